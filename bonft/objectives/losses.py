"""PyTorch losses for best-of-N-aware fine-tuning: a public credit function + one policy-gradient core.

Every named loss is, literally, :func:`policy_gradient_loss` applied to the
credit of :mod:`bonft.objectives.credit` (no gradient through it), plus the
pool value of that credit in ``info``; its gradient is

    -(1/B) * sum_b sum_i w_bi * grad log pi(y_bi)       (reduction="mean")

and minimising it ascends the objective averaged over prompts. Plug your own
credit into :func:`policy_gradient_loss` the same way.

Log-probabilities come either per sequence, ``logprobs: (B, n)``, or per token,
``logprobs: (B, n, T)`` with an optional ``mask: (B, n, T)`` (True/1 = response
token, False/0 = padding). Padding tokens change nothing, even if they hold NaN
or -inf. A floating mask *multiplies* the token log-probs, as a hand-written
``(lp * mask).sum(-1)`` does: its entries are token weights (0/1 is plain
masking, 0.5 halves a token's term; the anchor KL weights each token's k3 the
same way; sample reuse takes each response's ratio over its marked tokens,
unweighted). A bool or integer mask selects: any non-zero entry is a token of
weight 1. Token counts (``token_reduction="mean"``, ``masked_frac``) count the
non-zero entries, whatever their weight. A NaN or infinite weight is a
``ValueError`` naming the mask (looked for only once the result is non-finite);
with ``check_tokens=True`` a mask other than bool or 0/1 is a ``ValueError``.
:func:`bonft.objectives.logprobs.token_logprobs` turns a causal LM's logits and
labels into this layout.

The shared keywords (``**common``) are the fields of
:class:`bonft.objectives.validation.LossOptions`, written once:

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
same shape as ``logprobs`` (the anchor policy's log-probs of the same tokens)
the loss adds ``anchor_weight * (1/n) sum_i KL_i`` where ``KL_i`` aggregates
the per-token "k3" estimator ``exp(d) - d - 1``, ``d = anchor - logp``
(non-negative; from memory: J. Schulman's 2020 note "Approximating KL
divergence") with the same ``token_reduction``. Its *value* is an unbiased
estimate of KL(pi || anchor) per token on on-policy samples; its *gradient*
as a loss has mean ``grad KL(anchor || pi)`` (per token), which also pulls
``pi`` towards the anchor.

Sample reuse (several optimizer steps per sampled batch): pass
``sampling_logprobs``, the log-probs of the same tokens under the policy that
sampled them (``pi_old``, detached). Each term's credit is then weighted by the
importance ratio ``r = pi/pi_old`` (detached), so the gradient is
``-(1/B) sum_b sum_i w_bi r * grad log pi(y_bi)``; at ``r = 1`` it is the
on-policy gradient exactly. ``ratio_level``:
  * ``"pool"``: ``r_b = prod_i pi(y_bi)/pi_old(y_bi)``, the likelihood ratio of
    the whole pool. **Unbiased** for the gradient of the objective under
    ``pi`` for every credit whose on-policy estimate is (the pool is one draw
    from ``pi_old^n``); its variance grows with ``n`` and with the distance
    between the policies.
  * ``"sequence"`` (default): ``r_bi = pi(y_bi)/pi_old(y_bi)`` per sample.
    Unbiased for credits that are a per-sample reward minus a baseline from
    the other samples (``reinforce_credit``, ``best_of_k_credit`` with
    ``k = 1``); for ``k > 1`` the other members of each subset still come from
    ``pi_old``, so it is biased (the tests measure how much) and exact only
    as ``pi_old -> pi``.
  * ``"token"``: one ratio per token, ``pi(y_t | y_<t)/pi_old(y_t | y_<t)``
    (the per-token surrogate of Schulman et al. 2017); an approximation,
    biased even for ``k = 1``.
``clip_ratio=eps`` (token or sequence level) drops the gradient of a term
whose ratio has left ``[1 - eps, 1 + eps]`` in the direction its credit
pushes (credit > 0 and ``r > 1 + eps``, or credit < 0 and ``r < 1 - eps``):
exactly the gradient of the clipped surrogate ``min(r w, clip(r) w)`` of
Schulman et al. 2017, "Proximal Policy Optimization Algorithms". Clipping
trades bias for a bounded step. The loss *value* is ``-sum w * r * log pi``
with ``r`` detached (equal to the on-policy value at ``r = 1``); its gradient
is the surrogate's.

``reduction``: ``"mean"`` divides the per-prompt losses by ``B`` (the number
of prompts), ``"sum"`` adds them, ``"none"`` returns them, shape ``(B,)``.

Return value: the loss tensor; with ``return_info=True`` a pair ``(loss,
info)`` where ``info`` maps names to *detached tensors* (no ``float()``, so
no device sync): ``pools_with_signal`` (share of prompts whose credit is not
all zero: the others teach nothing), ``credit_abs_mean`` (mean absolute
credit: the size of the signal), ``masked_frac`` (share of token positions
that are padding), ``pool_value`` (named losses: the objective's pool
estimate), ``kl`` (per-token k3 value, with ``anchor_logprobs``), and with
``sampling_logprobs`` ``ratio_ess`` (effective sample size of the ratios as
a share of their count, ``(sum r)^2 / (N sum r^2)``: 1 when on-policy, small
when a few samples dominate: resample) and ``clip_frac`` (share of terms
whose gradient the clip dropped, with ``clip_ratio``).

Cost and checks: the pool checks are O(B n); credit is computed in float64
numpy on the host (scores and rewards come from verifiers) and copied to the
log-probs' device once (on a CPU, ``pass_at_k_loss``'s unbiased credit is each
pool's two values rounded to the log-probs' dtype, then selected: the same
numbers). A named loss checks the credit it computed for a NaN or an infinity
(finite rewards can overflow) on an accelerator before the loss, on a CPU only
when the loss is not finite: a ``ValueError`` naming the credit either way. With a mask, padding is taken out by a multiply: by a
floating mask as given (the backward allocates ``mask * g``; the caller's
tensor is never written), by 0/1 weights made from a bool or integer mask (one
conversion; the backward reuses that tensor for the gradient). One read of two
numbers decides the rest: the sum of the per-prompt loss (finite?) and whether
a masked sum is exactly 0. A response whose mask row is all zero but whose
credit is not would add nothing, silently, so it is a ``ValueError``; only a
zero sum sends the call to that O(B n T) row count. NaN or an infinity in the
padding makes the multiply's result non-finite (``0 * nan`` is NaN), and only
then is the loss computed again with ``torch.where`` (about 3-4x the cost of
the fast call), selecting ``mask != 0`` and then multiplying by a floating
mask, so the numbers are those of the fast call with finite padding: padding
may hold anything, at a price paid only when it holds a non-finite value. The
read is free on the CPU (numpy looks at the tensors' memory) and one sync on an
accelerator. Sample reuse masks with ``where`` throughout and reads one more
(the ratios must be finite). ``check_tokens=True`` adds the O(B n T) checks (a
0/1 mask, no empty response at all, finite log-probs under the mask; each a
sync on an accelerator). Without it a non-finite log-prob under the mask gives
a non-finite loss (never hidden): check the loss before the optimizer step, as
the trainer does.

Caution: these losses maximise what the verifier rewards. An imperfect
verifier (learned reward model, weak unit tests) will be exploited (reward
hacking): monitor a held-out true reward, and run model-written code only in a
sandbox.
"""
from __future__ import annotations

