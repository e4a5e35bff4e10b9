r"""Curves over prompts with bootstrap intervals: :func:`summarize`, :class:`CurveSummary`, :func:`bootstrap_ci`.

:func:`summarize` estimates, for every prompt, the best-of-k value (the verifier
picks) and pass@k (the best true reward among k) with the U-statistics of
:mod:`bonft.estimate.bestofk`, and puts a percentile bootstrap interval over
prompts around their means.

References: Efron & Tibshirani 1993, "An Introduction to the Bootstrap"
(percentile interval); Chow et al. 2024 (best-of-k); Chen et al. 2021 (pass@k).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from bonft._core.bootstrap import confidence_label, no_interval_columns, resample_counts, zero_spread
from bonft._core.checks import (
    as_float_array,
    check_finite,
    check_fraction,
    check_int,
    check_n_boot,
    check_nonempty,
    check_pool_ks,
    check_real,
    check_seed,
)
from bonft.estimate.bestofk import _best_of_k_matrix, _pools, _ragged_best_of_k, _smallest_pool

__all__ = ["bootstrap_ci", "reward_bounds", "default_ks", "CurveSummary", "summarize", "MIN_BOOT_PROMPTS"]


def _check_bounds(bounds) -> tuple[float, float] | None:
    """None, or ``(lo, hi)`` two finite numbers with ``lo < hi``."""
    if bounds is None:
        return None
    if not isinstance(bounds, (tuple, list)) or len(bounds) != 2:
        raise TypeError(f"bounds must be None or a pair (lo, hi), got {type(bounds).__name__} {bounds!r}")
    lo, hi = check_real("bounds[0]", bounds[0]), check_real("bounds[1]", bounds[1])
    if not lo < hi:
        raise ValueError(f"bounds must be (lo, hi) with lo < hi, got bounds={tuple(bounds)!r}")
    return lo, hi


def _all_equal_bound(P: int, confidence: float) -> float:
    r"""Width, as a share of ``hi - lo``, of the exact interval for a mean whose P values all sit at one bound.

    .. math:: 1 - \big(\tfrac{1-c}{2}\big)^{1/P}

    For values in ``[lo, hi]`` with mean ``mu``, Markov's inequality gives ``P(X = lo) <= 1 - t`` with
    ``t = (mu - lo)/(hi - lo)``, so P values all at ``lo`` have chance at most ``(1 - t)^P``; solving
    ``(1 - t)^P = (1 - c)/2`` bounds ``t`` for ANY distribution on ``[lo, hi]``. It is the Clopper & Pearson
    1934 upper limit for 0 successes in P trials (0.168 for P = 20 at 95%; the "rule of three" ``3/P``
    approximates its one-sided 95% form).
    """
    return -math.expm1(math.log((1.0 - confidence) / 2.0) / P)


def reward_bounds(rewards) -> tuple[float, float] | None:
    r"""The ``bounds`` of :func:`bootstrap_ci` for best-of-k, pass@k or any strategy's value of these rewards.

    Shape: ``rewards`` an array, or a sequence of arrays (ragged pools) ``-> (0.0, 1.0)`` or None.

    .. math:: \min_i r_i \ge 0 \;\wedge\; \max_i r_i \le 1 \;\Rightarrow\; V_k \in [0, 1]

    Each such value is an average of rewards, so it lies in their range; when a reward lies outside
    [0, 1] the range is not known from the data and the answer is None.

    References: Clopper & Pearson 1934 (the interval these bounds enable in :func:`bootstrap_ci`).
    """
    rows = [rewards] if isinstance(rewards, np.ndarray) else list(rewards)
    flat = [np.ravel(np.asarray(x, dtype=np.float64)) for x in rows]
    return (0.0, 1.0) if all(x.size == 0 or (x.min() >= 0 and x.max() <= 1) for x in flat) else None


def bootstrap_ci(values, *, confidence: float = 0.95, n_boot: int = 2000, seed: int = 0, bounds=None):
    r"""Percentile bootstrap over prompts.

    Shape: ``values (P, K) -> (mean (K,), lo (K,), hi (K,))``; ``(P,)`` gives three floats.

    .. math:: \bar v^{*}_b = \frac1P \sum_p W_{bp} v_p,\quad
              [lo, hi] = \mathrm{quantile}_{(1\mp c)/2}\{\bar v^{*}_b\}

    Each of ``n_boot`` replicates resamples the P prompts with replacement and
    takes the column means; ``lo``/``hi`` are the ``(1 -+ confidence)/2``
    quantiles of those means (Efron & Tibshirani 1993, percentile interval).
    ``mean`` is the plain mean over prompts. A 1-D ``values (P,)`` gives scalars.
    Resampling is vectorised (counts matrix @ values, :mod:`bonft._core.bootstrap`), in
    chunks to bound memory.

    Zero spread. A column whose P values are all equal gives every replicate the same mean: the
    percentile interval has width 0 and covers nothing it does not already see (with P = 1 this is
    every column). ``bounds=(lo, hi)`` states that every value lies in ``[lo, hi]`` (pass@k and
    best-of-k of rewards in [0, 1]: ``(0, 1)``; values outside raise ``ValueError``): a column all at
    ``lo`` then gets the exact interval ``[lo, lo + (hi - lo) w]`` with ``w = 1 - ((1 - c)/2)^(1/P)``
    (valid for any distribution on ``[lo, hi]``; Clopper & Pearson 1934), a column all at ``hi`` the
    mirror image; every other column is the percentile interval. ``bounds=None`` (the range is
    unknown) leaves such columns at width 0 (:meth:`CurveSummary.no_interval` names them).

    References: Efron & Tibshirani 1993, "An Introduction to the Bootstrap"; Clopper & Pearson 1934,
    "The use of confidence or fiducial limits illustrated in the case of the binomial".
    """
    v = as_float_array("values", values, ndim=(1, 2))
    check_nonempty("values", v)
    check_finite("values", v)
    confidence = check_fraction("confidence", confidence, open_low=True, open_high=True)
    n_boot = check_n_boot(n_boot)
    seed = check_seed(seed)
    bounds = _check_bounds(bounds)
    if bounds is not None and ((v < bounds[0]) | (v > bounds[1])).any():
        bad = float(v[(v < bounds[0]) | (v > bounds[1])][0])
        raise ValueError(f"values must lie within bounds [{bounds[0]:g}, {bounds[1]:g}], got {bad!r}")
    one_d = v.ndim == 1
    V = v[:, None] if one_d else v  # (P,) -> (P, 1)
    P = V.shape[0]
    scale = 2.0**64 if float(np.abs(V).max()) > 2.0**1000 else 1.0  # near float64's edge the sums would overflow
    Vs = V / scale if scale != 1.0 else V  # a power of two: exact
    rng = np.random.default_rng(seed)
    means = np.empty((n_boot, V.shape[1]))
    chunk = max(1, min(n_boot, 4_000_000 // P))
    for b0 in range(0, n_boot, chunk):
        b = min(chunk, n_boot - b0)
        means[b0 : b0 + b] = resample_counts(rng, P, b) @ Vs / P  # (b, P) counts: one matmul per chunk
    alpha = (1.0 - confidence) / 2.0
    lo, hi = np.quantile(means, [alpha, 1.0 - alpha], axis=0) * scale
    mean = Vs.mean(axis=0) * scale
    # a replicate mean cannot stray outside the data range, but keep lo <= mean <= hi exact
    lo, hi = np.minimum(lo, mean), np.maximum(hi, mean)
    if bounds is not None:
        b_lo, b_hi = bounds
        flat = zero_spread(V)
        w = (b_hi - b_lo) * _all_equal_bound(P, confidence)
        at_lo, at_hi = flat & (mean == b_lo), flat & (mean == b_hi)
        hi = np.where(at_lo, b_lo + w, hi)
        lo = np.where(at_hi, b_hi - w, lo)
    if one_d:
        return float(mean[0]), float(lo[0]), float(hi[0])
    return mean, lo, hi


# ----------------------------------------------------------------------------- summary


def default_ks(smallest_pool: int) -> list[int]:
    r"""1, 2, 4, ... up to ``smallest_pool``, plus ``smallest_pool`` itself when it is not a power of 2.

    Shape: ``int -> list of K ints``.

    .. math:: \{2^j : 2^j \le n_{min}\} \cup \{n_{min}\}

    References: common practice (pass@k curves are read on a log-k axis, Chen et al. 2021).
    """
    n = check_int("smallest_pool", smallest_pool, min=1)
    ks = [1 << j for j in range(n.bit_length()) if (1 << j) <= n]
    if ks[-1] != n:
        ks.append(n)
    return ks


# Fewest prompts for which CurveSummary prints bootstrap intervals. The percentile bootstrap is a large-sample
# method: with P prompts a replicate can take only C(2P-1, P) distinct values (3 for P=2, 92378 for P=10), and
# with one prompt every replicate equals the data, a zero-width interval. 10 is common practice, not a theorem.
MIN_BOOT_PROMPTS = 10

_CURVES = ("best_of_k_mean", "best_of_k_lo", "best_of_k_hi", "pass_at_k_mean", "pass_at_k_lo", "pass_at_k_hi")


@dataclass
class CurveSummary:
    """Best-of-k (the verifier picks) and pass@k (the best true reward among k) over prompts, with intervals.

    ks: (K,) subset sizes; n_prompts: P; smallest_pool: the smallest pool size.
    best_of_k_mean / _lo / _hi: best-of-k mean and bootstrap interval (K,);
    pass_at_k_mean / _lo / _hi: the best true reward among k (pass@k for 0/1 rewards) (K,).
    per_prompt_best_of_k, per_prompt_pass_at_k: (P, K).
    bounds: ``(lo, hi)`` every per-prompt value lies in (``(0, 1)`` when every reward does), or None when
    unknown; a column whose P values are all equal has no bootstrap interval (width 0): at a known bound it
    gets the exact interval of :func:`bootstrap_ci`, otherwise :meth:`table` and :meth:`to_dict` say so.
    """

    ks: np.ndarray
    n_prompts: int
    smallest_pool: int
    best_of_k_mean: np.ndarray
    best_of_k_lo: np.ndarray
    best_of_k_hi: np.ndarray
    pass_at_k_mean: np.ndarray
    pass_at_k_lo: np.ndarray
    pass_at_k_hi: np.ndarray
    per_prompt_best_of_k: np.ndarray = field(repr=False)
    per_prompt_pass_at_k: np.ndarray = field(repr=False)
    confidence: float = 0.95
    n_boot: int = 2000
    seed: int = 0
    bounds: tuple[float, float] | None = None

    def no_interval(self, which: str) -> np.ndarray:
        """``which`` = ``"best_of_k"`` or ``"pass_at_k"`` -> (K,) bool: the columns whose values have zero spread
        over prompts and sit at no known bound, so that their ``_lo``/``_hi`` are the mean, not an interval."""
        return no_interval_columns(getattr(self, f"per_prompt_{which}"), self.bounds)

    def _zero_spread_note(self) -> str | None:
        cols = [f"{label} k={int(k)}" for which, label in (("best_of_k", "best-of-k"), ("pass_at_k", "pass@k"))
                for k, bad in zip(self.ks, self.no_interval(which)) if bad]
        if not cols or not self.intervals_valid:
            return None
        why = ("the value range is unknown" if self.bounds is None else
               f"the common value is at neither bound {self.bounds[0]:g} or {self.bounds[1]:g}")
        return (f"no interval for {', '.join(cols)}: every prompt has the same value, so every bootstrap replicate "
                f"does too, and {why} (see docs/estimate.md)")

    @property
    def intervals_valid(self) -> bool:
        """False below ``MIN_BOOT_PROMPTS`` prompts: a bootstrap over so few prompts gives no honest interval."""
        return self.n_prompts >= MIN_BOOT_PROMPTS

    def table(self) -> str:
        """A fixed-width text table: one row per k; intervals print as ``n/a`` below ``MIN_BOOT_PROMPTS`` prompts."""
        pct = confidence_label(self.confidence)
        head = f"{'k':>6}  {'best-of-k':>9}  {pct + ' CI':>17}  {'pass@k':>7}  {pct + ' CI':>17}  {'gap':>7}"
        lines = [f"prompts: {self.n_prompts}   smallest pool: {self.smallest_pool}", head]
        ok = self.intervals_valid
        flat_b, flat_o = self.no_interval("best_of_k"), self.no_interval("pass_at_k")

        def ci(lo: float, hi: float, flat: bool) -> str:
            if not ok:
                return f"{'n/a':^16}"
            return f"{'no spread':^16}" if flat else f"[{lo:.4f}, {hi:.4f}]"

        for j, k in enumerate(self.ks):
            b, o = self.best_of_k_mean[j], self.pass_at_k_mean[j]
            lines.append(
                f"{int(k):>6}  {b:>9.4f}  {ci(self.best_of_k_lo[j], self.best_of_k_hi[j], flat_b[j])}"
                f"  {o:>7.4f}  {ci(self.pass_at_k_lo[j], self.pass_at_k_hi[j], flat_o[j])}  {o - b:>7.4f}"
            )
        note = self._zero_spread_note()
        if note:
            lines.append(note)
        if not ok:
            lines.append(f"intervals n/a: {self.n_prompts} prompt(s); a bootstrap over prompts needs at least "
                         f"{MIN_BOOT_PROMPTS} (see docs/estimate.md)")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """JSON-able dict of the curves (per-prompt matrices as nested lists)."""
        d = {
            "ks": [int(k) for k in self.ks],
            "n_prompts": int(self.n_prompts),
            "smallest_pool": int(self.smallest_pool),
            "confidence": float(self.confidence),
            "n_boot": int(self.n_boot),
            "seed": int(self.seed),
            "intervals_valid": self.intervals_valid,
            "bounds": None if self.bounds is None else [float(b) for b in self.bounds],
            "best_of_k_no_interval": [bool(x) for x in self.no_interval("best_of_k")],
            "pass_at_k_no_interval": [bool(x) for x in self.no_interval("pass_at_k")],
        }
        note = self._zero_spread_note()
        if note:
            d["zero_spread_note"] = note + "; their *_lo/*_hi equal the mean and are not confidence intervals"
        if not self.intervals_valid:
            d["intervals_note"] = (f"{self.n_prompts} prompt(s): a bootstrap over prompts needs at least "
                                   f"{MIN_BOOT_PROMPTS}; the *_lo/*_hi values are not confidence intervals")
        for name in _CURVES:
            d[name] = [float(x) for x in getattr(self, name)]
        d["per_prompt_best_of_k"] = np.asarray(self.per_prompt_best_of_k, dtype=float).tolist()
        d["per_prompt_pass_at_k"] = np.asarray(self.per_prompt_pass_at_k, dtype=float).tolist()
        json.dumps(d, allow_nan=False)  # refuses NaN instead of writing it
        return d


def summarize(scores, rewards, *, ks=None, confidence: float = 0.95, n_boot: int = 2000,
              seed: int = 0) -> CurveSummary:
    r"""Per-prompt best-of-k and pass@k curves plus bootstrap CIs over prompts.

    Shape: ``scores, rewards (P, n)`` arrays or lists of 1-D arrays (ragged)
    ``-> CurveSummary`` with ``(K,)`` curves and ``(P, K)`` per-prompt values.

    .. math:: \mathrm{best\_of\_k}_k = \frac1P\sum_p V_{pk}(s, r),\qquad \mathrm{pass\_at\_k}_k = \frac1P\sum_p V_{pk}(r, r)

    ``ks``: int, sequence, or None for :func:`default_ks` of the smallest pool. Both curves use
    one bootstrap seed, so each replicate resamples the same prompts for both.

    When every reward lies in [0, 1], every per-prompt value does too (each is an average of rewards), and
    the intervals use ``bounds=(0, 1)`` (:func:`bootstrap_ci`): a column where every prompt scores 0 (or 1)
    gets the exact Clopper & Pearson 1934 interval instead of a zero-width one. The assumption is only that
    range; otherwise ``bounds`` is None and :meth:`CurveSummary.table` flags zero-spread columns.

    References: Chow et al. 2024 (best-of-k); Chen et al. 2021 (pass@k);
    Efron & Tibshirani 1993 (percentile bootstrap).
    """
    check_n_boot(n_boot), check_seed(seed)  # before the per-prompt values are computed
    s, r = _pools(scores, rewards)
    smallest = _smallest_pool(s)
    ks_arr, _ = check_pool_ks(default_ks(smallest) if ks is None else ks, s)
    if isinstance(s, list):
        best, top = _ragged_best_of_k(s, r, ks_arr), _ragged_best_of_k(r, r, ks_arr)
    else:
        best, top = _best_of_k_matrix(s, r, ks_arr), _best_of_k_matrix(r, r, ks_arr)
    bounds = reward_bounds(r)
    bm, bl, bh = bootstrap_ci(best, confidence=confidence, n_boot=n_boot, seed=seed, bounds=bounds)
    pm, pl, ph = bootstrap_ci(top, confidence=confidence, n_boot=n_boot, seed=seed, bounds=bounds)
    return CurveSummary(
        ks=ks_arr, n_prompts=len(s), smallest_pool=smallest,
        best_of_k_mean=bm, best_of_k_lo=bl, best_of_k_hi=bh, pass_at_k_mean=pm, pass_at_k_lo=pl, pass_at_k_hi=ph,
        per_prompt_best_of_k=best, per_prompt_pass_at_k=top, confidence=confidence, n_boot=n_boot, seed=seed,
        bounds=bounds,
    )
