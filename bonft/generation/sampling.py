"""Sampling n responses per prompt from a causal LM, and the matching training forward pass.

:func:`sample` runs its own decoding loop over any ``transformers`` causal LM
(anything whose ``forward(input_ids, attention_mask=, position_ids=,
past_key_values=, use_cache=)`` returns ``.logits`` and ``.past_key_values``;
the newer ``cache=`` / ``.cache`` spelling is used where the model has it),
so that it controls the log-probs, the random stream and top-p.
The matching training forward, :func:`bonft.generation.logprobs.sequence_logprobs`,
recomputes the same per-token log-probs with gradients in one forward pass; the
two agree to float32 round-off.

Which policy the log-probs belong to matters. Sampling at temperature ``T``
(and top-p ``p``) draws from ``pi_T(y_t | x, y_<t) = softmax(logits / T)``
(truncated to the nucleus and renormalised when ``p < 1``). A score-function
(REINFORCE-style) gradient of a best-of-k objective,
``grad V_k = E[ A(y) * grad log pi_T(y | x) ]``, is unbiased for ``V_k`` of the
policy that actually drew the samples only when ``log pi_T`` is taken at that
same ``T`` (and ``p``) -- see Chow et al. 2024, "Inference-Aware Fine-Tuning for
Best-of-N Sampling in LLMs". Log-probs at ``T = 1`` for samples drawn at
``T != 1`` give a biased gradient. Both functions therefore take the
temperature, and ``Samples`` records it.
"""
from __future__ import annotations

import contextlib
from dataclasses import dataclass
from typing import Sequence

import torch

from bonft._core.checks import check_int
from bonft.generation import decode_step as _decode_step
from bonft.generation import prefix_attention as _prefix_attn
from bonft.generation.inputs import (
    check_model,
    check_prompts,
    check_temperature,
    check_top_k,
    check_top_p,
    left_pad,
    model_device,
    rng_state,
    set_rng_state,
    special_ids,
    stop_ids,
)
from bonft.generation.kvcache import cache_keyword, cache_of, decode_cache, position_ids
from bonft.generation.policy import draw_tokens, log_policy


@dataclass
class Samples:
    """n sampled responses for each of B prompts.

    prompt_tokens:   (B, Tp) long, left-padded with the pad id.
    prompt_valid:    (B, Tp) long, 1 on prompt tokens.
    response_tokens: (B, n, T) long, right-padded with the pad id.
    response_valid:  (B, n, T) long, 1 on generated tokens up to and including EOS.
    token_logprobs:  (B, n, T) float, log pi_T of each generated token at the
                     sampling temperature (top-k / top-p renormalised if used), 0 where masked.
    texts:           B lists of n decoded responses (special tokens removed).
    temperature:     the sampling temperature T.
    top_p:           the nucleus mass used (1.0 = none).
    top_k:           the number of most likely tokens kept (0 = all).
    """

    prompt_tokens: torch.Tensor
    prompt_valid: torch.Tensor
    response_tokens: torch.Tensor
    response_valid: torch.Tensor
    token_logprobs: torch.Tensor
    texts: list[list[str]]
    temperature: float
    top_p: float = 1.0
    top_k: int = 0

    @property
    def n(self) -> int:
        return int(self.response_tokens.shape[1])

    def sequence_logprob(self) -> torch.Tensor:
        """(B, n): log pi_T of each whole response (sum of token log-probs)."""
        return self.token_logprobs.sum(-1)

    def lengths(self) -> torch.Tensor:
        """(B, n): number of generated tokens (EOS included)."""
        return self.response_valid.sum(-1)


# ---------------------------------------------------------------- sampling


