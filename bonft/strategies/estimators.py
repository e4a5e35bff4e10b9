r"""Unbiased strategy values and per-sample credit from pools of samples.

For one prompt we hold a pool of ``n`` samples, each with an answer key, a verifier score and a
true reward. The estimate of ``V_k`` averages the served reward over all ``C(n, k)`` k-subsets of
the pool (a U-statistic, Hoeffding 1948), so it is unbiased for the strategy's value under the
policy that produced the pool:

.. math:: \hat V_k = \binom nk^{-1}\sum_{|S|=k} f(S)

* majority vote: exact for every ``k <= n`` at once by a dynamic programme over answer counts
  (:mod:`bonft.strategies.counting`); ``f(S) = sum_a share_a(S) * mean reward of a's samples in S``;
* weighted vote: exact over all k-subsets while ``C(n, k) <= max_subsets``, otherwise the mean of
  ``max_subsets`` uniform random k-subsets, still unbiased, with its standard error;
* best-of-k and pass@k: the closed forms of :mod:`bonft.estimate.bestofk`.

Answer keys are ints or strings; ``None`` is a missing answer (no answer could be extracted) and votes
alone, as ``null`` in a samples file does; a NaN key is refused (NaNs would count as one answer).
Each answer carries one reward (``conflicts="error"``, the default) or, with ``conflicts="mean"``,
the winning answer's samples among the k are served uniformly at random (the mean of their
rewards); weighted-vote scores are non-negative weights (:mod:`bonft.strategies.exact`).

Credit. With ``kb = min(k, n-1)``, the per-sample credit

.. math::
    w_i = \frac kn\Big(\mathrm{mean}_{S\ni i,|S|=k} f(S) - \mathrm{mean}_{S\not\ni i,|S|=kb} f(S)\Big)
        = \hat V_k(\text{pool}) - \hat V_{kb}(\text{pool} \setminus i)

gives ``E[sum_i w_i grad log pi(y_i)] = grad V_k`` exactly: the first term regroups the
U-statistic of the score-function gradient by sample, the second (a leave-one-out baseline) never
looks at sample ``i``. The second form holds for ``k < n`` and for ``k = n``
(``C(n-1, n) = 0``). The sampled weighted-vote credit
``w_i = mean_m f(S_m)(1{i in S_m} - k/(n-k) 1{i not in S_m})`` is unbiased for the same ``w_i``.

References: Hoeffding 1948 (U-statistics); Kool et al. 2019 (leave-one-out baselines);
Chow et al. 2024 (best-of-N policy gradients); Walder & Karkhanis 2025 (U-statistic pass@k
gradients); Wang et al. 2023 (majority vote).

Caution: credit for a vote pushes the policy towards answers the extraction or the verifier
favours, right or wrong (reward hacking); watch a held-out true reward.
"""
from __future__ import annotations

import contextvars
import functools
import itertools
import math

import numpy as np
import torch

from bonft._core.checks import (
    MAX_SUBSETS_BOUND,
    as_float_array,
    check_bound,
    check_choice,
    check_finite,
    check_k,
    check_pool_ks,
    check_seed,
    is_tensor,
    torch_out_dtype,
)
from bonft._core.ustat import within_pools
from bonft.strategies.counting import pool_vote_sums, vote_credit_batched, weighted_slot_weights
from bonft.strategies.exact import CONFLICT_RULES

__all__ = ["majority_vote_per_prompt", "weighted_vote_per_prompt", "majority_vote_credit", "weighted_vote_credit",
           "MAX_SUBSETS"]

_MAX_N_EXACT = 1000  # binomials of the count DP stay inside float64 (2^1000 ~ 1e301)
MAX_SUBSETS = 4000  # weighted vote: exact over all k-subsets up to this many, else this many sampled


# ---------------------------------------------------------------------------- inputs


def _out_kind(*xs):
    """Torch out when an input is a tensor (its device, its floating dtype with half precision widened to float32,
    or float64), else numpy."""
    for x in xs:
        if is_tensor(x):
            return x.device, torch_out_dtype(x)
    return None


def _finish(w: np.ndarray, kind):
    return w if kind is None else torch.as_tensor(w, dtype=kind[1], device=kind[0])


