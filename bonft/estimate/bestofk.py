r"""Unbiased best-of-k from pools of scored samples: the U-statistic estimators and the pool checks.

For one prompt we hold a pool of ``n`` samples, each with a verifier ``score``
(higher is better) and a true ``reward``. Serving best-of-k draws ``k``
samples and keeps the one with the highest score; its reward is what the user
gets. The estimators here average that reward over *all* ``C(n, k)``
k-subsets of the pool (a U-statistic, hence unbiased for the best-of-k value
of the policy that produced the pool):

    best_of_k = sum_i  C(i-1, k-1) / C(n, k) * r_(i)        (samples sorted ascending by score)

where ``r_(i)`` is the reward of the sample with the i-th smallest score. With
tied scores the verifier has no preference; we take the expectation under
uniform tie-breaking, which replaces each ``r_(i)`` by the mean reward of its
tied group (exact, no random draw). With ``scores = rewards`` this is the
best true reward among k (:func:`pass_at_k_per_prompt`); with binary rewards it
is pass@k of Chen et al. 2021, ``1 - C(n-c, k) / C(n, k)``.

Cost: one sort per prompt (``O(n log n)``, a sort of int64 keys instead of an
argsort) plus ``O(n)`` per requested k, with no Python loop over samples or
prompts (ragged pools are grouped by size). The weights come from
:mod:`bonft._core.ustat` (no log-gamma differences), so ``n = 10^5, k = 10^4``
stay finite.

References: Chen et al. 2021 (pass@k estimator); Chow et al. 2024
"Inference-Aware Fine-Tuning for Best-of-N Sampling in LLMs" (best-of-N as the
served quantity); Walder & Karkhanis 2025 (U-statistic pass@k); Hoeffding 1948
(U-statistics).

Caution: best-of-k with a verifier measures what the verifier rewards. Compare
it to the pass@k curve (best true reward among k); a large gap means the
verifier can be gamed (length, format, keywords) and fine-tuning towards it
would learn to game it.
"""
from __future__ import annotations

import numbers
from typing import Any

import numpy as np

from bonft._core.checks import (
    as_float_array,
    check_finite,
    check_ks,
    check_nonempty,
    check_pool_ks,
    check_same_shape,
    is_tensor,
)
from bonft._core.ties import first_of_group, tie_means
from bonft._core.ustat import weighted_ranks, within_pools

__all__ = ["best_of_k", "best_of_k_per_prompt", "pass_at_k_per_prompt"]


# ----------------------------------------------------------------------------- public estimators


def best_of_k(scores, rewards, *, k):
    r"""Unbiased best-of-k value of one prompt's pool.

    Shape: ``scores (n,), rewards (n,) -> float`` (``(K,)`` for a sequence of k).

    .. math:: \widehat{V}_k = \sum_{i=1}^{n} \frac{\binom{i-1}{k-1}}{\binom nk}\,\bar r_{(i)}

    samples sorted ascending by score, ``rbar`` the mean reward of the tied
    group (uniform tie-breaking). ``k``: int in [1, n], or a sequence of them.
    Integer scores must lie within +-2**53 (compared as float64; larger ones raise ``ValueError``).

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs"; pass@k special case: Chen et al. 2021.
    """
    s, r = _pool_pair(scores, rewards)
    ks, scalar = check_ks(k, len(s), name="k")
    out = _best_of_k_matrix(s[None, :], r[None, :], ks)[0]  # (1, n) -> (1, K) -> (K,)
    return float(out[0]) if scalar else out


def best_of_k_per_prompt(scores, rewards, *, ks):
    r"""Best-of-k value of every prompt.

    Shape: ``scores (P, n), rewards (P, n) -> (P, K)`` (``(P,)`` when ``ks`` is an int).

    .. math:: V_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk}\,\bar r_{p,(i)}

    ``scores``/``rewards`` are 2-D arrays (every prompt has ``n`` samples) or
    two lists of 1-D arrays (ragged pools; each k must fit the smallest pool).
    Same estimator as :func:`best_of_k`, per prompt, with no loop over prompts.

    References: Chow et al. 2024; Chen et al. 2021.
    """
    s, r = _pools(scores, rewards)
    ks_arr, scalar = check_pool_ks(ks, s)
    out = _ragged_best_of_k(s, r, ks_arr) if isinstance(s, list) else _best_of_k_matrix(s, r, ks_arr)
    return out[:, 0] if scalar else out


def pass_at_k_per_prompt(rewards, *, ks):
    r"""Best true reward among k, averaged over k-subsets.

    Shape: ``rewards (P, n) -> (P, K)`` (``(P,)`` when ``ks`` is an int).

    .. math:: V^{*}_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk}\, r_{p,(i)} \quad\text{(sorted by reward)}

    Equals :func:`best_of_k_per_prompt` with ``scores = rewards``; for binary
    rewards it is pass@k, the ceiling any verifier can reach.

    References: Chen et al. 2021, "Evaluating Large Language Models Trained on Code".
    """
    if _is_ragged_list(rewards):  # checked here, so that a bad pool is named rewards[p], not scores[p]
        rewards = [as_float_array(f"rewards[{p}]", x, ndim=1) for p, x in enumerate(rewards)]
        return best_of_k_per_prompt(rewards, rewards, ks=ks)
    r = as_float_array("rewards", rewards, ndim=2)
    return best_of_k_per_prompt(r, r, ks=ks)


