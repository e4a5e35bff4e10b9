"""Gradient signal-to-noise ratio of each objective (and the placebo) at the demo's warm start (its current defaults).

Trains the demo's warm start once (or reuses it in RUN_DIR/warm_start), then runs the RL step
(``bonft.trainer.steps.rl_step`` with ``snr_every = 1``) on several batches *without updating
the weights* and prints ``grad_snr`` per batch, its median, the pure-noise level ``1/sqrt(B)``
the median gradient norm and the mean share of prompts whose credit is all zero (no signal).
See docs/training.md for the formula.

    python benchmarks/snr_at_start.py [--prompts 16] [--n 16] [--batches 7] [--run-dir /tmp/snr]
"""
import argparse
import time
from pathlib import Path

import torch

from bonft.trainer.checkpoint import latest_checkpoint
from bonft.trainer.demo import DemoConfig, stage_config
from bonft.trainer.loop import train
from bonft.trainer.measure import Stopwatch
from bonft.trainer.run import build_run
from bonft.trainer.steps import rl_step

CASES = [("reinforce", False), ("pass_at_k", False), ("best_of_k", False), ("pass_at_k", True)]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--prompts", type=int, default=16)
    ap.add_argument("--n", type=int, default=16)
    ap.add_argument("--batches", type=int, default=7)
    ap.add_argument("--run-dir", default="/tmp/snr")
    args = ap.parse_args()
    torch.set_num_threads(1)
    dc = DemoConfig(run_dir=args.run_dir)
    warm_dir = Path(args.run_dir) / "warm_start"
    if latest_checkpoint(warm_dir) is None:
        t0 = time.perf_counter()
        train(stage_config(dc, name="warm_start", run_dir=str(warm_dir), rl_steps=0, plots=False), progress=False)
        print(f"warm start: {time.perf_counter() - t0:.0f} s")
    warm = str(latest_checkpoint(warm_dir))
    B = args.prompts
    for objective, placebo in CASES:
        cfg = stage_config(dc, name="snr", run_dir=str(Path(args.run_dir) / "snr"), start_from=warm, warm_start_steps=0,
                    rl_steps=1000, objective=objective, k=1 if objective == "reinforce" else min(8, args.n),
                    prompts_per_step=B, n=args.n, snr_every=1, placebo=placebo,
                    verifier="proxy" if objective == "best_of_k" else "exact")
        run = build_run(cfg)
        snrs, norms, zero = [], [], []
        for b in range(args.batches):  # batches of steps 100, 101, ...: fresh prompts and samples, same weights
            run.module.zero_grad(set_to_none=True)
            rec = rl_step(run, 100 + b, Stopwatch())
            snrs.append(rec["grad/snr"])
            zero.append(1 - rec["pool/with_signal"] if "pool/with_signal" in rec else rec["pool/without_signal"])
            norms.append(float(torch.nn.utils.get_total_norm([p.grad for p in run.module.parameters() if p.grad is not None])))
        med = sorted(snrs)[len(snrs) // 2]
        print(f"{objective + (' placebo' if placebo else ''):22s} B={B} n={args.n}  grad_snr "
              + " ".join(f"{v:.3f}" for v in snrs) + f"  median {med:.3f}  1/sqrt(B) {B ** -0.5:.3f}"
              f"  signal share median^2-1/B {med ** 2 - 1 / B:+.4f}  grad_norm median {sorted(norms)[len(norms) // 2]:.2f}"
              f"  prompts without credit {sum(zero) / len(zero):.2f}")


if __name__ == "__main__":
    main()
