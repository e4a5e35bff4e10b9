"""A pool of pre-started sandbox workers: one fork per process instead of an interpreter start.

**Caution -- a cheaper sandbox is not a safer one, and neither is a security
boundary.** The pool applies the layers of a one-at-a-time run
(:mod:`bonft.verifiers.sandbox.runner`) to every candidate; it does not add
any. Run model-written code at scale in a disposable container or VM with no
credentials and no network.

Each worker is a fresh interpreter (``python -c`` of a loader that runs ``zygote.py``, the
interpreter the runner chose, a scrubbed environment, as root when the caller
is) that has loaded what both bootstraps need and then splits in two: a
forker, which per job forks the tests' process and the candidate's (in a PID
namespace of its own as root, through its init) with the same layers, limits
and uids as a one-at-a-time run, and a supervisor, which reads the jobs,
feeds the two processes, reads their output and verdict and writes the
result, and never forks. The forker never holds a solution, tests, output or
verdict, so no candidate forked from it can find another candidate's code or
tests in its memory. A candidate costs three processes (tests, init,
candidate). Worker ``k`` runs one candidate at a time under uids of its own
(``uid0 + 2k``, tests ``+ 1``).

The parent streams jobs to idle workers over their control pipes and reads
result frames (the wire protocol of ``wire.py``: length-prefixed JSON, no
pickle) from their result pipes. A worker that dies, or sends something that
is not a result frame, gives its in-flight candidate a ``crashed`` verdict
whose reason starts with ``runner:`` and names the cause; a fresh worker takes
its place and the batch goes on.
"""
from __future__ import annotations

import json
import os
import secrets
import select
import signal
import subprocess
import tempfile
import threading
import time
from collections import deque
from glob import glob
from typing import Sequence

from bonft.verifiers.sandbox.oslayer import LAYER_NAMES, env
from bonft.verifiers.sandbox.outcome import frame
from bonft.verifiers.sandbox.procs import remove_tree

_HERE = os.path.dirname(os.path.abspath(__file__))
_UID_BASE = 1_500_000_000  # pool uids: _UID_BASE + 2000 * (random pool id) + 2 * worker (+ 1: tests)
_RESULT_CAP = 64 << 20
_PRELUDE = "import sys\nif sys.path and sys.path[0] in ('', '.'):\n    del sys.path[0]\n"
# The worker's ``-c`` text: it compiles zygote.py in a throwaway child and runs the code objects that
# child sends back (marshal), and so do the modules and bootstraps zygote.py loads (``_compiled``):
# the parser's scratch memory, which the allocator keeps after a compile (about 1 MB for zygote.py
# alone), never enters the process that every candidate is forked from.
_COMPILED = """import marshal
import os


def _compiled(sources):
    \"\"\"The code objects of ``sources`` ((text, filename) pairs), compiled in a child of this process.\"\"\"
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:
        try:
            os.close(r)
            view = memoryview(marshal.dumps([compile(text, name, "exec") for text, name in sources]))
            while view:
                view = view[os.write(w, view):]
        finally:
            os._exit(0)
    os.close(w)
    parts = []
    while True:
        chunk = os.read(r, 1 << 16)
        if not chunk:
            break
        parts.append(chunk)
    os.close(r)
    os.waitpid(pid, 0)
    if not parts:  # the child failed: compile here, to raise its error
        return [compile(text, name, "exec") for text, name in sources]
    return marshal.loads(b"".join(parts))
"""
_LOADER = _COMPILED + """

with open(os.path.join(sys.argv[1], "zygote.py"), encoding="utf-8") as _f:
    _zygote = _compiled([(_f.read(), "<string>")])[0]
del _f
exec(_zygote)
"""


def _cause(rc: int | None) -> str:
    if rc is None:
        return "no exit status"
    if rc < 0:
        try:
            return f"killed by {signal.Signals(-rc).name}"
        except ValueError:
            return f"killed by signal {-rc}"
    return f"exit status {rc}"


