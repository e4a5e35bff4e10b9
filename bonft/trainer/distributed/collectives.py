"""The model wrapper and the collectives a trainer needs, each failure turned into a :class:`PeerError`.

One process (``ctx.enabled`` False or a world of 1): every function here is a no-op or returns its input.
"""
from __future__ import annotations

import datetime
import inspect
from typing import Any, Mapping

import torch
import torch.distributed as dist
from torch.nn.parallel import DistributedDataParallel as DDP

from bonft._core.checks import check_choice, check_int
from bonft.trainer.distributed.group import DistContext, collective_guard


def wrap_model(model: torch.nn.Module, ctx: DistContext, **ddp_kwargs: Any) -> torch.nn.Module:
    """``DistributedDataParallel(model)`` when more than one rank runs, else ``model`` itself.

    DDP copies rank 0's weights to every rank here and averages gradients in
    ``backward()``. Buffers are synced here but not in each forward pass
    (``forward_sync_buffers=False``, ``broadcast_buffers=False`` in older torch), so
    ranks may make different numbers of forward calls; language models keep no
    running statistics.
    Sample with :func:`unwrap_model`'s module, train through the wrapper.
    """
    if not isinstance(model, torch.nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if not isinstance(ctx, DistContext):
        raise TypeError(f"ctx must be a DistContext, got {type(ctx).__name__}")
    if not ctx.enabled or ctx.world_size == 1:
        return model
    # no buffer broadcast in forward (newer torch spells it forward_sync_buffers; both still sync at wrap time)
    quiet = "forward_sync_buffers" if "forward_sync_buffers" in inspect.signature(DDP.__init__).parameters else "broadcast_buffers"
    if "broadcast_buffers" not in ddp_kwargs and "forward_sync_buffers" not in ddp_kwargs:
        ddp_kwargs[quiet] = False
    if ctx.device.type == "cuda":
        ddp_kwargs.setdefault("device_ids", [ctx.device.index])
    with collective_guard(ctx, "wrapping the model in DistributedDataParallel"):
        return DDP(model, **ddp_kwargs)


def unwrap_model(model: Any) -> Any:
    """The plain module inside a DDP wrapper (or ``model`` itself)."""
    return model.module if isinstance(model, DDP) else model


_OPS = {"sum": "SUM", "max": "MAX", "min": "MIN", "mean": "SUM"}


def all_reduce_(tensor: torch.Tensor, ctx: DistContext, *, op: str = "sum") -> torch.Tensor:
    """In-place all-reduce of a tensor over ranks (``sum``, ``mean``, ``max``, ``min``); returns it."""
    if not isinstance(tensor, torch.Tensor):
        raise TypeError(f"tensor must be a torch.Tensor, got {type(tensor).__name__}")
    check_choice("op", op, tuple(_OPS))
    if not ctx.enabled or ctx.world_size == 1:
        return tensor
    with collective_guard(ctx, f"all_reduce({op})"):
        dist.all_reduce(tensor, op=getattr(dist.ReduceOp, _OPS[op]))
    if op == "mean":
        tensor /= ctx.world_size
    return tensor


def reduce_metrics(values: Mapping[str, float], ctx: DistContext, *, op: str = "sum") -> dict[str, float]:
    """All-reduce a dict of numbers over ranks (float64); every rank gets the result.

    Every rank must pass the same keys (checked: a mismatch raises ``ValueError``
    on every rank instead of mixing values). ``op``: ``sum`` (for per-rank parts
    already divided by a global count), ``mean``, ``max``, ``min``.
    """
    if not isinstance(values, Mapping):
        raise TypeError(f"values must be a mapping of name -> number, got {type(values).__name__}")
    check_choice("op", op, tuple(_OPS))
    keys = sorted(values)
    try:
        flat = torch.tensor([float(values[k]) for k in keys], dtype=torch.float64)
    except (TypeError, ValueError):
        raise TypeError("values must map names to numbers, got a value that is not a number") from None
    if not ctx.enabled or ctx.world_size == 1:
        return dict(zip(keys, flat.tolist()))
    seen = all_gather_objects(keys, ctx)
    if any(s != keys for s in seen):
        raise ValueError(f"values must have the same keys on every rank, got {seen}")
    dev = ctx.device if ctx.backend == "nccl" else torch.device("cpu")
    out = all_reduce_(flat.to(dev), ctx, op=op).cpu()
    return dict(zip(keys, out.tolist()))


def gather_objects(obj: Any, ctx: DistContext, *, dst: int = 0) -> list | None:
    """Picklable ``obj`` of every rank, in rank order, on rank ``dst``; ``None`` elsewhere.

    Use it to pool evaluation results (sampled rewards, scores) so the estimators
    run once on the full held-out set. One process: ``[obj]``.
    """
    dst = check_int("dst", dst, min=0, max=ctx.world_size - 1)
    if not ctx.enabled or ctx.world_size == 1:
        return [obj]
    out = [None] * ctx.world_size if ctx.rank == dst else None
    with collective_guard(ctx, "gather_object"):
        dist.gather_object(obj, out, dst=dst)
    return out


def all_gather_objects(obj: Any, ctx: DistContext) -> list:
    """Picklable ``obj`` of every rank, in rank order, on every rank."""
    if not ctx.enabled or ctx.world_size == 1:
        return [obj]
    out: list = [None] * ctx.world_size
    with collective_guard(ctx, "all_gather_object"):
        dist.all_gather_object(out, obj)
    return out


def broadcast_object(obj: Any, ctx: DistContext, *, src: int = 0) -> Any:
    """Rank ``src``'s picklable ``obj`` on every rank (e.g. which checkpoint to resume from)."""
    src = check_int("src", src, min=0, max=ctx.world_size - 1)
    if not ctx.enabled or ctx.world_size == 1:
        return obj
    box = [obj if ctx.rank == src else None]
    with collective_guard(ctx, "broadcast_object"):
        dist.broadcast_object_list(box, src=src)
    return box[0]


def barrier(ctx: DistContext, *, what: str = "barrier") -> None:
    """Wait for every rank. With gloo a monitored barrier names the rank that did not arrive."""
    if not ctx.enabled or ctx.world_size == 1:
        return
    with collective_guard(ctx, what):
        if ctx.backend == "gloo":
            dist.monitored_barrier(timeout=datetime.timedelta(seconds=ctx.timeout_s))
        else:
            dist.barrier(device_ids=[ctx.device.index] if ctx.device.type == "cuda" else None)