@torch.no_grad()  # sampling never builds a graph; training log-probs come from sequence_logprobs
def _sample_rows(model, ids, mask, *, temperature, top_p, top_k, max_new_tokens, pad_id, stops, generator,
                 generators=None, n=1, shared_prefix=True):
    """Decode n samples of each of P prompts. ids, mask: (P, Tp) -> tokens, gen_mask, logprobs: (P*n, t_max).

    ``shared_prefix``: keep one copy of each prompt's KV cache for its n rows (``_prefix_attn``);
    raises ``PrefixUnsupported`` after the first step if the model does not use it.
    """
    cache_arg = cache_keyword(model)
    past, logits, state = decode_cache(model, ids, mask, n, max_new_tokens, shared_prefix=shared_prefix)
    # logits (R, V), R = P*n rows: row p*n + j is sample j of prompt p
    Tp = mask.shape[1]
    full = torch.ones((ids.shape[0] * n, Tp + max_new_tokens), dtype=mask.dtype, device=mask.device)
    full[:, :Tp] = mask.repeat_interleave(n, 0)  # (R, Tp + max_new_tokens): generated positions are all real
    mask = full[:, :Tp]  # (R, Tp), grows by one column a step as a view
    R = mask.shape[0]
    pos = position_ids(mask)[:, -1]  # (R,) position of each row's last prompt token
    done = torch.zeros(R, dtype=torch.bool, device=ids.device)
    toks, gmask, lps = [], [], []
    step = _decode_step.for_model(model, past, state)  # bonft's own forward for stock GPT-2 / Llama, else None
    registry = state is not None and step is None  # the model's own forward, calling our attention
    with (_prefix_attn.decoding(model, state) if registry else contextlib.nullcontext()) as shared:
        for _ in range(max_new_tokens):
            logp = log_policy(logits, temperature, top_p, top_k)  # (R, V)
            nxt = draw_tokens(logp, generator, generators, n)  # (R,)
            lp = logp.gather(-1, nxt[:, None]).squeeze(-1)
            live = ~done
            nxt = torch.where(live, nxt, torch.full_like(nxt, pad_id))
            toks.append(nxt)
            gmask.append(live.long())
            lps.append(torch.where(live, lp, torch.zeros_like(lp)))
            if len(stops) == 1:
                done = done | (live & (nxt == stops[0]))
            elif stops:  # several end tokens (the tokenizer's and the model's generation_config's)
                done = done | (live & torch.isin(nxt, torch.tensor(stops, device=nxt.device)))
            if bool(done.all()) or len(toks) == max_new_tokens:
                break
            pos = pos + 1
            if step is not None:  # the shared-prompt bias stands in for the mask
                logits = step(nxt, pos)  # (R, V)
                continue
            mask = full[:, :mask.shape[1] + 1]  # (R, Tp + t + 1)
            try:
                out = model(input_ids=nxt[:, None], attention_mask=mask, position_ids=pos[:, None],
                            use_cache=True, **{cache_arg: past})
            except Exception as e:  # a model that cannot decode on the shared-prompt cache: the caller redoes the chunk
                if shared and len(toks) == 1:
                    raise _prefix_attn.PrefixUnsupported(f"the first step failed: {e}") from e
                raise
            if shared:
                shared.check()  # every layer used the shared-prompt attention, else the caller redoes the chunk
            past, logits = cache_of(out), out.logits[:, -1, :]
    return torch.stack(toks, 1), torch.stack(gmask, 1), torch.stack(lps, 1)


