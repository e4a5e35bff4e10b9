"""The KV cache of the sampler and of the training forward: run each prompt once, copy its cache
to its n rows, and (when sampling) reserve room for the response instead of growing by torch.cat.

Works with any ``transformers`` causal LM whose ``forward`` takes ``past_key_values=`` (or the
newer ``cache=``) and returns ``.past_key_values`` (or ``.cache``); models whose cache cannot
be expanded fall back to the plain repeated pass.
"""
from __future__ import annotations

import inspect

import torch

from bonft.generation import prefix_attention as _prefix_attn


def position_ids(mask: torch.Tensor) -> torch.Tensor:
    """Position ids from an attention mask: 0 at each row's first real token (left padding)."""
    return (mask.cumsum(-1) - 1).clamp(min=0)


def accepts_kwarg(model, name: str) -> bool:
    try:
        return name in inspect.signature(model.forward).parameters
    except (AttributeError, TypeError, ValueError):
        return False


def cache_keyword(model) -> str:
    """Keyword of the KV cache: ``cache`` where the model's forward names it (transformers >= 5.25),
    ``past_key_values`` before.

    A wrapper whose forward takes ``*args, **kwargs`` (DDP's ``.module``, peft's ``get_base_model()``,
    a user's own) is looked through to the model inside, so a wrapped model gets the current keyword
    too and transformers' deprecation of ``past_key_values`` never fires.
    """
    seen: set[int] = set()
    while model is not None and id(model) not in seen:
        seen.add(id(model))
        if accepts_kwarg(model, "cache"):
            return "cache"
        if accepts_kwarg(model, "past_key_values"):
            return "past_key_values"
        inner = getattr(model, "module", None)
        if inner is None and callable(getattr(model, "get_base_model", None)):
            inner = model.get_base_model()
        model = inner
    return "past_key_values"


def checked_output(out):
    """A forward's output, which must carry ``.logits`` (a transformers ``ModelOutput``): a plain tuple is refused."""
    if not hasattr(out, "logits"):
        raise TypeError(f"model must return a transformers ModelOutput with .logits (and .past_key_values when asked "
                        f"for a cache), as transformers' causal LMs do, got {type(out).__name__}; a forward that "
                        f"returns a tuple can be wrapped to return CausalLMOutputWithPast(logits=..., past_key_values=...)")
    return out


def cache_of(out):
    cache = getattr(checked_output(out), "cache", None)
    return cache if cache is not None else out.past_key_values


def _run_prompts(model, ids, mask):
    """One forward pass over P left-padded prompts with the cache on, logits of the last position only."""
    kwargs = {"logits_to_keep": 1} if accepts_kwarg(model, "logits_to_keep") else {}
    return model(input_ids=ids, attention_mask=mask, position_ids=position_ids(mask), use_cache=True, **kwargs)


def prompt_pass(model, ids, mask, n, *, out=None):
    """Run P distinct prompts once and expand to P*n rows: ids, mask (P, Tp) -> (cache, last logits (P*n, V)).

    The KV cache of each prompt is copied to its n rows (``batch_repeat_interleave``,
    differentiable) instead of running the prompt n times. Models whose cache
    cannot be expanded get the plain repeated pass. ``out``: the prompts' forward, if already run.
    """
    out = _run_prompts(model, ids, mask) if out is None else out
    past = _repeat_cache(cache_of(out), n)
    if past is not _NO_CACHE:
        return past, out.logits[:, -1, :].repeat_interleave(n, 0)
    # a cache we cannot expand: repeat the prompt rows instead
    rep_ids, rep_mask = ids.repeat_interleave(n, 0), mask.repeat_interleave(n, 0)
    out = model(input_ids=rep_ids, attention_mask=rep_mask, position_ids=position_ids(rep_mask), use_cache=True)
    return cache_of(out), out.logits[:, -1, :]


def decode_cache(model, ids, mask, n, extra, *, shared_prefix=True):
    """The cache a sampler decodes on: ids, mask (P, Tp) -> (cache, logits (P*n, V), shared-prompt state or None).

    With ``shared_prefix`` and a model whose cache and attention allow it, each prompt's keys
    and values stay one copy for its n rows (``_prefix_attn``); otherwise they are copied to the
    n rows and, for stock dynamic layers, given reserved room for ``extra`` reply tokens.
    """
    out = _run_prompts(model, ids, mask)
    past = cache_of(out)
    if shared_prefix and _prefix_attn.supported(model, past):
        return past, out.logits[:, -1, :].repeat_interleave(n, 0), _prefix_attn.install(past, mask, n, extra)
    past, logits = prompt_pass(model, ids, mask, n, out=out)
    return _reserve(past, extra), logits, None


_NO_CACHE = object()


def _repeat_cache(past, n):
    """Copy each batch row of a KV cache n times (transformers Cache objects, legacy tuples of tensors)."""
    if n == 1:
        return past
    if hasattr(past, "batch_repeat_interleave"):
        past.batch_repeat_interleave(n)
        return past
    if torch.is_tensor(past):
        return past.repeat_interleave(n, 0)
    if isinstance(past, (tuple, list)):
        parts = [_repeat_cache(x, n) for x in past]
        return _NO_CACHE if any(x is _NO_CACHE for x in parts) else type(past)(parts)
    return _NO_CACHE


def _reserve(past, extra: int):
    """Give each plain dynamic layer of a transformers KV cache room for ``extra`` more positions.

    The stock dynamic layer grows by ``torch.cat`` at every decoding step, which copies the
    whole cache each time (quadratic in the response length; most of a long decode on CPU).
    A reserved layer writes each step into a buffer allocated once and hands the attention a
    view of the filled part. Caches of other kinds (legacy tuples, sliding windows, models
    with their own cache classes) are left as they are.
    """
    layers = getattr(past, "layers", None)
    if _DynamicLayer is None or not isinstance(layers, list):
        return past
    for i, layer in enumerate(layers):
        if type(layer) is _DynamicLayer and layer.is_initialized and layer.keys is not None and layer.keys.dim() == 4:
            layers[i] = _ReservedLayer(layer, extra)
    return past


try:  # transformers >= 5: caches are lists of layers
    from transformers.cache_utils import DynamicLayer as _DynamicLayer
except ImportError:  # pragma: no cover - older transformers: keep the stock cache
    _DynamicLayer = None
else:
    class _ReservedLayer(_DynamicLayer):
        """A dynamic cache layer with preallocated room: update writes in place, returns views."""

        def __init__(self, layer, extra: int):
            super().__init__()
            k, v = layer.keys, layer.values  # (R, heads, t, head_dim)
            R, H, t, d = k.shape
            self._k = k.new_empty(R, H, t + extra, d)
            self._v = v.new_empty(R, H, t + extra, v.shape[-1])
            self._k[:, :, :t], self._v[:, :, :t] = k, v
            self._len = t
            self.device, self.is_initialized = k.device, True
            self.keys, self.values = self._k[:, :, :t], self._v[:, :, :t]

        def update(self, key_states, value_states, *args, **kwargs):
            t, s = self._len, key_states.shape[-2]
            if t + s > self._k.shape[-2]:  # out of room: behave like the stock layer
                return super().update(key_states, value_states, *args, **kwargs)
            self._k[:, :, t:t + s], self._v[:, :, t:t + s] = key_states, value_states
            self._len = t + s
            self.keys, self.values = self._k[:, :, :t + s], self._v[:, :, :t + s]
            return self.keys, self.values

        def get_seq_length(self) -> int:
            return self._len if self.keys is not None else 0
