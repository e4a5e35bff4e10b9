"""Input checks and output kinds shared by :mod:`bonft.objectives.credit` and :mod:`bonft.objectives.losses`.

Credit is computed on the host in float64 numpy: scores and rewards come from
verifiers (host data), the arrays are (B, n) and small, and numpy's per-call
cost is a fraction of torch's at this size. A torch input gives a torch
output on its device; a device tensor is copied to the host first (one sync),
so pass host arrays to keep a training step free of device syncs.
Validation lives here, apart from the maths: public functions call these once
at their boundary; the cores trust their inputs. Every check is O(B n).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from bonft._core.checks import as_float_array, check_finite, check_nonempty, is_tensor, torch_out_dtype


def as_host(name: str, x: Any, *, ndim: int) -> np.ndarray:
    """Any array-like -> finite, non-empty float64 numpy array with ``ndim`` dimensions."""
    if is_tensor(x):
        t = x.detach()
        if t.is_complex():
            raise TypeError(f"{name} must hold real numbers, got dtype {t.dtype}")
        import torch

        x = t.cpu().to(torch.float64).numpy()  # bool, ints, float16/bfloat16 included
    a = as_float_array(name, x)
    if a.ndim != ndim:
        want = "(B, n)" if ndim == 2 else "(B,)"
        raise ValueError(f"{name} must have shape {want} ({ndim} dimension(s)), got shape {tuple(a.shape)}")
    check_nonempty(name, a)
    check_finite(name, a)
    return a


def out_kind(*xs: Any):
    """Output as torch if any input is a tensor (its device, its floating dtype, half precision widened to float32),
    else numpy float64."""
    for x in xs:
        if is_tensor(x):
            return True, torch_out_dtype(x), x.device
    return False, None, None


def finish(w: np.ndarray, kind):
    as_torch, dtype, device = kind
    if as_torch:
        import torch

        return torch.from_numpy(w).to(device=device, dtype=dtype)
    return w
