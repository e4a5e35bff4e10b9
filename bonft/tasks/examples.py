"""The bundled example samples file, and the code that generates it.

Scenario (ours, simulated): a policy answers *ledger puzzles* ("these twelve
entries were posted in March; what is the closing balance?"). Each puzzle has
a hidden difficulty; the policy gets it right with a probability that depends
on the difficulty and on the sampling temperature (low temperature: more
consistent, so better at k = 1 but less diverse at large k). An imperfect
verifier scores each answer: it mostly rewards correct balances, but it is
noisy and also likes long, thorough-looking working, so a long wrong answer
can outscore a short right one. The true reward is 1 for the right balance.
The gap between the pass@k curve and best-of-k shows that verifier's cost;
fine-tuning against such a verifier would push answers to grow longer
(reward hacking), which is why both curves are reported.

Regenerate the file with ``python -m bonft.tasks.examples`` (deterministic).
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from bonft._core.checks import check_int
from bonft.io import write_samples

__all__ = ["EXAMPLE_SAMPLES", "example_samples_path", "ledger_rows"]

EXAMPLE_SAMPLES = Path(__file__).resolve().parents[1] / "data" / "example_samples.jsonl"


def example_samples_path() -> str:
    """Path of the bundled ``example_samples.jsonl`` (200 ledger puzzles x 16 samples at each of 2 temperatures)."""
    return str(EXAMPLE_SAMPLES)


def ledger_rows(*, n_prompts: int = 200, n_samples: int = 16, temperatures=(0.6, 1.0), seed: int = 2026) -> list[dict]:
    """Simulated samples: ``n_prompts`` puzzles x ``len(temperatures)`` x ``n_samples`` rows.

    Per puzzle p: solve logit ``a_p ~ N(0.2, 1.6^2)``; at temperature T the
    success probability is ``sigmoid(a_p / T - 0.8 (T - 0.6))``. Answer length
    ``n_tokens`` ~ N(110, 20) if right, N(150, 45) if wrong (floored at 20).
    Verifier score = ``sigmoid(1.3 * right + 0.012 * (n_tokens - 120) + N(0, 0.8^2))``,
    rounded to 4 decimals (so a few scores tie, as real verifier scores do). ``sample`` is the row's index in
    its pool, so two draws that happen to agree in every field are not read as a repeated row.
    """
    n_prompts = check_int("n_prompts", n_prompts, min=1)
    n_samples = check_int("n_samples", n_samples, min=1)
    seed = check_int("seed", seed, min=0)
    rng = np.random.default_rng(seed)
    logit0 = rng.normal(0.2, 1.6, size=n_prompts)
    rows = []
    for T in temperatures:
        T = float(T)
        p = 1.0 / (1.0 + np.exp(-(logit0 / T - 0.8 * (T - 0.6))))  # (P,) success probability
        right = rng.random((n_prompts, n_samples)) < p[:, None]  # (P, n)
        length = np.where(right, rng.normal(110, 20, right.shape), rng.normal(150, 45, right.shape))
        length = np.maximum(20, np.round(length)).astype(int)
        z = 1.3 * right + 0.012 * (length - 120) + rng.normal(0, 0.8, right.shape)
        score = np.round(1.0 / (1.0 + np.exp(-z)), 4)
        for i in range(n_prompts):
            for j in range(n_samples):
                rows.append({
                    "prompt_id": f"ledger-{i:03d}",
                    "temperature": T,
                    "score": float(score[i, j]),
                    "reward": int(right[i, j]),
                    "n_tokens": int(length[i, j]),
                    "sample": j,  # its index in the pool: equal rows of one pool are distinct draws, not repeats
                })
    return rows


def main() -> int:
    os.makedirs(EXAMPLE_SAMPLES.parent, exist_ok=True)
    n = write_samples(EXAMPLE_SAMPLES, ledger_rows())
    print(f"wrote {n} rows to {EXAMPLE_SAMPLES} ({EXAMPLE_SAMPLES.stat().st_size / 1e3:.0f} kB)")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
