"""Joining and leaving the process group: :class:`DistContext`, :func:`init_from_env`, :func:`session`.

See :mod:`bonft.trainer.distributed` for the whole picture and the network caution.
"""
from __future__ import annotations

import contextlib
import datetime
import gc
import ipaddress
import os
import socket
from dataclasses import dataclass, field
from typing import Any, Iterator, Mapping

import torch
import torch.distributed as dist

from bonft._core.checks import check_choice, check_positive
from bonft.trainer.models import pick_device


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
def collective_guard(ctx: DistContext, what: str) -> Iterator[None]:
    """Turn a failed collective into a PeerError naming the rank, the operation and the timeout."""
    try:
        yield
    except RuntimeError as e:
        if isinstance(e, PeerError):
            raise
        raise PeerError(f"rank {ctx.rank} of {ctx.world_size}: {what} failed; a peer process probably died or "
                        f"stopped responding (process-group timeout {ctx.timeout_s:g} s). "
                        f"Check the other ranks' output. Cause: {e}") from e