import math

import numpy as np
import torch
from torch import Tensor

from bonft._core.checks import check_binary, is_tensor
from bonft.objectives.credit import (
    _best_of_k_credit_host,
    _pass_at_k_credit_host,
    _pass_values,
    _reinforce_credit_host,
    best_of_k_sft_credit,
)
from bonft.objectives.validation import (
    _DEFAULT_OPTIONS,
    LossOptions,
    _check_finite_host,
    as_host,
    check_credit_fits,
    check_empty_rows,
    check_logprobs,
    check_mask,
    check_pool_shape,
    check_ratios,
    check_sampling_logprobs,
    check_token_values,
    credit_tensor,
    token_weights,
)

__all__ = ["policy_gradient_loss", "best_of_k_loss", "pass_at_k_loss", "best_of_k_sft_loss", "reinforce_loss",
           "nll_loss"]

_NOT_FOR_NLL = ("anchor_logprobs", "anchor_weight", "sampling_logprobs", "clip_ratio", "ratio_level")


# ----------------------------------------------------------------------------
# the core
# ----------------------------------------------------------------------------

def policy_gradient_loss(logprobs, credit, **common):
    r"""Policy-gradient loss for a given per-sample credit (the core every named loss wraps).

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask (B, n, T)``;
    ``anchor_logprobs`` and ``sampling_logprobs`` like ``logprobs``],
    ``credit (B, n)`` ``-> loss ()``, or ``(B,)`` with ``reduction="none"``.

    .. math::
        \ell = \frac1B\sum_b\Big(-\sum_i w_{bi}\,\rho_{bi}\log\pi(y_{bi})
               + \beta\,\frac1n\sum_i \mathrm{KL}_{bi}\Big)

    ``credit`` (numpy, list or tensor; no gradient flows through it) is any
    weight ``w`` such that ``sum_i w_i grad log pi(y_i)`` estimates the
    gradient you want, e.g. from :mod:`bonft.objectives.credit`; ``beta`` is
    ``anchor_weight``; ``rho`` is 1 on-policy and the (detached, optionally
    clipped) importance ratio with ``sampling_logprobs`` (module docstring).
    ``**common``: the fields of :class:`~bonft.objectives.validation.LossOptions`
    (mask, token_reduction, reduction, anchor_logprobs, anchor_weight,
    sampling_logprobs, clip_ratio, ratio_level, check_tokens, return_info).
    Host credit is checked finite (O(B n)); a device tensor only with
    ``check_tokens=True`` (a sync).

    References: Williams 1992 (REINFORCE, the score-function gradient);
    Kool et al. 2019 (leave-one-out baselines); Schulman et al. 2017
    (the clipped surrogate).
    """
    return _policy_gradient_loss(logprobs, credit, LossOptions.from_keywords("policy_gradient_loss", common))


def _policy_gradient_loss(logprobs, credit, opt: LossOptions, *, own: bool = False):
    """:func:`policy_gradient_loss` with its options checked (the named losses check them under their own name).

    ``own``: ``logprobs`` were checked and ``credit`` is a float64 host array a named loss computed from
    its checked, finite pools (:func:`_own_credit`): no generic conversion, and on a CPU its finiteness
    (an overflow of finite rewards can still give an infinity) is looked at only when the loss is not finite;
    or a tensor of lp's dtype and device made from finite tables (taken as it is).
    """
    if own and opt is _DEFAULT_OPTIONS and logprobs.ndim == 2 and _numpy_view(logprobs):
        return _plain_sequence_loss(logprobs, credit)
    lp = logprobs if own else check_logprobs("logprobs", logprobs, seq_ndim=2)
    mask = check_mask("mask", opt.mask, "logprobs", lp, seq_ndim=2)
    if opt.check_tokens:
        check_token_values("logprobs", lp, "mask", opt.mask, mask)
    if not own:
        w, host = credit_tensor(credit, lp, check_device=opt.check_tokens)
        if host is not None and lp.dtype != torch.float64 and lp.device.type != "cpu":
            check_credit_fits("credit", host, lp.dtype)  # no read of a device: one pass over the host copy
        out = _checked_credit_loss(lp, mask, w, opt)
        if host is not None and lp.dtype != torch.float64 and lp.device.type == "cpu":
            loss = out[0] if opt.return_info else out  # finite host credit overflows the cast only to +-inf
            if not _finite_loss(loss):
                check_credit_fits("credit", host, lp.dtype)
        return out
    if is_tensor(credit):  # made in lp's dtype on its device from finite tables (_pass_at_k_selected): no check
        return _checked_credit_loss(lp, mask, credit, opt)
    if not _numpy_view(lp) or opt.sampling_logprobs is not None:  # no read of the loss to share: checked now
        _check_finite_host("credit", credit)
        check_credit_fits("credit", credit, lp.dtype)
        return _checked_credit_loss(lp, mask, _own_credit(credit, lp), opt)
    try:
        out = _checked_credit_loss(lp, mask, _own_credit(credit, lp), opt, late=credit)
    except (TypeError, ValueError):
        _check_finite_host("credit", credit)  # the error a non-finite credit gives comes first, as when checked first
        raise
    if mask is None:  # a non-finite credit makes the loss non-finite (inf * 0 is NaN): one read of host memory
        loss = out[0] if opt.return_info else out
        if not _finite_loss(loss):
            _check_finite_host("credit", credit)
            check_credit_fits("credit", credit, lp.dtype)
    return out


