"""PyTorch losses for best-of-N-aware fine-tuning: a credit function + one policy-gradient core.

Every named loss is :func:`policy_gradient_loss` applied to the credit of
:mod:`bonft.objectives.credit` (no gradient through it), so its gradient is

    -(1/B) * sum_b sum_i w_bi * grad log pi(y_bi)       (reduction="mean")

and minimising it ascends the objective averaged over prompts. Plug your own
credit into :func:`policy_gradient_loss` the same way.

Log-probabilities come either per sequence, ``logprobs: (B, n)``, or per token,
``logprobs: (B, n, T)`` with an optional ``mask: (B, n, T)`` (True/1 = response
token, False/0 = padding). Padding tokens change nothing, even if they hold NaN
or -inf.

``token_reduction``:
  * ``"sum"`` (default): the sequence log-prob is the sum of its token
    log-probs, so the gradient is the unbiased policy gradient.
  * ``"mean"``: per-token mean over the batch's response tokens - every token
    log-prob is divided by ``T_bar = (response tokens in the batch)/(B*n)``.
    Within a batch this only rescales the step by ``1/T_bar``; because
    ``T_bar`` is random and depends on the samples, batches of long responses
    take smaller steps, so the expected gradient is ``E[g_hat/T_bar]``, not
    ``grad V / E[T]`` (length-normalised, biased). Needs token log-probs.

KL penalty to the anchor (common practice): with ``anchor_logprobs`` of the
same shape as ``logprobs`` (the starting policy's log-probs of the same
tokens) the loss adds ``anchor_weight * (1/n) sum_i KL_i`` where ``KL_i``
aggregates the per-token "k3" estimator ``exp(d) - d - 1``, ``d = anchor -
logp`` (non-negative; from memory: J. Schulman's 2020 note "Approximating KL
divergence") with the same ``token_reduction``. Its *value* is an unbiased
estimate of KL(pi || anchor) per token on on-policy samples; its *gradient*
as a loss has mean ``grad KL(anchor || pi)`` (per token), which also pulls
``pi`` towards the anchor.

``reduction``: ``"mean"`` divides the per-prompt losses by ``B`` (the number
of prompts), ``"sum"`` adds them, ``"none"`` returns them, shape ``(B,)``.

Return value: the loss tensor; with ``return_info=True`` a pair ``(loss,
info)`` where ``info`` maps names to *detached tensors* (no ``float()``, so
no device sync): ``credit_mean``, ``zero_credit_frac`` (prompts whose credit
is all zero: no signal), ``pool_value`` (the objective's unbiased pool
estimate), ``kl`` (per-token k3 value, when ``anchor_logprobs`` is given).

Cost and checks: validation is O(B n) and reads no (B, n, T) tensor; credit
is computed in float64 numpy on the host (scores and rewards come from
verifiers) and copied to the log-probs' device once, so the hot path has no
device sync when scores/rewards are host arrays. ``check_tokens=True`` adds
the O(B n T) checks (a 0/1 mask, no empty response, finite log-probs under
the mask; each a sync on an accelerator). Without it a non-finite log-prob
under the mask gives a non-finite loss (never hidden): check the loss before
the optimizer step, as the trainer does.

Caution: these losses maximise what the verifier rewards. An imperfect
verifier (learned reward model, weak unit tests) will be exploited (reward
hacking): monitor a held-out true reward, and run model-written code only in a
sandbox.
"""
from __future__ import annotations

import numpy as np
import torch
from torch import Tensor

from bonft._core.checks import check_bool, check_choice, check_k
from bonft.objectives._loss_core import (
    _REDUCTIONS, _TOKEN_REDUCTIONS, _check_options, _core, _credit_tensor, _finish, _host_info, _lead_shape, _named, _per_prompt,
    _prepare, _rewards,
)
from bonft._core.passk import pass_at_k_counts
from bonft.objectives._credit_core import (
    _bon_rl_core, _bon_sft_core, _correct_pool, _expert_pool, _pass_at_k_core, _reinforce_core, _scored_pool,
)

__all__ = ["policy_gradient_loss", "bon_rl_loss", "pass_at_k_loss", "bon_sft_loss", "reinforce_loss", "nll_loss"]

# ----------------------------------------------------------------------------
# the core
# ----------------------------------------------------------------------------

