"""Inputs on a finite outcome set, shared by :mod:`bonft.bon` and :mod:`bonft.strategies.exact`.

A policy ``probs (..., V)``, per-outcome values (scores, rewards) whose leading axes broadcast with it,
and results handed back in the caller's kind: numpy in -> numpy out, torch in -> torch out
(float64, autograd kept).
"""
from __future__ import annotations

from typing import Any

import torch

from bonft._core.checks import as_float_array, check_finite, check_nonempty, check_probs, is_tensor

__all__ = ["as_float64_tensor", "check_policy_probs", "check_outcome_values", "returned_like"]


def as_float64_tensor(name: str, x: Any, device: torch.device | None) -> torch.Tensor:
    """float64 tensor; keeps autograd for tensors, converts everything else."""
    if is_tensor(x):
        if x.is_complex():
            raise TypeError(f"{name} must be a real array, got complex tensor of dtype {x.dtype}")
        return x.to(dtype=torch.float64, device=device if device is not None else x.device)
    arr = as_float_array(name, x)
    return torch.as_tensor(arr, dtype=torch.float64, device=device)


def check_policy_probs(probs: Any) -> tuple[torch.Tensor, bool]:
    """A policy ``probs (..., V)`` checked (finite, non-negative, rows sum to 1) -> (float64 tensor, whether to hand back numpy)."""
    p = as_float64_tensor("probs", probs, None)
    if p.ndim < 1:
        raise ValueError(f"probs must have at least 1 dimension (..., V), got shape {tuple(p.shape)}")
    check_nonempty("probs", p)
    eps = _half_eps(probs)
    if eps is None:
        check_probs("probs", p)
        return p, not is_tensor(probs)
    # float16 / bfloat16 round every probability (relative error eps / 2): a row sums to 1 within eps only, and is
    # renormalised in float64 so that the results are those of a distribution
    check_probs("probs", p, atol=eps)
    return p / p.sum(-1, keepdim=True), not is_tensor(probs)


def _half_eps(x: Any) -> float | None:
    """Machine epsilon of a float16 / bfloat16 array or tensor, None for any other input."""
    if is_tensor(x):
        return torch.finfo(x.dtype).eps if x.dtype in (torch.float16, torch.bfloat16) else None
    return 2.0**-10 if getattr(getattr(x, "dtype", None), "name", None) == "float16" else None  # IEEE 754 binary16


def check_outcome_values(name: str, x: Any, p: torch.Tensor, *others: torch.Tensor) -> torch.Tensor:
    """scores / rewards: last axis V like probs, leading axes broadcast with probs (and others)."""
    t = as_float64_tensor(name, x, p.device)
    V = p.shape[-1]
    if t.ndim < 1 or t.shape[-1] != V:
        raise ValueError(
            f"{name} must have shape (..., V) with V={V} like probs {tuple(p.shape)}, got shape {tuple(t.shape)}"
        )
    shapes = [p.shape, *(o.shape for o in others)]
    try:
        torch.broadcast_shapes(t.shape, *shapes)
    except RuntimeError:
        want = " and ".join(str(tuple(sh)) for sh in shapes)
        raise ValueError(f"{name} must broadcast against probs/scores {want}, got shape {tuple(t.shape)}") from None
    check_finite(name, t)
    return t


def returned_like(t: torch.Tensor, as_numpy: bool):
    """A result in the caller's kind: numpy (a 0-d result as a numpy scalar) when ``as_numpy``, else the tensor."""
    if not as_numpy:
        return t
    a = t.detach().cpu().numpy()
    return a[()] if a.ndim == 0 else a
