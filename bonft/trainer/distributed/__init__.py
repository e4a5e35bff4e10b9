"""Running one recipe on many processes and machines with ``torch.distributed``.

The same script runs alone or under ``torchrun`` (``python -m torch.distributed.run``):
:func:`init_from_env` reads ``RANK`` / ``WORLD_SIZE`` / ``LOCAL_RANK`` /
``MASTER_ADDR`` / ``MASTER_PORT`` and joins the process group (``gloo`` on CPU,
``nccl`` on CUDA); without them it returns a single-process context and every
helper below becomes a no-op, so callers never branch on "am I distributed".

The pieces a best-of-N trainer needs:

* :func:`shard_bounds` / :func:`shard_prompts` -- split a step's global batch by
  *prompt*: the n samples of a prompt stay on one rank, because their credit
  (leave-one-out baselines, best-of-k / pass@k weights) needs the whole group.
  Contiguous blocks: rank r holds prompts ``[r*B/W, (r+1)*B/W)``. A global batch
  that the world size does not divide is refused (``allow_uneven=True`` gives the
  first ``B % W`` ranks one prompt more, for evaluation where nothing is averaged).
* :func:`global_mean_scale` -- the constant that makes W ranks take the same
  step as one process with the same global batch: a loss summed over a rank's
  prompts times ``W / B`` under DDP (which *averages* gradients over W ranks)
  gives ``(1/B) * sum over all B prompts`` of the per-prompt gradients.
* :func:`derive_seed` / :func:`prompt_seed` -- seeds from ``(seed, step, rank)``
  or ``(seed, step, global prompt slot)``: reproducible, and different across
  ranks; a per-slot seed makes a prompt's samples independent of which rank holds it.
* :func:`wrap_model`, :func:`unwrap_model`, :func:`reduce_metrics`,
  :func:`gather_objects`, :func:`broadcast_object`, :func:`barrier`.

A dead or stuck peer must not hang the others: the process group gets a
timeout (``timeout_s``, default 60 s) and every collective here turns a failure
into :class:`PeerError`, which names the rank, the operation and the timeout.
With gloo a killed peer is noticed at the next collective (its sockets close);
a stopped one after ``timeout_s``. With nccl the watchdog aborts the process
after the timeout (``TORCH_NCCL_ASYNC_ERROR_HANDLING``, on by default).

Network caution: when this module creates the rendezvous store itself (manual
launch, no torchrun) rank 0 binds it to ``MASTER_ADDR`` only, not to every
interface; with ``MASTER_ADDR=127.0.0.1`` gloo is also kept on the loopback
device. Under torchrun the launcher's store is used as torchrun made it. The
store and the process group are unauthenticated: keep ``MASTER_PORT`` on a
private network or behind a firewall (common practice).
"""
from __future__ import annotations

import contextlib
import datetime
import gc
import ipaddress
import os
import socket
from dataclasses import dataclass, field
from typing import Any, Iterator, Mapping, Sequence

import torch
import torch.distributed as dist

from bonft._core.checks import check_choice, check_int, check_positive
from bonft.trainer.distributed.sharding import (check_divisible, derive_seed, global_mean_scale, prompt_seed, shard_bounds,  # noqa: F401 (re-exported)
                        shard_prompts)

__all__ = [
    "DistContext", "PeerError", "init_from_env", "shutdown", "session", "shard_bounds", "shard_prompts",
    "check_divisible", "step_guard", "stopped_ranks", "global_mean_scale", "derive_seed", "prompt_seed", "wrap_model", "unwrap_model",
    "sample_per_prompt", "reduce_metrics", "all_reduce_", "gather_objects", "all_gather_objects", "broadcast_object", "barrier",
]



class PeerError(RuntimeError):
    """A collective failed: a peer process died, hung past the timeout, or never joined."""


@dataclass(frozen=True)
class DistContext:
    """Where this process sits in the run; ``enabled=False`` means one process, no process group."""

    rank: int = 0
    world_size: int = 1
    local_rank: int = 0
    device: torch.device = field(default_factory=lambda: torch.device("cpu"))
    enabled: bool = False
    backend: str = ""
    timeout_s: float = 60.0

    @property
    def is_main(self) -> bool:
        """True on rank 0: the only rank that writes checkpoints, logs and plots."""
        return self.rank == 0

    def __str__(self) -> str:
        where = f"rank {self.rank}/{self.world_size} (local {self.local_rank})" if self.enabled else "single process"
        return f"{where} on {self.device}" + (f", {self.backend}" if self.backend else "")


