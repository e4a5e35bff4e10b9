"""Decoding attention that reads each prompt's keys and values once for its n samples.

When n responses are drawn per prompt, every one of the n rows attends to the same prompt
keys and values. A stock KV cache holds n copies of them, and each decoding step reads all n
copies: on a CPU a one-token attention step is bound by memory traffic, so those copies are
most of its time. Here the cache keeps one copy of each prompt (P rows) and a per-row buffer
for the response (R = P * n rows), and one decoding step computes

    s_prompt = q K_prompt^T * scale + bias    (the n queries of a prompt share K_prompt)
    s_reply  = q K_reply^T * scale
    out      = softmax([s_prompt, s_reply]) @ [V_prompt; V_reply]

with one softmax over both parts, which is exactly the attention over the concatenated cache
(up to float32 round-off). ``bias`` is 0 on prompt tokens and -inf on left padding; the
generated positions are never masked, so transformers' own mask is not needed.

:func:`attend` is that computation. bonft's own decoding step (``_decode_step``, stock GPT-2 and
Llama) calls it directly. Every other model reaches it through transformers' public attention
registry: for the decoding steps the model's attention implementation is switched to ours and
restored afterwards. Every call is checked (the keys must be the very tensor our cache layer
returned, with one query); a model that does not route its attention through the registry is
detected after the first step (:class:`PrefixUnsupported`) and the caller falls back to the
stock cache.
"""
from __future__ import annotations

import threading

import torch

NAME = "bonft_shared_prefix"
_FIRST_CAPACITY = 16  # reply tokens the buffer holds before it first doubles
_local = threading.local()  # .state: the _PrefixState of the decoding step in progress, or None


class PrefixUnsupported(RuntimeError):
    """The model did not call our attention for every layer of a decoding step."""


class _PrefixState:
    """What the attention function needs during one sampling call."""

    def __init__(self, bias: torch.Tensor, n: int, n_layers: int):
        self.bias = bias  # (P, 1, 1, Tp): 0 on prompt tokens, -inf on left padding
        self.n = n
        self.n_layers = n_layers
        self.current = None  # the layer whose update ran last: its attention call comes next
        self.calls = 0
        self.broken = False


def attend(query: torch.Tensor, layer, bias: torch.Tensor, scale: float) -> torch.Tensor:
    """Attention of one new token per row over [shared prompt; own reply]: query (R, Hq, 1, d) -> (R, Hkv, g, dv).

    ``layer`` holds the prompt's keys and values once per prompt (``pk``, ``pv``: (P, Hkv, Tp, d))
    and the rows' replies so far (``keys``, ``values``: (R, Hkv, t, d)); ``bias`` (P, 1, 1, Tp) is 0
    on prompt tokens and -inf on padding; g = Hq / Hkv query heads share a key head. One softmax
    runs over both parts, so this is the attention over the concatenated cache up to round-off.
    """
    R, Hq, _, d = query.shape
    P, Hkv, Tp, dv = layer.pv.shape
    n, g = R // P, Hq // Hkv  # samples per prompt, query heads per key head

    def rows(x):  # (P, Hkv, n*g, ...) -> (R, Hkv, g, ...): prompt layout to row layout
        return x.reshape(P, Hkv, n, g, *x.shape[3:]).transpose(1, 2).reshape(R, Hkv, g, *x.shape[3:])

    def prompts(x):  # (R, Hkv, g, ...) -> (P, Hkv, n*g, ...)
        return x.reshape(P, n, Hkv, g, *x.shape[3:]).transpose(1, 2).reshape(P, Hkv, n * g, *x.shape[3:])

    q = query.reshape(R, Hkv, g, d) * scale  # (R, Hq, 1, d) -> (R, Hkv, g, d), scaled once
    s_p = torch.matmul(prompts(q), layer.pk.transpose(-1, -2)).add_(bias)  # (P, Hkv, n*g, Tp)
    s_r = torch.matmul(q, layer.keys.transpose(-1, -2))  # (R, Hkv, g, t)
    w = torch.softmax(torch.cat([rows(s_p), s_r], -1), -1)  # (R, Hkv, g, Tp + t): one softmax over both parts
    return rows(torch.matmul(prompts(w[..., :Tp]), layer.pv)) + torch.matmul(w[..., Tp:], layer.values)


