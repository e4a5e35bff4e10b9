"""The float64 numpy cores of :mod:`bonft.objectives.credit` and the input checks it shares with :mod:`bonft.objectives.losses`.

The cores trust their inputs (validated once at the public boundary); the formulas and their
papers are in the docstrings of the public functions of :mod:`bonft.objectives.credit`.
"""
from __future__ import annotations

import functools

import numpy as np

from bonft._core.checks import check_binary, check_k, check_nonnegative
from bonft.objectives.validation import as_host
from bonft._core.passk import log_miss, pass_at_k_counts
from bonft._core.ties import first_of_group, flat_groups
from bonft._core.ustat import count_tables


# ----------------------------------------------------------------------------
# trusted float64 numpy cores (shared with bonft.objectives.losses)
# ----------------------------------------------------------------------------

def _bon_rl_core(s: np.ndarray, R: np.ndarray, k: int, baseline: str) -> tuple[np.ndarray, np.ndarray]:
    """Scores, rewards (B, n) -> (credit (B, n), pool U-statistic V_k (B,)).

    Sorted ascending, sample i sits in a tie group G of size m with L samples
    below. Its k-subset sum splits into subsets whose top group is G (i plus
    t-1 tied mates plus k-t from below) and subsets whose top group H lies
    above G (i is one of the k-t from below H). Summing over t with
    Vandermonde's identity gives, divided by C(n, k),
      own:   R_i (C(m+L,k) - C(L,k))/m
           + (sum_G R - R_i) (m C(m+L-1,k-1) - C(m+L,k) + C(L,k)) / (m(m-1))
      above: sum_{H above G} sum_H R (C(m_H+L_H-1,k-1) - C(L_H-1,k-1)) / m_H.
    The leave-one-out U-statistic over C(n-1, kb) follows the same way:
    removing i shrinks G to m-1 and lowers L by one for every group above.
    Every binomial ratio is a lookup in :func:`bonft._core.ustat.count_tables`.
    """
    B, n = s.shape
    loo = baseline == "loo" and n > 1
    # flat (B*n,) views throughout: row b occupies [b*n, (b+1)*n); every group lies inside one row
    fo = (np.argsort(s, axis=-1) + (np.arange(B, dtype=np.int64) * n)[:, None]).ravel()  # ties: any order
    starts, gid, m = flat_groups(first_of_group(s.ravel().take(fo).reshape(B, n)))  # tie groups, row by row
    if len(starts) == B * n:  # no tied scores (e.g. a reward model's): each group is one sample
        return _bon_rl_distinct(R.ravel().take(fo).reshape(B, n), fo, R[:, 0] if loo else np.zeros(B), k, loo)
    gL = starts % n  # samples strictly below the group in its row
    gend = gL + m - 1  # last sorted index of the group in its row
    per_row = np.bincount(starts // n, minlength=B)  # groups per row
    row_last = np.repeat(np.cumsum(per_row) - 1, per_row)  # (G,) last group of the group's row
    row_first = row_last - np.repeat(per_row, per_row) + 1

    def above(x):  # (G,) -> sum over the groups above each group in its row
        cx = np.cumsum(x)
        return cx[row_last] - cx

    def below(x):  # (G,) -> sum over the groups below each group in its row
        cx = np.cumsum(x) - x
        return cx - cx[row_first]

    # loo credit is unchanged by a constant shift of a row's rewards (the k/n terms cancel);
    # shifting by one of the row's own rewards makes all-equal rewards give exactly 0
    shift = R[:, 0] if loo else np.zeros(B)
    sg = shift.take(starts // n)  # (G,) shift of each group's row
    r = R.ravel().take(fo)  # (B*n,) rewards in score order
    r -= sg.take(gid)  # equal rewards become exact zeros, so their credit is exactly 0
    mf = m.astype(np.float64)
    gsum = np.add.reduceat(r, starts)  # (G,) reward sum of each group
    Ck, Ck1, Cb = count_tables(n, k)  # entry x+1 for x = -1..n
    ck_lo, ck_hi, ck1_hi1 = Ck.take(gL + 1), Ck.take(gend + 2), Ck1.take(gend + 1)  # C(L,k), C(L+m,k), C(L+m-1,k-1)
    a = (ck_hi - ck_lo) / mf  # own reward, top group G
    c = (mf * ck1_hi1 - ck_hi + ck_lo) / np.maximum(mf * (mf - 1), 1.0)  # each tied mate; m = 1: 0 by Pascal
    A = (ck1_hi1 - Ck1.take(gL)) / mf  # as a top group over one fixed lower sample
    # every term is (own reward) x (group coefficient) + (group constant): W_i = r_i alpha_G + beta_G
    alpha = a - c
    beta = gsum * c + above(gsum * A)  # tied mates' sum is gsum - r_i
    group_total = gsum * alpha + mf * beta  # sum of W over the group's members
    pool = np.add.reduceat(group_total, np.cumsum(per_row) - per_row) / k + shift  # sum_S g(S) = (1/k) sum_i W_i
    if loo:
        cb_lo1, cb_lo, cb_hi1, cb_hi = Cb.take(gL), Cb.take(gL + 1), Cb.take(gend + 1), Cb.take(gend + 2)
        own = (cb_hi1 - cb_lo) / np.maximum(mf - 1, 1.0)  # own group shrinks to m-1; m = 1: 0
        # groups below keep their L and m; groups above see L-1 below
        outside = below(gsum * (cb_hi - cb_lo) / mf) + above(gsum * (cb_hi1 - cb_lo1) / mf)
        kn = k / n  # C(n-1,k-1)/C(n,k)
        alpha = alpha + kn * own
        beta = beta - kn * (outside + gsum * own)
    W = r * alpha.take(gid)
    W += beta.take(gid)
    out = np.empty(B * n)
    out[fo] = W
    return out.reshape(B, n), pool


def _bon_rl_distinct(r: np.ndarray, fo: np.ndarray, shift: np.ndarray, k: int,
                     loo: bool) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_bon_rl_core` without ties: rewards in score order (B, n), every group one sample at rank L.

    With m = 1 the tied-mate terms vanish and each coefficient depends on the rank alone:
    ``W_L = r_L w_k(L) + sum_{j>L} r_j (C(j,k-1) - C(j-1,k-1))/C(n,k)``, minus, with the
    leave-one-out baseline, ``k/n`` times the same sums over the other n-1 samples.
    """
    B, n = r.shape
    r = r - shift[:, None]  # equal rewards become exact zeros (loo); a no-op shift otherwise
    Ck, Ck1, Cb = count_tables(n, k)  # entry x+1 for x = -1..n
    a = Ck[2:] - Ck[1:-1]  # (n,) own reward as the top of the subset: w_k(L)
    A = Ck1[1:-1] - Ck1[:-2]  # (n,) as one of the k-1 below a higher top

    def above(x):  # sum over the ranks above each rank, per row
        cx = np.cumsum(x, axis=1)
        return cx[:, -1:] - cx

    W = r * a
    W += above(r * A)
    pool = W.sum(axis=1) / k + shift  # sum_S g(S) = (1/k) sum_i W_i
    if loo:
        x = r * (Cb[2:] - Cb[1:-1])  # ranks below keep their place
        below = np.cumsum(x, axis=1) - x
        W -= (k / n) * (below + above(r * (Cb[1:-1] - Cb[:-2])))  # ranks above move down by one
    out = np.empty(B * n)
    out[fo] = W.ravel()
    return out.reshape(B, n), pool


@functools.lru_cache(maxsize=256)
def _pass_tables(n: int, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(n+1,) tables over c = correct samples in the pool, for the unbiased pass@k credit.

    ``q[c] = C(n-1-c, k-1)/C(n-1, k-1)`` (an incorrect sample's k-1 companions miss every correct
    one), ``b1[c]``, ``b0[c]``: pass@kb of the other n-1 samples when the sample is correct /
    incorrect (the leave-one-out baseline, Chen et al. 2021's estimator, ``kb = min(k, n-1)``).
    Cached per ``(n, k)``: a run asks for the same few.
    """
    c = np.arange(n + 1)
    q = np.exp(log_miss(n - 1, np.minimum(c, n - 1), k - 1))  # only used where c <= n-1
    if n > 1:
        kb = min(k, n - 1)
        b1 = pass_at_k_counts(n - 1, np.maximum(c - 1, 0), kb)
        b0 = pass_at_k_counts(n - 1, np.minimum(c, n - 1), kb)
    else:
        b1 = b0 = np.zeros(n + 1)
    for t in (q, b1, b0):
        t.flags.writeable = False
    return q, b1, b0


def _pass_at_k_core(c: np.ndarray, k: int, estimator: str, positive_only: bool) -> np.ndarray:
    """Binary c (B, n) float64 -> credit (B, n)."""
    B, n = c.shape
    tot = c.sum(-1, keepdims=True)  # correct samples per prompt
    if estimator == "plugin":
        p = tot / n
        w = (k / n) * (1 - p) ** (k - 1) * (c - p)
    else:
        # subset sums over C(n,k) = (k/n) * share of the C(n-1,k-1) subsets holding i that
        # succeed: all for a correct sample; for an incorrect one those with a correct mate
        # among its k-1 companions; minus the leave-one-out baseline (all-equal rows give 0)
        q, b1, b0 = _pass_tables(n, k)
        ti = tot.astype(np.int64)
        w = np.where(c > 0, 1.0 - b1.take(ti), 1.0 - q.take(ti) - b0.take(ti))
        w *= k / n
    if positive_only:
        w = w * c
    return w


def _loo_mean(x: np.ndarray) -> np.ndarray:
    """(B, n) -> mean of the other n-1 entries per position; 0 when n = 1."""
    n = x.shape[-1]
    if n == 1:
        return np.zeros_like(x)
    return (x.sum(-1, keepdims=True) - x) / (n - 1)


def _bon_sft_core(s: np.ndarray, s_star: np.ndarray, k: int, smoothing: float) -> np.ndarray:
    """Scores (B, n), expert scores (B,) -> sample credit (B, n)."""
    B, n = s.shape
    if k == 1:
        return np.zeros_like(s)
    u = (s <= s_star[:, None]).astype(np.float64)  # at or below the expert
    v = (s < s_star[:, None]).astype(np.float64)  # strictly below
    F = (u.sum(-1) + smoothing) / (n + smoothing)  # expert counted as `smoothing` pseudo-samples at s*
    F_ = v.sum(-1) / (n + smoothing)
    # h = log sum_{j<k} F^j F_^(k-1-j) = (k-1) log F + log sum_{q<k} r^q with r = F_/F <= 1
    r = (F_ / F)[:, None]
    q = np.arange(k, dtype=np.float64)  # (k,) powers
    rq = r ** q  # (B, k)
    z = rq.sum(-1)
    h_F = ((k - 1 - q) * rq).sum(-1) / (z * F)  # dh/dF
    h_F_ = (q[1:] * r ** (q[1:] - 1)).sum(-1) / (z * F)  # dh/dF_
    # grad F = E[(u - F) grad log pi]; leave-one-out mean as the baseline
    return (h_F[:, None] * (u - _loo_mean(u)) + h_F_[:, None] * (v - _loo_mean(v))) / n


def _reinforce_core(R: np.ndarray, baseline: str) -> np.ndarray:
    n = R.shape[-1]
    if baseline == "loo":
        if n > 1:
            R = R - R[:, :1]  # same credit, exact zeros for all-equal rewards
        return (R - _loo_mean(R)) / n
    return R / n


# ----------------------------------------------------------------------------
# validation shared with bonft.objectives.losses
# ----------------------------------------------------------------------------

def _scored_pool(scores, rewards, *, shape=None) -> tuple[np.ndarray, np.ndarray]:
    s = as_host("scores", scores, ndim=2)
    R = as_host("rewards", rewards, ndim=2)
    want = tuple(s.shape) if shape is None else shape
    for name, a in (("scores", s), ("rewards", R)):
        if tuple(a.shape) != want:
            what = "the same shape as scores" if shape is None else "shape (B, n) of logprobs"
            raise ValueError(f"{name} must have {what} {want}, got {tuple(a.shape)}")
    return s, R


def _correct_pool(correct, *, shape=None) -> np.ndarray:
    c = as_host("correct", correct, ndim=2)
    if shape is not None and tuple(c.shape) != shape:
        raise ValueError(f"correct must have shape (B, n) of logprobs {shape}, got {tuple(c.shape)}")
    check_binary("correct", c)
    return c


def _expert_pool(scores, expert_scores, k, smoothing, *, shape=None) -> tuple[np.ndarray, np.ndarray, int, float]:
    s = as_host("scores", scores, ndim=2)
    if shape is not None and tuple(s.shape) != shape:
        raise ValueError(f"scores must have shape (B, n) of logprobs {shape}, got {tuple(s.shape)}")
    e = as_host("expert_scores", expert_scores, ndim=1)
    if e.shape[0] != s.shape[0]:
        raise ValueError(f"expert_scores must have shape (B,) = ({s.shape[0]},) to match scores, got {tuple(e.shape)}")
    k = check_k(k, s.shape[1])
    smoothing = check_nonnegative("smoothing", smoothing)
    if smoothing == 0 and k > 1:  # h is undefined for a row where every sample beats the expert
        none_below = ~(s <= e[:, None]).any(-1)
        if none_below.any():
            b = int(np.flatnonzero(none_below)[0])
            raise ValueError(
                f"smoothing=0 needs a sample scoring at or below the expert, got none in row {b}; use smoothing > 0")
    return s, e, k, smoothing
