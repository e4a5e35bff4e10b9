"""PyTorch losses for best-of-N-aware fine-tuning, built on :mod:`bonft.credit`.

Each loss is a scalar (or ``(B,)`` with ``reduction="none"``) whose gradient is

    -(1/B) * sum_b sum_i w_bi * grad log pi(y_bi)       (reduction="mean")

with the credit ``w`` of :mod:`bonft.credit` (no gradient through it), so
minimising the loss ascends the objective averaged over prompts.

Log-probabilities come either per sequence, ``logprobs: (B, n)``, or per token,
``logprobs: (B, n, T)`` with an optional ``mask: (B, n, T)`` (1 = response
token, 0 = padding). Padding tokens change nothing, even if they hold NaN or
-inf; a sample whose mask row is all zero raises ``ValueError``.

``token_reduction``:
  * ``"sum"`` (default): the sequence log-prob is the sum of its token
    log-probs, so the gradient is the unbiased policy gradient.
  * ``"mean"``: per-token mean over the batch's response tokens - every token
    log-prob is divided by ``T_bar = (response tokens in the batch)/(B*n)``.
    Within a batch this only rescales the step by ``1/T_bar``; because
    ``T_bar`` is random and depends on the samples, batches of long responses
    take smaller steps, so the expected gradient is ``E[g_hat/T_bar]``, not
    ``grad V / E[T]`` (length-normalised, biased). Needs token log-probs.

KL penalty (common practice): with ``anchor_logprobs`` of the same shape as
``logprobs`` the loss adds ``anchor_weight * (1/n) sum_i KL_i`` where ``KL_i``
aggregates the per-token "k3" estimator ``exp(d) - d - 1``, ``d = ref - logp``
(non-negative; from memory: J. Schulman's 2020 note "Approximating KL
divergence") with the same ``token_reduction``. Its *value* is an unbiased
estimate of KL(pi || ref) per token on on-policy samples; its *gradient* as a
loss has mean ``grad KL(ref || pi)`` (per token), which also pulls ``pi``
towards the reference. ``info["kl"]`` reports the per-token mean of the k3
value whenever ``anchor_logprobs`` is given.

``reduction``: ``"mean"`` divides the per-prompt losses by ``B`` (the number
of prompts), ``"sum"`` adds them, ``"none"`` returns them, shape ``(B,)``.

Caution: these losses maximise what the verifier rewards. An imperfect
verifier (learned reward model, weak unit tests) will be exploited (reward
hacking): monitor a held-out true reward, and run model-written code only in a
sandbox.
"""
from __future__ import annotations

import numbers
from typing import Any

import torch
from torch import Tensor

from bonft._binom import log_comb_torch
from bonft._checks import check_choice, check_k, is_tensor
from bonft._credit_inputs import _as_tensor, _check_binary, _check_bool, _check_smoothing
from bonft.credit import _bon_credit_t, _check_expert_reachable, _pass_credit_t, _reinforce_credit_t, _sft_credit_t

__all__ = ["bon_rl_loss", "pass_at_k_loss", "bon_sft_loss", "reinforce_loss", "nll_loss"]

_TOKEN_REDUCTIONS = ("sum", "mean")
_REDUCTIONS = ("none", "mean", "sum")


# ----------------------------------------------------------------------------
# validation and shared pieces
# ----------------------------------------------------------------------------

def _check_logprobs(name: str, lp: Any, *, seq_ndim: int) -> Tensor:
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
    """Return a bool mask (token log-probs) or None (all tokens count)."""
    if mask is None:
        return None
    if lp.ndim == seq_ndim:
        raise ValueError(f"{mask_name} needs token log-probs ({seq_ndim + 1} dimensions), "
                         f"got {lp_name} of shape {tuple(lp.shape)}")
    if not is_tensor(mask):
        raise TypeError(f"{mask_name} must be a torch.Tensor, got {type(mask).__name__}")
    if tuple(mask.shape) != tuple(lp.shape):
        raise ValueError(f"{mask_name} must have the same shape as {lp_name} {tuple(lp.shape)}, got {tuple(mask.shape)}")
    if mask.dtype != torch.bool:
        _check_binary(mask_name, mask.detach())
    m = mask.detach().to(device=lp.device) != 0
    empty = ~m.any(-1)
    if bool(empty.any()):
        idx = tuple(int(i) for i in torch.nonzero(empty)[0].tolist())
        raise ValueError(f"{mask_name} must mark at least one token per sequence, got an all-zero row at index {idx}")
    return m


def _check_finite_masked(name: str, x: Tensor, m: Tensor | None) -> None:
    bad = ~torch.isfinite(x.detach())
    if m is not None:
        bad = bad & m
    if bool(bad.any()):
        idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
        raise ValueError(f"{name} must be finite where the mask is 1, got {float(x.detach()[idx])} at index {idx}")


