"""Every input check of :mod:`bonft.objectives`: pools, log-prob tensors and masks, the loss options.

Credit is computed on the host in float64 numpy: scores and rewards come from
verifiers (host data), the arrays are (B, n) and small, and numpy's per-call
cost is a fraction of torch's at this size. A torch input gives a torch
output on its device; a device tensor is copied to the host first (one sync),
so pass host arrays to keep a training step free of device syncs.

Public functions call these once at their boundary; the maths trusts its
inputs. The pool checks are O(B n). The log-prob checks read shapes and
dtypes only, except those that say otherwise: :func:`check_token_values`
(``check_tokens=True``, O(B n T)), :func:`check_empty_rows` (reads the mask
once, see its docstring) and :func:`check_ratios` (reuse only).
"""
from __future__ import annotations

import dataclasses
import math
import numbers
from typing import Any

import numpy as np
import torch
from torch import Tensor

from bonft._core.checks import (
    as_float_array,
    check_binary,
    check_bool,
    check_choice,
    check_finite,
    check_k,
    check_nonempty,
    check_nonnegative,
    is_tensor,
    torch_out_dtype,
)

TOKEN_REDUCTIONS = ("sum", "mean")
REDUCTIONS = ("none", "mean", "sum")
RATIO_LEVELS = ("token", "sequence", "pool")


# ----------------------------------------------------------------------------
# host arrays: pools of scores, rewards, correctness
# ----------------------------------------------------------------------------

def as_host(name: str, x: Any, *, ndim: int, finite: bool = True) -> np.ndarray:
    """Any array-like -> finite, non-empty float64 numpy array with ``ndim`` dimensions.

    ``finite=False``: the caller checks finiteness itself (with :func:`_check_finite_host`, whose error
    must then come first wherever another check fails).
    """
    if type(x) is np.ndarray and x.dtype == np.float64:  # the usual host pool: as it is, no conversion to try
        a = x
    elif is_tensor(x):
        t = x.detach()
        if t.is_complex():
            raise TypeError(f"{name} must hold real numbers, got dtype {t.dtype}")
        a = t.cpu().to(torch.float64).numpy()  # bool, ints, float16/bfloat16 included
    else:
        a = as_float_array(name, x)
    if a.ndim != ndim:
        want = "(B, n)" if ndim == 2 else "(B,)"
        raise ValueError(f"{name} must have shape {want} ({ndim} dimension(s)), got shape {tuple(a.shape)}")
    if a.size == 0:
        check_nonempty(name, a)
    if finite:
        _check_finite_host(name, a)
    return a


def _check_finite_host(name: str, a: np.ndarray) -> None:
    """:func:`check_finite` of a float64 host array, by its sum first: finite values sum to a finite number
    unless the sum overflows, so only a non-finite sum (NaN, an infinity, or an overflow) costs the exact
    elementwise look that names the first bad entry (one reduction instead of two passes and two copies)."""
    if not math.isfinite(np.add.reduce(a, axis=None)):  # the reduction of a.sum() without its Python wrapper
        check_finite(name, a)


def check_credit_fits(name: str, host: np.ndarray, dtype: torch.dtype) -> None:
    """A finite float64 host ``host`` must stay finite once cast to the log-probs' ``dtype``.

    Finite rewards or credit beyond the dtype's range (``|w| > 3.4e38`` in float32, which half-precision
    log-probs are computed in) become infinities in the cast, and the loss NaN or an infinity; this
    names the first such entry instead. One pass over ``host``: the losses call it only where a loss came out
    non-finite, or where nothing else reads the loss.
    """
    if dtype == torch.float64 or not dtype.is_floating_point:
        return
    big = torch.finfo(dtype).max
    bad = np.abs(host) > big
    if bad.any():
        idx = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ValueError(f"{name} must fit the log-probs' dtype {dtype} (|{name}| <= {big:.4g}), got {host[idx]:.4g} "
                         f"at index {idx}: compute the loss in float64 log-probs, or scale the rewards down")


def out_kind(*xs: Any) -> tuple[bool, Any, Any]:
    """Output as torch if any input is a tensor (its device, its floating dtype, half precision widened to float32),
    else numpy float64."""
    for x in xs:
        if is_tensor(x):
            return True, torch_out_dtype(x), x.device
    return False, None, None