def _finite_loss(loss: Tensor) -> bool:
    """One read of a host loss (a scalar, or its (B,) sum with ``reduction="none"``): is it finite?"""
    return math.isfinite(loss.item() if loss.ndim == 0 else float(loss.detach().numpy().sum()))


def _plain_sequence_loss(lp: Tensor, credit) -> Tensor:
    """The named losses' call without options on (B, n) host log-probs: :func:`_checked_credit_loss`'s operations
    and its read of the loss (a float64 credit is checked finite only when the loss is not), inline."""
    if is_tensor(credit):  # made in lp's dtype from finite tables
        return _plain_loss(credit, lp)
    loss = _plain_loss(_own_credit(credit, lp), lp)
    if not math.isfinite(loss.item()):
        _check_finite_host("credit", credit)  # a non-finite credit makes the loss non-finite (inf * 0 is NaN)
        check_credit_fits("credit", credit, lp.dtype)  # as does one that overflows lp's dtype
    return loss


def _plain_loss(w: Tensor, lp: Tensor) -> Tensor:
    """The sequence-level loss without options, :func:`_policy_gradient`'s operations: minus each prompt's
    credit-weighted sum, averaged over prompts."""
    return (-(w * lp).sum(-1)).mean()


def _own_credit(credit: np.ndarray, lp: Tensor) -> Tensor:
    """A float64 host credit the losses computed -> a tensor of lp's dtype on its device (the conversion only)."""
    w = torch.from_numpy(credit)
    if lp.device.type == "cpu":  # no device argument: half the cost of the call with one
        return w if lp.dtype == torch.float64 else w.to(dtype=lp.dtype)
    return w.to(device=lp.device, dtype=lp.dtype, non_blocking=True)


def _checked_credit_loss(lp: Tensor, mask: Tensor | None, w: Tensor, opt: LossOptions, *, late=None):
    """:func:`_policy_gradient_loss` once the credit is a tensor. ``late``: the own host credit whose finiteness
    is still to be checked, before anything else, where the one read finds a non-finite value."""
    if mask is None:
        if lp.ndim == 2 and opt is _DEFAULT_OPTIONS:  # the plain sequence-level loss
            return _plain_loss(w, lp)
        loss, info, _, _ = _policy_gradient(lp, w, None, opt, fast=False)
    elif opt.sampling_logprobs is not None:  # sample reuse reads its ratios anyway: the where path, checked first
        check_empty_rows("mask", mask, None if opt.check_tokens else w)
        m = _Mask(mask, lp.dtype)
        loss, info, checked, _ = _policy_gradient(lp, w, m, opt, fast=False)
        if m.multiplies and not bool(torch.isfinite(checked).all()):
            m.check_finite_weights("mask")  # a non-finite weight: a ValueError, not a NaN loss
    else:
        m = _Mask(mask, lp.dtype)
        loss, info, checked, sums = _policy_gradient(lp, w, m, opt, fast=True)
        if _needs_a_look(checked, sums):  # the one read
            if late is not None:
                _check_finite_host("credit", late)
                check_credit_fits("credit", late, lp.dtype)
            # an empty row (with credit, or any with check_tokens): a ValueError
            check_empty_rows("mask", mask, None if opt.check_tokens else w)
            if not bool(torch.isfinite(checked).all()):  # NaN or an infinity: where
                loss, info, checked, _ = _policy_gradient(lp, w, m, opt, fast=False)
                if m.multiplies and not bool(torch.isfinite(checked).all()):
                    m.check_finite_weights("mask")  # a non-finite weight: a ValueError, not a NaN loss
    return (loss, info) if opt.return_info else loss


_NUMPY_ON_CPU = True  # the tests switch it off to count the reads of the accelerator path on a CPU


def _numpy_view(t: Tensor) -> bool:
    """Read small (B, n) tensors through numpy (no copy, no sync: the tensor is in host memory)?"""
    return _NUMPY_ON_CPU and t.device.type == "cpu"


def _needs_a_look(checked: Tensor, sums: Tensor) -> bool:
    """One read: is anything in ``checked`` non-finite, or is a masked sum in ``sums`` exactly 0?

    An empty row's masked sum is exactly 0, so only rows whose sum is 0 can be empty: testing the
    (B, n) sums (O(B n)) instead of counting every row's tokens (O(B n T)) leaves the exact count
    to the rare call where a sum is 0 (a response whose every token had probability 1, or sums
    that cancel). A non-finite value anywhere makes the sum of ``checked`` non-finite (as may a
    finite overflow: then the exact path runs for nothing and gives the same result). On a CPU
    both are numpy reductions over the tensors' memory (a torch call costs several times more at
    this size); elsewhere one tensor of two numbers is read back.
    """
    if _numpy_view(checked):
        total = float(checked.detach().numpy().sum())
        zeros = 0 if sums.numpy().all() else 1  # a truth test per entry (NaN is true): 2x faster than a count
    else:
        total, zeros = torch.stack((checked.detach().sum().double(),
                                    (sums.numel() - torch.count_nonzero(sums)).double())).tolist()
    return zeros != 0 or not math.isfinite(total)