# ----------------------------------------------------------------------------- joining the group
def _env_int(env: Mapping[str, str], name: str, *, min: int) -> int:
    text = env.get(name)
    try:
        value = int(text)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise ValueError(f"environment variable {name} must be an int >= {min}, got {name}={text!r}") from None
    if value < min:
        raise ValueError(f"environment variable {name} must be an int >= {min}, got {name}={value}")
    return value


def _is_loopback(addr: str) -> bool:
    if addr == "localhost":
        return True
    try:
        return ipaddress.ip_address(addr).is_loopback
    except ValueError:
        return False


def _store(addr: str, port: int, rank: int, world: int, timeout: datetime.timedelta) -> Any:
    """The rendezvous store; rank 0 serves it on ``addr`` only (a pre-bound socket), others connect."""
    if rank != 0:
        return dist.TCPStore(addr, port, world, False, timeout)
    family, kind, proto, _, sockaddr = socket.getaddrinfo(addr, port, type=socket.SOCK_STREAM)[0]
    sock = socket.socket(family, kind, proto)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(sockaddr)
    except OSError as e:
        sock.close()
        raise ValueError(f"MASTER_PORT must be a free port on MASTER_ADDR={addr} for rank 0, got MASTER_PORT={port} ({e})") from None
    sock.listen(128)
    # detach(): the store owns the descriptor from now on (Python must not close it)
    return dist.TCPStore(addr, port, world, True, timeout, wait_for_workers=False, master_listen_fd=sock.detach())


def init_from_env(*, device: str = "auto", timeout_s: float | None = None, env: Mapping[str, str] | None = None) -> DistContext:
    """Join the process group described by the launcher's environment, or return a one-process context.

    ``RANK`` and ``WORLD_SIZE`` set (torchrun sets them, with ``LOCAL_RANK``,
    ``MASTER_ADDR``, ``MASTER_PORT``) -> ``init_process_group`` with backend
    ``nccl`` if the device is CUDA (``cuda:LOCAL_RANK``), else ``gloo``, and a
    timeout of ``timeout_s`` seconds on every collective. Neither set -> a
    context with ``enabled=False`` on ``device``. ``LOCAL_RANK`` defaults to
    ``RANK`` (one machine). Calling it again in a process that already joined
    returns the context of the existing group.

    device: ``"auto"`` (CUDA when available), ``"cpu"`` or ``"cuda"``. timeout_s:
    None reads ``BONFT_DIST_TIMEOUT_S`` from the environment, else 60 s.
    Raises ``ValueError`` for bad environment values and :class:`PeerError` when
    the peers do not meet within ``timeout_s``.
    """
    from bonft.trainer.models import pick_device

    check_choice("device", device, ("auto", "cpu", "cuda"))
    if env is None:
        env = os.environ
    elif not isinstance(env, Mapping):
        raise TypeError(f"env must be a mapping of environment variables, got {type(env).__name__}")
    if timeout_s is None:
        text = env.get("BONFT_DIST_TIMEOUT_S", "60")
        try:
            timeout_s = float(text)
        except ValueError:
            raise ValueError(f"environment variable BONFT_DIST_TIMEOUT_S must be a number of seconds, got {text!r}") from None
        if not (timeout_s > 0 and timeout_s < float("inf")):
            raise ValueError(f"environment variable BONFT_DIST_TIMEOUT_S must be > 0, got {text!r}")
    timeout_s = check_positive("timeout_s", timeout_s)
    if "RANK" not in env and "WORLD_SIZE" not in env:
        return DistContext(device=pick_device(device), timeout_s=timeout_s)
    world = _env_int(env, "WORLD_SIZE", min=1)
    rank = _env_int(env, "RANK", min=0)
    if rank >= world:
        raise ValueError(f"environment variable RANK must be < WORLD_SIZE (WORLD_SIZE={world}), got RANK={rank}")
    local = _env_int(env, "LOCAL_RANK", min=0) if "LOCAL_RANK" in env else rank
    dev = pick_device(device)
    if dev.type == "cuda":
        if local >= torch.cuda.device_count():
            raise ValueError(f"LOCAL_RANK must be < the number of visible GPUs ({torch.cuda.device_count()}), got LOCAL_RANK={local}")
        dev = torch.device("cuda", local)
        torch.cuda.set_device(dev)
    backend = "nccl" if dev.type == "cuda" else "gloo"
    ctx = DistContext(rank=rank, world_size=world, local_rank=local, device=dev, enabled=True, backend=backend,
                      timeout_s=timeout_s)
    if dist.is_initialized():
        if (dist.get_rank(), dist.get_world_size()) != (rank, world):
            raise ValueError(f"a process group is already initialised as rank {dist.get_rank()}/{dist.get_world_size()}, "
                             f"but the environment says RANK={rank}, WORLD_SIZE={world}")
        return ctx
    addr = env.get("MASTER_ADDR", "")
    if not addr:
        raise ValueError("environment variable MASTER_ADDR must name rank 0's host when RANK and WORLD_SIZE are set, got nothing")
    port = _env_int(env, "MASTER_PORT", min=1)
    timeout = datetime.timedelta(seconds=timeout_s)
    if backend == "gloo" and _is_loopback(addr) and "GLOO_SOCKET_IFNAME" not in os.environ:
        lo = [name for _, name in socket.if_nameindex() if name.startswith("lo")]
        if lo:  # one machine: keep gloo's sockets on the loopback device
            os.environ["GLOO_SOCKET_IFNAME"] = lo[0]
    try:
        if "TORCHELASTIC_RUN_ID" in env or env.get("TORCHELASTIC_USE_AGENT_STORE") == "True":
            # launched by torchrun: its agent serves (or told rank 0 to serve) the store; follow its env:// rules
            dist.init_process_group(backend, init_method="env://", rank=rank, world_size=world, timeout=timeout)
        else:
            store = _store(addr, port, rank, world, timeout)
            dist.init_process_group(backend, store=store, rank=rank, world_size=world, timeout=timeout)
    except (RuntimeError, OSError) as e:
        raise PeerError(f"rank {rank} of {world}: could not meet its peers at {addr}:{port} within "
                        f"timeout_s={timeout_s:g} s (is every rank started, with the same MASTER_ADDR/MASTER_PORT?): {e}") from e
    return ctx


