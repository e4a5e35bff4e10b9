"""Per-sample credit for best-of-N-aware policy gradients.

Setting: for each of ``B`` prompts the policy ``pi`` drew ``n`` samples
``y_1..y_n``; sample ``i`` has a verifier score ``s_i`` and a true reward
``R_i``. Best-of-k keeps the sample with the highest score among ``k`` draws
(ties broken uniformly at random) and ``V_k = E[R of the kept sample]``.

Every function here returns a credit array ``w`` of shape ``(B, n)`` such that
``sum_i w_i * grad log pi(y_i)`` is a (possibly biased, see each docstring)
estimate of the gradient of the objective for that prompt. Credit is plain
data: nothing here calls autograd. Inputs may be numpy arrays, nested lists or
torch tensors; a torch input gives a torch output on the same device (dtype of
the reward-like input when it is floating, else float64), anything else gives
a float64 numpy array. The maths runs in float64 numpy on the host: each
public function checks its inputs once (:mod:`bonft.objectives.validation`)
and calls a private float64 core below it that trusts them; hyper-parameters
are keyword-only.

Caution: credit pushes the policy towards whatever the verifier and reward
prefer. A verifier that can be fooled (a reward model, an incomplete unit-test
suite) will be exploited - keep a held-out true reward and watch the gap
(reward hacking). When rewards come from running model-written code, run it in
a sandbox.

Papers: Chow et al. 2024 "Inference-Aware Fine-Tuning for Best-of-N Sampling
in LLMs" (best-of-N RL and SFT objectives); Chen et al. 2021 (the unbiased
pass@k estimator); Kool et al. 2019 (leave-one-out baselines); Walder &
Karkhanis 2025 (U-statistic pass@k gradients).
"""
from __future__ import annotations

import functools

import numpy as np
import torch

from bonft._core.checks import check_bool, check_choice, check_k
from bonft._core.passk import log_miss, pass_at_k_counts
from bonft._core.ties import first_of_group, flat_groups
from bonft._core.ustat import count_tables
from bonft.objectives.validation import (
    as_host,
    check_loo_pool,
    correct_pool,
    finish,
    out_kind,
    reference_pool,
    scored_pool,
)

__all__ = ["best_of_k_credit", "pass_at_k_credit", "best_of_k_sft_credit", "reinforce_credit", "pool_value"]


# ----------------------------------------------------------------------------
# public API
# ----------------------------------------------------------------------------

def best_of_k_credit(scores, rewards, *, k, baseline="loo"):
    r"""Unbiased credit for the best-of-k value ``V_k`` with a verifier.

    Shape: ``scores (B, n), rewards (B, n) -> credit (B, n)``.

    .. math::
        w_i = \frac{1}{\binom nk}\sum_{|S|=k,\ S\ni i} E[R_{\mathrm{sel}(S)}]
              \;-\; \frac{\binom{n-1}{k-1}}{\binom nk}\, b_i

    where ``E[R_sel(S)]`` is the mean reward of the top-scored members of the
    k-subset ``S`` (uniform tie-breaking, so exact with tied scores) and
    ``b_i`` is the leave-one-out baseline: the best-of-k U-statistic of the
    other ``n-1`` samples, or their best-of-(k-1) value when ``k = n``.

    Why it is unbiased for every ``k <= n``: the U-statistic
    ``(1/C(n,k)) sum_S g(S)`` has mean ``V_k``; each subset term's
    score-function gradient only involves the samples in ``S``, so regrouping
    by sample gives the first term, and ``b_i`` never looks at sample ``i``
    (``E[b_i grad log pi(y_i)] = 0``). Hence
    ``E[sum_i w_i grad log pi(y_i)] = grad V_k`` exactly. With ``k = n`` this
    is the best-of-N policy gradient of Chow et al. 2024 (BoN-RL-V); ``k = 1``
    is leave-one-out REINFORCE (Kool et al. 2019), see :func:`reinforce_credit`.

    ``baseline="none"`` drops ``b_i`` (same mean, more variance). With the
    ``"loo"`` baseline, equal rewards give exactly zero credit. A single
    sample (``n = 1``) has nobody to leave out: ``baseline="loo"`` refuses it
    (``ValueError`` naming n); draw ``n >= 2`` or pass ``baseline="none"``
    (credit = reward, plain REINFORCE).

    Cost: one sort and a few prefix sums per row, O(n log n), no Python loop
    over samples; binomial ratios come from exact tables
    (:mod:`bonft._core.ustat`), so ``n = 4096, k = n`` stays finite.

    Caution: optimising best-of-k against a verifier exploits its mistakes
    (reward hacking); evaluate with a reward the verifier does not see.

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs"; Kool et al. 2019, "Buy 4 REINFORCE samples, get a
    baseline for free!".
    """
    kind = out_kind(rewards, scores)
    s, R = scored_pool(scores, rewards)
    return finish(_best_of_k_credit_host(s, R, k=k, baseline=baseline)[0], kind)


