"""Token log-probs and mask from a causal LM's logits and labels, in the layout the losses take.

Caution: the losses' unbiasedness statements assume these log-probs describe
the policy that sampled the responses: the same temperature, and a sampler
that can draw every token (a top-k or top-p sampler draws from a truncated
distribution, which full-softmax log-probs do not describe).
"""
from __future__ import annotations

import numbers

import torch
from torch import Tensor

from bonft._core.checks import check_positive, is_tensor

__all__ = ["token_logprobs"]

_HALF = (torch.float16, torch.bfloat16)


def token_logprobs(logits, labels, *, temperature=1.0, ignore_index=-100, pool_size=None):
    r"""Per-token log-probs of the labels under ``softmax(logits / temperature)``, and their mask.

    Shape: ``logits (B, n, T, V)``, ``labels (B, n, T) -> (logprobs (B, n, T-1), mask (B, n, T-1))``;
    ``logits (N, T, V)``, ``labels (N, T) -> (N, T-1)`` each, or ``(N/n, n, T-1)`` with
    ``pool_size=n`` (rows ``b*n .. b*n+n-1`` are prompt ``b``'s pool, the order of
    ``prompts.repeat_interleave(n, 0)``).

    **The function shifts.** ``labels`` are aligned with the model's *input* ids, as
    transformers' ``labels`` are: ``ignore_index`` (default -100) where nothing is
    scored (prompt, padding), the token id elsewhere. The logits at position ``t``
    predict the token at ``t + 1``, so

    .. math:: \mathrm{out}[..., t] = \log\mathrm{softmax}(\mathrm{logits}[..., t, :]/\tau)
              [\mathrm{labels}[..., t+1]],\quad t = 0..T-2

    and ``mask[..., t] = labels[..., t+1] != ignore_index``; ignored positions hold 0.
    Pass the logits of the whole ``[prompt ; response]`` rows and labels equal to the
    ids with the prompt (and padding) set to ``ignore_index``.

    Precision and memory: float16/bfloat16 logits are upcast to float32 for the
    log-sum-exp; float32 and float64 logits are used as they are (no float64 copy of
    the logits is made). ``logsumexp`` subtracts the row maximum, so large logits stay
    finite. Differentiable in ``logits``.

    Use the temperature the responses were sampled at: the policy gradient is unbiased
    only for the distribution that drew the samples (Williams 1992).

    Errors: ``ValueError``/``TypeError`` naming the argument for logits that are not a
    3- or 4-dimensional floating tensor, labels of another shape or not integer, labels
    outside ``[0, V)`` other than ``ignore_index`` (one read of the labels), fewer than 2
    positions, a temperature that is not a finite number > 0, and a ``pool_size`` that
    does not divide ``N`` (or is given with 4-dimensional logits, where it is the
    second axis already). A NaN log-prob (one read of the result) is an error naming its
    source: NaN logits, or a temperature so small that ``logits / temperature`` overflows.
    Labels of any integer dtype are taken.

    References: the softmax at a temperature (common practice); Williams 1992 (the
    score-function gradient these log-probs feed).
    """
    if not is_tensor(logits):
        raise TypeError(f"logits must be a torch.Tensor, got {type(logits).__name__}")
    if not logits.dtype.is_floating_point:
        raise TypeError(f"logits must be a floating tensor, got dtype {logits.dtype}")
    if logits.ndim not in (3, 4):
        raise ValueError(f"logits must have shape (N, T, V) or (B, n, T, V), got shape {tuple(logits.shape)}")
    if not is_tensor(labels):
        raise TypeError(f"labels must be a torch.Tensor, got {type(labels).__name__}")
    if labels.dtype.is_floating_point or labels.dtype.is_complex or labels.dtype == torch.bool:
        raise TypeError(f"labels must be an integer tensor of token ids, got dtype {labels.dtype}")
    if tuple(labels.shape) != tuple(logits.shape[:-1]):
        raise ValueError(f"labels must have the shape of logits without the vocabulary axis "
                         f"{tuple(logits.shape[:-1])}, got {tuple(labels.shape)}")
    T, V = logits.shape[-2], logits.shape[-1]
    if T < 2:
        raise ValueError(f"logits must have at least 2 positions (the logits at t predict token t+1), got T={T}")
    temperature = check_positive("temperature", temperature)
    if isinstance(ignore_index, bool) or not isinstance(ignore_index, numbers.Integral):
        raise TypeError(f"ignore_index must be an int, got {type(ignore_index).__name__} {ignore_index!r}")
    shape = _output_shape(logits, pool_size)

    y = labels[..., 1:].to(logits.device)
    valid = y != ignore_index
    out_of_range = valid & ((y < 0) | (y >= V))
    if bool(out_of_range.any()):
        idx = tuple(int(i) + (1 if d == labels.ndim - 1 else 0)
                    for d, i in enumerate(torch.nonzero(out_of_range)[0].tolist()))
        raise ValueError(f"labels must be token ids in [0, {V}) or ignore_index={ignore_index}, "
                         f"got {int(labels[idx])} at index {idx}")
    z = logits[..., :-1, :]
    if z.dtype in _HALF:
        z = z.float()
    if temperature != 1.0:
        z = z / temperature
    picked = z.gather(-1, torch.where(valid, y, 0).long().unsqueeze(-1)).squeeze(-1)  # gather takes int64 ids
    lp = torch.where(valid, picked - torch.logsumexp(z, -1), 0.0)
    if bool(torch.isnan(lp).any()):  # one read of the (..., T-1) result; the diagnosis only on this path
        _explain_nan(logits, temperature)
    return lp.reshape(shape), valid.reshape(shape)


def _explain_nan(logits: Tensor, temperature: float) -> None:
    """A NaN log-prob came from NaN logits or from logits / temperature overflowing (inf - inf): say which."""
    nan = torch.isnan(logits)
    if bool(nan.any()):
        idx = tuple(int(i) for i in torch.nonzero(nan)[0].tolist())
        raise ValueError(f"logits must not hold NaN, got NaN at index {idx}")
    top = float(logits.detach().abs().amax())
    raise ValueError(f"temperature must leave logits / temperature finite, got temperature={temperature:g} with "
                     f"largest |logit| {top:.4g} (or logits of +-inf): the log-probs would be NaN; sample and score at "
                     f"a larger temperature")


def _output_shape(logits: Tensor, pool_size) -> tuple[int, ...]:
    lead = tuple(logits.shape[:-2])
    T1 = logits.shape[-2] - 1
    if pool_size is None:
        return (*lead, T1)
    if logits.ndim == 4:
        raise ValueError(f"pool_size applies to flat (N, T, V) logits; logits of shape {tuple(logits.shape)} "
                         f"already have the pool axis (n={logits.shape[1]}), got pool_size={pool_size!r}")
    if isinstance(pool_size, bool) or not isinstance(pool_size, numbers.Integral) or pool_size < 1:
        raise ValueError(f"pool_size must be an int >= 1 (samples per prompt), got {pool_size!r}")
    N = lead[0]
    if N % pool_size:
        raise ValueError(f"pool_size must divide the number of rows N={N} of logits (rows = prompts x pool_size), "
                         f"got pool_size={pool_size}")
    return (N // pool_size, int(pool_size), T1)