def policy_gradient_loss(logprobs, credit, *, mask=None, token_reduction="sum", reduction="mean",
                         anchor_logprobs=None, anchor_weight=0.0, check_tokens=False, return_info=False):
    r"""Policy-gradient loss for a given per-sample credit (the core every named loss wraps).

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask (B, n, T)``,
    ``anchor_logprobs`` like ``logprobs``], ``credit (B, n)`` ``-> loss ()``,
    or ``(B,)`` with ``reduction="none"``.

    .. math::
        \ell = \frac1B\sum_b\Big(-\sum_i w_{bi}\log\pi(y_{bi})
               + \beta\,\frac1n\sum_i \mathrm{KL}_{bi}\Big)

    ``credit`` (numpy, list or tensor; no gradient flows through it) is any
    weight ``w`` such that ``sum_i w_i grad log pi(y_i)`` estimates the
    gradient you want, e.g. from :mod:`bonft.objectives.credit`; ``beta`` is
    ``anchor_weight``. Host credit is checked finite (O(B n)); a device
    tensor only with ``check_tokens=True`` (a sync).

    References: Williams 1992 (REINFORCE, the score-function gradient);
    Kool et al. 2019 (leave-one-out baselines).
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight, check_tokens, return_info)
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 2, check_tokens)
    w = _credit_tensor(credit, *seq.shape, seq, check_tokens)
    per_prompt, info = _core(lp, m, seq, w, anchor_logprobs, anchor_weight, token_reduction, check_tokens, return_info)
    return _finish(per_prompt, reduction, info, return_info)


# ----------------------------------------------------------------------------
# named losses: credit function + core
# ----------------------------------------------------------------------------

def bon_rl_loss(logprobs, scores, rewards, *, k, baseline="loo", mask=None, token_reduction="sum",
                reduction="mean", anchor_logprobs=None, anchor_weight=0.0, check_tokens=False, return_info=False):
    r"""Best-of-k policy-gradient loss with a verifier.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask (B, n, T)``],
    ``scores (B, n), rewards (B, n) -> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\,\log\pi(y_{bi}),\quad
              w = \mathrm{bon\_rl\_credit}(s, R, k)

    ``-grad loss`` is an unbiased estimate of ``grad (1/B) sum_b V_k(prompt b)``
    (``token_reduction="sum"``, no KL); ``k = n`` is BoN-RL-V of Chow et al.
    2024, ``k = 1`` leave-one-out REINFORCE. ``info["pool_value"]``: mean
    best-of-k U-statistic of the pools.

    Caution: a verifier that can be gamed will be gamed (reward hacking).

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs"; Kool et al. 2019.
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight, check_tokens, return_info)
    B, n = _lead_shape("logprobs", logprobs, 2)
    s, R = _scored_pool(scores, rewards, shape=(B, n))
    k = check_k(k, n)
    check_choice("baseline", baseline, ("loo", "none"))
    credit, pool = _bon_rl_core(s, R, k, baseline)
    return _named(logprobs, credit, mask, token_reduction, reduction, anchor_logprobs, anchor_weight, check_tokens,
                  return_info, pool_value=pool)


def pass_at_k_loss(logprobs, correct, *, k, estimator="unbiased", positive_only=False, mask=None,
                   token_reduction="sum", reduction="mean", anchor_logprobs=None, anchor_weight=0.0,
                   check_tokens=False, return_info=False):
    r"""pass@k policy-gradient loss for a binary reward.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask``], ``correct (B, n)``
    0/1 ``-> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\log\pi(y_{bi}),\quad
              w = \mathrm{pass\_at\_k\_credit}(c, k)

    ``estimator="unbiased"``: ``-grad loss`` is unbiased for
    ``grad mean_b pass@k``; ``"plugin"``: biased, consistent;
    ``positive_only=True``: estimates ``(1-p) grad pass@k`` for ``k < n`` and
    ``grad pass@k`` for ``k = n`` (see :func:`bonft.objectives.credit.pass_at_k_credit`).
    ``info["pool_value"]``: mean unbiased pass@k of the pools.

    Caution: when ``correct`` comes from executing model-written code, run
    it in a sandbox; tests that miss cases are exploited (reward hacking).

    References: Chen et al. 2021, "Evaluating Large Language Models Trained
    on Code"; Walder & Karkhanis 2025.
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight, check_tokens, return_info)
    B, n = _lead_shape("logprobs", logprobs, 2)
    c = _correct_pool(correct, shape=(B, n))
    k = check_k(k, n)
    check_choice("estimator", estimator, ("unbiased", "plugin"))
    check_bool("positive_only", positive_only)
    credit = _pass_at_k_core(c, k, estimator, positive_only)
    pool = pass_at_k_counts(n, c.sum(-1).astype(np.int64), k) if return_info else None
    return _named(logprobs, credit, mask, token_reduction, reduction, anchor_logprobs, anchor_weight, check_tokens,
                  return_info, pool_value=pool)


def reinforce_loss(logprobs, rewards, *, baseline="loo", mask=None, token_reduction="sum", reduction="mean",
                   anchor_logprobs=None, anchor_weight=0.0, check_tokens=False, return_info=False):
    r"""Leave-one-out REINFORCE loss, the best-of-1 case.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask``], ``rewards (B, n)
    -> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b\sum_i \frac{R_{bi}-\bar R_{b,-i}}{n}\log\pi(y_{bi})

    ``-grad loss`` is unbiased for ``grad mean_b E[R]``.
    ``info["pool_value"]``: mean reward.

    References: Kool et al. 2019, "Buy 4 REINFORCE samples, get a baseline for free!".
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight, check_tokens, return_info)
    B, n = _lead_shape("logprobs", logprobs, 2)
    R = _rewards(rewards, (B, n))
    check_choice("baseline", baseline, ("loo", "none"))
    credit = _reinforce_core(R, baseline)
    return _named(logprobs, credit, mask, token_reduction, reduction, anchor_logprobs, anchor_weight, check_tokens,
                  return_info, pool_value=R)