def _policy_gradient(lp: Tensor, w: Tensor, m: "_Mask | None", opt: LossOptions, *, fast: bool):
    """The loss of :func:`policy_gradient_loss` on checked inputs -> ``(loss, info, checked (B,), sums (B, n))``.

    ``fast``: padding is masked by a multiply (exact when it holds finite numbers); otherwise by
    ``where`` (exact whatever it holds). Every non-finite value met on the fast path reaches
    ``checked`` (the per-prompt loss, plus the KL; ``0 * inf`` and ``w * NaN`` are NaN), so one
    test of it tells whether the ``where`` path is needed. ``sums``: the masked sums of the
    log-probs, (B, n), detached (for the empty-row test).
    """
    info: dict[str, Tensor] = {}
    if opt.sampling_logprobs is None:
        seq = _masked_sum(lp, m, fast=fast, spare=opt.anchor_logprobs is None,  # the KL term uses the weights too
                          keep_count=opt.return_info or opt.token_reduction == "mean")  # (B, n)
    else:
        seq = _reweighted_sum(lp, m, w, opt, info)
    sums = seq.detach()
    seq = _per_token_scale(seq, lp, m, opt.token_reduction)
    prod = w * seq
    per_prompt = -prod.sum(-1)  # (B,)
    checked = per_prompt
    if opt.anchor_logprobs is not None:
        kl_b, kl_tok = _anchor_kl(lp, m, opt, fast=fast)
        if opt.anchor_weight:
            per_prompt = per_prompt + opt.anchor_weight * kl_b
        checked = per_prompt + kl_b.detach()  # the KL of the info too, with any weight
        info["kl"] = kl_tok
    loss = _reduce(per_prompt, opt.reduction)
    if not opt.return_info:
        return loss, None, checked, sums
    size = w.abs()
    info["pools_with_signal"] = _share_with_signal(w, size)
    info["credit_abs_mean"] = size.mean()
    info["masked_frac"] = (_padding_share(m, lp, w.dtype) if m is not None
                           else torch.scalar_tensor(0.0, dtype=w.dtype, device=w.device))
    return loss, info, checked, sums


def _padding_share(m: "_Mask", lp: Tensor, dtype: torch.dtype) -> Tensor:
    """``1 - tokens / positions`` in ``dtype``; on a CPU the same float operations on numpy scalars (no torch calls)."""
    count = m.count()
    if _numpy_view(count) and dtype in (torch.float32, torch.float64):
        one = np.float32(1) if dtype == torch.float32 else np.float64(1)  # the dtype's own arithmetic
        return torch.from_numpy(np.array(one - one.dtype.type(count.item()) / one.dtype.type(lp.numel())))
    return 1 - count.to(dtype) / lp.numel()


def _share_with_signal(w: Tensor, size: Tensor) -> Tensor:
    """Share of the (B, n) credit's rows that hold a non-zero value, in ``w``'s dtype and device (``size``: ``|w|``).

    On a CPU the rows whose largest ``|w|`` is not 0 are counted (torch's ``amax``, then numpy over the
    (B,) result: torch's ``any(-1)`` is slow, numpy's ``any(-1)`` takes half again as long); ``j / B`` is
    then rounded once to ``w``'s dtype, the value torch's mean of the 0/1 flags gives.
    """
    if _numpy_view(w):
        rows = np.count_nonzero(size.amax(-1).numpy())
        return torch.from_numpy(np.array(rows / w.shape[0], dtype=w.numpy().dtype))  # rounded once, as torch.tensor
    return (w != 0).any(-1).to(w.dtype).mean()


