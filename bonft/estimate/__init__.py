"""Unbiased best-of-k and pass@k from pools of scored samples, with confidence intervals.

For one prompt we hold a pool of ``n`` samples, each with a verifier ``score``
(higher is better) and a true ``reward``. Serving best-of-k draws ``k``
samples and keeps the one with the highest score; its reward is what the user
gets. The estimators here average that reward over *all* ``C(n, k)``
k-subsets of the pool (a U-statistic, hence unbiased for the best-of-k value
of the policy that produced the pool):

    bon@k = sum_i  C(i-1, k-1) / C(n, k) * r_(i)        (samples sorted ascending by score)

where ``r_(i)`` is the reward of the sample with the i-th smallest score. With
tied scores the verifier has no preference; we take the expectation under
uniform tie-breaking, which replaces each ``r_(i)`` by the mean reward of its
tied group (exact, no random draw). With ``scores = rewards`` this is the
oracle value (best true reward among k); with binary rewards it is pass@k of
Chen et al. 2021, ``1 - C(n-c, k) / C(n, k)``.

References: Chen et al. 2021 (pass@k estimator); Chow et al. 2024
"Inference-Aware Fine-Tuning for Best-of-N Sampling in LLMs" (best-of-N as the
served quantity); Walder & Karkhanis 2025 (U-statistic pass@k).

Cost: one sort per prompt (``O(n log n)``) plus ``O(n)`` per requested k, with
no Python loop over samples or prompts (ragged pools are grouped by size).
The weights come from :mod:`bonft._core.ustat` and pass@k from :mod:`bonft._core.passk`
(no log-gamma differences), so ``n = 10^5, k = 10^4`` stay finite and pass@k
is exact to ~1e-14 relative for any n in int64. Hyper-parameters (``k``,
``ks``, ...) are keyword-only.

Caution: best-of-k with a verifier measures what the verifier rewards. Compare
it to the oracle curve; a large gap means the verifier can be gamed (length,
format, keywords) and fine-tuning towards it would learn to game it.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from bonft.estimate.pools import _bon_matrix, _is_ragged_list, _n_min, _pool_pair, _pools, _ragged_bon
from bonft._core.bootstrap import resample_counts
from bonft._core.checks import (
    as_float_array,
    check_finite,
    check_fraction,
    check_int,
    check_ks,
    check_nonempty,
    is_tensor,
)
from bonft._core.passk import INT64_MAX, pass_at_k_counts

__all__ = [
    "bon_at_k",
    "pass_at_k",
    "bon_at_k_per_prompt",
    "oracle_at_k_per_prompt",
    "bootstrap_ci",
    "summarize",
    "default_ks",
    "CurveSummary",
]


# ----------------------------------------------------------------------------- public estimators


def bon_at_k(scores, rewards, *, k):
    r"""Unbiased best-of-k value of one prompt's pool.

    Shape: ``scores (n,), rewards (n,) -> float`` (``(K,)`` for a sequence of k).

    .. math:: \widehat{\mathrm{bon}@k} = \sum_{i=1}^{n} \frac{\binom{i-1}{k-1}}{\binom nk}\,\bar r_{(i)}

    samples sorted ascending by score, ``rbar`` the mean reward of the tied
    group (uniform tie-breaking). ``k``: int in [1, n], or a sequence of them.

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs"; pass@k special case: Chen et al. 2021.
    """
    s, r = _pool_pair(scores, rewards)
    ks, scalar = check_ks(k, len(s), name="k")
    out = _bon_matrix(s[None, :], r[None, :], ks)[0]  # (1, n) -> (1, K) -> (K,)
    return float(out[0]) if scalar else out


def bon_at_k_per_prompt(scores, rewards, *, ks):
    r"""Best-of-k value of every prompt.

    Shape: ``scores (P, n), rewards (P, n) -> (P, K)`` (``(P,)`` when ``ks`` is an int).

    .. math:: V_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk}\,\bar r_{p,(i)}

    ``scores``/``rewards`` are 2-D arrays (every prompt has ``n`` samples) or
    two lists of 1-D arrays (ragged pools; each k must fit the smallest pool).
    Same estimator as :func:`bon_at_k`, per prompt, with no loop over prompts.

    References: Chow et al. 2024; Chen et al. 2021.
    """
    s, r = _pools(scores, rewards)
    ks_arr, scalar = check_ks(ks, _n_min(s), name="ks")
    out = _ragged_bon(s, r, ks_arr) if isinstance(s, list) else _bon_matrix(s, r, ks_arr)
    return out[:, 0] if scalar else out


def oracle_at_k_per_prompt(rewards, *, ks):
    r"""Best true reward among k, averaged over k-subsets.

    Shape: ``rewards (P, n) -> (P, K)`` (``(P,)`` when ``ks`` is an int).

    .. math:: O_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk}\, r_{p,(i)} \quad\text{(sorted by reward)}

    Equals :func:`bon_at_k_per_prompt` with ``scores = rewards``; for binary
    rewards it is pass@k, the ceiling any verifier can reach.

    References: Chen et al. 2021, "Evaluating Large Language Models Trained on Code".
    """
    if _is_ragged_list(rewards):
        return bon_at_k_per_prompt(rewards, rewards, ks=ks)
    r = as_float_array("rewards", rewards, ndim=2)
    return bon_at_k_per_prompt(r, r, ks=ks)


def _int_array(name: str, x: Any) -> np.ndarray:
    """Ints (numpy, torch, Python, object arrays) -> int64; values beyond int64 are refused, not wrapped."""
    if is_tensor(x):
        x = x.detach().cpu().numpy()
    arr = np.asarray(x) if not isinstance(x, int) or abs(x) <= INT64_MAX else np.asarray(x, dtype=object)
    if arr.dtype == bool or not (np.issubdtype(arr.dtype, np.integer) or arr.dtype == object):
        raise TypeError(f"{name} must hold ints, got dtype {arr.dtype}")
    if arr.dtype == object:
        for v in arr.ravel():
            check_int(name, v)
        big = [int(v) for v in arr.ravel() if abs(int(v)) > INT64_MAX]
        if big:
            raise ValueError(f"{name} must fit in int64 (|{name}| <= 2**63 - 1), got {name}={big[0]}")
        return arr.astype(np.int64, copy=False)
    if arr.dtype == np.uint64 and arr.size and int(arr.max()) > INT64_MAX:
        raise ValueError(f"{name} must fit in int64 (|{name}| <= 2**63 - 1), got {name}={int(arr.max())}")
    return arr.astype(np.int64, copy=False)


def pass_at_k(n, c, *, k):
    r"""Unbiased pass@k from ``c`` correct among ``n`` samples, broadcast elementwise.

    Shape: ``n, c, k`` ints or broadcastable int arrays ``-> float`` (all
    scalars) or an array of the broadcast shape; ``0 <= c <= n``, ``1 <= k <= n``.

    .. math:: \mathrm{pass@}k = 1 - \binom{n-c}{k} \Big/ \binom nk

    Exact to ~1e-14 relative for any n that fits in int64 (the ratio through
    :func:`bonft._core.passk.log_miss`, no log-gamma differences: checked against
    ``fractions`` up to n = 10^18); larger Python ints raise ``ValueError``.

    References: Chen et al. 2021, "Evaluating Large Language Models Trained on Code".
    """
    scalar = all(np.ndim(v) == 0 for v in (n, c, k))
    n_, c_, k_ = (_int_array(nm, v) for nm, v in (("n", n), ("c", c), ("k", k)))
    k_range = (int(k_.min()), int(k_.max())) if k_.size else (1, 1)  # before broadcasting: k is often one int
    try:
        n_, c_, k_ = np.broadcast_arrays(n_, c_, k_)
    except ValueError:
        raise ValueError(
            f"n, c and k must broadcast together, got shapes {np.shape(n)}, {np.shape(c)}, {np.shape(k)}"
        ) from None
    if n_.ndim != 1 or _any_out_of_range(n_, c_, k_, k_range):  # 1-D: a block scan first, the message if needed
        for name, bad, what in (
            ("c", c_ < 0, "c must be >= 0"),
            ("c", c_ > n_, "c must be <= n"),
            ("k", k_ < 1, "k must be >= 1"),
            ("k", k_ > n_, "k must be <= n"),
        ):
            if bad.any():
                i = tuple(int(j) for j in np.argwhere(bad)[0]) if bad.ndim else ()
                raise ValueError(f"{what} (n={int(n_[i])}), got {name}={int((c_ if name == 'c' else k_)[i])}")
    out = _pass_at_k_shared(n_, c_, k_, k_range) if n_.size > 4096 else pass_at_k_counts(n_, c_, k_)
    return float(out) if scalar else np.asarray(out, dtype=np.float64)


# Long vectors are scanned in blocks of this many elements: temporaries of a block stay in the
# allocator's reused memory, while full-length ones are fresh pages (on the development machine a
# page fault per 4 kB cost as much as the arithmetic; benchmarks/bench_estimate.py).
_BLOCK = 1 << 15


def _any_out_of_range(n: np.ndarray, c: np.ndarray, k: np.ndarray, k_range: tuple[int, int]) -> bool:
    """Whether any element of the 1-D arrays breaks ``0 <= c <= n`` or ``1 <= k <= n`` (k in ``k_range``)."""
    if k_range[0] < 1:
        return True
    one_k = k_range[0] == k_range[1]
    for s in range(0, n.size, _BLOCK):
        nb, cb = n[s:s + _BLOCK], c[s:s + _BLOCK]
        if cb.min() < 0 or (cb > nb).any():
            return True
        if (k_range[1] > nb.min()) if one_k else (k[s:s + _BLOCK] > nb).any():
            return True
    return False


def _pass_at_k_shared(n: np.ndarray, c: np.ndarray, k: np.ndarray, k_range: tuple[int, int]) -> np.ndarray:
    """Large arrays: evaluate each distinct (n, c, k) once (pools of one size share at most n+1 values)."""
    n_hi, (k_lo, k_hi) = int(n.max()), k_range
    if k_lo == k_hi and n_hi < 4 * n.size:  # one k, small pools: a table over (pool size, c)
        sizes = np.flatnonzero(np.bincount(n.ravel(), minlength=n_hi + 1))  # distinct pool sizes
        if len(sizes) <= 64:
            W = n_hi + 1  # table row width: c in 0..n_hi
            offset = np.zeros(W, dtype=np.int64)
            offset[sizes] = np.arange(len(sizes)) * W  # pool size -> start of its row in the flat table
            cs = np.arange(W)
            table = pass_at_k_counts(sizes[:, None], np.minimum(cs[None, :], sizes[:, None]), k_hi).ravel()  # (S*W,)
            if n.ndim != 1:
                return table.take(offset.take(n) + c)
            out = np.empty(n.size)
            for s in range(0, n.size, _BLOCK):  # out[i] = table[offset[n[i]] + c[i]], a block at a time
                i = offset.take(n[s:s + _BLOCK], mode="clip")  # valid indices: "clip" skips the bounds buffer
                i += c[s:s + _BLOCK]
                table.take(i, out=out[s:s + _BLOCK], mode="clip")
            return out
    span = (int(n_hi) + 1) * (int(n_hi) + 1) * (int(k_hi) + 1)
    if span >= 2**62:  # no int64 key: every element on its own
        return pass_at_k_counts(n, c, k)
    key = (n * (n_hi + 1) + c) * (k_hi + 1) + k
    uniq, inv = np.unique(key, return_inverse=True)
    if len(uniq) > n.size // 4:
        return pass_at_k_counts(n, c, k)
    kk = uniq % (k_hi + 1)
    cc = (uniq // (k_hi + 1)) % (n_hi + 1)
    return pass_at_k_counts(uniq // ((k_hi + 1) * (n_hi + 1)), cc, kk).take(inv).reshape(n.shape)


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
    n_boot = check_int("n_boot", n_boot, min=1)
    seed = check_int("seed", seed, min=0)
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


def default_ks(n_min: int) -> list[int]:
    r"""1, 2, 4, ... up to ``n_min``, plus ``n_min`` itself when it is not a power of 2.

    Shape: ``int -> list of K ints``.

    .. math:: \{2^j : 2^j \le n_{min}\} \cup \{n_{min}\}

    References: common practice (pass@k curves are read on a log-k axis, Chen et al. 2021).
    """
    n_min = check_int("n_min", n_min, min=1)
    ks = [1 << j for j in range(n_min.bit_length()) if (1 << j) <= n_min]
    if ks[-1] != n_min:
        ks.append(n_min)
    return ks


# Fewest prompts for which CurveSummary prints bootstrap intervals. The percentile bootstrap is a large-sample
# method: with P prompts a replicate can take only C(2P-1, P) distinct values (3 for P=2, 92378 for P=10), and
# with one prompt every replicate equals the data, a zero-width interval. 10 is common practice, not a theorem.
MIN_BOOT_PROMPTS = 10


@dataclass
class CurveSummary:
    """Best-of-k (verifier-selected) and oracle curves over prompts, with bootstrap intervals.

    ks: (K,) subset sizes; n_prompts: P; n_min: smallest pool size.
    bon_*: verifier-selected best-of-k mean / lower / upper (K,);
    oracle_*: best true reward among k (pass@k for binary rewards) (K,).
    per_prompt_bon, per_prompt_oracle: (P, K).
    """

    ks: np.ndarray
    n_prompts: int
    n_min: int
    bon_mean: np.ndarray
    bon_lo: np.ndarray
    bon_hi: np.ndarray
    oracle_mean: np.ndarray
    oracle_lo: np.ndarray
    oracle_hi: np.ndarray
    per_prompt_bon: np.ndarray = field(repr=False)
    per_prompt_oracle: np.ndarray = field(repr=False)
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
        head = f"{'k':>6}  {'best-of-k':>9}  {pct + ' CI':>17}  {'oracle':>7}  {pct + ' CI':>17}  {'gap':>7}"
        lines = [f"prompts: {self.n_prompts}   smallest pool: {self.n_min}", head]
        ok = self.intervals_valid

        def ci(lo: float, hi: float) -> str:
            return f"[{lo:.4f}, {hi:.4f}]" if ok else f"{'n/a':^16}"

        for j, k in enumerate(self.ks):
            b, o = self.bon_mean[j], self.oracle_mean[j]
            lines.append(
                f"{int(k):>6}  {b:>9.4f}  {ci(self.bon_lo[j], self.bon_hi[j])}"
                f"  {o:>7.4f}  {ci(self.oracle_lo[j], self.oracle_hi[j])}  {o - b:>7.4f}"
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
            "n_min": int(self.n_min),
            "confidence": float(self.confidence),
            "n_boot": int(self.n_boot),
            "seed": int(self.seed),
            "intervals_valid": self.intervals_valid,
        }
        if not self.intervals_valid:
            d["intervals_note"] = (f"{self.n_prompts} prompt(s): a bootstrap over prompts needs at least "
                                   f"{MIN_BOOT_PROMPTS}; the *_lo/*_hi values are not confidence intervals")
        for name in ("bon_mean", "bon_lo", "bon_hi", "oracle_mean", "oracle_lo", "oracle_hi"):
            d[name] = [float(x) for x in getattr(self, name)]
        d["per_prompt_bon"] = np.asarray(self.per_prompt_bon, dtype=float).tolist()
        d["per_prompt_oracle"] = np.asarray(self.per_prompt_oracle, dtype=float).tolist()
        json.dumps(d, allow_nan=False)  # refuses NaN instead of writing it
        return d


def summarize(scores, rewards, *, ks=None, confidence: float = 0.95, n_boot: int = 2000,
              seed: int = 0) -> CurveSummary:
    r"""Per-prompt best-of-k and oracle curves plus bootstrap CIs over prompts.

    Shape: ``scores, rewards (P, n)`` arrays or lists of 1-D arrays (ragged)
    ``-> CurveSummary`` with ``(K,)`` curves and ``(P, K)`` per-prompt values.

    .. math:: \mathrm{bon}_k = \frac1P\sum_p V_{pk}(s, r),\qquad \mathrm{oracle}_k = \frac1P\sum_p V_{pk}(r, r)

    ``ks``: int, sequence, or None for :func:`default_ks` of the smallest pool.

    References: Chow et al. 2024 (best-of-k); Chen et al. 2021 (pass@k);
    Efron & Tibshirani 1993 (percentile bootstrap).
    """
    s, r = _pools(scores, rewards)
    n_min = _n_min(s)
    ks_arr, _ = check_ks(default_ks(n_min) if ks is None else ks, n_min, name="ks")
    if isinstance(s, list):
        bon, orc = _ragged_bon(s, r, ks_arr), _ragged_bon(r, r, ks_arr)
    else:
        bon, orc = _bon_matrix(s, r, ks_arr), _bon_matrix(r, r, ks_arr)
    bm, bl, bh = bootstrap_ci(bon, confidence=confidence, n_boot=n_boot, seed=seed)
    om, ol, oh = bootstrap_ci(orc, confidence=confidence, n_boot=n_boot, seed=seed)
    return CurveSummary(
        ks=ks_arr, n_prompts=len(s), n_min=n_min,
        bon_mean=bm, bon_lo=bl, bon_hi=bh, oracle_mean=om, oracle_lo=ol, oracle_hi=oh,
        per_prompt_bon=bon, per_prompt_oracle=orc, confidence=confidence, n_boot=n_boot, seed=seed,
    )
