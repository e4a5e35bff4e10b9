"""Trainer speed: samples/s of the RL step and its split, and the batched sampler vs a one-at-a-time loop.

The step runs as the trainer runs it (``bonft.trainer.loop._one_step``: lr, the RL step, finite
check, clipping, optimizer step); its split comes from the trainer's own timing metrics
(``time/sample``, ``time/score``, ``time/forward``, ``time/credit``, ``time/backward``,
``time/optimizer`` of ``time/step``). ``--snr`` also measures the gradient SNR every step.

Ratios are against baselines run in the same process (no absolute goals):
the batched sampler (all prompts x n samples in one decoding loop with a KV
cache) should be >= 10x faster than drawing one sequence at a time.

    python benchmarks/bench_train.py [--threads 2]
"""
import argparse
import time

import torch

from bonft.generation.sampling import sample
from bonft.trainer.config import from_dict
from bonft.trainer.loop import _one_step
from bonft.trainer.run import build_run, make_optimizer


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--steps", type=int, default=5)
    ap.add_argument("--prompts", type=int, default=16)
    ap.add_argument("--n", type=int, default=16)
    ap.add_argument("--snr", action="store_true", help="measure the gradient SNR every step (snr_every = 1)")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    # the demo's RL step: 16 prompts x 16 samples, the default 0.4 M-parameter tiny GPT-2
    cfg = from_dict(dict(rl_steps=args.steps + 1, prompts_per_step=args.prompts, n=args.n, k=min(8, args.n),
                         objective="pass_at_k", train_prompts=256, heldout_prompts=16, run_dir="/tmp/bench_train",
                         snr_every=int(args.snr)))
    run = build_run(cfg)
    run.optimizer = make_optimizer(run, "rl")
    _one_step(run, "rl", 0)  # warm-up
    tot: dict = {}
    for s in range(1, args.steps + 1):
        rec = _one_step(run, "rl", s)
        for key, v in rec.items():
            if key.startswith("time/"):
                tot[key[5:]] = tot.get(key[5:], 0.0) + v
    per = tot.pop("step") / args.steps
    print(f"RL step ({cfg.prompts_per_step} prompts x {cfg.n} samples): {per:.3f} s/step, "
          f"{cfg.prompts_per_step * cfg.n / per:.0f} samples/s ({args.threads} threads)")
    for key, v in tot.items():
        print(f"  {key:10s} {v / args.steps:.4f} s  ({100 * v / args.steps / per:.1f}%)")

    prompts = [e.prompt for e in run.train[:8]]
    n = 16
    t0 = time.perf_counter()
    sample(run.model, run.tokenizer, prompts, n=n, max_new_tokens=cfg.max_new_tokens, seed=0)
    batched = time.perf_counter() - t0
    t0 = time.perf_counter()
    for i, p in enumerate(prompts):
        for j in range(n):
            sample(run.model, run.tokenizer, [p], n=1, max_new_tokens=cfg.max_new_tokens, seed=i * n + j)
    single = time.perf_counter() - t0
    print(f"sampler, {len(prompts)} prompts x {n}: batched {batched:.3f} s, one at a time {single:.3f} s, "
          f"speed-up {single / batched:.1f}x (goal >= 10x)")


if __name__ == "__main__":
    main()
