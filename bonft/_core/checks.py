"""Input validation shared by every public function.

One exception policy for the whole library: a wrong *type* raises ``TypeError``,
a wrong *value* (shape, range, NaN, inconsistent arguments) raises
``ValueError``. Messages name the argument, what was expected and what came,
e.g. ``k must be <= n (n=8), got k=16``. Public functions validate once at
their boundary; internal helpers trust their inputs.
"""
from __future__ import annotations

import numbers
import sys
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


# ---------------------------------------------------------------- bounds of the knobs that size work or memory
# Each is checked before any work, by the API and (through it or the same constant) the command line.
MAX_BOOT = 1_000_000  # bootstrap replicates: a (replicates x values) table; past this no interval moves measurably
MIN_BOOT = 10  # replicates of a printed interval (commands, recipes, the planner): fewer give no percentile worth the name
MAX_SUBSETS_BOUND = 1_000_000  # weighted vote: sampled k-subsets, each drawing n random keys at once
MAX_POOL = 65_536  # samples per prompt (n, eval_samples): a pool is sampled, scored and credited at once
MAX_PROMPTS_PER_STEP = 65_536  # prompts per optimizer step
MAX_SAMPLES_AT_ONCE = 2**20  # responses one micro-batch samples at once ((prompts_per_step / grad_accum) x n)
SEED_BOUND = 2**63  # seeds in [0, 2**63): kept as int64 (torch.manual_seed takes < 2**64, numpy any size)


def check_bound(name: str, value: Any, *, max: int, why: str, min: int = 1) -> int:
    """An int in ``[min, max]`` whose upper bound has a reason: ``n_boot must be <= 1,000,000 (why), got ...``."""
    value = check_int(name, value, min=min)
    if value > max:
        raise ValueError(f"{name} must be <= {max:,} ({why}), got {name}={value:,}")
    return value


def check_n_boot(n_boot: Any, *, name: str = "n_boot", min: int = 1) -> int:
    """Bootstrap replicates in ``[min, MAX_BOOT]``."""
    return check_bound(name, n_boot, min=min, max=MAX_BOOT,
                       why="each replicate is a row of the bootstrap table held in memory; more than this cost time "
                           "and memory and do not move a percentile interval measurably")


def check_seed(seed: Any, *, name: str = "seed") -> int:
    """A seed in ``[0, 2**63)``: an int64, within what torch.manual_seed (< 2**64) and numpy take."""
    value = check_int(name, seed, min=0)
    if value >= SEED_BOUND:
        raise ValueError(f"{name} must be < 2**63 (seeds are kept as int64; torch.manual_seed overflows from 2**64), "
                         f"got {name}={value}")
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


def check_pool_ks(ks: Any, pools, *, name: str = "ks", pool: str = "scores") -> tuple[np.ndarray, bool]:
    """:func:`check_ks` against the smallest of ``pools`` (a 2-D array or a list of 1-D pools); a k above a ragged
    list's smallest pool names that pool (``scores[3]``), since one short pool caps k for every prompt."""
    sizes = [pools.shape[1]] if isinstance(pools, np.ndarray) else [len(x) for x in pools]
    p = int(np.argmin(sizes))
    if len(set(sizes)) < 2:
        return check_ks(ks, sizes[p], name=name)
    arr, scalar = check_ks(ks, sys.maxsize, name=name)
    if arr.max() > sizes[p]:
        raise ValueError(f"{name} must be <= the smallest pool (n={sizes[p]}, {pool}[{p}]; the largest holds "
                         f"{max(sizes)}), got {name}={int(arr.max())}: lower {name} or leave that pool out")
    return arr, scalar


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


_KIND_NAMES = {"c": "complex numbers", "U": "strings", "S": "bytes", "M": "dates", "m": "time spans", "V": "raw records"}


def _not_real(name: str, what: str, dtype: Any) -> TypeError:
    return TypeError(f"{name} must hold real numbers, got {what} (dtype {dtype}); convert it explicitly "
                     f"(e.g. its real part or its absolute value)" if what == "complex numbers" else
                     f"{name} must hold real numbers, got {what} (dtype {dtype})")


def as_float_array(name: str, x: Any, *, ndim: int | Sequence[int] | None = None) -> np.ndarray:
    """Convert numpy / torch / nested lists to a float64 numpy array (no copy when possible).

    The one dtype policy of every public boundary: real floating data of any width is accepted and
    widened to float64 before any arithmetic (float16 and bfloat16 included, so nothing overflows in
    the narrow type); integers and booleans convert exactly up to 2**53 (functions that document
    other meanings check them first); complex numbers, strings, bytes, dates and None are refused
    with a ``TypeError`` naming the argument (never a silent cast that drops the imaginary part).
    """
    if is_tensor(x):
        t = x.detach()
        if t.is_complex():
            raise _not_real(name, "complex numbers", t.dtype)
        import torch

        x = t.to(device="cpu", dtype=torch.float64).numpy()  # float16 / bfloat16 have no exact numpy route
    if isinstance(x, (str, bytes)) or x is None:
        raise TypeError(f"{name} must be an array of numbers, got {type(x).__name__}")
    try:
        arr = np.asarray(x)
        kind = arr.dtype.kind
        if kind in _KIND_NAMES:
            raise _not_real(name, _KIND_NAMES[kind], arr.dtype)
        arr = arr.astype(np.float64, copy=False)
    except OverflowError:
        raise ValueError(f"{name} must hold numbers within the float64 range (|x| < 1.8e308), "
                         f"got an integer beyond it") from None
    except (TypeError, ValueError) as e:
        if str(e).startswith(f"{name} must"):
            raise
        raise TypeError(f"{name} must be an array of real numbers, got {type(x).__name__}") from None
    if ndim is not None:
        allowed = (ndim,) if isinstance(ndim, int) else tuple(ndim)
        if arr.ndim not in allowed:
            raise ValueError(f"{name} must have {' or '.join(map(str, allowed))} dimension(s), got shape {tuple(arr.shape)}")
    return arr


def torch_out_dtype(x: Any):
    """The dtype a torch result takes for a torch input ``x``: float32 and float64 kept, the half-precision
    types widened to float32 (a result computed in float64 may not fit float16: credit of rewards +-6e4
    is +-1.2e5 > 65504), anything else float64."""
    import torch

    if x.dtype in (torch.float16, torch.bfloat16):
        return torch.float32
    return x.dtype if x.dtype.is_floating_point else torch.float64


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
