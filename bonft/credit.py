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
a float64 numpy array. The maths runs in float64.

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

import torch

from bonft._binom import log_comb_torch
from bonft._checks import check_choice, check_k
from bonft._credit_inputs import _as_tensor, _check_binary, _check_bool, _check_smoothing, _finish, _out_kind

__all__ = ["bon_credit", "pass_credit", "sft_credit", "reinforce_credit", "pool_value"]


# ----------------------------------------------------------------------------
# the sorted-pool machinery behind bon_credit (internal, trusts its inputs)
# ----------------------------------------------------------------------------

def _tie_groups(s: torch.Tensor):
    """Sort each row ascending and describe the tie groups.

    s: (B, n) -> order (B, n) sorting permutation, and per *sorted* position:
    L (samples strictly below its group), m (group size), end (last sorted
    index of its group), all (B, n) int64.
    """
    B, n = s.shape
    s_sorted, order = torch.sort(s, dim=-1)  # ties need no order: groups are handled whole
    idx = torch.arange(n, device=s.device).expand(B, n)
    new = torch.ones_like(s_sorted, dtype=torch.bool)
    new[:, 1:] = s_sorted[:, 1:] != s_sorted[:, :-1]  # first member of a group
    last = torch.ones_like(new)
    last[:, :-1] = new[:, 1:]  # last member of a group
    start = torch.where(new, idx, torch.zeros_like(idx)).cummax(-1).values
    end_marks = torch.where(last, idx, torch.full_like(idx, n - 1))
    end = torch.flip(torch.flip(end_marks, [-1]).cummin(-1).values, [-1])  # next group end at or after
    return order, start, end - start + 1, end


def _tables(n: int, k: int, device) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Three (n+2,) tables, entry x+1 for x = -1..n: C(x,k)/C(n,k), C(x,k-1)/C(n,k), C(x,kb)/C(n-1,kb).

    kb = min(k, n-1) is the leave-one-out size (k = n: the others can only
    form best-of-(n-1)); for n = 1 the last table is unused. Every binomial in
    the credit has one of these lower indices and an integer upper index in
    [-1, n], so one O(n) table replaces elementwise lgamma calls.
    """
    kb = max(min(k, n - 1), 0)
    x = torch.arange(-1, n + 1, device=device, dtype=torch.float64)[:, None]
    lower = torch.tensor([k, k - 1, kb], device=device, dtype=torch.float64)
    dens = log_comb_torch(torch.tensor([n, n, n - 1], device=device), lower[[0, 0, 2]])  # C(n,k), C(n,k), C(n-1,kb)
    tab = torch.exp(log_comb_torch(x, lower) - dens)  # (n+2, 3)
    return tab[:, 0].contiguous(), tab[:, 1].contiguous(), tab[:, 2].contiguous()


def _lookup(tab: torch.Tensor, x1: torch.Tensor) -> torch.Tensor:
    """tab (n+2,) at flat int positions x1 = x + 1, shaped like x1."""
    return tab.index_select(0, x1.reshape(-1)).view(x1.shape)


def _before(x: torch.Tensor, start: torch.Tensor) -> torch.Tensor:
    """Sum of x (B, n) over sorted positions strictly before each own group."""
    return (torch.cumsum(x, -1) - x).gather(-1, start)  # exclusive prefix at the group start


def _after(x: torch.Tensor, end: torch.Tensor) -> torch.Tensor:
    """Sum of x (B, n) over sorted positions strictly after each own group."""
    C = torch.cumsum(x, -1)
    return C[:, -1:] - C.gather(-1, end)


def _bon_credit_t(s: torch.Tensor, R: torch.Tensor, k: int, baseline: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Trusted float64 core: scores, rewards (B, n) -> (credit (B, n), pool U-statistic V_k (B,)).

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
    """
    B, n = s.shape
    loo = baseline == "loo" and n > 1
    order, L, m, end = _tie_groups(s)
    r = R.gather(-1, order)  # rewards in ascending score order
    # loo credit is unchanged by a constant shift of a row's rewards (the k/n
    # terms cancel); shifting by one of the row's own rewards makes all-equal
    # rewards give exactly 0 and keeps large offsets from cancelling badly
    shift = R[:, :1] if loo else torch.zeros_like(R[:, :1])
    r = r - shift
    mf = m.to(r.dtype)
    top = L + m  # L + m = end + 1, upper index of the own group
    # table positions (x + 1) for x = L-1, L, L+m-1, L+m
    x_lo1, x_lo, x_hi1, x_hi = L, L + 1, top, top + 1
    Ck, Ck1, Cb = _tables(n, k, s.device)
    ck_lo, ck_hi = _lookup(Ck, x_lo), _lookup(Ck, x_hi)  # C(L,k), C(L+m,k) over C(n,k)
    ck1_hi1 = _lookup(Ck1, x_hi1)  # C(L+m-1,k-1) over C(n,k)
    a = (ck_hi - ck_lo) / mf  # own reward, top group G
    c = (mf * ck1_hi1 - ck_hi + ck_lo) / (mf * (mf - 1)).clamp_min(1.0)  # each tied mate; m = 1: 0 by Pascal
    A = (ck1_hi1 - _lookup(Ck1, x_lo1)) / mf  # as a top group over one fixed lower sample
    C = torch.cumsum(r, -1)
    mates = C.gather(-1, end) - (C - r).gather(-1, L) - r  # sum of R over the tied mates
    W = r * a + mates * c + _after(r * A, end)
    pool = W.sum(-1) / k + shift[:, 0]  # sum_i sum_{S contains i} g(S) = k * sum_S g(S)
    if loo:
        cb_lo1, cb_lo, cb_hi1, cb_hi = (_lookup(Cb, x) for x in (x_lo1, x_lo, x_hi1, x_hi))
        below = _before(r * (cb_hi - cb_lo) / mf, L)  # groups below keep their L and m
        own = mates * (cb_hi1 - cb_lo) / (mf - 1).clamp_min(1.0)  # own group shrinks to m-1; m = 1: 0
        above = _after(r * (cb_hi1 - cb_lo1) / mf, end)  # groups above see L-1 below
        W = W - (k / n) * (below + own + above)  # k/n = C(n-1,k-1)/C(n,k)
    return torch.empty_like(W).scatter_(-1, order, W), pool