def _check_options(token_reduction: Any, reduction: Any, anchor_weight: Any) -> float:
    check_choice("token_reduction", token_reduction, _TOKEN_REDUCTIONS)
    check_choice("reduction", reduction, _REDUCTIONS)
    if isinstance(anchor_weight, bool) or not isinstance(anchor_weight, numbers.Real):
        raise TypeError(f"anchor_weight must be a real number >= 0, got {type(anchor_weight).__name__} {anchor_weight!r}")
    anchor_weight = float(anchor_weight)
    if not (anchor_weight >= 0 and anchor_weight < float("inf")):
        raise ValueError(f"anchor_weight must be a finite number >= 0, got anchor_weight={anchor_weight}")
    return anchor_weight


def _sequence_terms(name: str, lp: Tensor, m: Tensor | None, token_reduction: str, seq_ndim: int) -> Tensor:
    """Token or sequence log-probs -> per-sequence term (seq_ndim dims), differentiable."""
    if lp.ndim == seq_ndim:
        if token_reduction == "mean":
            raise ValueError(f"token_reduction='mean' needs token log-probs ({seq_ndim + 1} dimensions), "
                             f"got {name} of shape {tuple(lp.shape)}")
        return lp
    if m is None:
        m = torch.ones_like(lp, dtype=torch.bool)
    tok = torch.where(m, lp, torch.zeros_like(lp))  # padding contributes exactly 0, even if NaN
    seq = tok.sum(-1)
    if token_reduction == "mean":
        t_bar = m.sum().to(seq.dtype) / seq.numel()  # mean response length over the batch
        seq = seq / t_bar
    return seq


def _prepare(name: str, lp: Any, mask_name: str, mask: Any, token_reduction: str, seq_ndim: int):
    lp = _check_logprobs(name, lp, seq_ndim=seq_ndim)
    m = _check_mask(mask_name, mask, name, lp, seq_ndim)
    _check_finite_masked(name, lp, m)
    return lp, m, _sequence_terms(name, lp, m, token_reduction, seq_ndim)


def _kl(lp: Tensor, ref: Any, m: Tensor | None, token_reduction: str) -> tuple[Tensor, float]:
    """k3 estimator exp(d) - d - 1, d = ref - logp -> per-prompt mean over samples (B,), per-token mean value."""
    if not is_tensor(ref):
        raise TypeError(f"anchor_logprobs must be a torch.Tensor, got {type(ref).__name__}")
    if tuple(ref.shape) != tuple(lp.shape):
        raise ValueError(f"anchor_logprobs must have the same shape as logprobs {tuple(lp.shape)}, got {tuple(ref.shape)}")
    _check_finite_masked("anchor_logprobs", ref, m)
    d = ref.detach().to(lp.dtype) - lp
    if m is not None:
        d = torch.where(m, d, torch.zeros_like(d))  # exp(0) - 0 - 1 = 0 on padding
    k3 = torch.expm1(d) - d
    if lp.ndim == 2:  # sequence level: one "token" per sample
        return k3.mean(-1), float(k3.detach().mean())
    per_seq = _sequence_terms("logprobs", k3, m, token_reduction, 2)  # (B, n)
    count = float(m.sum()) if m is not None else float(k3.numel())
    return per_seq.mean(-1), float(k3.detach().sum()) / count


def _reduce(per_prompt: Tensor, reduction: str) -> Tensor:
    if reduction == "mean":
        return per_prompt.mean()  # divides by B, the number of prompts
    if reduction == "sum":
        return per_prompt.sum()
    return per_prompt


def _pg_loss(seq: Tensor, credit: Tensor, lp: Tensor, m, ref, anchor_weight: float,
             token_reduction: str, reduction: str, info: dict) -> tuple[Tensor, dict]:
    """-(sum_i w_i * seq_i) per prompt (+ KL), reduced; fills the shared info keys."""
    w = credit.to(device=seq.device, dtype=seq.dtype)
    per_prompt = -(w * seq).sum(-1)  # (B,)
    info["credit_mean"] = float(credit.mean())
    info["zero_credit_frac"] = float((credit == 0).all(-1).to(torch.float64).mean())
    if ref is not None:
        kl_b, kl_tok = _kl(lp, ref, m, token_reduction)
        info["kl"] = kl_tok
        if anchor_weight:
            per_prompt = per_prompt + anchor_weight * kl_b
    loss = _reduce(per_prompt, reduction)
    return loss, info


