"""The one home of the best-of-k U-statistic weights (numpy; :mod:`bonft.estimate` and :mod:`bonft.objectives.credit`).

Sort a pool of n samples ascending by score. Among the ``C(n, k)`` k-subsets,
``C(i, k-1)`` have the sample at 0-based rank ``i`` as their top, so

.. math:: w_k(i) = \\binom{i}{k-1} \\Big/ \\binom{n}{k}, \\qquad \\sum_i w_k(i) = 1

(hockey-stick identity) and best-of-k of the pool is ``sum_i w_k(i) r_(i)``
(Chen et al. 2021 for pass@k; the U-statistic of Hoeffding 1948).

Computed without log-gamma: every 64th weight from the top comes from
:func:`bonft._core.passk.log_miss` (``w_k(i) = (k/n) miss(n-1, n-1-i, k-1)``), the
ones between from the exact step ``w_k(i-1) = w_k(i) (i-k+1)/i``, so each
weight carries at most ~64 roundings (relative error < 2e-14, checked against
``fractions`` in ``tests/test_passk.py``). Going down from the top, weights
underflow to exactly 0 where they are below 1e-308 instead of overflowing
binomials.
"""
from __future__ import annotations

import functools

import numpy as np

from bonft._core.passk import log_miss

_BLOCK = 64