def _best_of_k_credit_host(s: np.ndarray, R: np.ndarray, *, k, baseline: str) -> tuple[np.ndarray, np.ndarray]:
    """:func:`best_of_k_credit` of checked float64 host pools (B, n), with the pool U-statistic (B,) it gets on the way.

    For the losses, which check the pools once against the log-probs: ``k`` and ``baseline`` are checked here.
    """
    k = check_k(k, s.shape[1])
    check_choice("baseline", baseline, ("loo", "none"))
    if baseline == "loo":
        check_loo_pool(s.shape[1], "best_of_k_credit")
    return _best_of_k_core(s, R, k, baseline)


def pool_value(scores, rewards, *, k):
    r"""Best-of-k U-statistic of each pool.

    Shape: ``scores (B, n), rewards (B, n) -> (B,)``.

    .. math:: \hat V_k = \frac{1}{\binom nk}\sum_{|S|=k} E[R_{\mathrm{sel}(S)}]

    Unbiased for ``V_k`` (exact with ties). Same kinds in/out as :func:`best_of_k_credit`.

    References: Chow et al. 2024; Hoeffding 1948 (U-statistics).
    """
    kind = out_kind(rewards, scores)
    s, R = scored_pool(scores, rewards)
    k = check_k(k, s.shape[1])
    return finish(_best_of_k_core(s, R, k, "none")[1], kind, "pool_value")


def pass_at_k_credit(correct, *, k, estimator="unbiased", positive_only=False):
    r"""Credit for pass@k = 1 - (1-p)^k when the verifier is the binary reward.

    Shape: ``correct (B, n)`` booleans or 0/1 ``-> credit (B, n)``.

    .. math::
        w_i = \frac kn\Big(1 - (1 - c_i)\frac{\binom{n-1-c}{k-1}}{\binom{n-1}{k-1}}
              - \mathrm{pass@}k_{\,b}(\text{others of } i)\Big)

    ``estimator="unbiased"`` (default): :func:`best_of_k_credit` with scores =
    rewards = ``correct``, in closed counts. With ``c`` correct samples,
    the k-subset sums over ``C(n,k)`` are ``k/n`` for a correct sample and
    ``(C(n-1,k-1) - C(n-c-1,k-1))/C(n,k)`` for an incorrect one; the
    leave-one-out baseline is ``(k/n) * pass@k`` of the other samples
    (Chen et al. 2021 estimator; ``pass@(k-1)`` of the others when ``k = n``).
    Unbiased for ``grad pass@k`` (Walder & Karkhanis 2025 study this
    U-statistic gradient).

    ``estimator="plugin"``: the closed-form gradient ``k (1-p)^(k-1) grad p``
    with ``p`` replaced by the pool rate ``p_hat = c/n``:
    ``w_i = (k/n) (1-p_hat)^(k-1) (R_i - p_hat)``. **Biased** (the power of an
    estimate is not the estimate of the power, and ``p_hat`` shares samples
    with the gradient); consistent as ``n`` grows. Fewer zero-credit prompts
    only when ``k`` is small; prefer ``"unbiased"``.

    ``positive_only=True``: incorrect samples get zero credit (the positive-only
    idea of Chow et al. 2024, BoN-RLB(P); the weights here are our own
    derivation). With the unbiased weights a correct sample's credit is
    ``(k/n)(1 - b_i)`` and ``b_i`` is independent of sample ``i``, so the
    estimate has mean
      * ``k < n``:  ``k (1-p)^k grad p = (1-p) grad pass@k
        = grad[(k/(k+1)) pass@(k+1)]`` - the same direction as
        ``grad pass@k``, shrunk by ``1-p``;
      * ``k = n``:  exactly ``grad pass@k`` (incorrect samples already get
        zero unbiased credit when the subset is the whole pool).
    With ``estimator="plugin"`` it estimates the same thing consistently.

    Needs ``n >= 2`` (``ValueError`` naming n otherwise): with one sample the
    unbiased credit has no other sample for its baseline and the plug-in
    credit is identically zero.

    References: Chen et al. 2021, "Evaluating Large Language Models Trained on
    Code"; Walder & Karkhanis 2025; Chow et al. 2024.
    """
    kind = out_kind(correct)
    return finish(_pass_at_k_credit_host(correct_pool(correct), k=k, estimator=estimator, positive_only=positive_only),
                  kind)


