"""The one home of tie grouping: sorted scores -> groups of equal scores.

Used by :mod:`bonft.estimate` (a tied group's rewards are replaced by their
mean), :mod:`bonft.objectives.credit` (the subset sums treat a tied group whole) and
:mod:`bonft.bon` (the mass of each score level). Rule, common practice for
U-statistics with ties: a verifier with tied scores has no preference, so the
selection among tied samples is uniform, which is exact in expectation
(no random draw). Works on numpy arrays and torch tensors alike.
"""
from __future__ import annotations

import numpy as np

from bonft._core.checks import is_tensor


def first_of_group(s_sorted):
    """``(..., n)`` scores sorted ascending -> bool ``(..., n)``, True where a tie group starts."""
    if is_tensor(s_sorted):
        import torch

        new = torch.ones_like(s_sorted, dtype=torch.bool)
    else:
        new = np.ones(s_sorted.shape, dtype=bool)
    new[..., 1:] = s_sorted[..., 1:] != s_sorted[..., :-1]
    return new


def group_ids(first):
    """``(..., n)`` group starts -> int64 group index of each sorted position (0, 0, 1, 2, 2, ...)."""
    if is_tensor(first):
        return first.long().cumsum(-1) - 1
    return np.cumsum(first, axis=-1, dtype=np.int64) - 1


def flat_groups(first: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """numpy ``(B, n)`` group starts -> flat ``(starts (G,), gid (B*n,), sizes (G,))``.

    ``starts``: flat index of each group's first position (row b holds [b*n, (b+1)*n), and a
    group never crosses a row because every row starts one); ``gid``: the group of each flat
    position; ``sizes``: the group sizes.
    """
    f = first.ravel()
    starts = np.flatnonzero(f)
    return starts, np.cumsum(f) - 1, np.diff(np.append(starts, f.size))


def tie_means(r: np.ndarray, first: np.ndarray) -> np.ndarray:
    """``(T, n)`` values in sorted order and their group starts -> each tied group replaced by its mean."""
    if first.all():
        return r
    T, n = r.shape
    starts = np.flatnonzero(first.ravel())  # group starts in the flattened (T*n,) view
    sums = np.add.reduceat(r.ravel(), starts)
    counts = np.diff(np.append(starts, T * n))
    return np.repeat(sums / counts, counts).reshape(T, n)
