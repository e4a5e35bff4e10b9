"""The one home of the bootstrap's resampling trick (used by :mod:`bonft.estimate` and :mod:`bonft.plan`), of the
rule for columns that have no interval, and of how a confidence level prints.

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


SPREAD_ULPS = 16  # values within this many float64 ulps of the column's largest magnitude count as equal


def zero_spread(values) -> np.ndarray:
    """``(P, K) -> (K,)`` bool: the columns whose P values are all equal (a bootstrap interval of width 0), up to
    rounding: within :data:`SPREAD_ULPS` ulps of the column's largest magnitude (per-prompt estimates of one
    value from pools of different sizes differ in their last bits: 0.55 and 0.5499999999999999)."""
    v = np.asarray(values, dtype=float)
    v = v[:, None] if v.ndim == 1 else v
    if not v.size:
        return np.ones(v.shape[1], dtype=bool)
    tol = SPREAD_ULPS * np.finfo(float).eps * np.abs(v).max(axis=0)
    return (np.abs(v - v[:1]) <= tol).all(axis=0)


def no_interval_columns(values, bounds) -> np.ndarray:
    """``(P, K) -> (K,)`` bool: the columns with no interval, those whose P values are all equal at a value that
    is neither bound of ``bounds`` (any value when ``bounds`` is None). A zero-spread column at a bound gets the
    exact interval of :func:`bonft.estimate.bootstrap_ci`; the one rule of summarize's table and the planner's."""
    v = np.asarray(values, dtype=float)
    v = v[:, None] if v.ndim == 1 else v
    flat = zero_spread(v)
    if bounds is not None:
        flat &= (v[0] != bounds[0]) & (v[0] != bounds[1])
    return flat


def confidence_label(confidence: float) -> str:
    """A confidence level as a percentage for a table: ``'95%'``, ``'99.99999%'`` for 0.9999999 (never rounded to
    ``'100%'``, which no interval is), float noise dropped (``100 * 0.07`` prints ``'7%'``)."""
    return f"{100 * float(confidence):.10g}%"
