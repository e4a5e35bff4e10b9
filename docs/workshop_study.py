"""The workshop study of docs/study_results.md: ``bonft demo --task workshop`` on seeds 0, 1 and 2
(fixed before any run), then the tables over seeds.

Reproduce (each seed is one demo; finished stages and sampled pools are reused)::

    for s in 0 1 2; do bonft demo --task workshop --seed $s --output runs/workshop/seed$s; done
    python docs/workshop_study.py runs/workshop      # writes runs/workshop/study.md

Statistics as in the refunds study: per seed, each policy's mean over the same held-out prompts;
over seeds, the mean with a Student-t interval and the paired per-seed differences from the warm
start and from REINFORCE with Student-t intervals (S - 1 degrees of freedom); each seed's own
bootstrap tables follow. Caution: the oracle runs model-written programs (docs/tasks.md,
docs/verifiers.md): run it in a disposable container or VM.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from bonft.trainer.demo import DemoConfig, demo_report
from bonft.trainer.demo.pipeline import training_verifier, verifier_caption
from bonft.trainer.demo.stats import LABELS, study_table

SEEDS = (0, 1, 2)  # fixed before any run of the study


def main(root: Path) -> str:
    configs = {s: DemoConfig.for_task("workshop", seed=s, run_dir=str(root / f"seed{s}")) for s in SEEDS}
    missing = [s for s, dc in configs.items() if not (Path(dc.run_dir) / "summary.json").is_file()]
    if missing:
        raise SystemExit(f"run the demo of seeds {missing} first: bonft demo --task workshop --seed S --output {root}/seedS")
    dc = configs[SEEDS[0]]
    names = ["warm_start", *dc.objectives]
    reports = {s: demo_report(d, Path(d.run_dir), names) for s, d in configs.items()}
    lines = ["| policy | training verifier | verifier's share of the RL step, per seed | mean |", "|---|---|---|---|"]
    for n in names[1:]:
        shares = [reports[s]["gradients"][n]["score_share"] for s in SEEDS]
        lines.append(f"| {LABELS.get(n, n)} | {training_verifier(n)} | {' / '.join(f'{v:.0%}' for v in shares)} | {np.mean(shares):.0%} |")
    text = [f"# The workshop study: seeds {', '.join(map(str, SEEDS))} x ({', '.join(names)})", "",
            f"{dc.task} task, {dc.heldout_prompts} held-out prompts x {dc.eval_samples} samples at T = {dc.eval_temperature:g} "
            f"per seed; RL: {dc.rl_steps} steps of {dc.prompts_per_step} prompts x {dc.n} samples, k = {dc.k}, "
            f"max_new_tokens {dc.max_new_tokens}, optimizer {dc.optimizer}, lr {dc.lr:g}, anchor_weight {dc.anchor_weight:g}, "
            f"clip_grad_norm {dc.clip_grad_norm:g}.", "",
            study_table({s: r["curves"] for s, r in reports.items()}, dc.eval_ks, confidence=dc.confidence,
                        caption=verifier_caption(dc, names)), "",
            "The training verifier's share of the RL step (time/score over time/step, summed over the steps)", "", *lines, ""]
    for s, r in reports.items():
        text += [f"## Seed {s}", "", r["text"], ""]
    out = "\n".join(text)
    (root / "study.md").write_text(out)
    return out


if __name__ == "__main__":
    print(main(Path(sys.argv[1] if len(sys.argv) > 1 else "runs/workshop")))