def shutdown(ctx: DistContext, *, wait_for_peers: bool = True) -> None:
    """Leave the process group (no-op for one process). Drop or :func:`unwrap_model` DDP wrappers first.

    ``wait_for_peers``: meet the other ranks at a barrier first (False on error paths). With it and the
    collection of dead wrappers, 0 of 90 two-rank exits aborted after their work ("terminate called
    without an active exception", exit -6), against 4 of 90 without (tests/dist_scripts/toy_ddp.py).
    """
    if ctx.enabled and dist.is_initialized():
        gc.collect()
        if wait_for_peers:
            try:
                dist.barrier()
            except RuntimeError:  # a peer already left or died: leave anyway
                pass
        dist.destroy_process_group()


@contextlib.contextmanager
def session(**kwargs: Any) -> Iterator[DistContext]:
    """``with session(timeout_s=30) as ctx: ...`` -- :func:`init_from_env`, then :func:`shutdown`."""
    ctx = init_from_env(**kwargs)
    try:
        yield ctx
    except BaseException:
        shutdown(ctx, wait_for_peers=False)  # the peers may be waiting elsewhere, or gone
        raise
    shutdown(ctx)


@contextlib.contextmanager
def _guard(ctx: DistContext, what: str) -> Iterator[None]:
    """Turn a failed collective into a PeerError naming the rank, the operation and the timeout."""
    try:
        yield
    except RuntimeError as e:
        if isinstance(e, PeerError):
            raise
        raise PeerError(f"rank {ctx.rank} of {ctx.world_size}: {what} failed; a peer process probably died or "
                        f"stopped responding (process-group timeout {ctx.timeout_s:g} s). "
                        f"Check the other ranks' output. Cause: {e}") from e


def sample_per_prompt(model: Any, tokenizer: Any, prompts: Sequence[str], *, seeds: Sequence[int], n: int,
                      temperature: float = 1.0, top_p: float = 1.0, max_new_tokens: int = 32) -> Any:
    """:func:`bonft.generation.sampling.sample` with one generator per prompt: prompt b's n responses come from ``seeds[b]``.

    prompts: B strings, seeds: B ints (e.g. :func:`prompt_seed` of each prompt's
    global slot) -> ``Samples`` with ``reply_tokens (B, n, T)``, as ``sample`` lays them out.

    A prompt's samples depend only on (model, prompt, seed), not on which other
    prompts share the call, so W ranks holding different prompts draw what one
    process would: all B*n rows are still decoded in one batch, each prompt's
    uniforms come from its own generator (``sample(..., seeds=...)``).
    """
    from bonft.generation.sampling import sample

    if isinstance(prompts, str):
        raise TypeError("prompts must be a sequence of str, got a single str (wrap it in a list)")
    prompts = list(prompts)
    if not prompts:
        raise ValueError("prompts must not be empty")
    seeds = [check_int("seeds", s, min=0) for s in seeds]
    if len(seeds) != len(prompts):
        raise ValueError(f"seeds must hold one seed per prompt ({len(prompts)} prompts), got {len(seeds)} seeds")
    return sample(model, tokenizer, prompts, n=n, temperature=temperature, top_p=top_p,
                  max_new_tokens=max_new_tokens, seeds=seeds)