class _Mask:
    """A checked mask in the forms the losses use, each made once and only when needed.

    A floating mask *multiplies* the token log-probs: its entries are token weights (0/1 masks
    give plain masking), and the fast path uses the caller's tensor as it is, no conversion (cast
    once to the log-probs' dtype when the two differ). A bool or integer mask selects: any
    non-zero entry is a token of weight 1. ``weights``: the multiplier of the fast path (the
    float mask itself, or 1/0 in the log-probs' dtype); ``bool``: ``mask != 0``, for the ``where``
    that keeps NaN or infinite padding out of the result, made only when the fast path met a
    non-finite value, and for sample reuse. An integer mask's weights are made from its bool
    form, which is kept: a second backward through a retained graph makes the weights again, and
    a bool mask (a quarter of the memory) converts 3x faster than a long one.
    """

    def __init__(self, mask: Tensor, dtype: torch.dtype):
        self.mask, self.dtype = mask, dtype
        self.multiplies = mask.dtype.is_floating_point
        self._weights: Tensor | None = None
        self._bool: Tensor | None = None
        self._count: Tensor | None = None

    @property
    def weights(self) -> Tensor:
        if self._weights is None:
            self._weights = self.make_weights()
        return self._weights

    def make_weights(self) -> Tensor:
        """The multiplier: a floating mask as given (cast to ``dtype`` if it differs), else new 0/1 weights."""
        if self.multiplies:
            return self.mask if self.mask.dtype == self.dtype else self.mask.to(self.dtype)
        return token_weights(self.bool if self.mask.dtype != torch.bool else self.mask, self.dtype)

    @property
    def owns_weights(self) -> bool:
        """Are the weights a tensor made here (that a backward may overwrite), not the caller's mask?"""
        return not (self.multiplies and self.mask.dtype == self.dtype)

    @property
    def bool(self) -> Tensor:
        if self._bool is None:
            # non-zero = token (torch's cast: 3x faster than mask != 0 for long; NaN casts to True)
            self._bool = self.mask.bool()
        return self._bool

    def take_weights(self) -> Tensor:
        """The weights, no longer held here (the caller may overwrite them; asked again, they are made anew)."""
        w, self._weights = self.weights, None
        return w

    def count(self) -> Tensor:
        """Response tokens (non-zero mask entries, whatever their weight) as an int64 tensor, exact, made once.

        A floating mask is counted as it is (one read; on a CPU numpy's ``x != 0`` and count, 6x faster than
        torch's ``count_nonzero`` of floats; -0.0 is padding, NaN a token). 0/1 weights: a sum of 0/1
        values whose partial sums are all exact integers of the dtype never rounds, in any order: the
        whole sum in the weights' dtype when the tensor is that small (one pass, no copy), else each
        row's count (at most T) summed as int64.
        """
        if self._count is None:
            if self.multiplies:
                if _numpy_view(self.mask) and self.mask.dtype != torch.bfloat16:
                    self._count = torch.tensor(np.count_nonzero(self.mask.numpy() != 0))
                else:
                    self._count = torch.count_nonzero(self.mask)
            else:
                w = self.weights
                if w.numel() <= 2 / torch.finfo(w.dtype).eps:  # every integer up to 2**24 (float32) is exact
                    self._count = w.sum().to(torch.int64)
                else:
                    self._count = w.sum(-1).to(torch.int64).sum()
        return self._count

    def select(self, x: Tensor) -> Tensor:
        """``x`` where the mask is non-zero, exactly 0 elsewhere whatever ``x`` holds there (``where``)."""
        return torch.where(self.bool, x, 0.0)

    def apply(self, x: Tensor) -> Tensor:
        """:meth:`select`, then times a floating mask's weights: the fast path's numbers, padding whatever it holds."""
        y = self.select(x)
        return y * self.weights if self.multiplies else y

    def check_finite_weights(self, name: str) -> None:
        """A floating mask holds finite weights (read only after a non-finite result): else ``ValueError`` naming it."""
        if not self.multiplies:
            return
        bad = ~torch.isfinite(self.mask)
        if bool(bad.any()):
            idx = tuple(int(i) for i in torch.nonzero(bad)[0].tolist())
            raise ValueError(f"{name} must hold finite token weights, got {float(self.mask[idx])} at index {idx}")


def _masked_sum(lp: Tensor, m: _Mask | None, *, fast: bool = False, spare: bool = False, keep_count: bool = True,
                seq_ndim: int = 2) -> Tensor:
    """Token or sequence log-probs -> (B, n) sequence log-probs.

    ``fast=False``: padding adds exactly 0, even if it holds NaN or an infinity (``where``).
    ``fast=True``: ``(lp * weights).sum(-1)``, the same sums when the padding holds finite
    numbers (``x * 0 = 0``) and a non-finite sum otherwise: the caller tests the result once
    (O(B n)) and recomputes with ``fast=False`` only then. ``spare``: nothing else in the graph
    uses ``m.weights``; ``keep_count``: ``m.count()`` will be asked for (:class:`_WeightedSum`).
    ``seq_ndim``: dimensions of sequence log-probs.
    """
    if lp.ndim == seq_ndim:
        return lp
    if m is None:
        return lp.sum(-1)
    if fast:
        return _WeightedSum.apply(lp, m, spare, keep_count)
    return m.apply(lp).sum(-1)


def _selected_sum(lp: Tensor, m: _Mask | None) -> Tensor:
    """Token log-probs -> (B, n) sums over the tokens the mask marks, unweighted (``where``; sequence level as is).

    The probability ratio of a response is over its tokens: a floating mask's weights scale the
    loss terms, not the ratio.
    """
    if lp.ndim == 2:
        return lp
    return lp.sum(-1) if m is None else m.select(lp).sum(-1)


class _WeightedSum(torch.autograd.Function):
    """``(lp * weights).sum(-1)`` with gradient ``g[..., None] * weights``, the weights made once per call.

    The same numbers as autograd gives for ``(lp * weights).sum(-1)`` (the same products and
    sums). A floating mask is the weights as it is: the forward reads it, the backward allocates
    ``weights * g`` (the caller's tensor is never written). When nothing else in the graph needs
    the 0/1 weights of a bool or integer mask (``spare``), they are made from the mask for this
    call only and kept for the backward, which scales them by the incoming gradient in place and
    hands them over as the gradient: one pass over the mask per call (the product is a transient
    tensor, served from the heap in a training loop). ``keep_count``:
    count the tokens before the weights are handed over (``token_reduction="mean"``,
    ``return_info``). A second backward through the same graph (``retain_graph``) or a
    differentiable one (``create_graph``) multiplies new weights out of place.
    """

    @staticmethod
    def forward(ctx, lp: Tensor, m: "_Mask", spare: bool, keep_count: bool) -> Tensor:
        ctx.m, ctx.weights = m, None
        if not spare or not m.owns_weights:  # the caller's float mask is never written: the backward allocates
            return (lp * m.weights).sum(-1)
        if keep_count:
            m.count()
        ctx.weights = m.take_weights()
        return (ctx.weights * lp).sum(-1)

    @staticmethod
    def backward(ctx, grad: Tensor):
        g = grad.unsqueeze(-1)
        m, weights, ctx.weights = ctx.m, ctx.weights, None
        if weights is None or torch.is_grad_enabled():
            return m.weights * g, None, None, None
        return weights.mul_(g), None, None, None


def _per_token_scale(seq: Tensor, lp: Tensor, m: _Mask | None, token_reduction: str) -> Tensor:
    """``token_reduction="mean"``: divide by the batch's mean response length."""
    if token_reduction == "sum":
        return seq
    if lp.ndim == seq.ndim:
        raise ValueError(f"token_reduction='mean' needs token log-probs ({seq.ndim + 1} dimensions), "
                         f"got logprobs of shape {tuple(lp.shape)}")
    count = m.count() if m is not None else torch.tensor(lp.numel(), device=lp.device)
    return seq * (seq.numel() / count.to(seq.dtype))