def _pass_at_k_credit_host(c: np.ndarray, *, k, estimator: str, positive_only: bool, dtype: torch.dtype | None = None):
    """:func:`pass_at_k_credit` of a checked 0/1 float64 host pool (B, n); the options are checked here.

    ``dtype`` (a torch floating dtype): the unbiased credit without ``positive_only`` comes back as a host
    tensor of that dtype, the float64 credit rounded once (:func:`_pass_at_k_selected`); any other credit
    as the float64 array.
    """
    k = check_k(k, c.shape[1])
    check_choice("estimator", estimator, ("unbiased", "plugin"))
    check_bool("positive_only", positive_only)
    if c.shape[1] < 2:
        raise ValueError(
            "n must be >= 2 for pass_at_k_credit (n=1: the unbiased credit's baseline leaves the only sample out "
            "and the plug-in credit is identically 0); draw n >= 2 samples per prompt or use "
            "best_of_k_credit(correct, correct, k=1, baseline='none')")
    if dtype is not None and estimator == "unbiased" and not positive_only:
        return _pass_at_k_selected(c, k, dtype)
    return _pass_at_k_core(c, k, estimator, positive_only)


def best_of_k_sft_credit(scores, reference_scores, *, k, smoothing=1.0):
    r"""Credit for the policy samples in best-of-k-aware SFT on a reference response.

    Shape: ``scores (B, n)`` verifier scores of the policy samples,
    ``reference_scores (B,)`` score ``s*`` of each prompt's reference (gold) response
    ``-> credit (B, n)``.

    The objective is the log-probability that best-of-k *selects* the reference
    response ``y*`` (Chow et al. 2024, BoN-SFT):

    .. math::
        \log\pi_{bon}(y^*) = \log\pi(y^*) + h(F, F_<),\qquad
        h = \log\frac{F^k - F_<^k}{F - F_<} = \log\sum_{j<k}F^jF_<^{k-1-j}

    with ``F = P(s <= s*)`` and ``F_< = P(s < s*)`` under ``pi`` (continuous
    scores: ``h = log k + (k-1) log F``). The ``log pi(y*)`` term is the usual
    SFT term (see :func:`bonft.objectives.losses.best_of_k_sft_loss`); this function returns
    the credit for the policy samples that estimates ``grad h``:

      ``w_i = (1/n) [h_F (u_i - mean_{-i} u) + h_<(v_i - mean_{-i} v)]``,
      ``u_i = 1{s_i <= s*}``, ``v_i = 1{s_i < s*}``,

    i.e. ``grad F = E[(1{s <= s*} - F) grad log pi]`` with a leave-one-out
    baseline, and the partial derivatives ``h_F, h_<`` (both >= 0) evaluated
    at pool estimates. Samples that beat the reference get negative credit,
    samples below it positive credit.

    Smoothing: the pool estimates count the reference response itself as
    ``smoothing`` pseudo-samples at ``s*``:
    ``F_hat = (#{s_i <= s*} + smoothing)/(n + smoothing)``,
    ``F<_hat = #{s_i < s*}/(n + smoothing)``. With ``smoothing > 0`` the
    estimate is finite even when no sample scores at or below the reference;
    ``smoothing=0`` is allowed but such a row raises ``ValueError``.

    Bias: a ratio estimator (the derivatives of ``h`` are evaluated at
    estimates), so consistent but **not unbiased**; the bias shrinks as ``n``
    grows. ``k = 1`` gives zero credit (``h = 0``: plain SFT).

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs" (BoN-SFT).
    """
    kind = out_kind(scores)
    s, e, k, smoothing = reference_pool(scores, reference_scores, k=k, smoothing=smoothing)
    return finish(_best_of_k_sft_core(s, e, k, smoothing), kind)


