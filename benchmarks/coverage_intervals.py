"""Coverage of the intervals of bonft.estimate near the boundary (a measurement, not a test; fixed seeds).

Each setting draws P prompts' pools of n = 8 samples from a population whose pass@k is known in closed form,
computes the per-prompt pass@k (Chen et al. 2021) and the interval of bonft.estimate.bootstrap_ci, and counts
how often the interval holds the true value over 1000 repeats (binomial sd of a share near 0.9: ~0.009).

* fixed p = 0.3 for every prompt: true pass@k = 1 - 0.7^k (pass@8 = 0.942, near the bound 1);
* p ~ Beta(1, 2) per prompt: true pass@k = 1 - B(1, 2 + k) / B(1, 2) = 1 - 2 / (k + 2) (the beta integral of (1 - p)^k);
* fixed p = 0.01: all-zero columns are common ((0.99^8)^20 = 0.20 at P = 20), with and without ``bounds=(0, 1)``.

Run: ``.venv/bin/python benchmarks/coverage_intervals.py`` (seconds). Its output is quoted in
docs/estimate.md.
"""
from __future__ import annotations

import numpy as np

from bonft.estimate import bootstrap_ci, pass_at_k_per_prompt

KS = [1, 4, 8]
N = 8
REPEATS = 1000
N_BOOT = 1000


def coverage(draw_p, true, P: int, *, seed: int, confidence: float = 0.95, bounds=None) -> np.ndarray:
    rng = np.random.default_rng(seed)
    hits = np.zeros(len(KS))
    for rep in range(REPEATS):
        p = draw_p(rng, P)
        X = (rng.random((P, N)) < p[:, None]).astype(float)
        v = pass_at_k_per_prompt(X, ks=KS)
        _, lo, hi = bootstrap_ci(v, confidence=confidence, n_boot=N_BOOT, seed=rep, bounds=bounds)
        hits += (lo <= true) & (true <= hi)
    return hits / REPEATS


def main() -> None:
    ks = np.array(KS, dtype=float)
    fixed = lambda q: (lambda rng, P: np.full(P, q))  # noqa: E731
    beta12 = lambda rng, P: rng.beta(1.0, 2.0, size=P)  # noqa: E731
    # each population without bounds (the plain percentile bootstrap) and with bounds=(0, 1), which summarize,
    # bonft estimate, compare and the trainer's tables use for rewards in [0, 1]
    settings = [
        ("p = 0.3 fixed", fixed(0.3), 1 - 0.7 ** ks, 30),
        ("p = 0.3 fixed", fixed(0.3), 1 - 0.7 ** ks, 100),
        ("p ~ Beta(1, 2)", beta12, 1 - 2 / (ks + 2), 40),
        ("p ~ Beta(1, 2)", beta12, 1 - 2 / (ks + 2), 12),
        ("p = 0.01 fixed", fixed(0.01), 1 - 0.99 ** ks, 20),
    ]
    rows = [(*row, bounds) for row in settings for bounds in (None, (0, 1))]
    print(f"95% intervals, n = {N}, {REPEATS} repeats, {N_BOOT} bootstrap replicates; coverage of pass@{KS}")
    for label, draw, true, P, bounds in rows:
        cov = coverage(draw, true, P, seed=7, bounds=bounds)
        print(f"{label:<15} P = {P:>3}  bounds = {str(bounds):<6}  true = {np.round(true, 3)}  coverage = {cov}",
              flush=True)


if __name__ == "__main__":
    main()
