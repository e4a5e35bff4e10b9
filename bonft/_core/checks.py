"""Input validation shared by every public function.

One exception policy for the whole library: a wrong *type* raises ``TypeError``,
a wrong *value* (shape, range, NaN, inconsistent arguments) raises
``ValueError``. Messages name the argument, what was expected and what came,
e.g. ``k must be <= n (n=8), got k=16``. Public functions validate once at
their boundary; internal helpers trust their inputs.
"""
from __future__ import annotations

import numbers
from typing import Any, Iterable, Sequence

import numpy as np



def is_tensor(x: Any) -> bool:
    """True for a torch tensor; never imports torch (a cold import costs seconds)."""
    if not type(x).__module__.startswith("torch"):
        return False
    import torch

    return isinstance(x, torch.Tensor)


def check_int(name: str, value: Any, *, min: int | None = None, max: int | None = None) -> int:
    """Return ``value`` as an int; bools and non-integral numbers are refused."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        if isinstance(value, (float, np.floating)) and float(value).is_integer():
            raise TypeError(f"{name} must be an int, got float {value!r}")
        raise TypeError(f"{name} must be an int, got {type(value).__name__} {value!r}")
    value = int(value)
    if min is not None and value < min:
        raise ValueError(f"{name} must be >= {min}, got {name}={value}")
    if max is not None and value > max:
        raise ValueError(f"{name} must be <= {max}, got {name}={value}")
    return value


def check_k(k: Any, n: int, *, name: str = "k") -> int:
    """Validate one subset size ``1 <= k <= n``."""
    k = check_int(name, k)
    if k < 1:
        raise ValueError(f"{name} must be >= 1, got {name}={k}")
    if k > n:
        raise ValueError(f"{name} must be <= n (n={n}), got {name}={k}")
    return k


def check_ks(ks: Any, n: int, *, name: str = "k") -> tuple[np.ndarray, bool]:
    """Validate an int or a sequence of ints in ``[1, n]``.

    Returns ``(ks as int64 array, was_scalar)``.
    """
    if isinstance(ks, numbers.Integral) and not isinstance(ks, bool):
        return np.array([check_k(ks, n, name=name)], dtype=np.int64), True
    if is_tensor(ks):
        ks = ks.tolist()
    items = _nonempty_list(name, ks, "an int or a sequence of ints")
    return np.array([check_k(v, n, name=name) for v in items], dtype=np.int64), False


def check_real(name: str, value: Any, *, min: float | None = None, max: float | None = None) -> float:
    """A finite real number, optionally within ``[min, max]``; bools are refused."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number, got {type(value).__name__} {value!r}")
    value = float(value)
    if np.isfinite(value) and (min is None or value >= min) and (max is None or value <= max):
        return value
    if min is not None and max is not None:
        span = f"a finite number in [{min:g}, {max:g}]"
    elif min is not None or max is not None:
        span = f"a finite number {'>=' if min is not None else '<='} {min if min is not None else max:g}"
    else:
        span = "a finite number"
    raise ValueError(f"{name} must be {span}, got {name}={value}")