def rank_weights(n: int, ks) -> np.ndarray:
    """``(K,)`` subset sizes in ``[1, n]`` -> ``(K, n)`` float64, ``w[j, i] = C(i, ks[j]-1) / C(n, ks[j])``."""
    ks = np.asarray(ks, dtype=np.int64).reshape(-1)
    nb = -(-n // _BLOCK)
    d = np.arange(nb * _BLOCK)  # distance from the top: rank i = n - 1 - d
    i = (n - 1 - d).astype(np.float64)
    inv = np.where(i >= 0, 1.0 / np.maximum(i + 1.0, 1.0), 0.0)  # 1/(i+1); padding below rank 0 -> ratio 0
    # step from rank i+1 down to rank i: w(i)/w(i+1) = (i+2-k)/(i+1) = 1 - (k-1)/(i+1), 0 once i < k-1
    q = (i[None, :] + 2.0) - ks[:, None].astype(np.float64)  # exact integers: 0 exactly at i = k-2
    q *= inv[None, :]
    np.maximum(q, 0.0, out=q)
    q[:, i < 0] = 0.0
    tops = np.arange(0, nb * _BLOCK, _BLOCK)  # block tops: d = 0, 64, 128, ...
    anchor = np.exp(log_miss(n - 1, tops[None, :], ks[:, None] - 1)) * (ks[:, None] / n)  # (K, nb)
    q[:, tops] = anchor
    w = np.cumprod(q.reshape(len(ks), nb, _BLOCK), axis=2).reshape(len(ks), nb * _BLOCK)
    return np.ascontiguousarray(w[:, n - 1 :: -1]) if n > 0 else w[:, :0]


_TAIL = 2.0**-60  # total weight a banded product may drop: below float64 rounding of the result
_BAND = 32  # subset sizes per band


@functools.lru_cache(maxsize=32)
def banded_weights(n: int, ks: tuple[int, ...]) -> tuple[tuple[int, int, int, np.ndarray], ...]:
    """The weights of ``ks`` as bands ``(k0, k1, start, W (n - start, k1 - k0))`` for ``r[:, start:] @ W``.

    For k >= 2 the lowest ranks carry almost no weight (``w_k(i) ~ (i/n)^(k-1)``); each band of
    ``_BAND`` consecutive subset sizes starts at the first rank where the weight below it reaches
    ``2^-60`` for its smallest k, so a product over the band drops at most ``2^-60 max|r|`` -
    below the rounding of the result - and large k cost ~``n/k`` instead of ``n`` per prompt.
    Cached per ``(n, ks)`` (planners and evaluations ask for the same few), read-only.
    """
    w = rank_weights(n, ks)  # (K, n)
    below = np.cumsum(w, axis=1)  # weight of the ranks <= i
    cut = (below < _TAIL).sum(axis=1)  # first rank to keep, per k
    bands = []
    for k0 in range(0, len(ks), _BAND):
        k1 = min(k0 + _BAND, len(ks))
        start = int(cut[k0:k1].min())
        W = np.ascontiguousarray(w[k0:k1, start:].T)  # (n - start, k1 - k0)
        W.flags.writeable = False
        bands.append((k0, k1, start, W))
    return tuple(bands)


def within_pools(values: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per-pool values ``(P, K)`` clipped in place into each pool's reward range ``[lo_p, hi_p]`` (``(P,)`` each).

    Every per-pool estimate (best-of-k, pass@k, the vote strategies) is a weighted mean of the pool's
    rewards, so it lies in that range; weights that sum to 1 only up to rounding can step an ulp
    outside (1.0000000000000007 for a pool of ones), which the clip undoes. The one rule for all of them.
    """
    return np.clip(values, lo[:, None], hi[:, None], out=values)


def weighted_ranks(r: np.ndarray, ks) -> np.ndarray:
    """Rewards in ascending score order ``(P, n)`` -> best-of-k values ``(P, K)``: ``sum_i w_k(i) r_(i)``.

    The weights sum to 1 only up to rounding: callers pass rewards shifted by the pool's minimum and
    clip with :func:`within_pools` (:func:`bonft.estimate.bestofk._best_of_k_matrix`).
    """
    P, n = r.shape
    ks = np.asarray(ks, dtype=np.int64)
    out = np.empty((P, len(ks)))
    if np.all(ks[1:] >= ks[:-1]):  # the usual case: ascending k, bands are column slices
        for k0, k1, start, W in banded_weights(n, tuple(ks.tolist())):
            np.matmul(r[:, start:], W, out=out[:, k0:k1])
        return out
    order = np.argsort(ks, kind="stable")  # bands of nearby k share most of their support
    out[:, order] = weighted_ranks(r, ks[order])
    return out


@functools.lru_cache(maxsize=256)
def count_tables(n: int, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Three ``(n+2,)`` tables, entry ``x+1`` for ``x = -1..n``:
    ``C(x, k)/C(n, k)``, ``C(x, k-1)/C(n, k)`` and ``C(x, kb)/C(n-1, kb)``, ``kb = min(k, n-1)``.

    ``C(x, k) = sum_{i<x} C(i, k-1)`` (hockey stick), so the first table is the running sum of
    :func:`rank_weights`; the third is the first for the pool without one sample (the
    leave-one-out baseline; for ``n = 1`` it is unused and all ones). Cached per ``(n, k)``
    (a training run asks for the same few), returned read-only.
    """
    w = rank_weights(n, [k])[0]  # (n,)
    ck = np.zeros(n + 2)
    ck[2:] = np.cumsum(w)  # x = 1..n: sum over ranks < x
    ck[-1] = 1.0  # C(n, k)/C(n, k), exactly
    ck1 = np.zeros(n + 2)
    ck1[1 : n + 1] = w  # x = 0..n-1
    ck1[n + 1] = k / (n - k + 1)  # C(n, k-1)/C(n, k)
    if k == 1:
        ck1[1:] = 1.0 / n  # C(x, 0)/C(n, 1) for every x >= 0
    kb = max(min(k, n - 1), 0)
    cb = np.ones(n + 2)
    cb[0] = 0.0  # C(-1, kb) = 0
    if kb >= 1:
        wb = rank_weights(n - 1, [kb])[0]  # (n-1,)
        cb[1] = 0.0
        cb[2 : n + 1] = np.cumsum(wb)
        cb[n] = 1.0
        cb[n + 1] = n / (n - kb)  # C(n, kb)/C(n-1, kb)
    for t in (ck, ck1, cb):
        t.flags.writeable = False
    return ck, ck1, cb