def _rows(name: str, x, *, numeric: bool) -> list[np.ndarray]:
    """(P, n) array or a list of 1-D per-prompt arrays -> list of 1-D arrays."""
    if is_tensor(x):  # numbers through the dtype policy (bfloat16 has no numpy type, complex is refused)
        x = as_float_array(name, x) if numeric else x.detach().cpu().numpy()
    if isinstance(x, np.ndarray) and x.ndim == 2:
        rows = list(x)
    elif isinstance(x, (list, tuple)) and x and not np.isscalar(x[0]):
        rows = [(as_float_array(f"{name}[{p}]", r) if numeric else r.detach().cpu().numpy()) if is_tensor(r)
                else np.asarray(r) if numeric else _answer_row(f"{name}[{p}]", r) for p, r in enumerate(x)]
    else:
        arr = np.asarray(x)
        if arr.ndim != 2:
            raise ValueError(f"{name} must have shape (P, n) or be a list of per-prompt arrays, got shape {arr.shape}")
        rows = list(arr)
    out = []
    for p, r in enumerate(rows):
        if r.ndim != 1 or len(r) == 0:
            raise ValueError(f"{name}[{p}] must be a non-empty 1-D pool, got shape {r.shape}")
        if numeric:
            r = as_float_array(f"{name}[{p}]", r)
            check_finite(f"{name}[{p}]", r)
        out.append(r)
    return out


def _missing(name: str, a: np.ndarray) -> np.ndarray:
    """The missing answers (None) of one pool, (n,) bool; a NaN key is a ``ValueError`` (NaNs would merge)."""
    if a.dtype.kind in "fc":
        nan = np.isnan(a)
    elif a.dtype == object:
        nan = np.array([isinstance(v, (float, complex, np.floating, np.complexfloating)) and v != v for v in a], bool)
    else:
        return np.zeros(len(a), bool)
    if nan.any():
        raise ValueError(f"{name} must not hold NaN as an answer key (NaNs would count as one answer), got NaN at "
                         f"sample {int(np.flatnonzero(nan)[0])}; pass None for a missing answer (it votes alone)")
    return np.array([v is None for v in a], bool) if a.dtype == object else np.zeros(len(a), bool)


def _answer_row(name: str, r) -> np.ndarray:
    """One pool of answer keys as numpy; a NaN among Python values is refused before numpy turns
    ``["a", nan]`` into the strings ``["a", "nan"]``."""
    if not isinstance(r, np.ndarray):
        raw = np.asarray(r, dtype=object)
        if raw.ndim == 1:
            _missing(name, raw)
    return np.asarray(r)


def _codes(answers: list[np.ndarray]) -> list[np.ndarray]:
    """Answer keys of any comparable kind -> int codes 0..A-1 per pool; each None (a missing answer) gets a code
    of its own, so it votes alone, as a null answer of the samples file (:mod:`bonft.io`) does."""
    out = []
    for p, a in enumerate(answers):
        miss = _missing(f"answers[{p}]", a)
        codes = np.empty(len(a), np.int64)
        try:
            present = np.unique(a[~miss], return_inverse=True)[1].reshape(-1)
        except TypeError:
            raise TypeError(f"answers[{p}] must hold comparable keys (ints or strings, or None for a missing answer, "
                            f"which votes alone), got dtype {a.dtype}") from None
        codes[~miss] = present
        codes[miss] = (int(present.max()) + 1 if len(present) else 0) + np.arange(int(miss.sum()))
        out.append(codes)
    return out


def _same_lengths(**pools: list[np.ndarray]) -> None:
    items = list(pools.items())
    n0, first = items[0]
    for name, rows in items[1:]:
        if len(rows) != len(first):
            raise ValueError(f"{name} must hold {len(first)} pools like {n0}, got {len(rows)}")
        for p, (a, b) in enumerate(zip(first, rows)):
            if len(a) != len(b):
                raise ValueError(f"{name}[{p}] must have {len(a)} samples like {n0}[{p}], got {len(b)}")


