"""A sandboxed Python unit-test runner: one limited process per candidate.

**Caution -- this lowers risk, it is not a security boundary.** Model-written
code can do anything your user can do. The layers below make accidents and
casual reward hacking (infinite loops, memory or fork bombs, writing files,
reading secrets from the environment, exiting early with status 0) harmless
on a development machine; a determined attacker can get round them (ctypes
alone bypasses the Python-level layer). Run model-written code at scale in a
disposable container or VM with no credentials and no network.

Layers, from the outside in, for each candidate:

1. a fresh temporary working directory, removed afterwards;
2. a scrubbed environment built from scratch (no inherited variables, so no
   API keys), stdin closed, stdout/stderr captured and capped;
3. its own session and process group, killed (SIGKILL) at the wall-clock
   limit; when running as root, every process of its uid is killed too, which
   also catches processes that left the group;
4. resource limits set before exec (``resource.setrlimit``): CPU seconds,
   address space, file size, process count, no core dumps;
5. when running as root: a fresh network namespace with no interfaces (when
   the kernel allows it), then a drop to an unprivileged uid of its own
   (a per-worker uid in a high range, so ``max_processes`` counts only this
   candidate's processes and it cannot signal or read its neighbours) with
   ``no_new_privs`` set. RLIMIT_NPROC is not enforced for root, so without
   this drop the process limit would not bite. Not as root, the process limit
   counts all of your user's processes and is set to the current count +
   ``max_processes`` -- a loose bound;
6. inside the interpreter, an audit hook (PEP 578) refusing writes outside
   the working directory, network use, signals to other processes and
   process creation beyond ``max_processes``;
7. a result record on a private pipe tagged with a per-run nonce: a candidate
   that exits early (even with status 0) does not pass.
"""
from __future__ import annotations

import ctypes
import json
import math
import numbers
import os
import re
import resource
import secrets
import selectors
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from queue import Queue
from typing import Any, Mapping, Sequence

import numpy as np

from ._procs import kill_by_cwd, kill_uid, pids_of, user_tasks
from .base import Verdicts
from .scoring import check_batch

STATUSES = ("pass", "fail", "timeout", "crashed", "limit-exceeded", "refused")
_UID_BASE = 1_000_000_000  # sandbox uids: _UID_BASE + 1000 * (random run id) + worker slot
_CHILD_SOURCE = os.path.join(os.path.dirname(os.path.abspath(__file__)), "_sandbox_child.py")
_CLONE_NEWNET = 0x40000000
_PR_SET_PDEATHSIG, _PR_SET_NO_NEW_PRIVS = 1, 38
_FENCE = re.compile(r"```[ \t]*(?:python|py|python3)?[ \t]*\n(.*?)```", re.DOTALL | re.IGNORECASE)


@dataclass(frozen=True)
class RunResult:
    """What happened to one candidate.

    status: one of ``pass, fail, timeout, crashed, limit-exceeded, refused``.
    reason: e.g. ``"AssertionError: ..."``, ``"killed by SIGSEGV"``,
            ``"wall time 2 s"``, ``"MemoryError (memory limit)"``; None on pass.
    stdout, stderr: captured output, each cut at ``max_output_bytes``.
    """

    status: str
    reason: str | None
    returncode: int | None
    stdout: str
    stderr: str
    wall_s: float

    @property
    def passed(self) -> bool:
        return self.status == "pass"


def extract_code(text: str) -> str:
    """The last fenced code block (```` ```python ... ``` ````) in ``text``, or the whole text."""
    blocks = _FENCE.findall(text)
    return blocks[-1] if blocks else text


def _real(name: str, value: Any, *, minimum: float) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number, got {type(value).__name__} {value!r}")
    if not (math.isfinite(value) and value >= minimum):
        raise ValueError(f"{name} must be a finite number >= {minimum:g}, got {name}={value}")
    return float(value)


