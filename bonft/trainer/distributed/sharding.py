"""Which rank holds which prompts, the loss scale that makes W ranks step like one process, and seeds.

Pure functions of counts, row sequences and integers (no process group); the
public names are re-exported by :mod:`bonft.trainer.distributed`, whose docstring describes them.
"""
from __future__ import annotations

from typing import Any

from bonft._core.checks import check_choice, check_int
from bonft._core.seeds import derive_seed as _derive

_PROMPT_STREAM = 0x5EED  # tags prompt_seed entropy apart from derive_seed's


# ----------------------------------------------------------------------------- sharding by prompt
def check_divisible(name: str, count: int, world_size: int) -> int:
    """Refuse a global count that W ranks cannot share equally; returns the per-rank share."""
    if count % world_size:
        lo, hi = count // world_size * world_size, (count // world_size + 1) * world_size
        nearest = f"{lo} or {hi}" if lo else f"{hi}"
        raise ValueError(f"{name} must be divisible by the world size (world_size={world_size}) so every rank "
                         f"holds whole prompts and the same share, got {name}={count}; use e.g. {nearest}")
    return count // world_size


def shard_bounds(n_prompts: int, *, rank: int, world_size: int, allow_uneven: bool = False,
                 name: str = "n_prompts") -> tuple[int, int]:
    """``[start, stop)`` of rank ``rank``'s contiguous block of ``n_prompts`` prompts.

    Equal shares ``B/W``; ``B % W != 0`` raises ``ValueError`` naming both numbers,
    unless ``allow_uneven`` (then ranks ``< B % W`` hold one prompt more, and a rank
    may hold none when ``B < W``). ``name`` labels ``n_prompts`` in the error.
    """
    n_prompts = check_int(name, n_prompts, min=0)
    world_size = check_int("world_size", world_size, min=1)
    rank = check_int("rank", rank, min=0)
    if rank >= world_size:
        raise ValueError(f"rank must be < world_size (world_size={world_size}), got rank={rank}")
    if not isinstance(allow_uneven, bool):
        raise TypeError(f"allow_uneven must be a bool, got {type(allow_uneven).__name__}")
    if not allow_uneven:
        share = check_divisible(name, n_prompts, world_size)
        return rank * share, (rank + 1) * share
    base, extra = divmod(n_prompts, world_size)
    start = rank * base + min(rank, extra)
    return start, start + base + (rank < extra)


def shard_prompts(items: Any, *, rank: int, world_size: int, pool_size: int = 1, allow_uneven: bool = False) -> Any:
    """This rank's prompts of a global batch, a prompt's ``pool_size`` rows kept together.

    items: a list / tuple / numpy array / tensor whose first axis has ``B * pool_size``
    rows in the library's flat layout (row ``b * pool_size + i`` is sample i of
    prompt b) -> the same type with ``(stop - start) * pool_size`` rows, where
    ``[start, stop) = shard_bounds(B, ...)``. With ``pool_size=1`` the rows are prompts.
    """
    pool_size = check_int("pool_size", pool_size, min=1)
    if isinstance(items, (str, bytes)) or not hasattr(items, "__len__") or not hasattr(items, "__getitem__"):
        raise TypeError(f"items must be a list, tuple, numpy array or tensor, got {type(items).__name__}")
    rows = len(items)
    if rows % pool_size:
        raise ValueError(f"items must hold whole pools of pool_size={pool_size} rows, got {rows} rows")
    start, stop = shard_bounds(rows // pool_size, rank=rank, world_size=world_size, allow_uneven=allow_uneven,
                               name="prompts in items")
    return items[start * pool_size: stop * pool_size]


# ----------------------------------------------------------------------------- loss scale and seeds
def global_mean_scale(*, global_count: int, world_size: int, grads: str = "averaged") -> float:
    """Factor for a rank's ``reduction="sum"`` loss so W ranks step like one process on the global batch.

    One process: ``loss = (1/B) sum_{b<B} l_b``. Rank r holds B/W of the prompts,
    ``S_r = sum_{b in r} l_b``. DDP averages gradients, ``g = (1/W) sum_r grad(c S_r)``,
    so ``c = W / B`` gives ``g = (1/B) sum_b grad l_b``; a gradient *sum*
    (``grads="summed"``, e.g. a manual all-reduce) needs ``c = 1 / B``.
    """
    global_count = check_int("global_count", global_count, min=1)
    world_size = check_int("world_size", world_size, min=1)
    check_choice("grads", grads, ("averaged", "summed"))
    return (world_size if grads == "averaged" else 1) / global_count


def derive_seed(seed: int, *, step: int, rank: int = 0, stream: int = 0) -> int:
    """A 63-bit seed for ``(seed, step, rank, stream)`` from numpy's ``SeedSequence`` (no collisions in practice).

    Different ranks (or streams) get independent streams; the same arguments
    always give the same seed, so a run (and a resumed run) is reproducible.
    """
    return _derive(*[check_int(nm, v, min=0) for nm, v in (("seed", seed), ("step", step), ("rank", rank), ("stream", stream))])


def prompt_seed(seed: int, *, step: int, slot: int, stream: int = 0) -> int:
    """Seed of the prompt in position ``slot`` of step ``step``'s *global* batch.

    Sampling a prompt's n responses from this seed makes them the same whichever
    rank holds the prompt (so W processes reproduce one process exactly), while
    ranks still draw differently because they hold different slots.
    """
    vals = [check_int(nm, v, min=0) for nm, v in (("seed", seed), ("step", step), ("slot", slot), ("stream", stream))]
    return _derive(vals[0], vals[1], _PROMPT_STREAM, vals[2], vals[3])
