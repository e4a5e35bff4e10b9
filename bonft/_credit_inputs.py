"""Input checks and output kinds shared by :mod:`bonft.credit` and :mod:`bonft.losses`.

Validation lives here, apart from the maths: public functions call these once
at their boundary; the float64 cores trust their inputs.
"""
from __future__ import annotations

import numbers
from typing import Any

import numpy as np
import torch

from bonft._checks import as_float_array, check_finite, check_nonempty, is_tensor


def _as_tensor(name: str, x: Any, *, ndim: int) -> torch.Tensor:
    """Any array-like -> float64 torch tensor with ``ndim`` dimensions, finite."""
    if is_tensor(x):
        t = x.detach()
        if t.dtype == torch.bool:
            t = t.to(torch.float64)
        elif not (t.dtype.is_floating_point or t.dtype in (torch.int8, torch.int16, torch.int32, torch.int64, torch.uint8)):
            raise TypeError(f"{name} must hold real numbers, got dtype {t.dtype}")
        t = t.to(torch.float64)
    else:
        t = torch.from_numpy(as_float_array(name, x))
    if t.ndim != ndim:
        want = "(B, n)" if ndim == 2 else "(B,)"
        raise ValueError(f"{name} must have shape {want} ({ndim} dimension(s)), got shape {tuple(t.shape)}")
    check_nonempty(name, t)
    check_finite(name, t)
    return t


def _out_kind(*xs: Any) -> tuple[bool, torch.dtype, torch.device]:
    """Output as torch if any input is a tensor (its device, its floating dtype)."""
    for x in xs:
        if is_tensor(x):
            dtype = x.dtype if x.dtype.is_floating_point else torch.float64
            return True, dtype, x.device
    return False, torch.float64, torch.device("cpu")


def _finish(w: torch.Tensor, kind: tuple[bool, torch.dtype, torch.device]):
    as_torch, dtype, device = kind
    if as_torch:
        return w.to(device=device, dtype=dtype)
    return w.cpu().numpy()


def _check_binary(name: str, t: torch.Tensor) -> None:
    bad = (t != 0) & (t != 1)
    if bool(bad.any()):
        idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
        raise ValueError(f"{name} must hold only 0/1 (or booleans), got {float(t[idx])} at index {idx}")




def _check_bool(name: str, value: Any) -> bool:
    if not isinstance(value, bool):
        raise TypeError(f"{name} must be a bool, got {type(value).__name__} {value!r}")
    return value


def _check_smoothing(smoothing: Any) -> float:
    """A finite real number >= 0 (0 is allowed, unlike _checks.check_positive)."""
    if isinstance(smoothing, bool) or not isinstance(smoothing, numbers.Real):
        raise TypeError(f"smoothing must be a real number >= 0, got {type(smoothing).__name__} {smoothing!r}")
    smoothing = float(smoothing)
    if not np.isfinite(smoothing) or smoothing < 0:
        raise ValueError(f"smoothing must be a finite number >= 0, got smoothing={smoothing}")
    return smoothing
