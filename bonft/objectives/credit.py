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
a float64 numpy array. The maths runs in float64 numpy on the host (see
:mod:`bonft.objectives.validation`); hyper-parameters are keyword-only.

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

from bonft._core.checks import check_bool, check_choice, check_k
from bonft.objectives._credit_core import (
    _bon_rl_core, _bon_sft_core, _correct_pool, _expert_pool, _pass_at_k_core, _reinforce_core, _scored_pool,
)
from bonft.objectives.validation import as_host, finish, out_kind

__all__ = ["bon_rl_credit", "pass_at_k_credit", "bon_sft_credit", "reinforce_credit", "pool_value"]


# ----------------------------------------------------------------------------
# public API
# ----------------------------------------------------------------------------

def bon_rl_credit(scores, rewards, *, k, baseline="loo"):
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
    ``"loo"`` baseline, equal rewards give exactly zero credit when ``n >= 2``.
    A single sample (``n = 1``) has nobody to leave out: its baseline is 0 and
    its credit is its reward, which keeps the estimate unbiased (plain
    REINFORCE) rather than silently returning no signal.

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
    s, R = _scored_pool(scores, rewards)
    k = check_k(k, s.shape[1])
    check_choice("baseline", baseline, ("loo", "none"))
    return finish(_bon_rl_core(s, R, k, baseline)[0], kind)


def pool_value(scores, rewards, *, k):
    r"""Best-of-k U-statistic of each pool.

    Shape: ``scores (B, n), rewards (B, n) -> (B,)``.

    .. math:: \hat V_k = \frac{1}{\binom nk}\sum_{|S|=k} E[R_{\mathrm{sel}(S)}]

    Unbiased for ``V_k`` (exact with ties). Same kinds in/out as :func:`bon_rl_credit`.

    References: Chow et al. 2024; Hoeffding 1948 (U-statistics).
    """
    kind = out_kind(rewards, scores)
    s, R = _scored_pool(scores, rewards)
    k = check_k(k, s.shape[1])
    return finish(_bon_rl_core(s, R, k, "none")[1], kind)


def pass_at_k_credit(correct, *, k, estimator="unbiased", positive_only=False):
    r"""Credit for pass@k = 1 - (1-p)^k when the verifier is the binary reward.

    Shape: ``correct (B, n)`` booleans or 0/1 ``-> credit (B, n)``.

    .. math::
        w_i = \frac kn\Big(1 - (1 - c_i)\frac{\binom{n-1-c}{k-1}}{\binom{n-1}{k-1}}
              - \mathrm{pass@}k_{\,b}(\text{others of } i)\Big)

    ``estimator="unbiased"`` (default): :func:`bon_rl_credit` with scores =
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

    References: Chen et al. 2021, "Evaluating Large Language Models Trained on
    Code"; Walder & Karkhanis 2025; Chow et al. 2024.
    """
    kind = out_kind(correct)
    c = _correct_pool(correct)
    k = check_k(k, c.shape[1])
    check_choice("estimator", estimator, ("unbiased", "plugin"))
    check_bool("positive_only", positive_only)
    return finish(_pass_at_k_core(c, k, estimator, positive_only), kind)


def bon_sft_credit(scores, expert_scores, *, k, smoothing=1.0):
    r"""Credit for the policy samples in best-of-k-aware SFT on an expert response.

    Shape: ``scores (B, n)`` verifier scores of the policy samples,
    ``expert_scores (B,)`` score ``s*`` of each prompt's expert response
    ``-> credit (B, n)``.

    The objective is the log-probability that best-of-k *selects* the expert
    response ``y*`` (Chow et al. 2024, BoN-SFT):

    .. math::
        \log\pi_{bon}(y^*) = \log\pi(y^*) + h(F, F_<),\qquad
        h = \log\frac{F^k - F_<^k}{F - F_<} = \log\sum_{j<k}F^jF_<^{k-1-j}

    with ``F = P(s <= s*)`` and ``F_< = P(s < s*)`` under ``pi`` (continuous
    scores: ``h = log k + (k-1) log F``). The ``log pi(y*)`` term is the usual
    SFT term (see :func:`bonft.objectives.losses.bon_sft_loss`); this function returns
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

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs" (BoN-SFT).
    """
    kind = out_kind(scores)
    s, e, k, smoothing = _expert_pool(scores, expert_scores, k, smoothing)
    return finish(_bon_sft_core(s, e, k, smoothing), kind)


def reinforce_credit(rewards, *, baseline="loo"):
    r"""Leave-one-out REINFORCE credit (Kool et al. 2019).

    Shape: ``rewards (B, n) -> credit (B, n)``.

    .. math:: w_i = \frac{1}{n}\Big(R_i - \frac{1}{n-1}\sum_{j\ne i}R_j\Big)

    Unbiased for ``grad E[R]`` (= ``grad V_1``); identical to
    ``bon_rl_credit(scores, rewards, k=1)`` for any scores. ``baseline="none"``:
    ``w_i = R_i/n``. With ``n = 1`` there are no others and the baseline is 0.

    References: Kool et al. 2019, "Buy 4 REINFORCE samples, get a baseline for free!".
    """
    kind = out_kind(rewards)
    R = as_host("rewards", rewards, ndim=2)
    check_choice("baseline", baseline, ("loo", "none"))
    return finish(_reinforce_core(R, baseline), kind)
