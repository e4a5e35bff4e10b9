r"""Unbiased pass@k from counts: ``c`` correct among ``n`` samples, for many (n, c) pairs at once.

.. math:: \mathrm{pass@}k = 1 - \binom{n-c}{k} \Big/ \binom nk

The ratio of binomials comes from :mod:`bonft._core.passk` (no log-gamma
differences), so pass@k is exact to ~1e-14 relative for any n in int64.
Long vectors are scanned in blocks and distinct (n, c, k) are evaluated once.

References: Chen et al. 2021, "Evaluating Large Language Models Trained on Code".
"""
from __future__ import annotations

from typing import Any

import numpy as np

from bonft._core.checks import check_int, is_tensor
from bonft._core.passk import INT64_MAX, pass_at_k_counts

__all__ = ["pass_at_k"]


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