def _pair(name: str, x: Any, B: int, n: int, device) -> Tensor:
    t = _as_tensor(name, x, ndim=2)
    if tuple(t.shape) != (B, n):
        raise ValueError(f"{name} must have shape (B, n) = ({B}, {n}) to match logprobs, got {tuple(t.shape)}")
    return t.to(device)


# ----------------------------------------------------------------------------
# losses
# ----------------------------------------------------------------------------

def bon_rl_loss(logprobs, scores, rewards, *, k, mask=None, baseline="loo", token_reduction="sum",
                anchor_logprobs=None, anchor_weight=0.0, reduction="mean") -> tuple[Tensor, dict[str, float]]:
    r"""Best-of-k policy-gradient loss with a verifier.

    logprobs: (B, n) or (B, n, T) [+ mask (B, n, T)], scores, rewards: (B, n)
    -> loss () or (B,) with ``reduction="none"``, and an info dict.

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\,\log\pi(y_{bi}),\quad
              w = \mathrm{bon\_credit}(s, R, k)

    ``-grad loss`` is an unbiased estimate of ``grad (1/B) sum_b V_k(prompt b)``
    (``token_reduction="sum"``, no KL); ``k = n`` is BoN-RL-V of Chow et al.
    2024, ``k = 1`` leave-one-out REINFORCE (Kool et al. 2019).

    info: ``credit_mean`` (mean of w), ``zero_credit_frac`` (prompts whose
    credit is all zero: no signal), ``pool_value`` (mean best-of-k U-statistic
    of the pools), ``kl`` (per-token k3 value, when ``anchor_logprobs`` given).

    Caution: a verifier that can be gamed will be gamed (reward hacking).
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight)
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 2)
    B, n = seq.shape
    s = _pair("scores", scores, B, n, lp.device)
    R = _pair("rewards", rewards, B, n, lp.device)
    k = check_k(k, n)
    check_choice("baseline", baseline, ("loo", "none"))
    credit, pool = _bon_credit_t(s, R, k, baseline)
    info = {"pool_value": float(pool.mean())}
    return _pg_loss(seq, credit, lp, m, anchor_logprobs, anchor_weight, token_reduction, reduction, info)


def pass_at_k_loss(logprobs, correct, *, k, estimator="unbiased", positive_only=False, mask=None,
                   token_reduction="sum", anchor_logprobs=None, anchor_weight=0.0,
                   reduction="mean") -> tuple[Tensor, dict[str, float]]:
    r"""pass@k policy-gradient loss for a binary reward.

    logprobs: (B, n) or (B, n, T) [+ mask], correct: (B, n) 0/1 -> loss, info.

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\log\pi(y_{bi}),\quad
              w = \mathrm{pass\_credit}(c, k)

    ``estimator="unbiased"``: ``-grad loss`` is unbiased for
    ``grad mean_b pass@k``; ``"plugin"``: biased, consistent;
    ``positive_only=True``: estimates ``(1-p) grad pass@k`` for ``k < n`` and
    ``grad pass@k`` for ``k = n`` (see :func:`bonft.credit.pass_credit`).
    info: ``credit_mean``, ``zero_credit_frac``, ``pool_value`` (mean
    unbiased pass@k of the pools, Chen et al. 2021), ``kl`` if used.

    Caution: when ``correct`` comes from executing model-written code, run
    it in a sandbox; tests that miss cases are exploited (reward hacking).
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight)
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 2)
    B, n = seq.shape
    c = _pair("correct", correct, B, n, lp.device)
    _check_binary("correct", c)
    k = check_k(k, n)
    check_choice("estimator", estimator, ("unbiased", "plugin"))
    _check_bool("positive_only", positive_only)
    credit = _pass_credit_t(c, k, estimator, positive_only)
    tot = c.sum(-1)
    pool = 1 - torch.exp(log_comb_torch(n - tot, k) - log_comb_torch(n, k))  # Chen et al. 2021 estimator
    info = {"pool_value": float(pool.mean())}
    return _pg_loss(seq, credit, lp, m, anchor_logprobs, anchor_weight, token_reduction, reduction, info)