# ----------------------------------------------------------------------------- math core (trusts inputs)


_FLIP = np.int64(0x7FFFFFFFFFFFFFFF)


def _sort_rewards_by_score(scores: np.ndarray, rewards: np.ndarray):
    """(P, n), (P, n) -> rewards in ascending score order (P, n), plus the rows that may hold ties.

    Returns ``(r, rows, s_rows)``: ``rows`` (T,) indexes the prompts whose pools may hold
    tied scores and ``s_rows`` (T, n) their sorted scores; every other row has distinct scores.

    Speed: one ``np.sort`` of int64 keys instead of an ``argsort``. Each score is mapped to an
    int64 with the same order (IEEE-754 bits, negatives flipped), its lowest b = ceil(log2 n)
    bits are replaced by the sample's column, and the sorted keys give the order and the
    columns at once. Scores that agree above those b bits (ties, or near-ties within
    ~2^(b-52) relative) are flagged; their rows are checked against the true scores and
    re-sorted exactly with ``argsort`` if needed, so the result is always exact.
    """
    P, n = scores.shape
    b = max(1, (n - 1).bit_length())
    if b > 24:  # huge pools: too few mantissa bits left for the key trick to pay
        order = np.argsort(scores, axis=1)
        return np.take_along_axis(rewards, order, 1), np.arange(P), np.take_along_axis(scores, order, 1)
    low = np.int64((1 << b) - 1)
    key = np.add(scores, 0.0).view(np.int64)  # new array; -0.0 + 0.0 = +0.0 so both zeros tie
    buf = np.empty((P, n), dtype=np.int64)  # scratch, reused below; ends up holding the sorted rewards
    np.right_shift(key, 63, out=buf)  # -1 where negative, else 0
    buf &= _FLIP
    key ^= buf  # negative floats: flip magnitude bits -> int64 order == float order
    key &= ~low
    key |= np.arange(n, dtype=np.int64)  # column in the freed low bits
    key.sort(axis=1)
    gap = np.subtract(key[:, 1:], key[:, :-1], out=buf[:, : n - 1])  # (P, n-1) successive key gaps
    near = (gap < (1 << b)).any(axis=1)  # (P,) same high bits somewhere (an int64 wrap is flagged too)
    order = key  # reuse the buffer: (P, n) columns in ascending score order
    order &= low
    order += (np.arange(P, dtype=np.int64) * n)[:, None]  # row offsets into the flattened (P*n,) view
    r = buf.view(np.float64)  # (P, n) rewards in score order
    np.take(rewards.ravel(), order, out=r, mode="clip")  # indices are in range; 'clip' avoids a buffered copy
    rows = np.flatnonzero(near)
    if not len(rows):
        return r, rows, None
    s_rows = scores.ravel().take(order[rows])  # (T, n) scores in key order
    bad = (s_rows[:, 1:] < s_rows[:, :-1]).any(axis=1)  # near-ties the key could not order (no subtraction: +-1e308)
    if bad.any():
        redo = rows[bad]
        o = np.argsort(scores[redo], axis=1)
        r[redo] = np.take_along_axis(rewards[redo], o, 1)
        s_rows[bad] = np.take_along_axis(scores[redo], o, 1)
    return r, rows, s_rows


def _best_of_k_matrix(scores: np.ndarray, rewards: np.ndarray, ks: np.ndarray) -> np.ndarray:
    """scores, rewards: (P, n) float64, ks: (K,) int -> (P, K) best-of-k values."""
    lo, hi = rewards.min(axis=1), rewards.max(axis=1)  # (P,) each: every pool's reward range
    big = rewards.size and max(abs(float(lo.min())), abs(float(hi.max()))) > _HUGE
    if big:  # near float64's edge a group's sum or a pool's spread would overflow: work at 2^-64 scale (exact)
        rewards, lo, hi = rewards * _DOWN, lo * _DOWN, hi * _DOWN
    r, rows, s_rows = _sort_rewards_by_score(scores, rewards)  # (P, n) rewards in score order, a new array
    # shifted by the pool's minimum, a pool of equal rewards is all zeros: its value is that reward exactly
    r -= lo[:, None]
    if len(rows):
        # ties: every member of a tied group gets the group's mean reward
        r[rows] = tie_means(r[rows], first_of_group(s_rows))
    out = weighted_ranks(r, ks)  # (P, n) -> (P, K), banded products of the cached weights
    out += lo[:, None]
    within_pools(out, lo, hi)  # weights summing to 1 +- ulps cannot step outside [min r, max r]
    if big:
        out *= 1.0 / _DOWN
    return out