class _Worker:
    def __init__(self, slot: int) -> None:
        self.slot = slot
        self.proc: subprocess.Popen | None = None
        self.ctl = self.res = -1
        self.inbuf = bytearray()
        self.outbuf = b""
        self.job: int | None = None  # index into the batch
        self.since = 0.0  # when the job in flight was sent
        self.seq = 0
        self.pid = 0
        self.layers = ""


class SandboxPool:
    """Pre-started workers that fork one sandboxed candidate (and its tests' process) per job.

    Built by :class:`~bonft.verifiers.sandbox.runner.CodeRunner` with ``pool=True`` from its
    own options; :meth:`run` takes ``(solution, tests)`` pairs and returns one result dict
    per pair (the fields of ``RunResult``), in input order. :meth:`floor` runs the same
    isolation for ``n`` processes that do nothing (the cost floor).

    ``layers`` names the OS layers that took effect for the workers' candidates (as
    ``RunResult.os_layers``), ``missing_layers`` those that could not (without root: all
    but ``no-userns``; the pool then protects no better than a one-at-a-time run without root).
    """

    def __init__(self, *, workers: int, python: str, config: dict, root: bool) -> None:
        self.python = python
        self.root = root
        self.uid0 = _UID_BASE + 2000 * secrets.randbelow(200_000) if root else None
        self.config = dict(config)
        # a job's own limit is wall_time (then kill, reap, remove two directories): this much later
        # the worker is taken for stuck, killed and replaced
        self._patience = float(config.get("wall_time", 5.0)) * 2 + 60.0
        self._workers = [_Worker(s) for s in range(workers)]
        self._lock = threading.Lock()
        self._seq = 0
        self.layers: tuple[str, ...] = ()
        self.restarts = 0
        self._closed = False
        try:
            for w in self._workers:
                self._start(w)
        except BaseException:
            self.close()
            raise
        self.layers = tuple(LAYER_NAMES[c] for c in self._workers[0].layers if c in LAYER_NAMES)
        self.missing_layers = tuple(n for n in LAYER_NAMES.values() if n not in self.layers)

    # -- workers ------------------------------------------------------------------------------
    def uids(self) -> set[int]:
        """The uids of the pool's candidates and tests' processes (empty when not root)."""
        if self.uid0 is None:
            return set()
        return {self.uid0 + 2 * w.slot + k for w in self._workers for k in (0, 1)}

    def worker_pids(self) -> list[int]:
        return [w.pid for w in self._workers if w.proc is not None]

    def _start(self, w: _Worker) -> None:
        ctl_r, ctl_w = os.pipe()
        res_r, res_w = os.pipe()
        cuid = None if self.uid0 is None else self.uid0 + 2 * w.slot
        cfg = dict(self.config, root=self.root, cuid=cuid, juid=None if cuid is None else cuid + 1,
                   tmp=tempfile.gettempdir())
        boot = _PRELUDE + _LOADER
        scrubbed = env(tempfile.gettempdir())
        try:
            proc = subprocess.Popen(
                [self.python, "-s", "-B", "-c", boot, _HERE, str(ctl_r), str(res_w)], cwd="/", env=scrubbed,
                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, pass_fds=(ctl_r, res_w), start_new_session=True)
        finally:
            os.close(ctl_r)
            os.close(res_w)
        w.proc, w.ctl, w.res, w.inbuf, w.outbuf, w.job = proc, ctl_w, res_r, bytearray(), b"", None
        data = json.dumps(cfg).encode("utf-8")
        os.write(ctl_w, b"%d\n" % len(data) + data)
        ready = self._read_frame(w, time.monotonic() + 60.0)
        if ready is None or ready.get("ready") is not True:
            rc = proc.poll()
            self._stop(w)
            raise OSError(f"sandbox pool worker {w.slot} did not start ({_cause(rc) if rc is not None else 'no answer'})")
        w.pid, w.layers = int(ready["pid"]), str(ready.get("layers", ""))
        os.set_blocking(w.ctl, False)
        os.set_blocking(w.res, False)

    def _read_frame(self, w: _Worker, deadline: float) -> dict | None:
        """Blocking read of one frame during start-up (None at EOF or the deadline)."""
        while time.monotonic() < deadline:
            msg, rest = _split(w.inbuf)
            if msg is not None:
                w.inbuf = rest
                return msg
            r, _, _ = select.select([w.res], [], [], max(0.0, deadline - time.monotonic()))
            if r:
                chunk = os.read(w.res, 1 << 16)
                if not chunk:
                    return None
                w.inbuf += chunk
        return None

    def _stop(self, w: _Worker, kill: bool = True) -> int | None:
        for fd in (w.ctl, w.res):
            if fd >= 0:
                try:
                    os.close(fd)
                except OSError:
                    pass
        w.ctl = w.res = -1
        rc = None
        if w.proc is not None:
            if kill:
                try:
                    os.killpg(w.proc.pid, signal.SIGKILL)  # the worker and its supervisor
                except (ProcessLookupError, PermissionError):
                    pass
            try:
                rc = w.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                rc = None
            w.proc = None
        self._sweep(w.pid)
        return rc

    @staticmethod
    def _sweep(pid: int) -> None:
        """Directories a dead worker left (named after its pid)."""
        if not pid:
            return
        base = tempfile.gettempdir()
        for _ in range(20):  # the dead worker's children die by their parent-death signal: a moment
            left = glob(os.path.join(base, f"bonft-sandbox-{pid}.*")) + glob(os.path.join(base, f"bonft-tests-{pid}.*"))
            for d in left:
                try:
                    remove_tree(d)
                except OSError:
                    pass
            if not any(os.path.lexists(d) for d in left):
                return
            time.sleep(0.05)

    def close(self) -> None:
        """Stop every worker (idempotent)."""
        self._closed = True
        for w in self._workers:
            if w.proc is not None:
                try:
                    os.set_blocking(w.ctl, True)
                    os.write(w.ctl, b"quit\n")
                except OSError:
                    pass
                self._stop(w)

    def __del__(self) -> None:  # pragma: no cover - best effort at interpreter exit
        try:
            self.close()
        except Exception:
            pass

    # -- batches ------------------------------------------------------------------------------
    def run(self, jobs: Sequence[tuple[str, str]]) -> list[dict]:
        """One result dict per ``(solution, tests)`` pair, in input order."""
        payloads = [json.dumps({"solution": s, "tests": t}).encode("utf-8") for s, t in jobs]
        return self._batch([("run", p) for p in payloads])

    def floor(self, n: int) -> list[dict]:
        """``n`` processes with the candidate's isolation that do nothing, each one fork of a worker:
        ``[{"layers": "...", ...}]``."""
        return self._batch([("bare", b"")] * n)

    def _batch(self, items: list[tuple[str, bytes]]) -> list[dict]:
        with self._lock:
            if self._closed:
                raise RuntimeError("the sandbox pool is closed")
            results: list[dict | None] = [None] * len(items)
            todo = deque(range(len(items)))
            while todo or any(w.job is not None for w in self._workers):
                for w in self._workers:
                    if w.job is None and todo and w.proc is not None:
                        i = todo.popleft()
                        mode, payload = items[i]
                        self._seq += 1
                        w.seq, w.job, w.since = self._seq, i, time.monotonic()
                        head = b"run %d %d\n" % (w.seq, len(payload)) if mode == "run" else b"bare %d\n" % w.seq
                        w.outbuf = head + payload
                        self._push(w)
                if not any(w.job is not None for w in self._workers):
                    for i in todo:  # no worker left to run them
                        results[i] = _infra("runner: no sandbox pool worker could be started")
                    break
                self._wait(results, todo)
            return results  # type: ignore[return-value]

    def _push(self, w: _Worker) -> None:
        while w.outbuf:
            try:
                n = os.write(w.ctl, w.outbuf)
            except BlockingIOError:
                return
            except OSError:  # the worker is gone: its result pipe will say so
                w.outbuf = b""
                return
            w.outbuf = w.outbuf[n:]

    def _wait(self, results: list, todo: deque) -> None:
        busy = [w for w in self._workers if w.job is not None]
        poller, by_fd = select.poll(), {}  # poll(2): registering costs no system call
        for w in busy:
            poller.register(w.res, select.POLLIN)
            by_fd[w.res] = (w, False)
            if w.outbuf:
                poller.register(w.ctl, select.POLLOUT)
                by_fd[w.ctl] = (w, True)
        ready = poller.poll(1000)
        late = time.monotonic() - self._patience
        for w in busy:  # a job ends by itself soon after wall_time: a worker whose job does not is stuck
            if w.job is not None and w.since < late and w.proc is not None:
                self._died(w, results, f"no result {self._patience:g} s after the job was sent")
        for fd, _ in ready:
            w, writing = by_fd[fd]
            if w.job is None or w.proc is None:
                continue
            if writing:
                self._push(w)
                continue
            try:
                chunk = os.read(w.res, 1 << 16)
            except BlockingIOError:
                continue
            if not chunk:
                self._died(w, results, None)
                continue
            w.inbuf += chunk
            if len(w.inbuf) > _RESULT_CAP + 16:
                self._died(w, results, f"a result frame over {_RESULT_CAP} bytes")
                continue
            while True:
                try:
                    msg, rest = _split(w.inbuf)
                except ValueError as e:
                    self._died(w, results, f"a broken result frame ({e})")
                    break
                if msg is None:
                    break
                w.inbuf = rest
                if w.job is not None and msg.get("job") == w.seq:
                    results[w.job] = _result(msg)
                    w.job = None
                # a frame for no job in flight (a supervisor's duplicate): dropped
                if msg.get("worker_exits") is True:  # it may have lost its place in the job stream
                    if w.job is not None:  # sent after the worker had stopped reading: it never ran
                        todo.appendleft(w.job)
                        w.job = None
                    self._died(w, results, "it stopped after a supervisor's death")
                    break

    def _died(self, w: _Worker, results: list, why: str | None) -> None:
        """The worker ended or broke the protocol: its in-flight candidate gets a verdict naming the
        cause; a fresh worker takes its place (if one can start)."""
        rc = self._stop(w)
        cause = why or f"it ended ({_cause(rc)})"
        if w.job is not None:
            results[w.job] = _infra(f"runner: sandbox pool worker {w.slot} failed while running this candidate: {cause}")
            w.job = None
        if self._closed:
            return
        self.restarts += 1
        try:
            self._start(w)
        except OSError:
            w.proc = None


def _split(buf: bytearray) -> tuple[dict | None, bytearray]:
    """The first complete frame of ``buf`` and the rest; (None, buf) when incomplete. ValueError
    when ``buf`` does not start with a frame."""
    head, sep, _ = bytes(buf[:16]).partition(b"\n")
    if not sep:
        if len(buf) > 12 or not bytes(buf).isdigit() and buf:
            raise ValueError("bad frame header %r" % bytes(buf[:16]))
        return None, buf
    if not head.isdigit():
        raise ValueError("bad frame header %r" % head)
    n = int(head)
    start = len(head) + 1
    if len(buf) < start + n:
        return None, buf
    msg = frame(bytes(buf[:start + n]))
    if msg is None:
        raise ValueError("a frame that is not a JSON object")
    return msg, buf[start + n:]


def _infra(reason: str) -> dict:
    return {"status": "crashed", "reason": reason, "returncode": None, "stdout": "", "stderr": "", "wall_s": 0.0,
            "os_layers": []}


def _result(msg: dict) -> dict:
    if "layers" in msg and "status" not in msg:  # a floor job
        return {"layers": msg["layers"]}
    out = _infra("runner: the pool worker sent a result without a status")
    for k in out:
        if k in msg:
            out[k] = msg[k]
    return out

