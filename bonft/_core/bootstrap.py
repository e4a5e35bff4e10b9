"""The one home of the bootstrap's resampling trick (used by :mod:`bonft.estimate` and :mod:`bonft.plan`).

Resampling P prompts with replacement b times is a count matrix ``W (b, P)``,
``W[j, i]`` = times prompt i is drawn in replicate j, so one matmul
``W @ X / P`` gives every replicate's mean of every column (percentile
bootstrap, Efron & Tibshirani 1993). The counts come from
``rng.integers(0, P, size=(b, P))`` and one ``bincount`` with row offsets.
"""
from __future__ import annotations

import numpy as np


def resample_counts(rng: np.random.Generator, P: int, b: int) -> np.ndarray:
    """``b`` resamples of ``P`` prompts -> float64 counts ``(b, P)``, each row summing to ``P``."""
    idx = rng.integers(0, P, size=(b, P))  # (b, P) drawn prompt indices
    flat = (idx + P * np.arange(b)[:, None]).ravel()  # offset row j by j*P to count per row
    return np.bincount(flat, minlength=b * P).reshape(b, P).astype(np.float64)