def _plain(x):
    """A numpy scalar as the Python value it holds (``'y'``, not ``np.str_('y')``) for messages."""
    return x.item() if isinstance(x, np.generic) else x


def _one_reward_per_answer(codes: list[np.ndarray], answers: list[np.ndarray], rewards: list[np.ndarray],
                           conflicts, strategy: str) -> None:
    """Refuse a pool where one answer carries different rewards unless ``conflicts="mean"``."""
    if check_choice("conflicts", conflicts, CONFLICT_RULES) == "mean":
        return
    for p, (c, a, r) in enumerate(zip(codes, answers, rewards)):
        lo = np.full(int(c.max()) + 1, np.inf)
        hi = np.full_like(lo, -np.inf)
        np.minimum.at(lo, c, r)
        np.maximum.at(hi, c, r)
        if (hi > lo).any():
            bad = int(np.flatnonzero(hi > lo)[0])
            i = int(np.flatnonzero(c == bad)[0])
            j = int(np.flatnonzero((c == bad) & (r != r[i]))[0])
            raise ValueError(
                f"rewards[{p}] must be one value per answer for {strategy}, got answer {_plain(a[i])!r} with rewards "
                f"{r[i]:g} (sample {i}) and {r[j]:g} (sample {j}); pass conflicts='mean' to serve the mean reward "
                f"of the answer's samples")


def _check_weights(scores: list[np.ndarray]) -> None:
    """Weighted-vote scores are non-negative weights."""
    for p, s in enumerate(scores):
        if (s < 0).any():
            i = int(np.flatnonzero(s < 0)[0])
            raise ValueError(f"scores[{p}] must be non-negative weights for weighted_vote (exponentiate "
                             f"log-probabilities first), got {s[i]:g} at sample {i}")


# ---------------------------------------------------------------------------- majority vote


def _unit(r: np.ndarray) -> tuple[np.ndarray, float, float]:
    """One pool's rewards -> ``(x, lo, half)``: ``x = (r - lo) / (max r - lo)`` in [0, 1], ``half = (max r - lo) / 2``.

    The vote programmes multiply rewards by subset counts up to ``C(1000, 500) ~ 1e299``; on [0, 1] nothing
    overflows, and :func:`_from_unit` maps a value back without forming ``max r - lo`` (which itself
    overflows for rewards of +-1e308). A pool of equal rewards gives ``x = 0``.
    """
    lo = float(r.min())
    half = float(r.max()) * 0.5 - lo * 0.5
    x = (r * 0.5 - lo * 0.5) / half if half > 0 else np.zeros_like(r)
    return np.minimum(x, 1.0), lo, half


def _from_unit(v: np.ndarray, lo: float, half: float) -> np.ndarray:
    """Values on the unit scale of :func:`_unit` -> the rewards' scale (``lo + 2 half v``, each step finite)."""
    return lo + half * v + half * v