# ----------------------------------------------------------------------------
# public API
# ----------------------------------------------------------------------------

def bon_credit(scores, rewards, k, *, baseline="loo"):
    r"""Unbiased credit for the best-of-k value ``V_k`` with a verifier.

    scores: (B, n), rewards: (B, n) -> credit (B, n).

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
    ``"loo"`` baseline, equal rewards give exactly zero credit when ``n >= 2``.
    A single sample (``n = 1``) has nobody to leave out: its baseline is 0 and
    its credit is its reward, which keeps the estimate unbiased (plain
    REINFORCE) rather than silently returning no signal.

    Cost: one sort and a few prefix sums per row, O(n log n), no Python loop
    over samples; binomials are formed as ratios of ``log_comb`` so
    ``n = 4096, k = n`` stays finite.

    Caution: optimising best-of-k against a verifier exploits its mistakes
    (reward hacking); evaluate with a reward the verifier does not see.
    """
    kind = _out_kind(rewards, scores)
    s = _as_tensor("scores", scores, ndim=2)
    R = _as_tensor("rewards", rewards, ndim=2)
    if R.shape != s.shape:
        raise ValueError(f"rewards must have the same shape as scores {tuple(s.shape)}, got {tuple(R.shape)}")
    k = check_k(k, s.shape[1])
    check_choice("baseline", baseline, ("loo", "none"))
    w, _ = _bon_credit_t(s, R.to(s.device), k, baseline)
    return _finish(w, kind)


def pool_value(scores, rewards, k):
    r"""Best-of-k U-statistic of each pool: scores, rewards (B, n) -> (B,).

    .. math:: \hat V_k = \frac{1}{\binom nk}\sum_{|S|=k} E[R_{\mathrm{sel}(S)}]

    Unbiased for ``V_k`` (exact with ties). Same kinds in/out as :func:`bon_credit`.
    """
    kind = _out_kind(rewards, scores)
    s = _as_tensor("scores", scores, ndim=2)
    R = _as_tensor("rewards", rewards, ndim=2)
    if R.shape != s.shape:
        raise ValueError(f"rewards must have the same shape as scores {tuple(s.shape)}, got {tuple(R.shape)}")
    k = check_k(k, s.shape[1])
    _, v = _bon_credit_t(s, R.to(s.device), k, "none")
    return _finish(v, kind)