def _reweighted_sum(lp: Tensor, m: _Mask | None, w: Tensor, opt: LossOptions, info: dict) -> Tensor:
    """Sequence terms with the importance ratio pi/pi_old (detached, clipped on request) as a coefficient."""
    old = check_sampling_logprobs(opt.sampling_logprobs, lp)
    level = opt.ratio_level
    if level == "token":
        if lp.ndim == 2:
            raise ValueError(f"ratio_level='token' needs token log-probs (3 dimensions), "
                             f"got logprobs of shape {tuple(lp.shape)}; use ratio_level='sequence'")
        log_ratio = lp.detach() - old
        if m is not None:
            log_ratio = m.select(log_ratio)  # padding: ratio 1, and masked out below
        unit_credit = w[..., None]
    else:
        log_ratio = _selected_sum(lp.detach(), m) - _selected_sum(old, m)  # (B, n): the responses' ratios
        unit_credit = w
        if level == "pool":
            log_ratio = log_ratio.sum(-1, keepdim=True)  # (B, 1)
            unit_credit = None
    check_ratios(log_ratio, level)
    ratio = torch.exp(log_ratio)
    coef = ratio
    if opt.clip_ratio is not None:
        eps = opt.clip_ratio
        dropped = ((unit_credit > 0) & (ratio > 1 + eps)) | ((unit_credit < 0) & (ratio < 1 - eps))
        coef = torch.where(dropped, 0.0, ratio)
        info["clip_frac"] = _unit_mean(dropped.to(ratio.dtype), m if level == "token" else None)
    info["ratio_ess"] = _ess(log_ratio, m if level == "token" else None)
    if level == "token":
        terms = coef * lp
        return terms.sum(-1) if m is None else m.apply(terms).sum(-1)
    return coef * _masked_sum(lp, m)


def _ess(log_ratio: Tensor, m: _Mask | None) -> Tensor:
    """Effective sample size of the ratios as a share of their count, ``(sum r)^2 / (N sum r^2)`` (Kish 1965).

    Scale-free, so computed from ``r / max r``: ratios too large to square stay finite.
    """
    top = (log_ratio if m is None else torch.where(m.bool, log_ratio, -torch.inf)).max()
    rel = torch.exp(log_ratio - top)
    mean = _unit_mean(rel, m)
    return mean * mean / _unit_mean(rel * rel, m)


def _unit_mean(x: Tensor, m: _Mask | None) -> Tensor:
    """Mean over the ratio's units (masked tokens at token level)."""
    if m is None:
        return x.mean()
    return m.select(x).sum() / m.bool.sum()


def _anchor_kl(lp: Tensor, m: _Mask | None, opt: LossOptions, *, fast: bool) -> tuple[Tensor, Tensor]:
    """k3 estimator exp(d) - d - 1, d = anchor - logp -> per-prompt mean over samples (B,), per-token mean value.

    Padding gives d = 0, so k3 = exp(0) - 0 - 1 = 0 there: ``d * weights`` with ``fast`` (non-finite
    padding then shows in the result, see :func:`_masked_sum`), ``where`` otherwise. A floating
    mask weights each token's k3 instead (``k3 * weights``; on 0/1 masks the same numbers).
    """
    anchor = opt.anchor_logprobs
    if not is_tensor(anchor):
        raise TypeError(f"anchor_logprobs must be a torch.Tensor, got {type(anchor).__name__}")
    if tuple(anchor.shape) != tuple(lp.shape):
        raise ValueError(f"anchor_logprobs must have the same shape as logprobs {tuple(lp.shape)}, got {tuple(anchor.shape)}")
    if opt.check_tokens:
        check_token_values("anchor_logprobs", anchor, "mask", None, None if m is None else m.mask)
    d = anchor.detach().to(lp.dtype) - lp
    if m is not None and not (fast and m.multiplies):
        d = m.select(d) if not fast else d * m.weights
    k3 = torch.expm1(d) - d
    if m is not None and m.multiplies:
        k3 = k3 * m.weights  # token weights scale each token's KL (padding: 0, or NaN on the fast path if non-finite)
    if lp.ndim == 2:  # sequence level: one "token" per sample
        return k3.mean(-1), k3.detach().mean()
    per_seq = _per_token_scale(k3.sum(-1), lp, m, opt.token_reduction)  # (B, n)
    count = m.count() if m is not None else torch.tensor(k3.numel(), device=k3.device)
    return per_seq.mean(-1), k3.detach().sum() / count


def _reduce(per_prompt: Tensor, reduction: str) -> Tensor:
    if reduction == "mean":
        return per_prompt.mean()  # divides by B, the number of prompts
    if reduction == "sum":
        return per_prompt.sum()
    return per_prompt


def _host_pool(logprobs, **arrays) -> tuple[Tensor, list[np.ndarray]]:
    """The checked log-probs and the pool's (B, n) arrays as float64 host arrays (one copy from a device), shaped
    like logprobs' (B, n): the first array and the log-probs as :func:`_host_one` checks them, then each other."""
    (name, x), *rest = arrays.items()
    lp, a = _host_one(logprobs, name, x)
    out = [a]
    for name, x in rest:
        a = as_host(name, x, ndim=2)
        if a.shape != lp.shape[:2]:
            check_pool_shape(name, a, logprobs)
        out.append(a)
    return lp, out