try:  # transformers >= 5: caches are lists of layers, attention goes through a registry
    from transformers import AttentionInterface
    from transformers.cache_utils import DynamicLayer as _DynamicLayer
    from transformers.integrations.sdpa_attention import sdpa_attention_forward as _sdpa
    from transformers.masking_utils import AttentionMaskInterface
    from transformers.masking_utils import sdpa_mask as _sdpa_mask
except ImportError:  # pragma: no cover - older transformers: the stock cache is used
    _DynamicLayer = None
else:
    class _PrefixLayer(_DynamicLayer):
        """A cache layer with one copy of the prompt (P rows) and a reserved reply buffer (R rows)."""

        def __init__(self, layer, n: int, extra: int, state: _PrefixState):
            super().__init__()
            pk, pv = layer.keys, layer.values  # (P, heads, Tp, head_dim)
            P, H, Tp, d = pk.shape
            self.pk, self.pv, self._tp = pk, pv, Tp
            self._extra = extra  # reply tokens this layer must hold at most
            cap = min(extra, _FIRST_CAPACITY)  # the buffer doubles when full (_grow)
            self._k = pk.new_empty(P * n, H, cap, d)  # (R, heads, capacity, head_dim)
            self._v = pv.new_empty(P * n, H, cap, pv.shape[-1])
            self._len = 0
            self._state = state
            self.device, self.is_initialized = pk.device, True
            self.keys, self.values = self._k[:, :, :0], self._v[:, :, :0]

        def update(self, key_states, value_states, *args, **kwargs):
            t, s = self._len, key_states.shape[-2]
            if t + s > self._extra:
                raise PrefixUnsupported("reply buffer full")
            if t + s > self._k.shape[-2]:
                self._grow(t + s)
            self._k[:, :, t:t + s], self._v[:, :, t:t + s] = key_states, value_states
            self._len = t + s
            self.keys, self.values = self._k[:, :, :t + s], self._v[:, :, :t + s]
            self._state.current = self
            return self.keys, self.values

        def _grow(self, need: int) -> None:
            """Double the capacity (at least ``need``, at most ``extra``): the rows' replies stay packed.

            Each (row, head) block of the buffer is read whole at every step, so a buffer sized
            for the longest reply from the start would leave a gap after every block and make the
            reads strided; doubling keeps at least half of what is read in use, for copies that
            add up to less than the final buffer.
            """
            cap = min(self._extra, max(need, 2 * self._k.shape[-2]))
            t = self._len
            k, v = self._k, self._v
            self._k = k.new_empty(*k.shape[:2], cap, k.shape[-1])
            self._v = v.new_empty(*v.shape[:2], cap, v.shape[-1])
            self._k[:, :, :t], self._v[:, :, :t] = k[:, :, :t], v[:, :, :t]

        def get_seq_length(self) -> int:
            return self._tp + self._len

    def _attention(module, query, key, value, attention_mask, scaling=None, dropout=0.0, **kwargs):
        """Attention of one new token per row over [shared prompt; own reply]: query (R, Hq, 1, d) -> (R, 1, Hq, d)."""
        st = getattr(_local, "state", None)
        if st is None:  # another thread using the model meanwhile: plain sdpa with its mask
            return _sdpa(module, query, key, value, attention_mask, dropout=dropout, scaling=scaling, **kwargs)
        layer = st.current
        if layer is None or key is not layer.keys or value is not layer.values or query.shape[2] != 1:
            st.broken = True  # not the call we expect: check() makes the caller redo the chunk
            return _sdpa(module, query, key, value, attention_mask, dropout=dropout, scaling=scaling, **kwargs)
        st.current = None
        st.calls += 1
        R, Hq, _, d = query.shape
        out = attend(query, layer, st.bias, d ** -0.5 if scaling is None else scaling)  # (R, Hkv, g, dv)
        return out.reshape(R, 1, Hq, out.shape[-1]), None  # (R, Hkv, g, dv) -> (R, 1, Hq, dv), as sdpa returns it

    def _mask(*args, **kwargs):
        """No mask for our decoding steps (the bias covers padding); sdpa's mask for other threads."""
        return None if getattr(_local, "state", None) is not None else _sdpa_mask(*args, **kwargs)

    AttentionInterface.register(NAME, _attention)
    AttentionMaskInterface.register(NAME, _mask)


