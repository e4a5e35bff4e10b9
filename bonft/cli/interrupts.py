"""SIGTERM (what a scheduler sends to preempt a job) handled as Ctrl-C by the commands that train.

The trainer checkpoints the last completed step on ``KeyboardInterrupt``; :func:`terminate_as_interrupt`
raises :class:`Terminated` (a ``KeyboardInterrupt``) on SIGTERM, and with ``children=True`` first passes a
Ctrl-C (SIGINT) on to this process's worker processes (``bonft demo``'s stages), which a SIGTERM sent to
the main process alone would otherwise leave running.
"""
from __future__ import annotations

import contextlib
import multiprocessing
import os
import signal
import threading
from typing import Iterator

EXIT_TERMINATED = 143  # 128 + SIGTERM, what a shell reports for a process ended by it


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised like Ctrl-C so that the trainer checkpoints the last completed step before it stops."""


@contextlib.contextmanager
def terminate_as_interrupt(*, children: bool = False) -> Iterator[None]:
    """SIGTERM raises :class:`Terminated` in the main thread for the body (every rank under torchrun, as each
    runs it); ``children``: each live worker process (``multiprocessing.active_children``) gets SIGINT first."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        if children:
            for child in multiprocessing.active_children():
                with contextlib.suppress(ProcessLookupError):
                    os.kill(child.pid, signal.SIGINT)  # a stage checkpoints its last step, as on Ctrl-C
        raise Terminated("SIGTERM")

    old = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old)