def finish(w: np.ndarray, kind: tuple[bool, Any, Any], name: str = "credit"):
    """A float64 host result in the kind :func:`out_kind` chose; a non-finite one is a ``ValueError``.

    Finite inputs can still give an infinity or NaN in float64 (rewards near 1e308 whose differences or sums
    overflow, a smoothing of 1e-320 that divides to infinity): named here, never returned. One reduction.
    """
    if not math.isfinite(np.add.reduce(w, axis=None)):
        bad = ~np.isfinite(w)
        if bad.any():
            idx = tuple(int(i) for i in np.argwhere(bad)[0])
            raise ValueError(f"{name} must be finite, got {w[idx]} at index {idx} from finite inputs: their sums or "
                             f"differences overflow float64 (values near 1e308, or a divisor near 0); scale them")
    as_torch, dtype, device = kind
    if as_torch:
        return torch.from_numpy(w).to(device=device, dtype=dtype)
    return w


def check_loo_pool(n: int, credit: str) -> None:
    """A leave-one-out baseline needs someone to leave out: ``n >= 2``."""
    if n < 2:
        raise ValueError(
            f"n must be >= 2 for the leave-one-out baseline of {credit} (n=1: with one sample per prompt there is "
            f"no other sample to leave out); draw n >= 2 samples per prompt "
            f"or use baseline='none'")


def scored_pool(scores: Any, rewards: Any) -> tuple[np.ndarray, np.ndarray]:
    """Scores and rewards (B, n) of the same shape as float64 host arrays."""
    s = as_host("scores", scores, ndim=2)
    R = as_host("rewards", rewards, ndim=2)
    if R.shape != s.shape:
        raise ValueError(f"rewards must have the same shape as scores {tuple(s.shape)}, got {tuple(R.shape)}")
    return s, R


def correct_pool(correct: Any) -> np.ndarray:
    """0/1 correctness (B, n) as a float64 host array."""
    c = as_host("correct", correct, ndim=2)
    check_binary("correct", c)
    return c


def reference_pool(scores: Any, reference_scores: Any, *, k: Any, smoothing: Any) -> tuple[np.ndarray, np.ndarray, int, float]:
    """Policy scores (B, n), the reference responses' scores (B,), k and smoothing of the SFT credit."""
    s = as_host("scores", scores, ndim=2)
    e = as_host("reference_scores", reference_scores, ndim=1)
    if e.shape[0] != s.shape[0]:
        raise ValueError(f"reference_scores must have shape (B,) = ({s.shape[0]},) to match scores, got {tuple(e.shape)}")
    k = check_k(k, s.shape[1])
    smoothing = check_nonnegative("smoothing", smoothing)
    if smoothing == 0 and k > 1:  # h is undefined for a row where every sample beats the reference
        none_below = ~(s <= e[:, None]).any(-1)
        if none_below.any():
            b = int(np.flatnonzero(none_below)[0])
            raise ValueError(
                f"smoothing=0 needs a sample scoring at or below the reference, got none in row {b}; use smoothing > 0")
    return s, e, k, smoothing


def check_pool_shape(name: str, x: Any, logprobs: Any) -> None:
    """``x`` (scores, rewards, correct) has the (B, n) leading shape of ``logprobs`` (shape only, nothing read)."""
    want = tuple(check_logprobs("logprobs", logprobs, seq_ndim=2).shape[:2])
    got = tuple(x.shape) if hasattr(x, "shape") else np.shape(x)
    if len(got) == 2 and got != want:
        raise ValueError(f"{name} must have shape (B, n) of logprobs {want}, got {got}")


# ----------------------------------------------------------------------------
# log-prob tensors and masks
# ----------------------------------------------------------------------------

def check_logprobs(name: str, lp: Any, *, seq_ndim: int) -> Tensor:
    """A floating tensor of sequence (``seq_ndim`` dims) or token (``seq_ndim + 1``) log-probs.

    Half precision comes back widened to float32 (autograd still reaches the caller's tensor): a loss
    in float16 overflows once credit times log-prob passes 65504 (credit of rewards +-6e4 gave NaN).
    """
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
    return lp.float() if lp.dtype in (torch.float16, torch.bfloat16) else lp


