"""bonft's own decoding forward for stock GPT-2 and Llama models: one new token per row on the shared-prompt cache.

A decoding step of a small model on the CPU is short, and a large part of it is not the model's
arithmetic: transformers' forward spends milliseconds per step in Python (argument handling,
output objects, masks, the attention registry, hook dispatch), and GPT-2's ``gelu_new`` spells
its tanh approximation in seven elementwise passes. For a model that is exactly transformers'
``GPT2LMHeadModel`` or ``LlamaForCausalLM`` (every submodule of the stock type, no hooks, no
cross-attention), :func:`for_model` returns a step that runs the same layers on the same
parameters, in the same order and with the same kernels (``addmm`` / ``linear``, ``layer_norm``,
RMSNorm and rotary positions in transformers' order of operations, the shared-prompt attention
of :mod:`._prefix_attn`), with two exceptions:

- GPT-2's tanh GELU (``gelu_new``, ``gelu_pytorch_tanh``), ``0.5 x (1 + tanh(z))`` with
  ``z = sqrt(2/pi) (x + 0.044715 x^3)`` (Hendrycks and Gimpel 2016), is computed as
  ``x * sigmoid(2 z)``: the same function, since ``0.5 (1 + tanh z) = 1 / (1 + exp(-2 z))``, in
  four in-place passes; it differs from transformers' spelling by float32 round-off (5e-7 at most
  on N(0, 9) inputs, against 4e-7 for transformers' own, both measured against float64) and takes
  a third of its time;
- dropout is skipped: :func:`~bonft.generation.sampling.sample` decodes in eval mode.

Any other model (another architecture, a subclass, an adapter or quantised layer in place of a
stock module, a forward hook, an activation that is neither transformers' nor torch's) gets
``None`` and is decoded by its own forward. ``sequence_logprobs`` always runs the model's own
forward; the test suite checks that the two agree to float32 round-off and draw the same tokens.
"""
from __future__ import annotations

import math
from typing import Callable

import torch
import torch.nn.functional as F
from torch.nn.modules import module as _torch_module

from bonft.generation import prefix_attention as _prefix_attn

try:
    from transformers.activations import GELUTanh, NewGELUActivation
    from transformers.models.gpt2 import modeling_gpt2 as _gpt2
    from transformers.pytorch_utils import Conv1D
except ImportError:  # pragma: no cover - transformers without GPT-2: such models run their own forward
    _gpt2 = None
try:
    from transformers.models.llama import modeling_llama as _llama
except ImportError:  # pragma: no cover
    _llama = None

Step = Callable[[torch.Tensor, torch.Tensor], torch.Tensor]


_C = 2 * math.sqrt(2 / math.pi)


def _gelu_tanh(x: torch.Tensor) -> torch.Tensor:
    """0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3))) as x * sigmoid(2 sqrt(2/pi) (x + 0.044715 x^3)); no grad."""
    z = x * x
    z.mul_(0.044715 * _C).add_(_C).mul_(x)  # 2 sqrt(2/pi) (x + 0.044715 x^3)
    return z.sigmoid_().mul_(x)


def _has_hooks(model) -> bool:
    """Whether any forward hook (global or on a submodule) would run in the model's own forward."""
    if _torch_module._global_forward_hooks or _torch_module._global_forward_pre_hooks:
        return True
    return any(m._forward_hooks or m._forward_pre_hooks for m in model.modules())


_ACTIVATIONS = ("transformers.activations", "torch.nn.modules.activation")  # where an MLP's activation may come from


def _stock(model, allowed: tuple) -> bool:
    """Every submodule of a stock type (or an activation from transformers' or torch's table), no hooks."""
    for m in model.modules():
        if type(m) not in allowed and type(m).__module__ not in _ACTIVATIONS:
            return False
    return not _has_hooks(model)


def for_model(model, past, state) -> Step | None:
    """The decoding step for ``model`` on the shared-prompt cache ``past``, or None where the model must run itself.

    step(tokens (R,), positions (R,)) -> logits (R, V) of the next token, after writing the
    tokens' keys and values into ``past``'s reply buffers.
    """
    if state is None:
        return None
    if _gpt2 is not None and type(model) is _gpt2.GPT2LMHeadModel:
        return _gpt2_step(model, list(past.layers), state)
    if _llama is not None and type(model) is _llama.LlamaForCausalLM:
        return _llama_step(model, list(past.layers), state)
    return None


