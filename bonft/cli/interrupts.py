"""SIGTERM (what a scheduler sends to preempt a job) handled as Ctrl-C by the commands that train.

The trainer checkpoints the last completed step on ``KeyboardInterrupt``; :func:`terminate_as_interrupt`
raises :class:`Terminated` (a ``KeyboardInterrupt``) on SIGTERM, and given ``children`` first passes a
Ctrl-C (SIGINT) on to the worker processes it names (``bonft demo``'s running stages), which a SIGTERM
sent to the main process alone would otherwise leave running.
"""
from __future__ import annotations

import contextlib
import os
import signal
import threading
from typing import Callable, Iterable, Iterator

EXIT_TERMINATED = 143  # 128 + SIGTERM, what a shell reports for a process ended by it


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised like Ctrl-C so that the trainer checkpoints the last completed step before it stops."""


@contextlib.contextmanager
def terminate_as_interrupt(*, children: Callable[[], Iterable[int]] | None = None) -> Iterator[None]:
    """SIGTERM raises :class:`Terminated` in the main thread for the body (every rank under torchrun, as each
    runs it); ``children``: the process ids that get SIGINT first (workers running a job; an idle worker is
    told by its pool that no job comes)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        for pid in children() if children is not None else ():
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGINT)  # a stage checkpoints its last step, as on Ctrl-C
        raise Terminated("SIGTERM")

    old = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old)
