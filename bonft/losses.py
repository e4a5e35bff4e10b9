"""PyTorch losses for best-of-N-aware fine-tuning: a credit function + one policy-gradient core.

Every named loss is :func:`policy_gradient_loss` applied to the credit of
:mod:`bonft.credit` (no gradient through it), so its gradient is

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

from typing import Any

import numpy as np
import torch
from torch import Tensor

from bonft._checks import check_binary, check_bool, check_choice, check_finite, check_k, check_nonnegative, is_tensor
from bonft._credit_inputs import as_host
from bonft._passk import pass_at_k_counts
from bonft.credit import (
    _bon_rl_core, _bon_sft_core, _correct_pool, _expert_pool, _pass_at_k_core, _reinforce_core, _scored_pool,
)

__all__ = ["policy_gradient_loss", "bon_rl_loss", "pass_at_k_loss", "bon_sft_loss", "reinforce_loss", "nll_loss"]

_TOKEN_REDUCTIONS = ("sum", "mean")
_REDUCTIONS = ("none", "mean", "sum")


# ----------------------------------------------------------------------------
# validation (O(B n) by default; O(B n T) only with check_tokens=True)
# ----------------------------------------------------------------------------

def _check_logprobs(name: str, lp: Any, seq_ndim: int) -> Tensor:
    if not is_tensor(lp):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(lp).__name__}")
    if not lp.dtype.is_floating_point:
        raise TypeError(f"{name} must be a floating tensor, got dtype {lp.dtype}")
    if lp.ndim not in (seq_ndim, seq_ndim + 1):
        raise ValueError(
            f"{name} must have {seq_ndim} (sequence log-probs) or {seq_ndim + 1} (token log-probs) "
            f"dimensions, got shape {tuple(lp.shape)}")
    if lp.numel() == 0:
        raise ValueError(f"{name} must not be empty")
    return lp


def _check_mask(mask_name: str, mask: Any, lp_name: str, lp: Tensor, seq_ndim: int) -> Tensor | None:
    """A bool mask on lp's device (token log-probs) or None (all tokens count); shape and type only."""
    if mask is None:
        return None
    if lp.ndim == seq_ndim:
        raise ValueError(f"{mask_name} needs token log-probs ({seq_ndim + 1} dimensions), "
                         f"got {lp_name} of shape {tuple(lp.shape)}")
    if not is_tensor(mask):
        raise TypeError(f"{mask_name} must be a torch.Tensor, got {type(mask).__name__}")
    if tuple(mask.shape) != tuple(lp.shape):
        raise ValueError(f"{mask_name} must have the same shape as {lp_name} {tuple(lp.shape)}, got {tuple(mask.shape)}")
    if mask.dtype.is_complex:
        raise TypeError(f"{mask_name} must be a bool or 0/1 tensor, got dtype {mask.dtype}")
    m = mask.detach().to(device=lp.device)
    return m if m.dtype == torch.bool else m != 0


def _check_tokens(name: str, lp: Tensor, mask_name: str, mask: Any, m: Tensor | None) -> None:
    """The O(B n T) checks of check_tokens=True."""
    if m is not None:
        if mask.dtype != torch.bool:
            check_binary(mask_name, mask.detach())
        empty = ~m.any(-1)
        if bool(empty.any()):
            idx = tuple(int(i) for i in torch.nonzero(empty)[0].tolist())
            raise ValueError(f"{mask_name} must mark at least one token per sequence, got an all-zero row at index {idx}")
    bad = ~torch.isfinite(lp.detach())
    if m is not None:
        bad = bad & m
    if bool(bad.any()):
        idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
        where = " where the mask is 1" if m is not None else ""
        raise ValueError(f"{name} must be finite{where}, got {float(lp.detach()[idx])} at index {idx}")


def _check_options(token_reduction: Any, reduction: Any, anchor_weight: Any, check_tokens: Any,
                   return_info: Any) -> float:
    check_choice("token_reduction", token_reduction, _TOKEN_REDUCTIONS)
    check_choice("reduction", reduction, _REDUCTIONS)
    check_bool("check_tokens", check_tokens)
    check_bool("return_info", return_info)
    return check_nonnegative("anchor_weight", anchor_weight)


def _sequence_terms(name: str, lp: Tensor, m: Tensor | None, token_reduction: str, seq_ndim: int) -> Tensor:
    """Token or sequence log-probs -> per-sequence term (seq_ndim dims), differentiable."""
    if lp.ndim == seq_ndim:
        if token_reduction == "mean":
            raise ValueError(f"token_reduction='mean' needs token log-probs ({seq_ndim + 1} dimensions), "
                             f"got {name} of shape {tuple(lp.shape)}")
        return lp
    seq = (lp if m is None else torch.where(m, lp, 0.0)).sum(-1)  # padding contributes exactly 0, even if NaN
    if token_reduction == "mean":
        count = m.sum() if m is not None else torch.tensor(lp.numel(), device=lp.device)
        seq = seq * (seq.numel() / count.to(seq.dtype))  # / mean response length over the batch
    return seq


def _prepare(name: str, lp: Any, mask_name: str, mask: Any, token_reduction: str, seq_ndim: int,
             check_tokens: bool):
    lp = _check_logprobs(name, lp, seq_ndim)
    m = _check_mask(mask_name, mask, name, lp, seq_ndim)
    if check_tokens:
        _check_tokens(name, lp, mask_name, mask, m)
    return lp, m, _sequence_terms(name, lp, m, token_reduction, seq_ndim)


def _lead_shape(name: str, lp: Any, seq_ndim: int) -> tuple[int, ...]:
    return tuple(_check_logprobs(name, lp, seq_ndim).shape[:seq_ndim])


