"""Where the demo's work runs: worker processes started ahead of their jobs, run several at a time.

A worker is a spawned process that imports the library (torch and transformers: about 6 s of CPU)
as soon as it starts and then waits for its one job. :func:`bonft.trainer.demo.run_demo` starts its
workers before the warm start, so their imports run on the core the single-threaded warm start
leaves idle; it then gives every RL stage a worker at once, so three stages on two cores share both
until they end together, where two at a time leave one core idle while the last stage runs alone.

Nothing computed depends on where a job runs: each job sets its own torch threads and draws from
its own seeds, so a stage or a pool is the same in a worker as in the calling process.
"""
from __future__ import annotations

import importlib
import multiprocessing as mp
import time
from typing import Callable

__all__ = ["Workers", "run_jobs", "busy_pids"]

_BUSY: list = []  # the worker processes handed a job (those still alive run it)


def busy_pids() -> list[int]:
    """Process ids of the workers running a job now (each takes SIGINT as Ctrl-C: its stage checkpoints)."""
    _BUSY[:] = [p for p in _BUSY if p.is_alive()]
    return [p.pid for p in _BUSY]


def _serve(conn, preload: tuple[str, ...]) -> None:
    """A worker's life: import ``preload``, wait for one job ``(fn, args)``, run it, exit (an exception: exit code 1)."""
    try:
        for module in preload:
            importlib.import_module(module)
        job = conn.recv()
    except (EOFError, OSError, KeyboardInterrupt):  # the caller went away or was interrupted before a job came
        return
    conn.close()
    if job is None:
        return
    fn, args = job
    try:
        fn(*args)
    except KeyboardInterrupt:  # Ctrl-C, or SIGTERM passed on: the trainer has said what it checkpointed
        raise SystemExit(130) from None


class Workers:
    """``count`` worker processes started now (spawned), each importing ``preload`` and then waiting
    for one job.

    :meth:`submit` hands a job to a waiting worker, or starts a new one when none is left.
    :meth:`close` releases the workers that got no job. Use as a context manager.
    """

    def __init__(self, count: int, preload: tuple[str, ...] = ()) -> None:
        self._ctx = mp.get_context("spawn")
        self._preload = tuple(preload)
        self._idle: list[tuple[mp.Process, object]] = []
        for _ in range(count):
            self._idle.append(self._start())

    def _start(self):
        recv, send = self._ctx.Pipe(duplex=False)
        p = self._ctx.Process(target=_serve, args=(recv, self._preload), name="bonft-worker")
        p.start()
        recv.close()
        return p, send

    def submit(self, name: str, fn: Callable, *args) -> mp.Process:
        """Run ``fn(*args)`` in a worker (``fn`` and ``args`` picklable; ``fn`` a module-level function)."""
        p, send = self._idle.pop(0) if self._idle else self._start()
        p.name = name
        busy_pids()  # drops the finished ones
        _BUSY.append(p)
        send.send((fn, args))
        send.close()
        return p

    def close(self) -> None:
        """Tell every worker still waiting that no job comes, and wait for it to exit."""
        while self._idle:
            p, send = self._idle.pop()
            try:
                send.send(None)
                send.close()
            except OSError:  # already gone (interrupted)
                pass
            p.join(timeout=60)

    def __enter__(self) -> "Workers":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def run_jobs(jobs: list[tuple[str, str, Callable, tuple]], workers: int, *, pool: Workers | None = None,
             meanwhile: Callable[[], None] | None = None, tick: Callable[[], None] | None = None) -> None:
    """Run ``jobs`` (name, where to look when it fails, fn, args), at most ``workers`` at a time, each in
    a worker process.

    ``pool``: workers started earlier (used first). ``meanwhile``: run once in this process after the
    first jobs are handed out. ``tick``: called about once a second while jobs run (a progress bar).
    A job that fails raises ``RuntimeError`` naming it. An interrupt (Ctrl-C reaches the workers too:
    same process group) waits up to 60 s for each running worker, then re-raises.
    """
    pending, running = list(jobs), []
    own = pool is None
    pool = pool or Workers(0)
    try:
        handed_out = False
        while pending or running:
            while pending and len(running) < workers:
                name, where, fn, args = pending.pop(0)
                running.append((name, where, pool.submit(name, fn, *args)))
            if not handed_out and meanwhile is not None:
                handed_out = True
                meanwhile()
            for job in list(running):
                name, where, p = job
                p.join(timeout=0)
                if not p.is_alive():
                    if p.exitcode != 0:
                        raise RuntimeError(f"stage {name} failed (exit code {p.exitcode}); see {where}")
                    running.remove(job)
            if tick is not None:
                tick()
            if running:
                time.sleep(1.0)
    except BaseException:
        for _, _, p in running:
            p.join(timeout=60)
        raise
    finally:
        if own:
            pool.close()