def sample(
    model,
    tokenizer,
    prompts: Sequence[str],
    *,
    n: int,
    temperature: float = 1.0,
    top_p: float = 1.0,
    top_k: int = 0,
    max_new_tokens: int = 32,
    seed: int | None = None,
    seeds: Sequence[int] | None = None,
    batch_size: int | None = None,
) -> Samples:
    """Draw ``n`` responses for each prompt from the temperature-``T`` policy.

    prompts: B strings -> :class:`Samples` with ``response_tokens (B, n, T)``.

    ``pi_T(y_t | x, y_<t) = softmax(logits_t / T)`` (restricted to the ``top_k`` most likely tokens when
    ``top_k > 0``, then to the top-p nucleus when ``top_p < 1``, and renormalised:
    :func:`bonft.generation.policy.log_policy`). Each prompt is repeated n times and the ``B * n`` rows are decoded ``batch_size`` rows at a time
    (default: all at once; rounded down to whole prompts, at least one) with the
    model's KV cache; each prompt is run once. On transformers models on the CPU with the stock dynamic
    cache and sdpa or eager attention, the n rows of a prompt share one copy of its keys and values, read by
    bonft's own decoding attention (registered under ``"bonft_shared_prefix"`` and switched on only
    while decoding); other models get the prompt's cache copied to its n rows. On a model that is exactly
    transformers' ``GPT2LMHeadModel`` or ``LlamaForCausalLM`` (stock submodules, no hooks) the decoding
    steps run bonft's own forward over the same layers and parameters (``bonft/generation/decode_step.py``:
    less Python per step, GPT-2's tanh GELU in fewer passes; equal to the model's forward to float32
    round-off). A row stops at EOS;
    afterwards it gets the pad id, mask 0 and log-prob 0. Prompts are
    tokenized with the tokenizer's own special tokens and left-padded; the
    attention mask and position ids (counted from each row's first real
    token) make padding invisible to the model.

    Decoding runs under ``torch.no_grad``: the result holds no autograd graph.
    ``token_logprobs`` are log pi_T at the *sampling* temperature: the policy
    that drew the samples. Use them (or :func:`sequence_logprobs` at the same
    ``temperature``) in score-function gradients; otherwise the estimate of
    ``grad V_k`` at ``T`` is biased (Chow et al. 2024).

    ``seed``: an int makes the draw reproducible (same arguments, same device ->
    same samples) through a private ``torch.Generator``; ``None`` uses torch's
    global RNG. ``seeds``: one int per prompt instead; prompt b's responses then
    depend only on (model, prompt b, seeds[b]), not on the other prompts in the
    call (up to float round-off of batched kernels), which lets ranks holding
    different prompts draw what one process would. Chunks then hold whole
    prompts. The model is put in eval mode while sampling and restored after.
    """
    check_model(model)
    prompts = check_prompts(prompts)
    n = check_int("n", n, min=1)
    temperature = check_temperature(temperature)
    top_p = check_top_p(top_p)
    top_k = check_top_k(top_k)
    max_new_tokens = check_int("max_new_tokens", max_new_tokens, min=1)
    if seed is not None:
        seed = check_int("seed", seed, min=0)
    if batch_size is not None:
        batch_size = check_int("batch_size", batch_size, min=1)
    if seeds is not None:
        if seed is not None:
            raise ValueError("give seed or seeds, not both")
        seeds = [check_int("seeds", v, min=0) for v in seeds]
        if len(seeds) != len(prompts):
            raise ValueError(f"seeds must hold one seed per prompt ({len(prompts)} prompts), got {len(seeds)} seeds")

    pad_id, eos_id = special_ids(tokenizer)
    stops = stop_ids(model, eos_id)  # a row ends at the tokenizer's EOS or any the model's generation_config names
    rows = [list(tokenizer(p)["input_ids"]) for p in prompts]
    for i, r in enumerate(rows):
        if not r:
            raise ValueError(f"prompts must encode to at least one token, got an empty encoding at index {i}")
    limit = getattr(getattr(model, "config", None), "max_position_embeddings", None)
    longest = max(len(r) for r in rows)
    if isinstance(limit, int) and longest + max_new_tokens > limit:
        raise ValueError(
            f"max_new_tokens must be <= {limit - longest} (the model has {limit} positions and the longest "
            f"prompt takes {longest} tokens), got max_new_tokens={max_new_tokens}"
        )
    device = model_device(model)
    prompt_tokens, prompt_valid = left_pad(rows, pad_id)
    B, Tp = prompt_tokens.shape
    ids, mask = prompt_tokens.to(device), prompt_valid.to(device)  # (B, Tp); each is expanded to n rows when decoded
    chunk = n * max(1, (batch_size or B * n) // n)  # rows per decoding chunk, whole prompts
    generator, generators = None, None
    if seed is not None:
        generator = torch.Generator(device=device)
        generator.manual_seed(seed)
    if seeds is not None:
        generators = [torch.Generator(device=device) for _ in seeds]
        for g, v in zip(generators, seeds):
            g.manual_seed(v)

    was_training = getattr(model, "training", False)
    if hasattr(model, "eval"):
        model.eval()
    try:
        parts = []
        for s in range(0, B * n, chunk):
            kw = dict(temperature=temperature, top_p=top_p, top_k=top_k, max_new_tokens=max_new_tokens, pad_id=pad_id,
                      stops=stops, generator=generator, n=n,
                      generators=None if generators is None else generators[s // n:(s + chunk) // n])
            rows_ids, rows_mask = ids[s // n:(s + chunk) // n], mask[s // n:(s + chunk) // n]
            rng = rng_state(generator, kw["generators"], device)
            try:
                parts.append(_sample_rows(model, rows_ids, rows_mask, **kw))
            except _prefix_attn.PrefixUnsupported:  # the model bypassed our attention: redo with the stock cache
                set_rng_state(rng, generator, kw["generators"], device)
                parts.append(_sample_rows(model, rows_ids, rows_mask, shared_prefix=False, **kw))
    finally:
        if was_training and hasattr(model, "train"):
            model.train()

    T = max(p[0].shape[1] for p in parts)
    resp = torch.full((B * n, T), pad_id, dtype=torch.long, device=device)
    rmask = torch.zeros((B * n, T), dtype=torch.long, device=device)
    rlp = torch.zeros((B * n, T), dtype=torch.float32, device=device)
    r0 = 0
    for toks, gm, lp in parts:  # chunks may stop at different lengths: right-pad to T
        r1, t = r0 + toks.shape[0], toks.shape[1]
        resp[r0:r1, :t], rmask[r0:r1, :t], rlp[r0:r1, :t] = toks, gm, lp
        r0 = r1

    flat = []
    for toks, m in zip(resp.tolist(), rmask.tolist()):
        kept = [t for t, keep in zip(toks, m) if keep and t not in stops]
        flat.append(tokenizer.decode(kept, skip_special_tokens=True))
    texts = [flat[b * n:(b + 1) * n] for b in range(B)]
    return Samples(
        prompt_tokens=prompt_tokens.to(device),
        prompt_valid=prompt_valid.to(device),
        response_tokens=resp.view(B, n, T),  # (B*n, T) -> (B, n, T)
        response_valid=rmask.view(B, n, T),
        token_logprobs=rlp.view(B, n, T),
        texts=texts,
        temperature=temperature,
        top_p=top_p,
        top_k=top_k,
    )
