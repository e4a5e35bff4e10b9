"""The study: 5 fixed seeds x (warm start, leave-one-out REINFORCE, pass@k, best-of-k with the proxy
verifier, k annealing, the placebo), each seed from its own warm start.

Writes runs/study/study.md: means over seeds with 95% t-intervals, paired per-seed differences from
the warm start and from REINFORCE, per-seed values, and each seed's tables (bootstrap intervals over
prompts, gradient signal-to-noise, the planner's best temperature per k). Slow (about an hour on
2 CPU cores); the same as `bonft demo --study --output runs/study`. Results: docs/study_results.md.

    python recipes/study.py [OUT_DIR]
"""
import sys

from bonft.trainer.demo import STUDY_SEEDS, DemoConfig, run_study

if __name__ == "__main__":
    run_study(DemoConfig(run_dir=sys.argv[1] if len(sys.argv) > 1 else "runs/study"), seeds=STUDY_SEEDS)