def check_mask(mask_name: str, mask: Any, lp_name: str, lp: Tensor, *, seq_ndim: int) -> Tensor | None:
    """The detached mask on lp's device, in its own dtype (token log-probs), or None (all tokens count).

    Shape and type only. A floating mask's entries are token weights (the losses multiply by it); in a
    bool or integer mask any non-zero entry marks a response token (:func:`token_weights`).
    """
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
    return mask.detach().to(device=lp.device)


def token_weights(mask: Tensor, dtype: torch.dtype, *, out: Tensor | None = None) -> Tensor:
    """A checked mask -> 1 where it is non-zero, 0 elsewhere, in ``dtype`` (in ``out`` if given): one pass over the mask.

    The losses multiply token log-probs by the weights of a bool or integer mask (the cheapest
    masking torch offers: a ``where`` costs about twice a multiply on a CPU; a floating mask is
    used as it is, its entries being token weights) and fall back to ``where`` only when the
    product is not finite (:func:`bonft.objectives.losses.policy_gradient_loss`). Each dtype takes
    the fastest exact conversion torch has on a CPU (measured, B = 256, n = 64, T = 32): a bool
    mask is copied as its bytes (``mask.float()`` takes 7x longer), a floating one compared with 0
    straight into the result, an integer one made bool first (comparing a long mask with 0 into
    floats takes 6x longer).
    """
    if out is None:
        out = torch.empty(mask.shape, dtype=dtype, device=mask.device)
    if mask.dtype.is_floating_point:
        return torch.ne(mask, 0, out=out)
    as_bool = mask if mask.dtype == torch.bool else mask.bool()  # non-zero = token
    return out.copy_(as_bool.view(torch.uint8))


def check_token_values(name: str, lp: Tensor, mask_name: str, mask: Any, m: Tensor | None) -> None:
    """The O(B n T) checks of ``check_tokens=True``: a 0/1 mask, finite log-probs under it (``m``: the checked mask)."""
    if m is not None and mask is not None and mask.dtype != torch.bool:
        check_binary(mask_name, mask.detach())
    bad = ~torch.isfinite(lp.detach())
    if m is not None:
        bad = bad & (m != 0)
    if bool(bad.any()):
        idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
        where = " where the mask is 1" if m is not None else ""
        raise ValueError(f"{name} must be finite{where}, got {float(lp.detach()[idx])} at index {idx}")


def empty_rows(m: Tensor, weight: Tensor | None, *, zero_one: bool = False) -> Tensor:
    """``(..., T)`` checked mask -> bool ``(...)``: rows without a token (and with non-zero ``weight``). Reads nothing.

    Counts instead of ``any(-1)``, which torch runs about 5x slower than a sum on a CPU: a bool mask
    is summed as bytes; ``zero_one=True`` says ``m`` holds only 0 and 1 (:func:`token_weights`), so
    it is summed as it is.
    """
    if zero_one:
        counts = m.sum(-1)
    else:
        counts = (m if m.dtype == torch.bool else m != 0).view(torch.uint8).sum(-1)
    empty = counts == 0
    return empty if weight is None else empty & (weight != 0)


def check_empty_rows(mask_name: str, m: Tensor, weight: Tensor | None) -> None:
    """No sequence without tokens where it carries weight (all rows when ``weight`` is None).

    ``m``: a checked mask of any dtype (non-zero = token). Reads one bool back from the mask's
    device: free for a CPU mask, one sync on an accelerator. A response with credit and no token
    would contribute 0 to the loss silently.
    """
    empty = empty_rows(m, weight)
    if bool(empty.any()):
        idx = tuple(int(i) for i in torch.nonzero(empty)[0].tolist())
        what = "with non-zero credit" if weight is not None else ""
        raise ValueError(f"{mask_name} must mark at least one token per sequence{' ' + what if what else ''}, "
                         f"got an all-zero row at index {idx}")


