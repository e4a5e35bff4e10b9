"""The study of docs/study_results.md, the same as ``bonft demo --study --output OUT_DIR [OPTIONS]``.

Every objective (leave-one-out REINFORCE; pass@k with unbiased, plug-in and positive-only credit;
best-of-k ranked by the proxy verifier; k annealing; plain SFT and BoN-SFT at k = 4, 8, 16) at its own
best admissible learning rate from a grid fixed in advance, chosen on a validation split where the
objective's placebo stays within noise of the warm start; then compared on held-out prompts over main
seeds 0-4 and, apart, replication seeds 5-7. Writes OUT_DIR/study.md (every table docs/study_results.md
quotes), study.json and frontier.png, with the machine, the commit and the wall time. Slow: hours on
2 CPU cores (docs/study_results.md gives the estimate); a rerun reuses finished stages.

    python recipes/study.py [OUT_DIR] [OPTIONS of bonft demo --study, e.g. --grid-only]
"""
import sys

from bonft.cli import main

if __name__ == "__main__":
    args = sys.argv[1:]
    out = args.pop(0) if args and not args[0].startswith("-") else "runs/study"
    sys.exit(main(["demo", "--study", "--output", out, *args]))