def _kl(lp: Tensor, anchor: Any, m: Tensor | None, token_reduction: str, check_tokens: bool) -> tuple[Tensor, Tensor]:
    """k3 estimator exp(d) - d - 1, d = anchor - logp -> per-prompt mean over samples (B,), per-token mean value."""
    if not is_tensor(anchor):
        raise TypeError(f"anchor_logprobs must be a torch.Tensor, got {type(anchor).__name__}")
    if tuple(anchor.shape) != tuple(lp.shape):
        raise ValueError(f"anchor_logprobs must have the same shape as logprobs {tuple(lp.shape)}, got {tuple(anchor.shape)}")
    if check_tokens:
        _check_tokens("anchor_logprobs", anchor, "mask", None, m)
    d = anchor.detach().to(lp.dtype) - lp
    if m is not None:
        d = torch.where(m, d, 0.0)  # exp(0) - 0 - 1 = 0 on padding
    k3 = torch.expm1(d) - d
    if lp.ndim == 2:  # sequence level: one "token" per sample
        return k3.mean(-1), k3.detach().mean()
    per_seq = _sequence_terms("logprobs", k3, m, token_reduction, 2)  # (B, n)
    count = m.sum() if m is not None else torch.tensor(k3.numel(), device=k3.device)
    return per_seq.mean(-1), k3.detach().sum() / count


def _reduce(per_prompt: Tensor, reduction: str) -> Tensor:
    if reduction == "mean":
        return per_prompt.mean()  # divides by B, the number of prompts
    if reduction == "sum":
        return per_prompt.sum()
    return per_prompt


def _credit_tensor(credit: Any, B: int, n: int, seq: Tensor, check_tokens: bool) -> Tensor:
    """Credit (B, n) as a detached tensor on seq's device and dtype; host credit is checked (O(B n), numpy)."""
    if is_tensor(credit):
        w = credit.detach()
        if w.dtype.is_complex or w.dtype == torch.bool:
            raise TypeError(f"credit must hold real numbers, got dtype {w.dtype}")
        host = w.to(torch.float64).numpy() if w.device.type == "cpu" else None
    else:
        try:
            host = np.asarray(credit, dtype=np.float64)
        except (TypeError, ValueError):
            raise TypeError(f"credit must be an array of numbers, got {type(credit).__name__}") from None
        w = torch.from_numpy(host)
    if tuple(w.shape) != (B, n):
        raise ValueError(f"credit must have shape (B, n) = ({B}, {n}) to match logprobs, got {tuple(w.shape)}")
    if host is not None:
        check_finite("credit", host)
    elif check_tokens:
        check_finite("credit", w)  # a device tensor: one sync, so only on request
    return w.to(device=seq.device, dtype=seq.dtype, non_blocking=True)


def _core(lp: Tensor, m, seq: Tensor, w: Tensor, anchor_logprobs, anchor_weight: float, token_reduction: str,
          check_tokens: bool, return_info: bool) -> tuple[Tensor, dict]:
    """Per-prompt -(sum_i w_i seq_i) (+ anchor KL) -> (B,), and the shared info."""
    per_prompt = -(w * seq).sum(-1)  # (B,)
    info: dict[str, Tensor] = {}
    if anchor_logprobs is not None:
        kl_b, kl_tok = _kl(lp, anchor_logprobs, m, token_reduction, check_tokens)
        if anchor_weight:
            per_prompt = per_prompt + anchor_weight * kl_b
        info["kl"] = kl_tok
    if return_info:
        info["credit_mean"] = w.mean()
        info["zero_credit_frac"] = (w == 0).all(-1).to(w.dtype).mean()
    return per_prompt, info


def _finish(per_prompt: Tensor, reduction: str, info: dict, return_info: bool):
    loss = _reduce(per_prompt, reduction)
    return (loss, info) if return_info else loss


def _host_info(info: dict, **values: np.ndarray) -> dict:
    """Means of host arrays as 0-d CPU tensors (no device involved)."""
    for key, v in values.items():
        info[key] = torch.tensor(float(np.mean(v)), dtype=torch.float64)
    return info


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
    gradient you want, e.g. from :mod:`bonft.credit`; ``beta`` is
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
    ``grad pass@k`` for ``k = n`` (see :func:`bonft.credit.pass_at_k_credit`).
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
    n; see :func:`bonft.credit.bon_sft_credit` for the smoothing). ``k = 1``
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


# ----------------------------------------------------------------------------
# shared tails of the named losses
# ----------------------------------------------------------------------------

def _rewards(rewards: Any, shape: tuple[int, int]) -> np.ndarray:
    R = as_host("rewards", rewards, ndim=2)
    if tuple(R.shape) != shape:
        raise ValueError(f"rewards must have shape (B, n) of logprobs {shape}, got {tuple(R.shape)}")
    return R


def _per_prompt(logprobs, credit: np.ndarray, mask, token_reduction, anchor_logprobs, anchor_weight, check_tokens,
                return_info):
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 2, check_tokens)
    w = torch.from_numpy(credit).to(device=seq.device, dtype=seq.dtype, non_blocking=True)
    return _core(lp, m, seq, w, anchor_logprobs, anchor_weight, token_reduction, check_tokens, return_info)


def _named(logprobs, credit: np.ndarray, mask, token_reduction, reduction, anchor_logprobs, anchor_weight,
           check_tokens, return_info, *, pool_value):
    per_prompt, info = _per_prompt(logprobs, credit, mask, token_reduction, anchor_logprobs, anchor_weight,
                                   check_tokens, return_info)
    if return_info:
        _host_info(info, pool_value=pool_value)
    return _finish(per_prompt, reduction, info, return_info)