def _gpt2_step(model, layers, state) -> Step | None:
    """GPT-2 (Radford et al. 2019): learned positions, pre-LayerNorm blocks, fused q/k/v, GELU MLP."""
    cfg, tr = model.config, model.transformer
    if getattr(cfg, "add_cross_attention", False) or getattr(cfg, "reorder_and_upcast_attn", False):
        return None
    if not _stock(model, (_gpt2.GPT2LMHeadModel, _gpt2.GPT2Model, _gpt2.GPT2Block, _gpt2.GPT2Attention,
                          _gpt2.GPT2MLP, Conv1D, torch.nn.ModuleList, torch.nn.LayerNorm, torch.nn.Embedding,
                          torch.nn.Linear, torch.nn.Dropout)):
        return None
    blocks = list(tr.h)
    if len(layers) != len(blocks):
        return None
    D, H = tr.embed_dim, blocks[0].attn.num_heads
    d = D // H
    acts = [_gelu_tanh if type(b.mlp.act) in (NewGELUActivation, GELUTanh) else b.mlp.act for b in blocks]
    head = model.lm_head

    def step(tokens: torch.Tensor, positions: torch.Tensor) -> torch.Tensor:
        R = tokens.shape[0]
        x = F.embedding(tokens, tr.wte.weight) + F.embedding(positions, tr.wpe.weight)  # (R, D)
        for b, layer, act in zip(blocks, layers, acts):
            a, m = b.attn, b.mlp
            h = F.layer_norm(x, (D,), b.ln_1.weight, b.ln_1.bias, b.ln_1.eps)
            q, k, v = torch.addmm(a.c_attn.bias, h, a.c_attn.weight).split(D, 1)  # (R, 3D) -> 3 x (R, D)
            layer.update(k.view(R, H, 1, d), v.view(R, H, 1, d))  # (R, D) -> (R, heads, 1, head_dim)
            o = _prefix_attn.attend(q.view(R, H, 1, d), layer, state.bias, a.scaling)  # (R, heads, 1, head_dim)
            x = x + torch.addmm(a.c_proj.bias, o.reshape(R, D), a.c_proj.weight)  # (R, heads, 1, d) -> (R, D)
            h = F.layer_norm(x, (D,), b.ln_2.weight, b.ln_2.bias, b.ln_2.eps)
            x = x + torch.addmm(m.c_proj.bias, act(torch.addmm(m.c_fc.bias, h, m.c_fc.weight)), m.c_proj.weight)
        x = F.layer_norm(x, (D,), tr.ln_f.weight, tr.ln_f.bias, tr.ln_f.eps)
        return F.linear(x, head.weight, head.bias)  # (R, V)

    return step


def _rms_norm(x: torch.Tensor, norm) -> torch.Tensor:
    """Llama's RMSNorm (Zhang and Sennrich 2019) in transformers' order of operations: w * x / sqrt(mean(x^2) + eps)."""
    h = x.to(torch.float32)
    h = h * torch.rsqrt(h.pow(2).mean(-1, keepdim=True) + norm.variance_epsilon)
    return norm.weight * h.to(x.dtype)


def _rotate(x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor) -> torch.Tensor:
    """Rotary positions (Su et al. 2021) as transformers applies them: x cos + rotate_half(x) sin."""
    half = x.shape[-1] // 2
    return x * cos + torch.cat((-x[..., half:], x[..., :half]), dim=-1) * sin


def _llama_step(model, layers, state) -> Step | None:
    """Llama (Touvron et al. 2023): rotary positions, RMSNorm, grouped-query attention, gated MLP."""
    body = model.model
    if not _stock(model, (_llama.LlamaForCausalLM, _llama.LlamaModel, _llama.LlamaDecoderLayer,
                          _llama.LlamaAttention, _llama.LlamaMLP, _llama.LlamaRMSNorm, _llama.LlamaRotaryEmbedding,
                          torch.nn.ModuleList, torch.nn.Embedding, torch.nn.Linear)):
        return None
    blocks = list(body.layers)[: model.config.num_hidden_layers]
    if len(layers) != len(blocks):
        return None
    head = model.lm_head

    def step(tokens: torch.Tensor, positions: torch.Tensor) -> torch.Tensor:
        R = tokens.shape[0]
        x = F.embedding(tokens, body.embed_tokens.weight)  # (R, D)
        cos, sin = body.rotary_emb(x, positions[:, None])  # (R, 1, head_dim) each
        cos, sin = cos[:, None], sin[:, None]  # (R, 1, 1, head_dim): broadcast over heads
        for b, layer in zip(blocks, layers):
            a, m = b.self_attn, b.mlp
            h = _rms_norm(x, b.input_layernorm)
            d = a.head_dim
            q = _rotate(F.linear(h, a.q_proj.weight, a.q_proj.bias).view(R, -1, 1, d), cos, sin)  # (R, Hq, 1, d)
            k = _rotate(F.linear(h, a.k_proj.weight, a.k_proj.bias).view(R, -1, 1, d), cos, sin)  # (R, Hkv, 1, d)
            v = F.linear(h, a.v_proj.weight, a.v_proj.bias).view(R, -1, 1, d)  # (R, Hkv * d) -> (R, Hkv, 1, d)
            layer.update(k, v)
            o = _prefix_attn.attend(q, layer, state.bias, a.scaling)  # (R, Hkv, g, d)
            x = x + F.linear(o.reshape(R, -1), a.o_proj.weight, a.o_proj.bias)  # (R, Hkv, g, d) -> (R, Hq * d)
            h = _rms_norm(x, b.post_attention_layernorm)
            gate = m.act_fn(F.linear(h, m.gate_proj.weight, m.gate_proj.bias))
            x = x + F.linear(gate * F.linear(h, m.up_proj.weight, m.up_proj.bias), m.down_proj.weight, m.down_proj.bias)
        return F.linear(_rms_norm(x, body.norm), head.weight, head.bias)  # (R, V)

    return step
