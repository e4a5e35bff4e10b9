"""Cost of the majority-vote estimators and credit against best-of-k, run in the same process.

1. Estimators for every k <= n: 1000 prompts x 256 samples, up to 64 distinct answers per prompt
   (Zipf-like answer frequencies, our own simulation): ``majority_vote_per_prompt`` (exact count DP)
   against ``best_of_k_per_prompt`` (sorted-pool closed form) on the same pools.
   Goal: seconds on one core.
2. Credit for B = 256 prompts, n = 64 samples, k = 8: ``majority_vote_credit`` against ``best_of_k_credit``.
   Goal: within 2x the best-of-k credit. For information, ``weighted_vote_credit``
   (sampled k-subsets, ``MAX_SUBSETS`` per pool) on the same pools.

Run: python benchmarks/bench_strategies.py [--quick]
Prints times, the ratios, and the machine's load (``os.getloadavg``) while it ran.
"""
from __future__ import annotations

import argparse
import os

import numpy as np
import torch
from _timing import min_time

from bonft.estimate import best_of_k_per_prompt
from bonft.objectives.credit import best_of_k_credit
from bonft.strategies.estimators import majority_vote_credit, majority_vote_per_prompt, weighted_vote_credit


def pools(P: int, n: int, max_answers: int, seed: int = 0):
    """(P, n) answer ids with Zipf-like frequencies (2..max_answers answers), scores, 0/1 rewards (answer 0 is right)."""
    rng = np.random.default_rng(seed)
    ans = np.empty((P, n), dtype=np.int64)
    for p in range(P):
        A = int(rng.integers(2, max_answers + 1))
        w = 1.0 / np.arange(1, A + 1) ** rng.uniform(0.5, 2.0)
        ans[p] = rng.choice(A, size=n, p=w / w.sum())
    scores = rng.random((P, n)) + 0.3 * (ans == 0)
    return ans, scores, (ans == 0).astype(np.float64)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="100 prompts instead of 1000 in part 1")
    args = ap.parse_args()
    torch.set_num_threads(1)
    P = 100 if args.quick else 1000
    ans, s, r = pools(P, 256, 64)
    ks = list(range(1, 257))
    t_vote = min_time(lambda: majority_vote_per_prompt(ans, r, ks=ks))
    t_bon = min_time(lambda: best_of_k_per_prompt(s, r, ks=ks), repeats=3)
    print(f"1. estimators, every k <= 256, {P} prompts x 256 samples, <= 64 answers/prompt "
          f"(mean {np.mean([len(np.unique(a)) for a in ans]):.1f}):")
    print(f"   majority vote (count DP) {t_vote:8.3f} s   best-of-k {t_bon:8.4f} s   ratio {t_vote / t_bon:8.1f}x")

    ans, s, r = pools(256, 64, 20, seed=1)
    rt, st = torch.as_tensor(r), torch.as_tensor(s)
    t_vc = min_time(lambda: majority_vote_credit(ans, r, k=8), repeats=2)
    t_bc = min_time(lambda: best_of_k_credit(st, rt, k=8), repeats=5)
    print("2. credit, B = 256, n = 64, k = 8 (<= 20 answers/prompt):")
    print(f"   majority vote {t_vc:8.4f} s   best-of-k {t_bc:8.5f} s   ratio {t_vc / t_bc:8.1f}x (goal <= 2x)")
    t_wc = min_time(lambda: weighted_vote_credit(ans, s, r, k=8))
    print(f"   weighted vote {t_wc:8.4f} s (sampled k-subsets)            ratio {t_wc / t_bc:8.1f}x")
    print(f"load average while running: {os.getloadavg()[0]:.2f} (2 cores shared)")


if __name__ == "__main__":
    main()