def _pass_credit_t(c: torch.Tensor, k: int, estimator: str, positive_only: bool) -> torch.Tensor:
    """Trusted core: binary c (B, n) float64 -> credit (B, n)."""
    B, n = c.shape
    tot = c.sum(-1, keepdim=True)  # correct samples per prompt
    if estimator == "plugin":
        p = tot / n
        w = (k / n) * (1 - p) ** (k - 1) * (c - p)
    else:
        # subset sums over C(n,k) = (k/n) * share of the C(n-1,k-1) subsets
        # holding i that succeed: all for a correct sample; for an incorrect
        # one those with a correct mate among its k-1 companions
        q = torch.exp(log_comb_torch(n - 1 - tot, k - 1) - log_comb_torch(n - 1, k - 1))
        w = 1 - (1 - c) * q
        if n > 1:
            kb = min(k, n - 1)
            others = tot - c  # correct among the other n-1
            b = 1 - torch.exp(log_comb_torch(n - 1 - others, kb) - log_comb_torch(n - 1, kb))
            w = w - b  # all-equal rows give exactly 1 - 1 or 1 - 1 - 0 = 0
        w = (k / n) * w
    if positive_only:
        w = w * c
    return w


def pass_credit(correct, k, *, estimator="unbiased", positive_only=False):
    r"""Credit for pass@k = 1 - (1-p)^k when the verifier is the binary reward.

    correct: (B, n) booleans or 0/1 -> credit (B, n).

    ``estimator="unbiased"`` (default): :func:`bon_credit` with scores =
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
    """
    kind = _out_kind(correct)
    c = _as_tensor("correct", correct, ndim=2)
    _check_binary("correct", c)
    k = check_k(k, c.shape[1])
    check_choice("estimator", estimator, ("unbiased", "plugin"))
    _check_bool("positive_only", positive_only)
    return _finish(_pass_credit_t(c, k, estimator, positive_only), kind)


def _loo_mean(x: torch.Tensor) -> torch.Tensor:
    """(B, n) -> mean of the other n-1 entries per position; 0 when n = 1."""
    n = x.shape[-1]
    if n == 1:
        return torch.zeros_like(x)
    return (x.sum(-1, keepdim=True) - x) / (n - 1)


def _sft_credit_t(s: torch.Tensor, s_star: torch.Tensor, k: int, smoothing: float) -> torch.Tensor:
    """Trusted core: scores (B, n), expert scores (B,) -> sample credit (B, n)."""
    B, n = s.shape
    u = (s <= s_star[:, None]).to(s.dtype)  # at or below the expert
    v = (s < s_star[:, None]).to(s.dtype)  # strictly below
    F = (u.sum(-1) + smoothing) / (n + smoothing)  # expert counted as `smoothing` pseudo-samples at s*
    F_ = v.sum(-1) / (n + smoothing)
    if k == 1:
        return torch.zeros_like(s)
    # h = log sum_{j<k} F^j F_^(k-1-j) = (k-1) log F + log sum_{q<k} r^q with r = F_/F <= 1
    r = (F_ / F)[:, None]
    q = torch.arange(k, device=s.device, dtype=s.dtype)  # (k,) powers
    rq = torch.pow(r, q)  # (B, k)
    z = rq.sum(-1)
    h_F = ((k - 1 - q) * rq).sum(-1) / (z * F)  # dh/dF
    h_F_ = (q[1:] * torch.pow(r, q[1:] - 1)).sum(-1) / (z * F)  # dh/dF_
    # grad F = E[(u - F) grad log pi]; leave-one-out mean as the baseline
    return (h_F[:, None] * (u - _loo_mean(u)) + h_F_[:, None] * (v - _loo_mean(v))) / n


def _check_expert_reachable(s: torch.Tensor, e: torch.Tensor, k: int, smoothing: float) -> None:
    """smoothing=0 leaves h undefined for a row where every sample beats the expert."""
    if smoothing == 0 and k > 1:
        none_below = ~(s <= e[:, None]).any(-1)
        if bool(none_below.any()):
            b = int(torch.nonzero(none_below)[0])
            raise ValueError(
                f"smoothing=0 needs a sample scoring at or below the expert, got none in row {b}; use smoothing > 0")


