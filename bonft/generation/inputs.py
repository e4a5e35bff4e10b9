"""Input checks and small helpers of :mod:`bonft.generation.sampling`: prompts, the model, sampling
options, token tensors, left padding, and the random state a chunk of draws is replayed from.
"""
from __future__ import annotations

import torch

from bonft._core.checks import check_fraction, check_int, check_items, check_positive

# ---------------------------------------------------------------- validation


def check_model(model) -> None:
    if not callable(model):
        raise TypeError(f"model must be a callable causal LM (e.g. a transformers model), got {type(model).__name__}")


def check_prompts(prompts) -> list[str]:
    return check_items("prompts", prompts, str, "str")


def check_temperature(temperature) -> float:
    return check_positive("temperature", temperature)


def check_top_p(top_p) -> float:
    return check_fraction("top_p", top_p, open_low=True)


def check_top_k(top_k) -> int:
    return check_int("top_k", top_k, min=0)  # 0 = off


# ---------------------------------------------------------------- helpers


def model_device(model) -> torch.device:
    try:
        return next(model.parameters()).device
    except (AttributeError, StopIteration):
        return torch.device("cpu")


def special_ids(tokenizer) -> tuple[int, int | None]:
    """(pad id, eos id); pad falls back to eos, then 0 (GPT-2 tokenizers have no pad)."""
    eos = tokenizer.eos_token_id
    pad = tokenizer.pad_token_id
    if pad is None:
        pad = eos if eos is not None else 0
    return int(pad), (None if eos is None else int(eos))


def stop_ids(model, eos_id: int | None) -> tuple[int, ...]:
    """The tokens that end a response: the tokenizer's EOS, then every id of the model's
    ``generation_config.eos_token_id`` (an int or a list, as ``generate`` reads it)."""
    ids = [] if eos_id is None else [int(eos_id)]
    extra = getattr(getattr(model, "generation_config", None), "eos_token_id", None)
    for e in (extra if isinstance(extra, (list, tuple)) else [] if extra is None else [extra]):
        if int(e) not in ids:
            ids.append(int(e))
    return tuple(ids)


def left_pad(rows: list[list[int]], pad_id: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Left-pad token lists: (B, Tp) ids and (B, Tp) mask."""
    Tp = max(len(r) for r in rows)
    ids = torch.full((len(rows), Tp), pad_id, dtype=torch.long)
    mask = torch.zeros((len(rows), Tp), dtype=torch.long)
    for i, r in enumerate(rows):
        if r:
            ids[i, Tp - len(r):] = torch.tensor(r, dtype=torch.long)
            mask[i, Tp - len(r):] = 1
    return ids, mask


def rng_state(generator, generators, device):
    """The state of every random stream a draw may use, to replay a chunk exactly."""
    if generators is not None:
        return [g.get_state() for g in generators]
    if generator is not None:
        return generator.get_state()
    return torch.cuda.get_rng_state(device) if device.type == "cuda" else torch.get_rng_state()


def set_rng_state(state, generator, generators, device) -> None:
    if generators is not None:
        for g, st in zip(generators, state):
            g.set_state(st)
    elif generator is not None:
        generator.set_state(state)
    elif device.type == "cuda":
        torch.cuda.set_rng_state(state, device)
    else:
        torch.set_rng_state(state)



def check_long(name: str, x, ndim: int) -> torch.Tensor:
    if not isinstance(x, torch.Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(x).__name__}")
    if x.dtype.is_floating_point or x.dtype.is_complex:
        raise TypeError(f"{name} must be an integer tensor, got dtype {x.dtype}")
    if x.ndim != ndim:
        raise ValueError(f"{name} must have {ndim} dimensions, got shape {tuple(x.shape)}")
    return x