def check_positive(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number, got {type(value).__name__} {value!r}")
    value = float(value)
    if not np.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a finite number > 0, got {name}={value}")
    return value


def check_nonnegative(name: str, value: Any) -> float:
    """A finite real number >= 0 (0 allowed, unlike :func:`check_positive`)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number >= 0, got {type(value).__name__} {value!r}")
    value = float(value)
    if not np.isfinite(value) or value < 0:
        raise ValueError(f"{name} must be a finite number >= 0, got {name}={value}")
    return value


def check_bool(name: str, value: Any) -> bool:
    if not isinstance(value, bool):
        raise TypeError(f"{name} must be a bool, got {type(value).__name__} {value!r}")
    return value


def check_binary(name: str, a: Any) -> None:
    """Every entry 0 or 1 (numpy or torch), saying where one is not."""
    if is_tensor(a):
        import torch

        bad = (a != 0) & (a != 1)
        if bool(bad.any()):
            idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
            raise ValueError(f"{name} must hold only 0/1 (or booleans), got {float(a[idx])} at index {idx}")
        return
    a = np.asarray(a)
    bad = (a != 0) & (a != 1)
    if bad.any():
        idx = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ValueError(f"{name} must hold only 0/1 (or booleans), got {float(a[idx])} at index {idx}")


def check_fraction(name: str, value: Any, *, open_low: bool = False, open_high: bool = False) -> float:
    """A real number in [0, 1] (ends optionally open)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number, got {type(value).__name__} {value!r}")
    value = float(value)
    lo_ok = value > 0 if open_low else value >= 0
    hi_ok = value < 1 if open_high else value <= 1
    if not (np.isfinite(value) and lo_ok and hi_ok):
        lo = "(" if open_low else "["
        hi = ")" if open_high else "]"
        raise ValueError(f"{name} must be in {lo}0, 1{hi}, got {name}={value}")
    return value


def check_choice(name: str, value: Any, choices: Iterable[str]) -> str:
    choices = tuple(choices)
    if not isinstance(value, str):
        raise TypeError(f"{name} must be one of {choices}, got {type(value).__name__} {value!r}")
    if value not in choices:
        raise ValueError(f"{name} must be one of {choices}, got {value!r}")
    return value


def as_float_array(name: str, x: Any, *, ndim: int | Sequence[int] | None = None) -> np.ndarray:
    """Convert numpy / torch / nested lists to a float64 numpy array (no copy when possible)."""
    if is_tensor(x):
        x = x.detach().cpu().numpy()
    if isinstance(x, (str, bytes)) or x is None:
        raise TypeError(f"{name} must be an array of numbers, got {type(x).__name__}")
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError):
        raise TypeError(f"{name} must be an array of numbers, got {type(x).__name__}") from None
    if ndim is not None:
        allowed = (ndim,) if isinstance(ndim, int) else tuple(ndim)
        if arr.ndim not in allowed:
            raise ValueError(f"{name} must have {' or '.join(map(str, allowed))} dimension(s), got shape {tuple(arr.shape)}")
    return arr


def check_finite(name: str, x: Any) -> None:
    """Raise ``ValueError`` if ``x`` (numpy or torch) holds NaN or +-inf, saying where."""
    if is_tensor(x):
        import torch

        bad = ~torch.isfinite(x.detach())
        if bool(bad.any()):
            idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
            raise ValueError(f"{name} must be finite, got {float(x.detach()[idx])} at index {idx}")
        return
    arr = np.asarray(x)
    bad = ~np.isfinite(arr)
    if bad.any():
        idx = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ValueError(f"{name} must be finite, got {arr[idx]} at index {idx}")


def check_same_shape(**arrays: Any) -> tuple[int, ...]:
    """All keyword arrays must share one shape; returns it."""
    items = [(k, tuple(v.shape)) for k, v in arrays.items()]
    first_name, first = items[0]
    for name, shape in items[1:]:
        if shape != first:
            raise ValueError(f"{name} must have the same shape as {first_name} {first}, got {shape}")
    return first


def _nonempty_list(name: str, x: Any, expected: str) -> list:
    """``list(x)``, refusing what cannot be listed (``TypeError``) and an empty result (``ValueError``)."""
    try:
        items = list(x)
    except TypeError:
        raise TypeError(f"{name} must be {expected}, got {type(x).__name__}") from None
    if not items:
        raise ValueError(f"{name} must not be empty")
    return items


def check_items(name: str, x: Any, kind: type, what: str) -> list:
    """A non-empty sequence whose items are all ``kind`` (named ``what`` in messages) -> a list.

    A single str is refused even where str items are wanted (it would be read letter by letter).
    """
    if isinstance(x, str):
        raise TypeError(f"{name} must be a sequence of {what}, got a single str (wrap it in a list)")
    items = _nonempty_list(name, x, f"a sequence of {what}")
    for i, item in enumerate(items):
        if not isinstance(item, kind):
            raise TypeError(f"{name} must be a sequence of {what}, got {type(item).__name__} at index {i}")
    return items


def check_nonempty(name: str, x: Any) -> None:
    if int(np.prod(getattr(x, "shape", (len(x),)))) == 0:
        raise ValueError(f"{name} must not be empty")


def check_probs(name: str, p: Any, *, atol: float = 1e-6) -> None:
    """Probabilities along the last axis: non-negative, finite, summing to 1 within ``atol``."""
    check_finite(name, p)
    if is_tensor(p):
        pd = p.detach()
        if bool((pd < 0).any()):
            raise ValueError(f"{name} must be non-negative, got min {float(pd.min())}")
        s = pd.sum(-1)
        err = float((s - 1).abs().max()) if s.numel() else 0.0
    else:
        pa = np.asarray(p)
        if (pa < 0).any():
            raise ValueError(f"{name} must be non-negative, got min {float(pa.min())}")
        s = pa.sum(-1)
        err = float(np.abs(s - 1).max()) if s.size else 0.0
    if err > atol:
        raise ValueError(f"{name} must sum to 1 along the last axis (atol={atol}), got a row off by {err:.3g}")