def reinforce_credit(rewards, *, baseline="loo"):
    r"""Leave-one-out REINFORCE credit (Kool et al. 2019).

    Shape: ``rewards (B, n) -> credit (B, n)``.

    .. math:: w_i = \frac{1}{n}\Big(R_i - \frac{1}{n-1}\sum_{j\ne i}R_j\Big)

    Unbiased for ``grad E[R]`` (= ``grad V_1``); identical to
    ``best_of_k_credit(scores, rewards, k=1)`` for any scores. ``baseline="none"``:
    ``w_i = R_i/n``. With ``n = 1`` there are no others: ``baseline="loo"``
    raises ``ValueError`` (draw ``n >= 2``, or pass ``baseline="none"``).

    References: Kool et al. 2019, "Buy 4 REINFORCE samples, get a baseline for free!".
    """
    kind = out_kind(rewards)
    return finish(_reinforce_credit_host(as_host("rewards", rewards, ndim=2), baseline=baseline), kind)


def _reinforce_credit_host(R: np.ndarray, *, baseline: str) -> np.ndarray:
    """:func:`reinforce_credit` of checked float64 host rewards (B, n); ``baseline`` is checked here."""
    check_choice("baseline", baseline, ("loo", "none"))
    if baseline == "loo":
        check_loo_pool(R.shape[1], "reinforce_credit")
    return _reinforce_core(R, baseline)


# ----------------------------------------------------------------------------
# float64 numpy cores (inputs checked by the public functions above)
# ----------------------------------------------------------------------------