def _int(name: str, value: Any, *, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int, got {type(value).__name__} {value!r}")
    if not lo <= value <= hi:
        raise ValueError(f"{name} must be in [{lo}, {hi}], got {name}={value}")
    return int(value)


class CodeRunner:
    """Run each response as a Python solution against the prompt's unit tests.

    ``prompts, responses: (N,) -> Verdicts(scores (N,) 1.0 = all tests pass, rewards = scores)``.

    tests:            prompt -> test code (plain Python using ``assert``), run
                      after the solution in the same namespace. The tests pass
                      when they run to the end; an exit (even status 0), an
                      exception or a limit hit before that is not a pass.
    wall_time:        seconds of wall clock per candidate (then SIGKILL -> ``timeout``).
    cpu_time:         CPU seconds (RLIMIT_CPU; SIGXCPU -> ``limit-exceeded``);
                      default ``wall_time + 1`` so that a busy loop reads as a timeout.
    memory_mb:        address-space limit (RLIMIT_AS); MemoryError -> ``limit-exceeded``.
    file_size_mb:     largest file it may write (RLIMIT_FSIZE).
    max_processes:    processes (and threads) it may have, itself included (RLIMIT_NPROC + audit hook).
    max_output_bytes: stdout and stderr are each cut here; more -> killed, ``limit-exceeded``.
    workers:          candidates run in parallel (threads driving subprocesses).
    python:           interpreter for the candidates. Default: this one, or when
                      running as root one that the unprivileged sandbox uid can
                      execute (e.g. ``/usr/bin/python3`` when this one lives
                      under ``/root``), found by trying them.
    isolate_network:  as root, give each candidate an empty network namespace.
    code_from_fence:  use the last fenced code block of a response when it has one.

    :meth:`run` returns a :class:`RunResult` per candidate (status, reason,
    output). Candidate outcomes are scores, not verifier failures:
    ``Verdicts.failed`` is set only when the runner itself could not run a
    candidate (e.g. the interpreter could not start).

    See the module docstring for the layers and their limits: this is **not**
    a security boundary; run model-written code in a disposable container or VM.
    """

    def __init__(self, tests: Mapping[str, str], *, wall_time: float = 5.0, cpu_time: float | None = None,
                 memory_mb: int = 512, file_size_mb: int = 16, max_processes: int = 8,
                 max_output_bytes: int = 65536, workers: int | None = None, python: str | None = None,
                 isolate_network: bool = True, code_from_fence: bool = True) -> None:
        if not isinstance(tests, Mapping):
            raise TypeError(f"tests must be a mapping prompt -> test code, got {type(tests).__name__}")
        for p, code in tests.items():
            if not isinstance(p, str) or not isinstance(code, str):
                raise TypeError(f"tests must map str prompts to str test code, got {type(p).__name__} -> {type(code).__name__}")
            try:
                compile(code, "tests.py", "exec")
            except SyntaxError as e:
                raise ValueError(f"tests[{p!r:.40}] must be valid Python, got a SyntaxError at line {e.lineno}: {e.msg}") from None
        self.tests = dict(tests)
        self.wall_time = _real("wall_time", wall_time, minimum=0.1)
        self.cpu_time = self.wall_time + 1 if cpu_time is None else _real("cpu_time", cpu_time, minimum=1)
        self.memory_mb = _int("memory_mb", memory_mb, lo=32, hi=1 << 20)
        self.file_size_mb = _int("file_size_mb", file_size_mb, lo=0, hi=1 << 20)
        self.max_processes = _int("max_processes", max_processes, lo=1, hi=4096)
        self.max_output_bytes = _int("max_output_bytes", max_output_bytes, lo=1, hi=1 << 30)
        self.workers = min(4, os.cpu_count() or 1) if workers is None else _int("workers", workers, lo=1, hi=999)
        if python is not None and not isinstance(python, str):
            raise TypeError(f"python must be None or a path to an interpreter, got {type(python).__name__}")
        self.python = python
        self.isolate_network = bool(isolate_network)
        self.code_from_fence = bool(code_from_fence)
        self._root = os.geteuid() == 0
        self._uid0 = _UID_BASE + 1000 * secrets.randbelow(1_000_000)
        self._lock = threading.Lock()
        self._chosen_python: str | None = None
        with open(_CHILD_SOURCE, encoding="utf-8") as f:
            self._boot = f.read()
        try:
            self._libc = ctypes.CDLL(None, use_errno=True)
        except OSError:  # pragma: no cover - non-glibc platforms
            self._libc = None

    # -- public -----------------------------------------------------------------------------
    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        results = self.run(prompts, responses)
        scores = np.array([float(r.passed) for r in results])
        infra = [r.status == "crashed" and (r.reason or "").startswith("runner:") for r in results]
        reasons = [r.reason if bad else None for r, bad in zip(results, infra)]
        return Verdicts(scores=scores, rewards=scores.copy(), failed=np.array(infra, dtype=bool), reasons=reasons)

    def run(self, prompts: Sequence[str], responses: Sequence[str], *, progress: bool = False) -> list[RunResult]:
        """Run every candidate; ``(N,) prompts, responses -> N RunResult``, in input order."""
        prompts, responses = check_batch(prompts, responses)
        missing = [p for p in prompts if p not in self.tests]
        if missing:
            raise ValueError(f"prompts must all have tests; {len(missing)} do not, e.g. {missing[0]!r:.60}")
        jobs = [(extract_code(r) if self.code_from_fence else r, self.tests[p]) for p, r in zip(prompts, responses)]
        return self.run_code(jobs, progress=progress)

    def run_code(self, jobs: Sequence[tuple[str, str]], *, progress: bool = False) -> list[RunResult]:
        """Run ``(solution, tests)`` source pairs directly (no prompt lookup)."""
        python = self._interpreter()
        slots: Queue[int] = Queue()
        for s in range(self.workers):
            slots.put(s)

        def task(job: tuple[str, str]) -> RunResult:
            slot = slots.get()
            try:
                return self._run_one(job[0], job[1], slot, python)
            finally:
                slots.put(slot)

        with ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="bonft-sandbox") as pool:
            futures = [pool.submit(task, j) for j in jobs]
            if progress:
                from tqdm.auto import tqdm

                for _ in tqdm(futures, desc="running candidates", unit="cand"):
                    _.result()
            return [f.result() for f in futures]

    # -- one candidate ----------------------------------------------------------------------
    def _uid(self, slot: int) -> int | None:
        return self._uid0 + slot if self._root else None

    def _preexec(self, uid: int | None):
        limits = [
            (resource.RLIMIT_CPU, (math.ceil(self.cpu_time), math.ceil(self.cpu_time) + 1)),
            (resource.RLIMIT_AS, (self.memory_mb << 20,) * 2),
            (resource.RLIMIT_FSIZE, (self.file_size_mb << 20,) * 2),
            (resource.RLIMIT_CORE, (0, 0)),
        ]
        nproc = self.max_processes if uid is not None else user_tasks(os.getuid()) + self.max_processes
        soft, hard = resource.getrlimit(resource.RLIMIT_NPROC)
        if uid is None and hard != resource.RLIM_INFINITY:
            nproc = min(nproc, hard)
        limits.append((resource.RLIMIT_NPROC, (nproc, nproc)))
        libc, netns = self._libc, self.isolate_network and uid is not None

        def fn() -> None:  # runs in the child between fork and exec: no imports, no locks
            for res, val in limits:
                resource.setrlimit(res, val)
            if libc is not None:
                libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
                if netns:
                    libc.unshare(_CLONE_NEWNET)  # best effort: fails quietly where not allowed
            if uid is not None:
                os.setgroups([])
                os.setgid(uid)
                os.setuid(uid)
            if libc is not None:
                libc.prctl(_PR_SET_NO_NEW_PRIVS, 1, 0, 0, 0)

        return fn

    def _env(self, workdir: str) -> dict[str, str]:
        # built from scratch: nothing of the parent's environment is inherited
        return {
            "PATH": "/usr/local/bin:/usr/bin:/bin", "HOME": workdir, "TMPDIR": workdir,
            "LANG": "C.UTF-8", "LC_ALL": "C.UTF-8", "PYTHONHASHSEED": "0",
            "PYTHONDONTWRITEBYTECODE": "1", "PYTHONNOUSERSITE": "1", "PYTHONIOENCODING": "utf-8",
        }

    def _kill(self, proc: subprocess.Popen, uid: int | None, workdir: str) -> None:
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        if uid is not None:
            # kill(-1) as the sandbox uid reaches every process of that uid, even ones
            # that left the process group; repeat until none is left (bounded)
            for _ in range(50):
                if not pids_of(uid):
                    break
                kill_uid(uid)
                time.sleep(0.01)
        else:
            kill_by_cwd(workdir)

    def _spawn(self, python: str, workdir: str, uid: int | None, cfg_r: int, res_w: int) -> subprocess.Popen:
        return subprocess.Popen(
            [python, "-s", "-B", "-c", self._boot, str(cfg_r), str(res_w)],
            cwd=workdir, env=self._env(workdir), stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, pass_fds=(cfg_r, res_w),
            start_new_session=True, preexec_fn=self._preexec(uid),
        )

    def _run_one(self, solution: str, tests: str, slot: int, python: str) -> RunResult:
        uid = self._uid(slot)
        workdir = tempfile.mkdtemp(prefix="bonft-sandbox-")
        nonce = secrets.token_hex(16)
        t0 = time.monotonic()
        try:
            if uid is not None:
                os.chown(workdir, uid, uid)
            cfg_r, cfg_w = os.pipe()
            res_r, res_w = os.pipe()
            try:
                proc = self._spawn(python, workdir, uid, cfg_r, res_w)
            except OSError as e:
                for fd in (cfg_r, cfg_w, res_r, res_w):
                    os.close(fd)
                return RunResult("crashed", f"runner: could not start {python}: {e}", None, "", "", 0.0)
            os.close(cfg_r)
            os.close(res_w)
            try:
                with os.fdopen(cfg_w, "wb") as f:
                    f.write(json.dumps({"nonce": nonce, "solution": solution, "tests": tests,
                                        "max_processes": self.max_processes}).encode("utf-8"))
            except OSError:
                pass  # the child died before reading: its exit status tells why
            out, timed_out, over = self._collect(proc, res_r, t0)
            self._kill(proc, uid, workdir)
            rc = proc.wait()
            os.close(res_r)
        finally:
            shutil.rmtree(workdir, ignore_errors=True)
        wall = time.monotonic() - t0
        stdout = out["stdout"].decode("utf-8", "replace")
        stderr = out["stderr"].decode("utf-8", "replace")
        status, reason = self._classify(out["result"], nonce, rc, timed_out, over)
        return RunResult(status, reason, rc, stdout, stderr, wall)

    def _collect(self, proc: subprocess.Popen, res_r: int, t0: float) -> tuple[dict[str, bytes], bool, str | None]:
        """Read stdout, stderr and the result pipe until EOF, the deadline or the output cap."""
        cap = self.max_output_bytes
        bufs = {"stdout": bytearray(), "stderr": bytearray(), "result": bytearray()}
        sel = selectors.DefaultSelector()
        sel.register(proc.stdout.fileno(), selectors.EVENT_READ, "stdout")
        sel.register(proc.stderr.fileno(), selectors.EVENT_READ, "stderr")
        sel.register(res_r, selectors.EVENT_READ, "result")
        deadline = t0 + self.wall_time
        timed_out, over, exited_at = False, None, None
        open_fds = 3
        while open_fds:
            now = time.monotonic()
            if now >= deadline:
                timed_out = True
                break
            if exited_at is None and proc.poll() is not None:
                exited_at = now
            if exited_at is not None and now - exited_at > 0.2:
                break  # the candidate exited; leftover processes hold the pipes
            for key, _ in sel.select(timeout=min(0.05, deadline - now)):
                chunk = os.read(key.fd, 65536)
                if not chunk:
                    sel.unregister(key.fd)
                    open_fds -= 1
                    continue
                buf = bufs[key.data]
                room = (cap if key.data != "result" else 65536) - len(buf)
                buf += chunk[:max(room, 0)]
                if len(chunk) > room and key.data != "result":
                    over = f"{key.data} over max_output_bytes={cap}"
            if over:
                break
        sel.close()
        proc.stdout.close()
        proc.stderr.close()
        return {k: bytes(v) for k, v in bufs.items()}, timed_out, over

    def _classify(self, record: bytes, nonce: str, rc: int, timed_out: bool, over: str | None) -> tuple[str, str | None]:
        if over:
            return "limit-exceeded", over
        for line in record.splitlines():
            try:
                rec = json.loads(line)
            except ValueError:
                continue
            if isinstance(rec, dict) and rec.get("nonce") == nonce and rec.get("status") in STATUSES:
                return rec["status"], rec.get("reason")
        if timed_out:
            return "timeout", f"wall time {self.wall_time:g} s"
        if rc < 0:
            name = signal.Signals(-rc).name if -rc in signal.valid_signals() else f"signal {-rc}"
            if name == "SIGXCPU":
                return "limit-exceeded", f"cpu time limit {math.ceil(self.cpu_time)} s (SIGXCPU)"
            if name == "SIGXFSZ":
                return "limit-exceeded", f"file size limit {self.file_size_mb} MB (SIGXFSZ)"
            return "crashed", f"killed by {name}"
        return "crashed", f"exited with code {rc} before the tests finished"

    # -- interpreter ------------------------------------------------------------------------
    def _interpreter(self) -> str:
        with self._lock:
            if self._chosen_python is None:
                self._chosen_python = self._find_interpreter()
            return self._chosen_python

    def _find_interpreter(self) -> str:
        if self.python is not None:
            options = [self.python]
        elif not self._root:
            options = [sys.executable]
        else:
            options = [sys.executable, getattr(sys, "_base_executable", sys.executable),
                       "/usr/bin/python3", "/usr/local/bin/python3", "/bin/python3"]
        tried = []
        for py in dict.fromkeys(options):
            r = self.run_probe(py)
            if r is None:
                return py
            tried.append(f"{py}: {r}")
        raise ValueError("python must be an interpreter the sandbox user can run; tried " + "; ".join(tried))

    def run_probe(self, python: str) -> str | None:
        """Run a trivial candidate with ``python``; None if it passes, else why not."""
        old = self._chosen_python
        self._chosen_python = python
        try:
            r = self._run_one("x = 1", "assert x == 1", 0, python)
        finally:
            self._chosen_python = old
        return None if r.passed else f"{r.status} ({r.reason}; {r.stderr.strip()[-200:]})"