_HUGE = 2.0**960  # rewards above this in magnitude are scaled down before summing
_DOWN = 2.0**-64  # a power of two: scaling is exact (up to subnormals, far below such rewards' rounding)


# ----------------------------------------------------------------------------- validation helpers


_EXACT_INT = 2**53  # float64 holds every integer of magnitude <= 2**53; 2**53 + 1 rounds to 2**53


def _check_exact_ints(name: str, x: Any) -> None:
    """Integer scores beyond +-2**53 are refused: as float64 neighbours would tie and the picks change."""
    if is_tensor(x):
        if x.dtype.is_floating_point or x.dtype.is_complex or str(x.dtype) == "torch.bool":
            return
        x = x.detach().cpu().numpy()
    try:
        a = np.asarray(x)
    except (TypeError, ValueError):
        return  # ragged or not numbers: as_float_array names the problem
    if a.dtype.kind in "iu" and a.size:
        lo, hi = int(a.min()), int(a.max())
        bad = hi if hi > _EXACT_INT else lo if lo < -_EXACT_INT else None
    elif a.dtype == object:
        bad = next((int(v) for v in a.ravel() if isinstance(v, numbers.Integral) and not isinstance(v, bool)
                    and abs(int(v)) > _EXACT_INT), None)
    else:
        return
    if bad is not None:
        raise ValueError(f"{name} must be integers of magnitude <= 2**53 (scores are compared as float64, where larger "
                         f"integers round and neighbours tie), got {bad}; rank them first (e.g. scipy.stats.rankdata)")


def _pool_pair(scores: Any, rewards: Any, *, name_s: str = "scores", name_r: str = "rewards"):
    """One prompt's pool -> two finite (n,) float64 arrays."""
    _check_exact_ints(name_s, scores)
    s = as_float_array(name_s, scores, ndim=1)
    r = as_float_array(name_r, rewards, ndim=1)
    check_same_shape(**{name_s: s, name_r: r})
    check_nonempty(name_s, s)
    check_finite(name_s, s)
    check_finite(name_r, r)
    return s, r


def _is_ragged_list(x: Any) -> bool:
    return isinstance(x, (list, tuple)) and len(x) > 0 and not isinstance(x[0], numbers.Number)


def _pools(scores: Any, rewards: Any) -> tuple[list[np.ndarray], list[np.ndarray]] | tuple[np.ndarray, np.ndarray]:
    """Validate per-prompt pools: a 2-D pair of arrays, or two lists of 1-D arrays."""
    for name, x in (("scores", scores), ("rewards", rewards)):
        if isinstance(x, (list, tuple)) and not x or tuple(getattr(x, "shape", (1,)))[:1] == (0,):
            raise ValueError(f"{name} must hold at least one prompt's pool, got no prompts")
    if _is_ragged_list(scores) or _is_ragged_list(rewards):
        pair = []
        for name, x in (("scores", scores), ("rewards", rewards)):
            if not isinstance(x, (list, tuple)):
                if np.ndim(x) != 2:
                    raise TypeError(
                        f"{name} must be a list of 1-D arrays or a 2-D array like the other argument, "
                        f"got {type(x).__name__} with {np.ndim(x)} dimension(s)"
                    )
                x = list(x)  # (P, n) -> P rows
            pair.append(x)
        scores, rewards = pair
        if len(scores) != len(rewards):
            raise ValueError(f"rewards must hold one pool per prompt like scores ({len(scores)}), got {len(rewards)}")
        if not scores:
            raise ValueError("scores must not be empty")
        ss, rr = [], []
        for p, (s, r) in enumerate(zip(scores, rewards)):
            s, r = _pool_pair(s, r, name_s=f"scores[{p}]", name_r=f"rewards[{p}]")
            ss.append(s)
            rr.append(r)
        return ss, rr
    _check_exact_ints("scores", scores)
    s = as_float_array("scores", scores, ndim=2)
    r = as_float_array("rewards", rewards, ndim=2)
    check_same_shape(scores=s, rewards=r)
    check_nonempty("scores", s)
    check_finite("scores", s)
    check_finite("rewards", r)
    return s, r


def _ragged_best_of_k(ss: list[np.ndarray], rr: list[np.ndarray], ks: np.ndarray) -> np.ndarray:
    """Lists of (n_p,) pools -> (P, K); pools of equal size go through the 2-D path together."""
    lengths = np.array([len(s) for s in ss])
    out = np.empty((len(ss), len(ks)))
    for n in np.unique(lengths):
        idx = np.flatnonzero(lengths == n)
        S = np.stack([ss[i] for i in idx])  # (P_n, n)
        R = np.stack([rr[i] for i in idx])
        out[idx] = _best_of_k_matrix(S, R, ks)
    return out


def _smallest_pool(s) -> int:
    """The smallest pool size of validated pools (a list of 1-D arrays or a 2-D array)."""
    return min(len(x) for x in s) if isinstance(s, list) else s.shape[1]