def _host_one(logprobs, name: str, x, *, finite: bool = True) -> tuple[Tensor, np.ndarray]:
    """One (B, n) pool array as a float64 host array, then the log-probs (checked once, after it: the order of
    the errors) and the array's shape against theirs.

    ``finite=False``: the caller checks the array's finiteness (a later check subsumes it); the
    finiteness error still comes before the errors of the log-probs, as with ``finite=True``.
    """
    a = as_host(name, x, ndim=2, finite=finite)
    try:
        lp = check_logprobs("logprobs", logprobs, seq_ndim=2)
        if a.shape != lp.shape[:2]:
            check_pool_shape(name, a, logprobs)
    except (TypeError, ValueError):
        if not finite:
            _check_finite_host(name, a)
        raise
    return lp, a


def _with_pool_value(out, value):
    """Add ``pool_value`` (mean over prompts of ``value()``, a (B,) host array) to the info of a ``(loss, info)`` pair."""
    if not isinstance(out, tuple):
        return out
    loss, info = out
    v = value()  # np.mean's operations without its Python wrapper: the sum, divided by the count
    info["pool_value"] = torch.scalar_tensor(float(np.add.reduce(v, axis=None) / v.shape[0]), dtype=torch.float64)
    return loss, info


# ----------------------------------------------------------------------------
# named losses: public credit + the core
# ----------------------------------------------------------------------------

def best_of_k_loss(logprobs, scores, rewards, *, k, baseline="loo", **common):
    r"""Best-of-k policy-gradient loss with a verifier.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask (B, n, T)``],
    ``scores (B, n), rewards (B, n) -> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\,\log\pi(y_{bi}),\quad
              w = \mathrm{best\_of\_k\_credit}(s, R, k)

    ``-grad loss`` is an unbiased estimate of ``grad (1/B) sum_b V_k(prompt b)``
    (``token_reduction="sum"``, no KL, on-policy or reused with
    ``ratio_level="pool"``); ``k = n`` is BoN-RL-V of Chow et al. 2024,
    ``k = 1`` leave-one-out REINFORCE. ``**common``: see
    :func:`policy_gradient_loss`. ``info["pool_value"]``: mean best-of-k
    U-statistic of the pools (:func:`~bonft.objectives.credit.pool_value`).

    Caution: a verifier that can be gamed will be gamed (reward hacking).

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs"; Kool et al. 2019.
    """
    opt = LossOptions.from_keywords("best_of_k_loss", common)  # option errors name this loss, before any work
    lp, (s, R) = _host_pool(logprobs, scores=scores, rewards=rewards)
    credit, value = _best_of_k_credit_host(s, R, k=k, baseline=baseline)  # one pass gives both
    return _with_pool_value(_policy_gradient_loss(lp, credit, opt, own=True), lambda: value)


def pass_at_k_loss(logprobs, correct, *, k, estimator="unbiased", positive_only=False, **common):
    r"""pass@k policy-gradient loss for a binary reward.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask``], ``correct (B, n)``
    0/1 ``-> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\log\pi(y_{bi}),\quad
              w = \mathrm{pass\_at\_k\_credit}(c, k)

    ``estimator="unbiased"``: ``-grad loss`` is unbiased for
    ``grad mean_b pass@k``; ``"plugin"``: biased, consistent;
    ``positive_only=True``: estimates ``(1-p) grad pass@k`` for ``k < n`` and
    ``grad pass@k`` for ``k = n`` (see :func:`bonft.objectives.credit.pass_at_k_credit`).
    ``**common``: see :func:`policy_gradient_loss`. ``info["pool_value"]``:
    mean unbiased pass@k of the pools (Chen et al. 2021's estimator, the
    best-of-k U-statistic with scores = rewards = correct).

    Caution: when ``correct`` comes from executing model-written code, run
    it in a sandbox; tests that miss cases are exploited (reward hacking).

    References: Chen et al. 2021, "Evaluating Large Language Models Trained
    on Code"; Walder & Karkhanis 2025.
    """
    opt = LossOptions.from_keywords("pass_at_k_loss", common)  # option errors name this loss, before any work
    lp, c = _host_one(logprobs, "correct", correct, finite=False)  # NaN and infinities are not 0/1 either
    try:
        check_binary("correct", c)
    except ValueError:
        _check_finite_host("correct", c)  # a NaN or an infinity is named as such, as the finiteness check names it
        raise
    credit = _pass_at_k_credit_host(c, k=k, estimator=estimator, positive_only=positive_only,
                                    dtype=lp.dtype if lp.device.type == "cpu" else None)
    n = c.shape[1]  # Chen et al. 2021's 1 - C(n-c, k)/C(n, k) of each pool (k was checked with the credit)
    return _with_pool_value(_policy_gradient_loss(lp, credit, opt, own=True),
                            lambda: _pass_values(n, int(k)).take(c.sum(-1).astype(np.int64)))


def reinforce_loss(logprobs, rewards, *, baseline="loo", **common):
    r"""Leave-one-out REINFORCE loss, the best-of-1 case.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask``], ``rewards (B, n)
    -> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b\sum_i \frac{R_{bi}-\bar R_{b,-i}}{n}\log\pi(y_{bi})

    ``-grad loss`` is unbiased for ``grad mean_b E[R]`` (on-policy, or reused
    with ``ratio_level="sequence"`` or ``"pool"``); ``n = 1`` needs
    ``baseline="none"``. ``**common``: see :func:`policy_gradient_loss`.
    ``info["pool_value"]``: mean reward.

    References: Kool et al. 2019, "Buy 4 REINFORCE samples, get a baseline for free!".
    """
    opt = LossOptions.from_keywords("reinforce_loss", common)  # option errors name this loss, before any work
    lp, R = _host_one(logprobs, "rewards", rewards)
    credit = _reinforce_credit_host(R, baseline=baseline)
    return _with_pool_value(_policy_gradient_loss(lp, credit, opt, own=True),
                            lambda: np.add.reduce(R, axis=-1) / R.shape[1])  # R.mean(-1), as np.mean does it


