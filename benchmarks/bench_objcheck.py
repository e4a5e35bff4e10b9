"""Cost of check_objective, as ratios against baselines run in the same process, on one core.

1. The exact categorical check, V = 4 outcomes, n = 6 (4,096 ordered pools, 84 multisets), one policy,
   k = 3, for a built-in credit and for a user payoff, against a plain enumeration loop: one credit call
   on all 4,096 ordered pools and their probability-weighted gradient (what tests/test_credit.py does).
2. The enumerated transformer check (vocabulary 4, 3 response tokens: 64 responses, n = 6, 3 directions,
   400 Monte Carlo pools; the model is built inside) against one forward pass of the same model over the
   64 responses.
Goal: each check finishes in seconds on one core.

Run: python benchmarks/bench_objcheck.py [--quick]
"""
from __future__ import annotations

import argparse
import itertools

import numpy as np
import torch
from _timing import min_time

from bonft.objcheck import builtin, check_objective
from bonft.objcheck.enumeration import resolve_target
from bonft.objcheck.transformer import transformer_check
from bonft.trainer.models import build_tiny_model


def enumeration_loop(V=4, n=6, k=3, seed=0):
    """Baseline: every ordered n-tuple, one credit call, sum_pools P sum_i w_i (e_y - p)."""
    rng = np.random.default_rng(seed)
    theta, s, r = rng.normal(size=V), rng.integers(0, 3, V).astype(float), rng.normal(size=V)
    p = np.exp(theta) / np.exp(theta).sum()
    Y = np.array(list(itertools.product(range(V), repeat=n)))
    w = builtin.best_of_k(s[Y], r[Y], k=k)
    return np.einsum("m,mi,miv->v", p[Y].prod(-1), w, np.eye(V)[Y] - p)


def kept_reward(S, R):
    top = S == S.max(-1, keepdims=True)
    return (R * top).sum(-1) / top.sum(-1)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer repeats")
    args = ap.parse_args()
    torch.set_num_threads(1)
    reps = 2 if args.quick else 5

    base = min_time(enumeration_loop, reps, warmup=True)
    cat = {
        "best_of_k, best_of_k": lambda: check_objective(builtin.best_of_k, target="best_of_k", k=3, n=6, policies=1,
                                                     transformer=False),
        "best_of_k, user payoff": lambda: check_objective(builtin.best_of_k, target=kept_reward, k=3, n=6, policies=1,
                                                       transformer=False),
        "pass_at_k_plugin": lambda: check_objective(builtin.pass_at_k_plugin, target="pass_at_k", k=3, n=6,
                                                    policies=1, transformer=False),
    }
    print("1. exact categorical check, V=4, n=6 (4,096 ordered pools), one policy, k=3, one core")
    print(f"   baseline: enumeration loop over 4,096 ordered pools  {base * 1e3:8.1f} ms")
    for name, fn in cat.items():
        t = min_time(fn, reps, warmup=True)
        print(f"   check_objective ({name:<20})  {t * 1e3:8.1f} ms  = {t / base:5.2f}x the loop")

    model = build_tiny_model("gpt2", vocab_size=4, layers=1, width=16, heads=2, max_positions=4, seed=0).double()
    resp = torch.tensor(list(itertools.product(range(4), repeat=3)))
    ids = torch.cat([torch.zeros(64, 1, dtype=torch.long), resp], 1)

    def forward():
        with torch.no_grad():
            model(ids)

    fwd = min_time(forward, 20, warmup=True)
    t = resolve_target("best_of_k")
    lm = min_time(lambda: transformer_check(builtin.best_of_k, t, 3, 6, ordered=False, seed=0, tolerance=1e-6), reps, warmup=True)
    whole = min_time(lambda: check_objective(builtin.best_of_k, target="best_of_k", k=3, n=6), max(1, reps // 2), warmup=True)
    print("2. enumerated transformer check, vocabulary 4, 3 response tokens (64 responses), n=6, one core")
    print(f"   baseline: one forward pass over the 64 responses     {fwd * 1e3:8.2f} ms")
    print(f"   transformer check (model built inside)               {lm:8.3f} s   = {lm / fwd:6.0f} forward passes")
    print(f"   whole check_objective (4 policies + transformer)     {whole:8.3f} s   = {whole / fwd:6.0f} forward passes")


if __name__ == "__main__":
    main()