def bon_sft_loss(logprobs, scores, expert_logprobs, expert_scores, *, k, smoothing=1.0, mask=None, expert_mask=None,
                 token_reduction="sum", reduction="mean", anchor_logprobs=None, anchor_weight=0.0, check_tokens=False,
                 return_info=False):
    r"""Best-of-k-aware SFT loss: raise the chance that best-of-k selects the expert response.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask (B, n, T)``] of n
    policy samples, ``scores (B, n)``; ``expert_logprobs (B,)`` or ``(B, T)``
    [+ ``expert_mask (B, T)``], ``expert_scores (B,) -> loss ()`` (``(B,)``
    with ``reduction="none"``).

    .. math:: \ell_b = -\Big(\log\pi(y^*_b) + \sum_i w_{bi}\log\pi(y_{bi})\Big),\quad
              w = \mathrm{bon\_sft\_credit}(s, s^*, k)

    ``-grad loss`` estimates ``grad mean_b log pi_bon(y*_b)``: the expert term
    is exact, the sample term a consistent ratio estimator (biased for finite
    n; see :func:`bonft.objectives.credit.bon_sft_credit` for the smoothing). ``k = 1``
    is plain SFT. ``anchor_logprobs`` (shape of ``logprobs``) adds the KL
    penalty on the policy samples. info adds ``expert_logprob`` (mean expert
    term) and ``beaten_frac`` (share of samples scoring above the expert).

    Caution: the verifier decides which samples "beat" the expert; a gamed
    verifier pushes the policy away from the expert for the wrong reasons.

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs" (BoN-SFT).
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight, check_tokens, return_info)
    B, n = _lead_shape("logprobs", logprobs, 2)
    elp, _, e_seq = _prepare("expert_logprobs", expert_logprobs, "expert_mask", expert_mask, token_reduction, 1,
                             check_tokens)
    if e_seq.shape[0] != B:
        raise ValueError(f"expert_logprobs must have B = {B} rows to match logprobs, got {tuple(elp.shape)}")
    s, e, k, smoothing = _expert_pool(scores, expert_scores, k, smoothing, shape=(B, n))
    credit = _bon_sft_core(s, e, k, smoothing)
    per_prompt, info = _per_prompt(logprobs, credit, mask, token_reduction, anchor_logprobs, anchor_weight,
                                   check_tokens, return_info)
    per_prompt = per_prompt - e_seq.to(per_prompt.dtype)
    if return_info:
        info["expert_logprob"] = e_seq.detach().mean()
        _host_info(info, beaten_frac=(s > e[:, None]))
    return _finish(per_prompt, reduction, info, return_info)


def nll_loss(logprobs, *, mask=None, token_reduction="sum", reduction="mean", check_tokens=False, return_info=False):
    r"""Negative log-likelihood (plain SFT) of given responses.

    Shape: ``logprobs (B,)`` sequence log-probs or ``(B, T)`` token log-probs
    [+ ``mask (B, T)``] ``-> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b \log\pi(y_b)

    ``token_reduction="mean"`` divides every token log-prob by the batch's mean
    response length (see the module docstring). info: ``nll`` (mean per-row
    loss), ``tokens`` (response tokens counted).

    References: maximum likelihood (common practice).
    """
    check_choice("token_reduction", token_reduction, _TOKEN_REDUCTIONS)
    check_choice("reduction", reduction, _REDUCTIONS)
    check_bool("check_tokens", check_tokens)
    check_bool("return_info", return_info)
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 1, check_tokens)
    per = -seq
    info: dict[str, Tensor] = {}
    if return_info:
        if lp.ndim == 1:
            tokens = torch.tensor(float(lp.shape[0]))
        else:
            tokens = m.sum().to(torch.float64) if m is not None else torch.tensor(float(lp.numel()))
        info = {"nll": per.detach().mean(), "tokens": tokens}
    return _finish(per, reduction, info, return_info)
