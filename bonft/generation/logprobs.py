"""The training forward: the per-token log-probs of given responses under pi_T, with gradients.

:func:`sequence_logprobs` recomputes what :func:`bonft.generation.sampling.sample` recorded
(``Samples.token_logprobs``) in one differentiable forward pass; the two agree to float32
round-off. :func:`encode_responses` lays out given texts (e.g. reference answers for a warm
start) as the sampler lays out its samples. See :mod:`bonft.generation.sampling` for why the
log-probs must be taken at the sampling temperature and top-p.
"""
from __future__ import annotations

from typing import Sequence

import torch

from bonft.generation.inputs import (
    check_long,
    check_model,
    check_prompts,
    check_temperature,
    check_top_k,
    check_top_p,
    left_pad,
    special_ids,
)
from bonft.generation.kvcache import accepts_kwarg, cache_keyword, checked_output, position_ids, prompt_pass
from bonft.generation.policy import log_policy


def encode_responses(tokenizer, prompts: Sequence[str], responses, *, add_eos: bool = True):
    """Token tensors for given texts, in the layout of :class:`Samples` (e.g. for supervised warm-starts).

    prompts: B strings; responses: B lists of n strings (or B strings, n = 1) ->
    ``(prompt_tokens (B, Tp), prompt_valid (B, Tp), response_tokens (B, n, T), response_valid (B, n, T))``,
    prompts left-padded and tokenized with the tokenizer's special tokens, responses
    without them, right-padded, each followed by EOS when ``add_eos`` (the tokenizer
    must have one). ``sequence_logprobs(model, *encode_responses(...))`` is then the
    log-likelihood of each response.
    """
    prompts = check_prompts(prompts)
    if isinstance(responses, str):
        raise TypeError("responses must be a sequence (one entry per prompt), got a single str")
    responses = list(responses)
    if len(responses) != len(prompts):
        raise ValueError(f"responses must have one entry per prompt (len(prompts)={len(prompts)}), got {len(responses)}")
    groups = [[r] if isinstance(r, str) else list(r) for r in responses]
    n = len(groups[0])
    for i, g in enumerate(groups):
        if len(g) != n or n == 0:
            raise ValueError(f"responses must give the same number n >= 1 of responses per prompt (n={n}), got {len(g)} at index {i}")
        for r in g:
            if not isinstance(r, str):
                raise TypeError(f"responses must hold str, got {type(r).__name__} at index {i}")
    pad_id, eos_id = special_ids(tokenizer)
    if add_eos and eos_id is None:
        raise ValueError("add_eos=True needs a tokenizer with an eos token, got eos_token_id=None")
    prompt_tokens, prompt_valid = left_pad([list(tokenizer(p)["input_ids"]) for p in prompts], pad_id)
    rows = [list(tokenizer(r, add_special_tokens=False)["input_ids"]) + ([eos_id] if add_eos else [])
            for g in groups for r in g]
    T = max(1, max(len(r) for r in rows))
    ids = torch.full((len(rows), T), pad_id, dtype=torch.long)
    mask = torch.zeros((len(rows), T), dtype=torch.long)
    for i, r in enumerate(rows):
        ids[i, :len(r)] = torch.tensor(r, dtype=torch.long)
        mask[i, :len(r)] = 1
    B = len(prompts)
    return prompt_tokens, prompt_valid, ids.view(B, n, T), mask.view(B, n, T)  # (B*n, T) -> (B, n, T)


def recomputes(model) -> bool:
    """Whether a forward of ``model`` now recomputes activations in backward (gradient checkpointing, Chen et al.
    2016): transformers then drops the KV cache inside each layer, so the cached prompt pass has nothing to reuse."""
    if not torch.is_grad_enabled() or not getattr(model, "training", False) or not callable(getattr(model, "modules", None)):
        return False
    return any(getattr(m, "gradient_checkpointing", False) is True for m in model.modules())


def check_padding(prompt_valid: torch.Tensor, response_valid: torch.Tensor) -> None:
    """Prompts left-padded (each row ``0..0 1..1``, ending in a real token), responses right-padded (``1..1 0..0``).

    The prompt's last position predicts the first response token, and positions count from the first real
    token: a right-padded prompt would be scored from a pad (wrong numbers, no error). One read of both masks.
    """
    pv, rv = prompt_valid != 0, response_valid != 0
    bad = torch.stack(((pv[:, 1:] < pv[:, :-1]).any() | (~pv[:, -1]).any() if pv.shape[1] else torch.tensor(True),
                       (rv[..., 1:] > rv[..., :-1]).any() if rv.shape[-1] > 1 else torch.tensor(False, device=rv.device)))
    prompt_bad, response_bad = bad.tolist()
    if prompt_bad:
        row = next(i for i in range(pv.shape[0]) if pv.shape[1] == 0 or not pv[i, -1] or (pv[i, 1:] < pv[i, :-1]).any())
        raise ValueError(f"prompt_valid must mark left-padded prompts (each row 0..0 1..1, ending in a real token: the "
                         f"last prompt position predicts the first response token), got row {row} = "
                         f"{pv[row].long().tolist()[:16]}; pad prompts on the left (tokenizer.padding_side = 'left')")
    if response_bad:
        idx = tuple(int(i) for i in torch.nonzero(rv[..., 1:] > rv[..., :-1])[0].tolist())
        raise ValueError(f"response_valid must mark right-padded responses (each row 1..1 0..0), got a 1 after a 0 at "
                         f"index {idx[:-1] + (idx[-1] + 1,)}")