def sft_credit(scores, expert_scores, k, *, smoothing=1.0):
    r"""Credit for the policy samples in best-of-k-aware SFT on an expert response.

    scores: (B, n) verifier scores of the policy samples, expert_scores: (B,)
    score ``s*`` of each prompt's expert response -> credit (B, n).

    The objective is the log-probability that best-of-k *selects* the expert
    response ``y*`` (Chow et al. 2024, BoN-SFT):

    .. math::
        \log\pi_{bon}(y^*) = \log\pi(y^*) + h(F, F_<),\qquad
        h = \log\frac{F^k - F_<^k}{F - F_<} = \log\sum_{j<k}F^jF_<^{k-1-j}

    with ``F = P(s <= s*)`` and ``F_< = P(s < s*)`` under ``pi`` (continuous
    scores: ``h = log k + (k-1) log F``). The ``log pi(y*)`` term is the usual
    SFT term (see :func:`bonft.losses.bon_sft_loss`); this function returns
    the credit for the policy samples that estimates ``grad h``:

      ``w_i = (1/n) [h_F (u_i - mean_{-i} u) + h_<(v_i - mean_{-i} v)]``,
      ``u_i = 1{s_i <= s*}``, ``v_i = 1{s_i < s*}``,

    i.e. ``grad F = E[(1{s <= s*} - F) grad log pi]`` with a leave-one-out
    baseline, and the partial derivatives ``h_F, h_<`` (both >= 0) evaluated
    at pool estimates. Samples that beat the expert get negative credit,
    samples below it positive credit.

    Smoothing: the pool estimates count the expert response itself as
    ``smoothing`` pseudo-samples at ``s*``:
    ``F_hat = (#{s_i <= s*} + smoothing)/(n + smoothing)``,
    ``F<_hat = #{s_i < s*}/(n + smoothing)``. With ``smoothing > 0`` the
    estimate is finite even when no sample scores at or below the expert;
    ``smoothing=0`` is allowed but such a row raises ``ValueError``.

    Bias: a ratio estimator (the derivatives of ``h`` are evaluated at
    estimates), so consistent but **not unbiased**; the bias shrinks as ``n``
    grows. ``k = 1`` gives zero credit (``h = 0``: plain SFT).
    """
    kind = _out_kind(scores)
    s = _as_tensor("scores", scores, ndim=2)
    e = _as_tensor("expert_scores", expert_scores, ndim=1)
    if e.shape[0] != s.shape[0]:
        raise ValueError(f"expert_scores must have shape (B,) = ({s.shape[0]},) to match scores, got {tuple(e.shape)}")
    k = check_k(k, s.shape[1])
    smoothing = _check_smoothing(smoothing)
    e = e.to(s.device)
    _check_expert_reachable(s, e, k, smoothing)
    return _finish(_sft_credit_t(s, e, k, smoothing), kind)


def _reinforce_credit_t(R: torch.Tensor, baseline: str) -> torch.Tensor:
    n = R.shape[-1]
    if baseline == "loo":
        if n > 1:
            R = R - R[:, :1]  # same credit, exact zeros for all-equal rewards
        return (R - _loo_mean(R)) / n
    return R / n


def reinforce_credit(rewards, *, baseline="loo"):
    r"""Leave-one-out REINFORCE credit (Kool et al. 2019): rewards (B, n) -> (B, n).

    .. math:: w_i = \frac{1}{n}\Big(R_i - \frac{1}{n-1}\sum_{j\ne i}R_j\Big)

    Unbiased for ``grad E[R]`` (= ``grad V_1``); identical to
    ``bon_credit(scores, rewards, 1)`` for any scores. ``baseline="none"``:
    ``w_i = R_i/n``. With ``n = 1`` there are no others and the baseline is 0.
    """
    kind = _out_kind(rewards)
    R = _as_tensor("rewards", rewards, ndim=2)
    check_choice("baseline", baseline, ("loo", "none"))
    return _finish(_reinforce_credit_t(R, baseline), kind)
