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
from dataclasses import dataclass, field

import numpy as np

from bonft._core.bootstrap import resample_counts
from bonft._core.checks import (
    as_float_array,
    check_finite,
    check_fraction,
    check_int,
    check_ks,
    check_n_boot,
    check_nonempty,
    check_seed,
)
from bonft.estimate.bestofk import _best_of_k_matrix, _pools, _ragged_best_of_k, _smallest_pool

__all__ = ["bootstrap_ci", "default_ks", "CurveSummary", "summarize", "MIN_BOOT_PROMPTS"]


def bootstrap_ci(values, *, confidence: float = 0.95, n_boot: int = 2000, seed: int = 0):
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

    References: Efron & Tibshirani 1993, "An Introduction to the Bootstrap".
    """
    v = as_float_array("values", values, ndim=(1, 2))
    check_nonempty("values", v)
    check_finite("values", v)
    confidence = check_fraction("confidence", confidence, open_low=True, open_high=True)
    n_boot = check_n_boot(n_boot)
    seed = check_seed(seed)
    one_d = v.ndim == 1
    V = v[:, None] if one_d else v  # (P,) -> (P, 1)
    P = V.shape[0]
    rng = np.random.default_rng(seed)
    means = np.empty((n_boot, V.shape[1]))
    chunk = max(1, min(n_boot, 4_000_000 // P))
    for b0 in range(0, n_boot, chunk):
        b = min(chunk, n_boot - b0)
        means[b0 : b0 + b] = resample_counts(rng, P, b) @ V / P  # (b, P) counts: one matmul per chunk
    alpha = (1.0 - confidence) / 2.0
    lo, hi = np.quantile(means, [alpha, 1.0 - alpha], axis=0)
    mean = V.mean(axis=0)
    # a replicate mean cannot stray outside the data range, but keep lo <= mean <= hi exact
    lo, hi = np.minimum(lo, mean), np.maximum(hi, mean)
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

    @property
    def intervals_valid(self) -> bool:
        """False below ``MIN_BOOT_PROMPTS`` prompts: a bootstrap over so few prompts gives no honest interval."""
        return self.n_prompts >= MIN_BOOT_PROMPTS

    def table(self) -> str:
        """A fixed-width text table: one row per k; intervals print as ``n/a`` below ``MIN_BOOT_PROMPTS`` prompts."""
        pct = f"{100 * self.confidence:g}%"
        head = f"{'k':>6}  {'best-of-k':>9}  {pct + ' CI':>17}  {'pass@k':>7}  {pct + ' CI':>17}  {'gap':>7}"
        lines = [f"prompts: {self.n_prompts}   smallest pool: {self.smallest_pool}", head]
        ok = self.intervals_valid

        def ci(lo: float, hi: float) -> str:
            return f"[{lo:.4f}, {hi:.4f}]" if ok else f"{'n/a':^16}"

        for j, k in enumerate(self.ks):
            b, o = self.best_of_k_mean[j], self.pass_at_k_mean[j]
            lines.append(
                f"{int(k):>6}  {b:>9.4f}  {ci(self.best_of_k_lo[j], self.best_of_k_hi[j])}"
                f"  {o:>7.4f}  {ci(self.pass_at_k_lo[j], self.pass_at_k_hi[j])}  {o - b:>7.4f}"
            )
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
        }
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

    References: Chow et al. 2024 (best-of-k); Chen et al. 2021 (pass@k);
    Efron & Tibshirani 1993 (percentile bootstrap).
    """
    check_n_boot(n_boot), check_seed(seed)  # before the per-prompt values are computed
    s, r = _pools(scores, rewards)
    smallest = _smallest_pool(s)
    ks_arr, _ = check_ks(default_ks(smallest) if ks is None else ks, smallest, name="ks")
    if isinstance(s, list):
        best, top = _ragged_best_of_k(s, r, ks_arr), _ragged_best_of_k(r, r, ks_arr)
    else:
        best, top = _best_of_k_matrix(s, r, ks_arr), _best_of_k_matrix(r, r, ks_arr)
    bm, bl, bh = bootstrap_ci(best, confidence=confidence, n_boot=n_boot, seed=seed)
    pm, pl, ph = bootstrap_ci(top, confidence=confidence, n_boot=n_boot, seed=seed)
    return CurveSummary(
        ks=ks_arr, n_prompts=len(s), smallest_pool=smallest,
        best_of_k_mean=bm, best_of_k_lo=bl, best_of_k_hi=bh, pass_at_k_mean=pm, pass_at_k_lo=pl, pass_at_k_hi=ph,
        per_prompt_best_of_k=best, per_prompt_pass_at_k=top, confidence=confidence, n_boot=n_boot, seed=seed,
    )