# ----------------------------------------------------------------------------- model and collectives
def wrap_model(model: torch.nn.Module, ctx: DistContext, **ddp_kwargs: Any) -> torch.nn.Module:
    """``DistributedDataParallel(model)`` when more than one rank runs, else ``model`` itself.

    DDP copies rank 0's weights to every rank here and averages gradients in
    ``backward()``. Buffers are synced here but not in each forward pass
    (``forward_sync_buffers=False``, formerly ``broadcast_buffers=False``), so
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
    import inspect

    from torch.nn.parallel import DistributedDataParallel as DDP

    # no buffer broadcast in forward (newer torch spells it forward_sync_buffers; both still sync at wrap time)
    quiet = "forward_sync_buffers" if "forward_sync_buffers" in inspect.signature(DDP.__init__).parameters else "broadcast_buffers"
    if "broadcast_buffers" not in ddp_kwargs and "forward_sync_buffers" not in ddp_kwargs:
        ddp_kwargs[quiet] = False
    if ctx.device.type == "cuda":
        ddp_kwargs.setdefault("device_ids", [ctx.device.index])
    with _guard(ctx, "wrapping the model in DistributedDataParallel"):
        return DDP(model, **ddp_kwargs)


def unwrap_model(model: Any) -> Any:
    """The plain module inside a DDP wrapper (or ``model`` itself)."""
    from torch.nn.parallel import DistributedDataParallel as DDP

    return model.module if isinstance(model, DDP) else model


_OPS = {"sum": "SUM", "max": "MAX", "min": "MIN", "mean": "SUM"}


def all_reduce_(tensor: torch.Tensor, ctx: DistContext, *, op: str = "sum") -> torch.Tensor:
    """In-place all-reduce of a tensor over ranks (``sum``, ``mean``, ``max``, ``min``); returns it."""
    if not isinstance(tensor, torch.Tensor):
        raise TypeError(f"tensor must be a torch.Tensor, got {type(tensor).__name__}")
    check_choice("op", op, tuple(_OPS))
    if not ctx.enabled or ctx.world_size == 1:
        return tensor
    with _guard(ctx, f"all_reduce({op})"):
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
    with _guard(ctx, "gather_object"):
        dist.gather_object(obj, out, dst=dst)
    return out


def all_gather_objects(obj: Any, ctx: DistContext) -> list:
    """Picklable ``obj`` of every rank, in rank order, on every rank."""
    if not ctx.enabled or ctx.world_size == 1:
        return [obj]
    out: list = [None] * ctx.world_size
    with _guard(ctx, "all_gather_object"):
        dist.all_gather_object(out, obj)
    return out


def broadcast_object(obj: Any, ctx: DistContext, *, src: int = 0) -> Any:
    """Rank ``src``'s picklable ``obj`` on every rank (e.g. which checkpoint to resume from)."""
    src = check_int("src", src, min=0, max=ctx.world_size - 1)
    if not ctx.enabled or ctx.world_size == 1:
        return obj
    box = [obj if ctx.rank == src else None]
    with _guard(ctx, "broadcast_object"):
        dist.broadcast_object_list(box, src=src)
    return box[0]


def barrier(ctx: DistContext, *, what: str = "barrier") -> None:
    """Wait for every rank. With gloo a monitored barrier names the rank that did not arrive."""
    if not ctx.enabled or ctx.world_size == 1:
        return
    with _guard(ctx, what):
        if ctx.backend == "gloo":
            dist.monitored_barrier(timeout=datetime.timedelta(seconds=ctx.timeout_s))
        else:
            dist.barrier(device_ids=[ctx.device.index] if ctx.device.type == "cuda" else None)


from bonft.trainer.distributed.stopping import step_guard, stopped_ranks  # noqa: E402  (they raise this module's PeerError)