def _pool_ranges(rew: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The pools' reward ranges: ``(lo (P,), hi (P,))``."""
    return np.array([r.min() for r in rew]), np.array([r.max() for r in rew])


_PROGRESS = contextvars.ContextVar("bonft_vote_progress", default=False)


class VoteProgress:
    """``with VoteProgress():`` the vote estimators show a progress bar over pools on stderr (tqdm; only when stderr
    is a terminal). Off by default: the commands turn it on (``bonft plan --samples F --strategy``, off with --quiet);
    ``VoteProgress(False)`` turns it off inside such a block."""

    def __init__(self, enabled: bool = True) -> None:
        self.enabled = bool(enabled)
        self._token = None

    def __enter__(self) -> VoteProgress:
        self._token = _PROGRESS.set(self.enabled)
        return self

    def __exit__(self, *exc) -> None:
        _PROGRESS.reset(self._token)


def _pools_bar(rows, desc: str):
    """``rows`` as they are, or wrapped in a progress bar while :class:`VoteProgress` is on."""
    if not _PROGRESS.get() or len(rows) < 2:
        return rows
    from tqdm.auto import tqdm

    return tqdm(rows, desc=desc, unit=" pools", leave=False, disable=None)  # None: off where stderr is no terminal


def _vote_pool(codes: np.ndarray, r: np.ndarray, ks: np.ndarray) -> np.ndarray:
    """One pool -> (K,) majority-vote values."""
    r, lo, half = _unit(r)
    counts = np.bincount(codes)
    rbar = np.bincount(codes, weights=r) / counts
    d, cls, mult = np.unique(counts, return_inverse=True, return_counts=True)
    per_class_r = np.bincount(cls.reshape(-1), weights=rbar, minlength=len(d))  # (J,) sum of rbar per class
    sums = pool_vote_sums(d, mult, per_class_r, int(ks.max()))
    return _from_unit(sums[ks] / np.array([float(math.comb(len(r), k)) for k in ks]), lo, half)


def majority_vote_per_prompt(answers, rewards, *, ks, conflicts="error"):
    r"""Unbiased majority-vote value of every pool.

    Shape: ``answers (P, n), rewards (P, n) -> (P, K)`` (``(P,)`` for an int ``ks``).

    .. math:: \hat V_k = \sum_a \hat P_k(a\ \text{wins})\,\bar r_a,\quad
              \hat P_k(a\ \text{wins}) = \binom nk^{-1}\sum_{|S|=k}\frac{1\{c_a(S)=\max\}}{\#\{b: c_b(S)=\max\}}

    ``answers`` are any comparable keys (ints, strings); ``None`` is a missing answer and votes alone
    (a key of its own); a NaN key is a ``ValueError``. ``rbar_a`` is the mean reward of the
    pool's samples with answer ``a``. Exact U-statistic over all k-subsets by a dynamic
    programme over answer counts (every k <= n in one pass); pools up to n = 1000.
    Ragged pools: lists of 1-D arrays.
    ``conflicts``: ``"error"`` (a pool where one answer carries different rewards is refused,
    naming the prompt and the answer) or ``"mean"`` (the winner's samples are served uniformly,
    so ``rbar_a`` is their mean reward).

    References: Wang et al. 2023 (majority vote); Hoeffding 1948 (U-statistics).
    """
    ans = _rows("answers", answers, numeric=False)
    rew = _rows("rewards", rewards, numeric=True)
    _same_lengths(answers=ans, rewards=rew)
    n_max = max(len(a) for a in ans)
    if n_max > _MAX_N_EXACT:
        raise ValueError(f"answers pools must have n <= {_MAX_N_EXACT} for the exact vote estimate, got n={n_max}")
    ks_arr, scalar = check_pool_ks(ks, ans, pool="answers")
    codes = _codes(ans)
    _one_reward_per_answer(codes, ans, rew, conflicts, "majority_vote")
    values = [_vote_pool(c, r, ks_arr) for c, r in _pools_bar(list(zip(codes, rew)), "majority_vote")]
    out = within_pools(np.stack(values), *_pool_ranges(rew))
    return out[:, 0] if scalar else out


def majority_vote_credit(answers, rewards, *, k, conflicts="error"):
    r"""Majority-vote credit with a leave-one-out baseline.

    Shape: ``answers (B, n), rewards (B, n) -> credit (B, n)``.

    .. math:: w_i = \hat V_k(\text{pool}) - \hat V_{\min(k,n-1)}(\text{pool}\setminus i)

    ``E[sum_i w_i grad log pi(y_i)] = grad V_k`` exactly (module docstring). Equal rewards give
    zero credit; ``n = 1`` gives ``w = R``. All pools in one batched count DP: prefix and suffix
    products over the answers give every leave-one-out value (:func:`bonft.strategies.counting.vote_credit_batched`).
    numpy/list in -> float64 numpy; torch in -> torch (device, floating dtype of ``rewards``).
    ``answers`` as in :func:`majority_vote_per_prompt` (``None`` votes alone, NaN is refused).
    ``conflicts``: ``"error"`` (a pool where one answer carries different rewards is refused,
    naming the prompt and the answer) or ``"mean"`` (the winner's samples are served uniformly,
    so ``rbar_a`` is their mean reward).

    References: Hoeffding 1948; Kool et al. 2019; Wang et al. 2023.
    """
    kind = _out_kind(rewards)
    ans = _rows("answers", answers, numeric=False)
    rew = _rows("rewards", rewards, numeric=True)
    _same_lengths(answers=ans, rewards=rew)
    n = len(rew[0])
    if any(len(r) != n for r in rew):
        raise ValueError("rewards must have shape (B, n): every pool the same size for credit")
    if n > _MAX_N_EXACT:
        raise ValueError(f"rewards must have n <= {_MAX_N_EXACT} samples per prompt, got n={n}")
    k = check_k(k, n)
    codes = _codes(ans)
    _one_reward_per_answer(codes, ans, rew, conflicts, "majority_vote")
    if n == 1:
        return _finish(np.stack(rew), kind)
    codes = np.stack(codes)
    r = np.stack(rew)
    w = np.zeros_like(r)
    live = np.flatnonzero(r.max(1) > r.min(1))  # equal rewards serve the same reward whatever wins: w = 0
    if len(live):
        codes, r = codes[live], r[live]
        # chunks of pools keep the (pools, answers, thresholds, nodes, degree) tensors near 20M numbers
        A = int(codes.max()) + 1
        size = A * k * ((min(A, k) + 1) // 2) * (k + 1)
        step = max(1, 20_000_000 // size)
        w[live] = np.concatenate([vote_credit_batched(codes[i : i + step], r[i : i + step], k)
                                  for i in range(0, len(r), step)])
    return _finish(w, kind)


# ---------------------------------------------------------------------------- weighted vote


def _all_subsets(n: int, k: int) -> np.ndarray:
    """Every k-subset of range(n) as a (C(n, k), k) array."""
    return np.array(list(itertools.combinations(range(n), k)), dtype=np.int64).reshape(-1, k)


@functools.lru_cache(maxsize=32)
def _shared_subsets(n: int, k: int) -> np.ndarray:
    """:func:`_all_subsets`, read-only and cached: the pools of one size share the table."""
    out = _all_subsets(n, k)
    out.flags.writeable = False
    return out


_SHARED_CELLS = 1 << 20  # entries of a table kept in that cache (8 MB at most each)


def _subsets(n: int, k: int, max_subsets: int, rng) -> tuple[np.ndarray, bool]:
    """Sample indices (N, k) of all k-subsets (exact) or of max_subsets uniform ones."""
    count = math.comb(n, k)
    if count <= max_subsets:
        return (_shared_subsets if count * k <= _SHARED_CELLS else _all_subsets)(n, k), True
    return np.argpartition(rng.random((max_subsets, n)), k - 1, axis=1)[:, :k], False  # the k smallest of iid keys


def _weighted_f(idx: np.ndarray, codes: np.ndarray, s: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Served reward of a weighted vote on each subset idx (N, k) -> (N,)."""
    return (weighted_slot_weights(codes[idx], s[idx]) * r[idx]).sum(1)


def _check_budget(max_subsets, seed) -> tuple[int, int]:
    why = "each sampled subset draws n random keys at once; 10^6 subsets put the standard error near sd(f) / 1000"
    return check_bound("max_subsets", max_subsets, min=2, max=MAX_SUBSETS_BOUND, why=why), check_seed(seed)


def weighted_vote_per_prompt(answers, scores, rewards, *, ks, max_subsets=MAX_SUBSETS, seed=0, conflicts="error"):
    r"""Unbiased verifier-weighted vote value of every pool and its standard error.

    Shape: ``answers, scores, rewards (P, n) -> (values (P, K), stderr (P, K))``. Scores are non-negative
    weights (a negative one is a ``ValueError``); the served answer maximises the total weight of its
    samples among the k (totals equal to 1e-12 relative tie, uniformly among the tied answers), and one
    of its samples is served uniformly. While ``C(n, k) <= max_subsets`` the U-statistic runs
    over every k-subset (stderr 0); above, over ``max_subsets`` uniform random k-subsets (seeded),
    unbiased with standard error ``sd(f)/sqrt(max_subsets)``.

    .. math:: \hat V_k = \binom nk^{-1}\sum_{|S|=k} f(S)

    ``answers`` and ``conflicts`` as in :func:`majority_vote_per_prompt` (``None`` votes alone).

    References: Li et al. 2023 (verifier-weighted voting); Hoeffding 1948.
    """
    ans = _rows("answers", answers, numeric=False)
    sc = _rows("scores", scores, numeric=True)
    rew = _rows("rewards", rewards, numeric=True)
    _same_lengths(answers=ans, scores=sc, rewards=rew)
    ks_arr, _ = check_pool_ks(ks, ans, pool="answers")
    max_subsets, seed = _check_budget(max_subsets, seed)
    _check_weights(sc)
    codes = _codes(ans)
    _one_reward_per_answer(codes, ans, rew, conflicts, "weighted_vote")
    rng = np.random.default_rng(seed)
    val = np.zeros((len(ans), len(ks_arr)))
    se = np.zeros_like(val)
    for p, (c, s, r) in enumerate(_pools_bar(list(zip(codes, sc, rew)), "weighted_vote")):
        x, lo, half = _unit(r)  # served rewards summed over subsets stay finite on [0, 1]
        for j, k in enumerate(ks_arr):
            idx, exact = _subsets(len(r), int(k), max_subsets, rng)
            f = _weighted_f(idx, c, s, x)
            val[p, j] = _from_unit(f.mean(), lo, half)
            se[p, j] = 0.0 if exact else (2.0 * f.std(ddof=1) / math.sqrt(len(f))) * half
    return within_pools(val, *_pool_ranges(rew)), se


def weighted_vote_credit(answers, scores, rewards, *, k, max_subsets=MAX_SUBSETS, seed=0, conflicts="error"):
    r"""Weighted-vote credit with a leave-one-out baseline.

    Shape: ``answers, scores, rewards (B, n) -> credit (B, n)``.

    .. math:: w_i = \frac kn\Big(\mathrm{mean}_{S\ni i} f(S) - \mathrm{mean}_{S\not\ni i,|S|=kb} f(S)\Big)

    over every k-subset while ``C(n, k) <= max_subsets``; above, the unbiased sampled form
    ``w_i = mean_m f(S_m)(1{i in S_m} - k/(n-k) 1{i not in S_m})`` over ``max_subsets``
    uniform k-subsets. Either way ``E[sum_i w_i grad log pi(y_i)] = grad V_k``. Scores are
    non-negative weights; ``answers`` and ``conflicts`` as in :func:`majority_vote_per_prompt`.

    References: Kool et al. 2019; Hoeffding 1948; Li et al. 2023.
    """
    kind = _out_kind(rewards, scores)
    ans = _rows("answers", answers, numeric=False)
    sc = _rows("scores", scores, numeric=True)
    rew = _rows("rewards", rewards, numeric=True)
    _same_lengths(answers=ans, scores=sc, rewards=rew)
    n = len(rew[0])
    if any(len(r) != n for r in rew):
        raise ValueError("rewards must have shape (B, n): every pool the same size for credit")
    k = check_k(k, n)
    max_subsets, seed = _check_budget(max_subsets, seed)
    _check_weights(sc)
    codes = _codes(ans)
    _one_reward_per_answer(codes, ans, rew, conflicts, "weighted_vote")
    rng = np.random.default_rng(seed)
    out = np.zeros((len(rew), n))
    for p, (c, s, r) in enumerate(zip(codes, sc, rew)):
        if n == 1:
            out[p] = r
            continue
        idx, exact = _subsets(n, k, max_subsets, rng)
        f = _weighted_f(idx, c, s, r)
        sum_with = np.bincount(idx.ravel(), weights=np.repeat(f, k), minlength=n)  # (n,) sum of f over S holding i
        n_with = np.bincount(idx.ravel(), minlength=n).astype(np.float64)
        sum_without, n_without = f.sum() - sum_with, len(f) - n_with
        if not exact:  # k < n here
            out[p] = (sum_with - (k / (n - k)) * sum_without) / len(f)
            continue
        if k < n:
            without_i = sum_without / n_without
        else:  # the baseline is the pool without i, all n-1 of it
            others = np.array([np.delete(np.arange(n), i) for i in range(n)])  # (n, n-1)
            without_i = _weighted_f(others, c, s, r)
        out[p] = (k / n) * (sum_with / n_with - without_i)
    return _finish(out, kind)