def sequence_logprobs(
    model,
    prompt_tokens: torch.Tensor,
    prompt_valid: torch.Tensor,
    response_tokens: torch.Tensor,
    response_valid: torch.Tensor,
    *,
    temperature: float = 1.0,
    top_p: float = 1.0,
    top_k: int = 0,
) -> torch.Tensor:
    """Per-token log pi_T of given responses, differentiable: (B, Tp), (B, n, T) -> (B, n, T).

    ``out[b, j, t] = log softmax(logits / T)[response_tokens[b, j, t]]`` given the
    prompt and the earlier response tokens, 0 where ``response_valid`` is 0.
    Each prompt runs once; its KV cache is copied to its n rows and the
    ``B * n`` responses run on top of it (models without an expandable cache
    get one pass over ``[prompt_b ; response_bj]`` rows). Position ids count
    from the first real token, so left padding of prompts and right padding of responses change
    nothing. With the ``temperature`` (and ``top_k``, ``top_p``) used by :func:`sample`
    this reproduces ``Samples.token_logprobs`` to float32 round-off; use the
    sampling temperature for unbiased score-function gradients (Chow et al. 2024).
    Prompts must be left-padded and responses right-padded (``prompt_valid`` rows ``0..0 1..1``,
    ``response_valid`` rows ``1..1 0..0``; anything else is a ``ValueError``: one read of the masks).
    Runs in whatever mode the model is in: a model with active dropout in training mode scores another
    policy than :func:`sample`, which decodes in eval mode. A model in training mode that
    recomputes its activations (:func:`recomputes`) gets the one pass over ``[prompt ; response]`` rows.
    """
    check_model(model)
    check_long("prompt_tokens", prompt_tokens, 2)
    check_long("prompt_valid", prompt_valid, 2)
    check_long("response_tokens", response_tokens, 3)
    check_long("response_valid", response_valid, 3)
    if prompt_valid.shape != prompt_tokens.shape:
        raise ValueError(f"prompt_valid must have the shape of prompt_tokens {tuple(prompt_tokens.shape)}, got {tuple(prompt_valid.shape)}")
    if response_valid.shape != response_tokens.shape:
        raise ValueError(f"response_valid must have the shape of response_tokens {tuple(response_tokens.shape)}, got {tuple(response_valid.shape)}")
    if response_tokens.shape[0] != prompt_tokens.shape[0]:
        raise ValueError(f"response_tokens must have B={prompt_tokens.shape[0]} rows like prompt_tokens, got {response_tokens.shape[0]}")
    temperature = check_temperature(temperature)
    top_p = check_top_p(top_p)
    top_k = check_top_k(top_k)
    check_padding(prompt_valid, response_valid)

    B, n, T = response_tokens.shape
    resp = response_tokens.reshape(B * n, T)  # (B, n, T) -> (B*n, T): row b*n + j is response j of prompt b
    mask = torch.cat([prompt_valid.repeat_interleave(n, 0), response_valid.reshape(B * n, T)], dim=1)  # (B*n, Tp+T)
    past, first = None, None
    if not recomputes(model):  # with recomputed activations a layer keeps no KV cache: one pass over whole rows
        past, first = prompt_pass(model, prompt_tokens, prompt_valid, n)  # first (B*n, V) predicts response token 0
    if past is not None:
        # the prompt ran once per prompt; the responses attend to its copied cache
        pos = position_ids(prompt_valid)[:, -1:].repeat_interleave(n, 0) + 1 + torch.arange(T, device=resp.device)
        out = model(input_ids=resp, attention_mask=mask, position_ids=pos, use_cache=True,
                    **{cache_keyword(model): past})
        logits = torch.cat([first[:, None, :], out.logits[:, :-1, :]], dim=1)  # (B*n, T, V): token t given < t
    else:
        ids = torch.cat([prompt_tokens.repeat_interleave(n, 0), resp], dim=1)  # (B*n, Tp+T)
        kwargs = {"logits_to_keep": T + 1} if accepts_kwarg(model, "logits_to_keep") else {}
        if first is None and recomputes(model):
            kwargs["use_cache"] = False  # no cache is kept while recomputing (transformers would warn and drop it)
        logits = checked_output(model(input_ids=ids, attention_mask=mask, position_ids=position_ids(mask), **kwargs)).logits
        logits = logits[:, -(T + 1):-1, :]  # (B*n, T, V): position Tp-1+t predicts response token t
    logp = log_policy(logits, temperature, top_p, top_k)
    tok = logp.gather(-1, response_tokens.reshape(B * n, T, 1)).squeeze(-1)  # (B*n, T)
    tok = tok.masked_fill(response_valid.reshape(B * n, T) == 0, 0.0)
    return tok.view(B, n, T)  # (B*n, T) -> (B, n, T)