def credit_tensor(credit: Any, lp: Tensor, *, check_device: bool) -> tuple[Tensor, np.ndarray | None]:
    """Credit (B, n) as a detached tensor on lp's device and dtype, and its float64 host copy (None for a device
    tensor); host credit is checked finite (O(B n)). Whether it fits lp's dtype (:func:`check_credit_fits`) is
    the caller's look, where the loss comes out non-finite."""
    B, n = lp.shape[:2]
    if is_tensor(credit):
        w = credit.detach()
        if w.dtype.is_complex or w.dtype == torch.bool:
            raise TypeError(f"credit must hold real numbers, got dtype {w.dtype}")
        host = w.to(torch.float64).numpy() if w.device.type == "cpu" else None
    else:
        host = as_float_array("credit", credit)  # the dtype policy: complex refused, not cast
        w = torch.from_numpy(host)
    if tuple(w.shape) != (B, n):
        raise ValueError(f"credit must have shape (B, n) = ({B}, {n}) to match logprobs, got {tuple(w.shape)}")
    if host is not None:
        _check_finite_host("credit", host)
    elif check_device:
        check_finite("credit", w)  # a device tensor: one sync, so only on request
    return w.to(device=lp.device, dtype=lp.dtype, non_blocking=True), host


def check_sampling_logprobs(sampling: Any, lp: Tensor) -> Tensor:
    """Log-probs under the sampling policy: a detached floating tensor of lp's shape (values: :func:`check_ratios`)."""
    if not is_tensor(sampling):
        raise TypeError(f"sampling_logprobs must be a torch.Tensor, got {type(sampling).__name__}")
    if not sampling.dtype.is_floating_point:
        raise TypeError(f"sampling_logprobs must be a floating tensor, got dtype {sampling.dtype}")
    if tuple(sampling.shape) != tuple(lp.shape):
        raise ValueError(f"sampling_logprobs must have the same shape as logprobs {tuple(lp.shape)}, "
                         f"got {tuple(sampling.shape)}")
    if sampling.requires_grad:
        raise ValueError("sampling_logprobs must not require grad (they are the sampling policy's log-probs, "
                         "a constant of the step), got a tensor attached to the graph; pass sampling_logprobs.detach()")
    return sampling.to(device=lp.device, dtype=lp.dtype)


def check_ratios(log_ratio: Tensor, level: str) -> None:
    """The log importance ratios ``logprobs - sampling_logprobs`` at ``level`` give finite ratios (one read)."""
    bad = ~torch.isfinite(torch.exp(log_ratio))
    if bool(bad.any()):
        idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
        raise ValueError(
            f"sampling_logprobs give a non-finite {level}-level ratio pi/pi_old: logprobs - sampling_logprobs = "
            f"{float(log_ratio[idx])} at index {idx}; check that both hold log-probs of the same tokens "
            f"(finite under the mask) and that the policy has not moved this far since sampling")


# ----------------------------------------------------------------------------
# the loss options, written once
# ----------------------------------------------------------------------------