def reinforce_loss(logprobs, rewards, *, baseline="loo", mask=None, token_reduction="sum",
                   anchor_logprobs=None, anchor_weight=0.0, reduction="mean") -> tuple[Tensor, dict[str, float]]:
    r"""Leave-one-out REINFORCE loss (Kool et al. 2019), the best-of-1 case.

    logprobs: (B, n) or (B, n, T) [+ mask], rewards: (B, n) -> loss, info.

    .. math:: \ell = -\frac1B\sum_b\sum_i \frac{R_{bi}-\bar R_{b,-i}}{n}\log\pi(y_{bi})

    ``-grad loss`` is unbiased for ``grad mean_b E[R]``. info:
    ``credit_mean``, ``zero_credit_frac``, ``pool_value`` (mean reward),
    ``kl`` if used.
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight)
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 2)
    B, n = seq.shape
    R = _pair("rewards", rewards, B, n, lp.device)
    check_choice("baseline", baseline, ("loo", "none"))
    credit = _reinforce_credit_t(R, baseline)
    info = {"pool_value": float(R.mean())}
    return _pg_loss(seq, credit, lp, m, anchor_logprobs, anchor_weight, token_reduction, reduction, info)


def bon_sft_loss(expert_logprobs, sample_logprobs, sample_scores, expert_scores, *, k, expert_mask=None,
                 mask=None, smoothing=1.0, token_reduction="sum", anchor_logprobs=None, anchor_weight=0.0,
                 reduction="mean") -> tuple[Tensor, dict[str, float]]:
    r"""Best-of-k-aware SFT loss: raise the chance that best-of-k selects the expert response.

    expert_logprobs: (B,) or (B, T) [+ expert_mask (B, T)];
    sample_logprobs: (B, n) or (B, n, T) [+ mask (B, n, T)] of n policy samples;
    sample_scores: (B, n); expert_scores: (B,) -> loss, info.

    .. math:: \ell_b = -\Big(\log\pi(y^*_b) + \sum_i w_{bi}\log\pi(y_{bi})\Big),\quad
              w = \mathrm{sft\_credit}(s, s^*, k)

    ``-grad loss`` estimates ``grad mean_b log pi_bon(y*_b)`` (Chow et al.
    2024, BoN-SFT): the expert term is exact, the sample term is a consistent
    ratio estimator (biased for finite n; see :func:`bonft.credit.sft_credit`
    for the smoothing). ``k = 1`` is plain SFT. ``anchor_logprobs`` (shape of
    ``sample_logprobs``) adds the KL penalty on the policy samples.

    info: ``expert_logprob`` (mean expert term), ``credit_mean``,
    ``zero_credit_frac``, ``beaten_frac`` (share of samples scoring above
    the expert), ``kl`` if used.

    Caution: the verifier decides which samples "beat" the expert; a gamed
    verifier pushes the policy away from the expert for the wrong reasons.
    """
    anchor_weight = _check_options(token_reduction, reduction, anchor_weight)
    elp, _, e_seq = _prepare("expert_logprobs", expert_logprobs, "expert_mask", expert_mask, token_reduction, 1)
    lp, m, seq = _prepare("sample_logprobs", sample_logprobs, "mask", mask, token_reduction, 2)
    B, n = seq.shape
    if e_seq.shape[0] != B:
        raise ValueError(f"expert_logprobs must have B = {B} rows to match sample_logprobs, got {tuple(elp.shape)}")
    s = _pair("sample_scores", sample_scores, B, n, lp.device)
    e = _as_tensor("expert_scores", expert_scores, ndim=1).to(lp.device)
    if e.shape[0] != B:
        raise ValueError(f"expert_scores must have shape (B,) = ({B},), got {tuple(e.shape)}")
    k = check_k(k, n)
    smoothing = _check_smoothing(smoothing)
    _check_expert_reachable(s, e, k, smoothing)
    credit = _sft_credit_t(s, e, k, smoothing)
    info = {"expert_logprob": float(e_seq.detach().mean()),
            "beaten_frac": float((s > e[:, None]).to(torch.float64).mean())}
    loss, info = _pg_loss(seq, credit, lp, m, anchor_logprobs, anchor_weight, token_reduction, "none", info)
    per_prompt = loss - e_seq.to(loss.dtype)
    return _reduce(per_prompt, reduction), info


def nll_loss(logprobs, *, mask=None, token_reduction="sum", reduction="mean") -> tuple[Tensor, dict[str, float]]:
    r"""Negative log-likelihood (plain SFT) of given responses.

    logprobs: (B,) sequence log-probs or (B, T) token log-probs [+ mask (B, T)]
    -> loss () or (B,), info.

    .. math:: \ell = -\frac1B\sum_b \log\pi(y_b)

    ``token_reduction="mean"`` divides every token log-prob by the batch's mean
    response length (see the module docstring). info: ``nll`` (mean per-row
    loss), ``tokens`` (response tokens counted).
    """
    check_choice("token_reduction", token_reduction, _TOKEN_REDUCTIONS)
    check_choice("reduction", reduction, _REDUCTIONS)
    lp, m, seq = _prepare("logprobs", logprobs, "mask", mask, token_reduction, 1)
    per = -seq
    if lp.ndim == 1:
        tokens = float(lp.shape[0])
    else:
        tokens = float(m.sum()) if m is not None else float(lp.numel())
    info = {"nll": float(per.detach().mean()), "tokens": tokens}
    return _reduce(per, reduction), info