def supported(model, past) -> bool:
    """Whether the shared-prompt decoding can be tried: a transformers model on the CPU, stock dynamic cache layers.

    CPU only: it was measured there (benchmarks/bench_sampling.py). On a GPU, fused attention kernels
    and kernel-launch costs change the balance, and it has not been measured; the copied cache is used.
    """
    if _DynamicLayer is None:
        return False
    cfg = getattr(model, "config", None)
    if getattr(cfg, "_attn_implementation", None) not in ("sdpa", "eager"):
        return False
    if getattr(cfg, "is_encoder_decoder", False) or getattr(cfg, "add_cross_attention", False):
        return False
    if getattr(cfg, "sub_configs", None):  # switching back would overwrite each sub-config's own choice
        return False
    layers = getattr(past, "layers", None)
    return isinstance(layers, list) and bool(layers) and all(
        type(x) is _DynamicLayer and x.is_initialized and x.keys is not None and x.keys.dim() == 4
        and x.keys.device.type == "cpu" for x in layers)


def install(past, prompt_mask: torch.Tensor, n: int, extra: int) -> _PrefixState:
    """Swap the P-row prompt cache ``past`` for shared-prompt layers with room for ``extra`` reply tokens."""
    bias = torch.zeros(prompt_mask.shape, dtype=past.layers[0].keys.dtype, device=prompt_mask.device)
    bias = bias.masked_fill(prompt_mask == 0, float("-inf"))[:, None, None, :]  # (P, Tp) -> (P, 1, 1, Tp)
    state = _PrefixState(bias, n, len(past.layers))
    past.layers[:] = [_PrefixLayer(x, n, extra, state) for x in past.layers]
    return state


_switch_lock = threading.Lock()
_switched: dict[int, list] = {}  # id(config) -> [active decoders, the implementation to restore]


class decoding:
    """Context for the decoding steps: our attention in the model, the state visible to this thread.

    The model's attention implementation is switched to ours while at least one sampler
    (in any thread) decodes on it, and restored when the last one leaves; calls from threads
    without a state get plain sdpa with transformers' own mask. ``check()`` after each
    forward raises :class:`PrefixUnsupported` unless every layer called us as expected.
    """

    def __init__(self, model, state: _PrefixState):
        self.cfg, self.state = model.config, state

    def __enter__(self):
        with _switch_lock:
            entry = _switched.setdefault(id(self.cfg), [0, self.cfg._attn_implementation])
            entry[0] += 1
            self.cfg._attn_implementation = NAME
        _local.state = self.state
        return self

    def check(self) -> None:
        st = self.state
        if st.broken or st.calls != st.n_layers:
            raise PrefixUnsupported(f"{st.calls} of {st.n_layers} layers used the shared-prompt attention")
        st.calls = 0

    def __exit__(self, *exc):
        _local.state = None
        with _switch_lock:
            entry = _switched[id(self.cfg)]
            entry[0] -= 1
            if entry[0] == 0:
                self.cfg._attn_implementation = entry[1]
                del _switched[id(self.cfg)]
        return False
