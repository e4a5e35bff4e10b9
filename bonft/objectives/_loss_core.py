"""The machinery behind :mod:`bonft.objectives.losses`: checks of the log-prob tensors, the sequence terms, the KL
term to the anchor, and the shared tail that turns host credit into a loss.

Validation is O(B n) and reads no (B, n, T) tensor unless ``check_tokens=True`` (see the
:mod:`bonft.objectives.losses` docstring for what each check guarantees).
"""
from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import Tensor

from bonft._core.checks import check_binary, check_bool, check_choice, check_finite, check_nonnegative, is_tensor
from bonft.objectives.validation import as_host

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