@dataclasses.dataclass(frozen=True)
class LossOptions:
    """The keywords every loss of :mod:`bonft.objectives.losses` shares (its ``**common``).

    mask: ``(B, n, T)``, 0 = padding (token log-probs only): bool or integer, non-zero = response token;
    floating, token weights that multiply the token log-probs (0/1 = plain masking).
    token_reduction: ``"sum"`` (unbiased) or ``"mean"`` (divide by the batch's mean response length).
    reduction: ``"mean"`` over prompts, ``"sum"``, or ``"none"`` (one loss per prompt, ``(B,)``).
    anchor_logprobs, anchor_weight: the KL term to the anchor policy (weight >= 0; a weight > 0 needs
    the anchor log-probs, of the shape of ``logprobs``).
    sampling_logprobs: log-probs of the same tokens under the policy that sampled them (detached,
    shape of ``logprobs``): the credit is weighted by the importance ratio pi/pi_old.
    clip_ratio: epsilon of the clipped surrogate (Schulman et al. 2017), > 0; None = no clipping.
    ratio_level: ``"token"``, ``"sequence"`` (default) or ``"pool"``: where the ratio is taken.
    check_tokens: add the O(B n T) value checks. return_info: return ``(loss, info)``.
    """

    mask: Any = None
    token_reduction: str = "sum"
    reduction: str = "mean"
    anchor_logprobs: Any = None
    anchor_weight: float = 0.0
    sampling_logprobs: Any = None
    clip_ratio: float | None = None
    ratio_level: str | None = None
    check_tokens: bool = False
    return_info: bool = False

    def __post_init__(self):
        # the usual values are recognised without a call (every loss call builds one of these)
        if type(self.token_reduction) is not str or self.token_reduction not in TOKEN_REDUCTIONS:
            check_choice("token_reduction", self.token_reduction, TOKEN_REDUCTIONS)
        if type(self.reduction) is not str or self.reduction not in REDUCTIONS:
            check_choice("reduction", self.reduction, REDUCTIONS)
        if self.check_tokens is not False and self.check_tokens is not True:
            check_bool("check_tokens", self.check_tokens)
        if self.return_info is not False and self.return_info is not True:
            check_bool("return_info", self.return_info)
        if type(self.anchor_weight) is not float or not self.anchor_weight == 0.0:
            object.__setattr__(self, "anchor_weight", check_nonnegative("anchor_weight", self.anchor_weight))
        if self.anchor_weight > 0 and self.anchor_logprobs is None:
            raise ValueError(f"anchor_weight={self.anchor_weight} needs anchor_logprobs (the anchor policy's "
                             f"log-probs of the same tokens); without them the KL term cannot be computed")
        if self.anchor_logprobs is not None and self.anchor_weight == 0 and not self.return_info:
            raise ValueError("anchor_logprobs has no effect with anchor_weight=0 and return_info=False: set "
                             "anchor_weight > 0 for the KL penalty, or return_info=True to report the KL (info['kl']) "
                             "without adding it to the loss")
        reuse = self.sampling_logprobs is not None
        if self.ratio_level is not None:
            check_choice("ratio_level", self.ratio_level, RATIO_LEVELS)
            if not reuse:
                raise ValueError(f"ratio_level={self.ratio_level!r} needs sampling_logprobs (the log-probs under the "
                                 f"policy that sampled); without them there is no ratio")
        if self.clip_ratio is not None:
            if isinstance(self.clip_ratio, bool) or not isinstance(self.clip_ratio, numbers.Real):
                raise TypeError(f"clip_ratio must be a number > 0 or None, got "
                                f"{type(self.clip_ratio).__name__} {self.clip_ratio!r}")
            eps = float(self.clip_ratio)
            if not np.isfinite(eps) or eps <= 0:
                raise ValueError(f"clip_ratio must be a finite number > 0 (the surrogate keeps ratios in "
                                 f"[1 - clip_ratio, 1 + clip_ratio]), got clip_ratio={eps}")
            if not reuse:
                raise ValueError(f"clip_ratio={eps} needs sampling_logprobs (the log-probs under the policy that "
                                 f"sampled); without them every ratio is 1 and nothing is clipped")
            if self.ratio_level == "pool":
                raise ValueError("clip_ratio applies to ratio_level 'token' or 'sequence', got ratio_level='pool' "
                                 "(the pool ratio weights every sample's term of a pool; it is not clipped)")
            object.__setattr__(self, "clip_ratio", eps)
        if reuse and self.ratio_level is None:
            object.__setattr__(self, "ratio_level", "sequence")

    @classmethod
    def from_keywords(cls, where: str, common: dict, *, refused: tuple[str, ...] = ()) -> "LossOptions":
        """Options from ``**common`` of the function ``where``; unknown keys and ``refused`` ones are errors."""
        if not common:
            return _DEFAULT_OPTIONS  # frozen: one instance serves every call without options
        known = _OPTION_NAMES
        for key in common:
            if key not in known:
                raise TypeError(f"{where} got an unexpected keyword argument {key!r}; the shared options are "
                                f"{sorted(known - set(refused))}")
            value = common[key]
            if key in refused and value is not None and not (isinstance(value, numbers.Real) and value == 0):
                got = f"a tensor of shape {tuple(value.shape)}" if is_tensor(value) else f"{key}={value!r}"
                raise ValueError(f"{where} does not take {key} (it has no effect there), got {got}")
        return cls(**common)


_OPTION_NAMES = frozenset(f.name for f in dataclasses.fields(LossOptions))  # looked up on every loss call
_DEFAULT_OPTIONS = LossOptions()