def _best_of_k_core(s: np.ndarray, R: np.ndarray, k: int, baseline: str) -> tuple[np.ndarray, np.ndarray]:
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
    first = first_of_group(s.ravel().take(fo).reshape(B, n))  # tie groups of the sorted scores
    if first.all():  # no tied scores (e.g. a reward model's): each group is one sample
        return _best_of_k_distinct(R.ravel().take(fo).reshape(B, n), fo, R[:, 0] if loo else np.zeros(B), k, loo)
    starts, gid, m = flat_groups(first)  # tie groups, row by row
    gL = starts % n  # samples strictly below the group in its row
    gend = gL + m - 1  # last sorted index of the group in its row
    per_row = np.bincount(starts // n, minlength=B)  # groups per row
    row_last = np.repeat(np.cumsum(per_row) - 1, per_row)  # (G,) last group of the group's row
    row_first = row_last - np.repeat(per_row, per_row) + 1

    def above(x):  # (G,) -> sum over the groups above each group in its row
        cx = _running_sum(x)
        return cx[row_last] - cx

    def below(x):  # (G,) -> sum over the groups below each group in its row
        cx = _running_sum(x) - x
        return cx - cx[row_first]

    # loo credit is unchanged by a constant shift of a row's rewards (the k/n terms cancel);
    # shifting by one of the row's own rewards makes all-equal rewards give exactly 0
    shift = R[:, 0] if loo else np.zeros(B)
    # (B*n,) rewards in score order; equal rewards become exact zeros, so their credit is exactly 0
    r = (R - R[:, :1] if loo else R).ravel().take(fo)
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


def _best_of_k_distinct(r: np.ndarray, fo: np.ndarray, shift: np.ndarray, k: int,
                     loo: bool) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_best_of_k_core` without ties: rewards in score order (B, n), every group one sample at rank L.

    The credit and the pool value are then a fixed linear map of the rewards in score order
    (:func:`_distinct_sums`): for ``n <= 64`` products with its (n, n + 1) matrix, cached per
    ``(n, k, baseline)`` (:func:`_distinct_map`; 0.05 ms at (256, 64) against 0.12 ms for the
    prefix sums), else the prefix sums themselves. The products go in blocks of rows small enough
    for the BLAS to run each on the calling thread (OpenBLAS threads a product of more than 2^18
    multiply-adds): a helper thread waiting for a busy core made the call 10x slower under load.
    """
    B, n = r.shape
    r = r - shift[:, None]  # equal rewards become exact zeros (loo); a no-op shift otherwise
    if n <= _MAP_MAX_N:
        M = _distinct_map(n, k, loo)
        Wp = np.empty((B, n + 1))
        step = max(1, _ONE_THREAD_MACS // (n * (n + 1)))
        for i in range(0, B, step):
            np.matmul(r[i:i + step], M, out=Wp[i:i + step])
        W, pool = Wp[:, :n], Wp[:, n] + shift
    else:
        W, pool = _distinct_sums(r, k, loo)
        pool += shift
    out = np.empty(B * n)
    out[fo] = W.ravel()
    return out.reshape(B, n), pool


_MAP_MAX_N = 64  # above, the (n, n) products cost about what the O(n) prefix sums do
_ONE_THREAD_MACS = 2**17  # multiply-adds per product: below OpenBLAS's threading threshold (2^18), with room


@functools.lru_cache(maxsize=64)
def _distinct_map(n: int, k: int, loo: bool) -> np.ndarray:
    """``M (n, n + 1)``: ``r @ M`` is the credit (first n columns) and the pool U-statistic (last) of rewards in
    score order without ties.

    Row ``j`` of ``M`` is :func:`_distinct_sums` of the unit reward at rank ``j``: the same
    coefficients (each entry a single table value or 0, or their k/n-scaled difference), summed by
    the product instead of by running sums. Read-only.
    """
    W, v = _distinct_sums(np.eye(n), k, loo)
    M = np.concatenate([W, v[:, None]], axis=1)
    M.flags.writeable = False
    return M


def _distinct_sums(r: np.ndarray, k: int, loo: bool) -> tuple[np.ndarray, np.ndarray]:
    """Credit (B, n) in score order and pool U-statistic (B,) of shifted rewards in score order, no ties.

    With m = 1 the tied-mate terms vanish and each coefficient depends on the rank alone:
    ``W_L = r_L w_k(L) + sum_{j>L} r_j (C(j,k-1) - C(j-1,k-1))/C(n,k)``, minus, with the
    leave-one-out baseline, ``k/n`` times the same sums over the other n-1 samples.
    """
    n = r.shape[1]
    Ck, Ck1, Cb = count_tables(n, k)  # entry x+1 for x = -1..n
    a = Ck[2:] - Ck[1:-1]  # (n,) own reward as the top of the subset: w_k(L)
    A = Ck1[1:-1] - Ck1[:-2]  # (n,) as one of the k-1 below a higher top

    def above(x):  # sum over the ranks above each rank, per row
        cx = _running_sum(x)
        return cx[:, -1:] - cx

    W = r * a
    W += above(r * A)
    pool = W.sum(axis=1) / k  # sum_S g(S) = (1/k) sum_i W_i
    if loo:
        x = r * (Cb[2:] - Cb[1:-1])  # ranks below keep their place
        below = _running_sum(x) - x
        W -= (k / n) * (below + above(r * (Cb[1:-1] - Cb[:-2])))  # ranks above move down by one
    return W, pool


def _running_sum(x: np.ndarray) -> np.ndarray:
    """``np.cumsum(x, axis=-1)`` of a float64 array by torch's CPU loop: the same additions in the same order.

    Both add left to right in float64, so the sums are the same numbers (torch starts from +0, so a
    leading run of -0.0 comes out as +0.0: the same value); torch's loop is about 5x faster (11 us
    against 56 us for the 16384 numbers of (B, n) = (256, 64) pools, one thread).
    """
    out = np.empty_like(x)
    torch.cumsum(torch.from_numpy(x), -1, out=torch.from_numpy(out))  # host memory both: nothing is read back
    return out


@functools.lru_cache(maxsize=256)
def _pass_values(n: int, k: int) -> np.ndarray:
    """(n+1,) Chen et al. 2021's unbiased pass@k of a pool of n with c correct, for c = 0..n (read-only).

    :func:`bonft._core.passk.pass_at_k_counts` evaluated once per ``(n, k)``: a pool's value is a
    lookup by its count of correct samples (the same numbers, elementwise, at a fraction of the cost).
    """
    v = pass_at_k_counts(n, np.arange(n + 1), k)
    v.flags.writeable = False
    return v


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


@functools.lru_cache(maxsize=64)
def _pass_credit_values(n: int, k: int, dtype: torch.dtype) -> tuple[torch.Tensor, torch.Tensor]:
    """(n+1,) unbiased pass@k credit of a correct and of an incorrect sample, by the pool's count of correct
    samples, in ``dtype``: :func:`_pass_at_k_core`'s float64 values (the same operations), rounded once."""
    q, b1, b0 = _pass_tables(n, k)
    kn = k / n
    hit, miss = (1.0 - b1) * kn, (1.0 - q - b0) * kn
    if not (np.isfinite(hit).all() and np.isfinite(miss).all()):  # shares and chances: never, checked once
        raise ValueError(f"the pass@k credit tables of n={n}, k={k} are not finite")
    return torch.from_numpy(hit).to(dtype), torch.from_numpy(miss).to(dtype)


def _pass_at_k_selected(c: np.ndarray, k: int, dtype: torch.dtype) -> torch.Tensor:
    """:func:`_pass_at_k_core` (unbiased, not positive_only) as a host tensor of ``dtype``.

    Each entry is one of two values of its row, so the row's two values are rounded to ``dtype`` and
    then selected: the numbers of the float64 credit converted, without the (B, n) float64 array and
    its conversion (a numpy ``where`` of per-row values walks the rows one by one, 4x slower than
    torch's). The count of correct samples is exact in any order of addition (0/1 values).
    """
    hit, miss = _pass_credit_values(c.shape[1], k, dtype)
    tot = torch.from_numpy(c).sum(-1, keepdim=True).long()  # (B, 1) correct samples per pool
    return torch.where(torch.from_numpy(c > 0), hit.take(tot), miss.take(tot))  # numpy's c > 0: 3x torch's


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


def _best_of_k_sft_core(s: np.ndarray, s_star: np.ndarray, k: int, smoothing: float) -> np.ndarray:
    """Scores (B, n), reference scores (B,) -> sample credit (B, n)."""
    B, n = s.shape
    if k == 1:
        return np.zeros_like(s)
    ub = s <= s_star[:, None]  # at or below the reference
    vb = s < s_star[:, None]  # strictly below
    U = np.count_nonzero(ub, axis=-1).astype(np.float64)  # exact counts: the sums of the 0/1 indicators
    V = np.count_nonzero(vb, axis=-1).astype(np.float64)
    F = (U + smoothing) / (n + smoothing)  # reference counted as `smoothing` pseudo-samples at s*
    F_ = V / (n + smoothing)
    # h = log sum_{j<k} F^j F_^(k-1-j) = (k-1) log F + log sum_{q<k} r^q with r = F_/F <= 1
    r = (F_ / F)[:, None]
    q = np.arange(k, dtype=np.float64)  # (k,) powers
    rq = r ** q  # (B, k)
    z = rq.sum(-1)
    h_F = ((k - 1 - q) * rq).sum(-1) / (z * F)  # dh/dF
    h_F_ = (q[1:] * rq[:, :-1]).sum(-1) / (z * F)  # dh/dF_ (r ** (q - 1) for q = 1..k-1: the powers 0..k-2)
    # grad F = E[(u - F) grad log pi]; leave-one-out mean as the baseline:
    #   w = (h_F (u - mean_{-i} u) + h_< (v - mean_{-i} v)) / n,
    # and since v <= u each row holds three values only, (u, v) = (1, 1), (1, 0), (0, 0): each is
    # computed per row with the same operations as elementwise, then placed (the same numbers)
    du1, du0 = _loo_centred(U, n)
    dv1, dv0 = _loo_centred(V, n)
    t_u1, t_u0, t_v1, t_v0 = h_F * du1, h_F * du0, h_F_ * dv1, h_F_ * dv0
    table = np.stack(((t_u0 + t_v0) / n, (t_u1 + t_v0) / n, (t_u1 + t_v1) / n), axis=-1)  # (B, 3)
    which = ub.view(np.uint8) + vb.view(np.uint8)  # 0, 1 or 2 entries of (u, v) are 1
    return table.ravel().take(which + (3 * np.arange(B))[:, None])


def _loo_centred(count: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """(B,) count of ones in a 0/1 row of n -> ``x - mean_{-i} x`` for an entry x = 1 and x = 0 (0 when n = 1)."""
    if n == 1:
        return np.ones_like(count), np.zeros_like(count)
    return 1.0 - (count - 1.0) / (n - 1), 0.0 - count / (n - 1)


def _reinforce_core(R: np.ndarray, baseline: str) -> np.ndarray:
    n = R.shape[-1]
    if baseline == "loo":
        if n == 1:
            return R / n  # no others: the leave-one-out mean is 0
        R = R - R[:, :1]  # same credit, exact zeros for all-equal rewards
        # (R - mean_{-i} R) / n with mean_{-i} R = (sum R - R) / (n - 1), in place (two arrays instead of five)
        w = np.add.reduce(R, axis=-1, keepdims=True) - R  # R.sum(-1, keepdims=True) without its Python wrapper
        w /= n - 1
        np.subtract(R, w, out=w)
        if n & (n - 1) == 0:
            w *= 1.0 / n  # n a power of two: the same exact scaling as the division, at half its cost
        else:
            w /= n
        return w
    return R / n
