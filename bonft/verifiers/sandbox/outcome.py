"""Reading a run's outcome: the output of both processes, the verdict frame, and the status.

Helpers of :mod:`bonft.verifiers.sandbox.runner` (Linux): the tests' process writes
length-prefixed JSON frames (``wire.py``) on a pipe only it and the runner
hold; the candidate's exit status is read only when the tests' process says
the candidate is gone.
"""
from __future__ import annotations

import json
import math
import os
import select
import signal
import time

STATUSES = ("pass", "fail", "timeout", "crashed", "limit-exceeded", "refused")


def frame(buf: bytes) -> dict | None:
    """The first complete frame in ``buf`` (the trusted tests' process wrote it), or None."""
    head, sep, rest = buf.partition(b"\n")
    if not sep or not head.isdigit() or len(rest) < int(head):
        return None
    try:
        msg = json.loads(rest[:int(head)])
    except ValueError:
        return None
    return msg if isinstance(msg, dict) else None


def await_start(ver_r: int, deadline: float) -> bool:
    """Wait for the tests' process to say it is running (and non-dumpable) before the candidate starts."""
    buf = b""
    while time.monotonic() < deadline:
        r, _, _ = select.select([ver_r], [], [], 0.05)
        if r:
            chunk = os.read(ver_r, 1)
            if not chunk:
                return False
            buf += chunk
            msg = frame(buf)
            if msg is not None:
                return msg.get("started") is True
    return False


def collect(judge, cand, ver_r: int, *, deadline: float, cap: int, frame_cap: int, on_candidate_exit):
    """Read both processes' output and the verdict until the verdict, the deadline or the output cap.

    ``on_candidate_exit()`` runs once when the candidate's process has exited 0.2 s ago without a
    verdict (its leftovers may hold the reply pipe open). Returns (outputs, verdict, timed_out, over).
    """
    streams = {judge.stdout.fileno(): "j_out", judge.stderr.fileno(): "j_err",
               cand.stdout.fileno(): "c_out", cand.stderr.fileno(): "c_err", ver_r: "verdict"}
    bufs = {name: bytearray() for name in streams.values()}
    poller = select.poll()  # poll(2): no descriptor of its own and no system call per registration
    for fd in streams:
        poller.register(fd, select.POLLIN)
    live = set(streams)
    timed_out, over, verdict, done_at, cand_exit, called = False, None, None, None, None, False
    while live:
        now = time.monotonic()
        if now >= deadline:
            timed_out = verdict is None
            break
        if done_at is not None and now - done_at > 0.1:
            break  # the verdict is in; leftover processes may hold the output pipes
        if cand_exit is None and cand.poll() is not None:
            cand_exit = now
        if verdict is None and cand_exit is not None and now - cand_exit > 0.2 and not called:
            on_candidate_exit()
            called = True
        for fd, _ in poller.poll(math.ceil(min(0.05, deadline - now) * 1000)):
            name = streams[fd]
            chunk = os.read(fd, 65536)
            if not chunk:
                poller.unregister(fd)
                live.discard(fd)
                if name == "verdict" and done_at is None:
                    done_at = time.monotonic()
                continue
            buf = bufs[name]
            room = (frame_cap if name == "verdict" else cap) - len(buf)
            buf += chunk[:max(room, 0)]
            if len(chunk) > room and name != "verdict":
                over = f"{'stdout' if name.endswith('out') else 'stderr'} over max_output_bytes={cap}"
            if name == "verdict" and verdict is None:
                verdict = frame(bytes(buf))
                if verdict is not None:
                    done_at = time.monotonic()
        if over:
            break
    for p in (judge, cand):
        p.stdout.close()
        p.stderr.close()
    return {k: bytes(v) for k, v in bufs.items() if k != "verdict"}, verdict or {}, timed_out, over


def classify(verdict: dict, rc: int | None, judge_rc: int | None, *, timed_out: bool, over: str | None,
             wall_time: float, cpu_time: float, file_size_mb: int) -> tuple[str, str | None]:
    """(status, reason): the output cap, then the tests' verdict, then the clock, then exit statuses.

    ``pass`` needs all three: the tests' verdict ``pass`` (they ran to their end), the candidate's
    process ended with status 0 after its last reply, and the tests' process with status 0."""
    if over:
        return "limit-exceeded", over
    status, reason = verdict.get("status"), verdict.get("reason")
    if status == "pass" and rc != 0:  # a pass needs the candidate's process to end normally after its last reply
        if rc == -signal.SIGKILL:
            return "crashed", "the solution's process did not end after its last reply (killed)"
        return "crashed", _ended(rc, cpu_time, file_size_mb)[1] + " after its last reply"
    if status == "pass" and judge_rc != 0:
        return "crashed", f"the tests' process ended with exit status {judge_rc} after its verdict"
    if status in STATUSES:
        return status, reason
    if timed_out:
        return "timeout", f"wall time {wall_time:g} s"
    if status != "gone":
        return "crashed", f"the tests' process ended without a verdict (exit status {judge_rc})"
    if rc is not None and rc < 0:
        return _ended(rc, cpu_time, file_size_mb)
    return "crashed", f"exited with code {rc} before the tests finished"


def _ended(rc: int, cpu_time: float, file_size_mb: int) -> tuple[str, str]:
    """(status, reason) for a candidate's process that ended with exit status ``rc``."""
    if rc is None or rc >= 0:
        return "crashed", f"exited with code {rc}"
    name = signal.Signals(-rc).name if -rc in signal.valid_signals() else f"signal {-rc}"
    if name == "SIGXCPU":
        return "limit-exceeded", f"cpu time limit {math.ceil(cpu_time)} s (SIGXCPU)"
    if name == "SIGXFSZ":
        return "limit-exceeded", f"file size limit {file_size_mb} MB (SIGXFSZ)"
    return "crashed", f"killed by {name}"