def best_of_k_sft_loss(logprobs, scores, reference_logprobs, reference_scores, *, k, smoothing=1.0,
                       reference_mask=None, **common):
    r"""Best-of-k-aware SFT loss: raise the chance that best-of-k selects the reference response.

    Shape: ``logprobs (B, n)`` or ``(B, n, T)`` [+ ``mask (B, n, T)``] of n
    policy samples, ``scores (B, n)``; ``reference_logprobs (B,)`` or ``(B, T)``
    [+ ``reference_mask (B, T)``] of each prompt's reference (gold) response,
    ``reference_scores (B,) -> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell_b = -\Big(\log\pi(y^*_b) + \sum_i w_{bi}\log\pi(y_{bi})\Big),\quad
              w = \mathrm{best\_of\_k\_sft\_credit}(s, s^*, k)

    The sample term is :func:`policy_gradient_loss` with that credit (its
    ``**common`` options apply to the policy samples: ``anchor_logprobs`` and
    ``sampling_logprobs`` have the shape of ``logprobs``); the reference term
    is :func:`nll_loss` with the same ``token_reduction`` and ``reduction``.
    ``-grad loss`` estimates ``grad mean_b log pi_bon(y*_b)``: the reference
    term is exact, the sample term a consistent ratio estimator (biased for
    finite n; see :func:`bonft.objectives.credit.best_of_k_sft_credit` for the
    smoothing). ``k = 1`` is plain SFT. info adds ``reference_logprob`` (mean
    reference term) and ``beaten_frac`` (share of samples scoring above the
    reference).

    Caution: the verifier decides which samples "beat" the reference; a gamed
    verifier pushes the policy away from the reference for the wrong reasons.

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
    Sampling in LLMs" (BoN-SFT).
    """
    opt = LossOptions.from_keywords("best_of_k_sft_loss", common)
    lp, s = _host_one(logprobs, "scores", scores)
    e = as_host("reference_scores", reference_scores, ndim=1)
    B = logprobs.shape[0]
    ref = check_logprobs("reference_logprobs", reference_logprobs, seq_ndim=1)
    if ref.shape[0] != B:
        raise ValueError(f"reference_logprobs must have B = {B} rows to match logprobs, got {tuple(ref.shape)}")
    credit = best_of_k_sft_credit(s, e, k=k, smoothing=smoothing)
    ref_opt = LossOptions(mask=reference_mask, token_reduction=opt.token_reduction, reduction=opt.reduction,
                          check_tokens=opt.check_tokens)
    ref_loss, _, _ = _nll("reference_logprobs", ref, "reference_mask", ref_opt)
    out = _policy_gradient_loss(lp, credit, opt, own=True)
    if not opt.return_info:
        return out + ref_loss
    loss, info = out
    info["reference_logprob"] = -ref_loss.detach() if opt.reduction == "mean" else -ref_loss.detach().sum() / B
    info["beaten_frac"] = torch.tensor(float((s > e[:, None]).mean()), dtype=torch.float64)
    return loss + ref_loss, info


def nll_loss(logprobs, **common):
    r"""Negative log-likelihood (plain SFT) of given responses.

    Shape: ``logprobs (B,)`` sequence log-probs or ``(B, T)`` token log-probs
    [+ ``mask (B, T)``] ``-> loss ()`` (``(B,)`` with ``reduction="none"``).

    .. math:: \ell = -\frac1B\sum_b \log\pi(y_b)

    ``**common``: ``mask``, ``token_reduction``, ``reduction``,
    ``check_tokens``, ``return_info`` as in :func:`policy_gradient_loss`;
    the anchor and ratio options are refused (they cannot take effect on
    given responses). ``token_reduction="mean"`` divides every token log-prob
    by the batch's mean response length. A mask row that is all zero is an
    error (that response would add nothing). info: ``nll`` (mean per-row
    loss), ``tokens`` (response tokens counted).

    References: maximum likelihood (common practice).
    """
    opt = LossOptions.from_keywords("nll_loss", common, refused=_NOT_FOR_NLL)
    lp = check_logprobs("logprobs", logprobs, seq_ndim=1)
    loss, per, m = _nll("logprobs", lp, "mask", opt)
    if not opt.return_info:
        return loss
    tokens = m.count().to(torch.float64) if m is not None else torch.tensor(float(lp.numel()))
    return loss, {"nll": per.detach().mean(), "tokens": tokens}


def _nll(name: str, lp: Tensor, mask_name: str, opt: LossOptions) -> tuple[Tensor, Tensor, "_Mask | None"]:
    """Reduced loss, per-row ``-log pi(y_b)`` (B,) of given responses, and the checked mask (None without one)."""
    mask = check_mask(mask_name, opt.mask, name, lp, seq_ndim=1)
    if opt.check_tokens:
        check_token_values(name, lp, mask_name, opt.mask, mask)
    m = _Mask(mask, lp.dtype) if mask is not None else None
    seq = _masked_sum(lp, m, fast=True, spare=True, keep_count=opt.return_info or opt.token_reduction == "mean",
                      seq_ndim=1)
    if m is not None and _needs_a_look(seq.detach(), seq.detach()):  # the one read
        check_empty_rows(mask_name, mask, None)
        if not bool(torch.isfinite(seq).all()):
            seq = _masked_sum(lp, m, seq_ndim=1)  # NaN or an infinity in the padding: recomputed with where
            if m.multiplies and not bool(torch.isfinite(seq).all()):
                m.check_finite_weights(mask_name)  # a non-finite weight: a ValueError, not a NaN loss
    if opt.token_reduction == "mean":
        if lp.ndim == 1:
            raise ValueError(f"token_reduction='mean' needs token log-probs (2 dimensions), "
                             f"got {name} of shape {tuple(lp.shape)}")
        count = m.count() if m is not None else torch.tensor(lp.numel(), device=lp.device)
        seq = seq * (seq.numel() / count.to(seq.dtype))
    return _reduce(-seq, opt.reduction), -seq, m
