"""A sandboxed Python unit-test runner: two processes per candidate, the verdict in the trusted one.

**Caution -- this lowers risk, it is not a security boundary.** Model-written
code runs with real system calls; ctypes alone bypasses the Python-level
layer. Run model-written code at scale in a disposable container or VM with
no credentials and no network. See docs/verifiers.md for what is enforced
and what is not.

The verdict. The candidate's code runs in its own sandboxed process only as a
callee. The tests run in a second, trusted process (under a uid of its own
as root; otherwise started first and made non-dumpable) that resolves the solution's names and
calls its functions over a pair of pipes (:mod:`bonft.verifiers.sandbox.wire`:
length-prefixed JSON, capped frames, a strict decoder, no pickle). A call's
result is converted to plain data in the candidate's process (exact built-in
types; anything else is ``fail``, ``unsupported return type: Z``) and rebuilt
as the trusted process's own ``int``, ``list``...; the solution's functions
and classes are references the tests can only call. No method or operator of
a candidate's object runs for the tests, and the solution's exceptions arrive
as one type, ``SolutionError``. The tests' ``assert`` statements are
evaluated there, and the verdict travels on a pipe only that process and this
runner hold. The candidate never sees the tests' text. An exit, crash or
protocol error of the candidate during the tests is sticky: never ``pass``;
and a ``pass`` also needs the candidate's process to end with status 0 after
its last reply.

The sandbox, from the outside in, for each candidate's process:

1. a fresh temporary working directory, removed afterwards without depth
   limits (:func:`~bonft.verifiers.sandbox.procs.remove_tree`); a removal that fails
   makes that candidate ``crashed`` (``clean-up failed: ...``), not the batch;
2. a scrubbed environment built from scratch (no inherited variables, so no
   API keys), stdin closed, stdout/stderr captured and capped;
3. its own session and process group, killed (SIGKILL) at the wall-clock
   limit; when running as root, every process of its uid is killed too, which
   also catches processes that left the group;
4. resource limits set before exec (``resource.setrlimit``): CPU seconds,
   address space, file size, process count, no core dumps;
5. when running as root: a private mount namespace in which /tmp, /var/tmp,
   /dev/shm and /run/lock are fresh tmpfs (gone with the run), a fresh PID
   namespace with its own /proc (every process the candidate left dies with
   it), a fresh IPC namespace (System V objects die with it), a fresh network
   namespace with no interfaces, then a drop to an unprivileged uid of its own
   (a per-worker uid in a high range) with ``no_new_privs``. RLIMIT_NPROC is
   not enforced for root, so without this drop the process limit would not
   bite. Not as root none of these exist (``RunResult.os_layers`` says which
   took effect) and the process limit counts all of your user's processes;
6. root or not, a seccomp filter refusing user namespaces (``no-userns``);
7. inside the interpreter, an audit hook (PEP 578) refusing writes outside
   the working directory, network use, signals to other processes and
   process creation beyond ``max_processes``.
"""
from __future__ import annotations

import ast
import ctypes
import json
import os
import re
import resource
import secrets
import signal
import subprocess
import sys
import tempfile
import threading
import time
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from queue import Queue
from typing import Any, Mapping, Sequence

import numpy as np

from bonft._core.checks import check_int, check_real
from bonft.verifiers.base import Verdicts
from bonft.verifiers.sandbox.oslayer import LAYER_NAMES, env, make_preexec, rlimits
from bonft.verifiers.sandbox.outcome import STATUSES, await_start, classify, collect  # noqa: F401 - STATUSES is public here
from bonft.verifiers.sandbox.pool import SandboxPool
from bonft.verifiers.sandbox.procs import kill_by_cwd, kill_uid, pids_of, remove_tree, user_tasks
from bonft.verifiers.scoring import check_batch

_UID_BASE = 1_000_000_000  # sandbox uids: _UID_BASE + 2000 * (random run id) + 2 * worker slot (+ 1: tests)
_HERE = os.path.dirname(os.path.abspath(__file__))
_FRAME_CAP = 4 << 20  # bytes of one message between the two processes
_FENCE = re.compile(r"```[ \t]*(?:python|py|python3)?[ \t]*\n(.*?)```", re.DOTALL | re.IGNORECASE)


@dataclass(frozen=True)
class RunResult:
    """What happened to one candidate.

    status: one of ``pass, fail, timeout, crashed, limit-exceeded, refused``.
    reason: e.g. ``"AssertionError: ..."``, ``"killed by SIGSEGV"``,
            ``"wall time 2 s"``, ``"MemoryError (memory limit)"``; None on pass.
    stdout, stderr: captured output, each cut at ``max_output_bytes`` (the
            candidate's, then the tests' process's: a failing assertion's traceback).
    os_layers: the OS layers that took effect for this run, from ``own-uid``,
            ``no-network``, ``private-tmp``, ``private-pids``, ``private-ipc``
            (all as root on Linux with namespaces; none otherwise -- then the
            candidate can write to the shared /tmp, use the network and leave
            System V objects, and only the audit hook objects) and
            ``no-userns`` (the seccomp filter; root or not, x86-64 and ARM64).
    """

    status: str
    reason: str | None
    returncode: int | None
    stdout: str
    stderr: str
    wall_s: float

    os_layers: tuple[str, ...] = ()

    @property
    def passed(self) -> bool:
        return self.status == "pass"


_PRELUDE = "import sys\nif sys.path and sys.path[0] in ('', '.'):\n    del sys.path[0]\n"


def _boot(name: str) -> str:
    """Bootstrap source: the working directory off ``sys.path`` before any import (nothing
    planted there is ever imported), then the wire protocol's text, then the named child file's."""
    with open(os.path.join(_HERE, "wire.py"), encoding="utf-8") as f:
        wire = f.read()
    with open(os.path.join(_HERE, name), encoding="utf-8") as f:
        return _PRELUDE + wire + "\n" + f.read()


def extract_code(text: str) -> str:
    """The last fenced code block (```` ```python ... ``` ````) in ``text``, or the whole text."""
    blocks = _FENCE.findall(text)
    return blocks[-1] if blocks else text


def _real(name: str, value: Any, *, minimum: float) -> float:
    return check_real(name, value, min=minimum)


def _int(name: str, value: Any, *, lo: int, hi: int) -> int:
    return check_int(name, value, min=lo, max=hi)


class UncheckedTestsWarning(UserWarning):
    """Unit tests that check nothing: no ``assert``, no ``raise`` and no call of an ``assert...`` or ``fail``
    function anywhere in their code, so they fail a candidate only when it raises or exits, and any
    solution that runs passes them (a forged reward a trained policy finds)."""


def _checks_something(tree: ast.AST) -> bool:
    """Does the tests' code hold a check: an ``assert`` or ``raise`` statement, or a call of a function named
    ``assert...`` or ``fail`` (unittest's and numpy.testing's spellings), anywhere, helpers' bodies included?"""
    for node in ast.walk(tree):
        if isinstance(node, (ast.Assert, ast.Raise)):
            return True
        if isinstance(node, ast.Call):
            f = node.func
            name = f.attr if isinstance(f, ast.Attribute) else f.id if isinstance(f, ast.Name) else ""
            if name.startswith("assert") or name == "fail":
                return True
    return False


def check_tests_code(code: str) -> bool:
    """Refuse test code that is not Python, or has no statement (blank or comments only: any code would pass it);
    return whether it checks anything (:class:`UncheckedTestsWarning`: tests with statements but no check).

    The ``ValueError`` message starts with ``must ...``, for the caller to put the prompt in front.
    """
    try:
        compile(code, "tests.py", "exec")  # the whole compiler: `return` outside a function is caught only here
        tree = ast.parse(code, "tests.py")
    except SyntaxError as e:
        raise ValueError(f"must be valid Python, got a SyntaxError at line {e.lineno}: {e.msg}") from None
    if not tree.body:
        raise ValueError("must hold at least one statement, got none (only blanks or comments): any code would pass "
                         "these tests; give the prompt asserts that call the solution")
    return _checks_something(tree)


class CodeRunner:
    """Run each response as a Python solution against the prompt's unit tests.

    ``prompts, responses: (N,) -> Verdicts(scores (N,) 1.0 = all tests pass, rewards = scores)``.

    tests:            prompt -> test code (plain Python using ``assert``). It runs
                      in a separate trusted process; the solution's names
                      (functions, classes, constants) resolve after builtins and
                      the tests' own names, and calls into them are forwarded to
                      the candidate's process, which must return plain data
                      (else ``unsupported return type: Z``); its exceptions
                      arrive as ``SolutionError`` (``e.type_name``,
                      ``e.message``). The tests pass when they run to the end
                      and the candidate's process then ends normally; an exit
                      (even status 0), an exception or a limit hit before that
                      is not a pass. Test code with no statement (blank or
                      comments only) is a ValueError: any code would pass it;
                      code with no check (no assert, raise, assert...() or
                      fail() call) gives an ``UncheckedTestsWarning``.
    wall_time:        seconds of wall clock per candidate (then SIGKILL -> ``timeout``).
    cpu_time:         CPU seconds (RLIMIT_CPU; SIGXCPU -> ``limit-exceeded``);
                      default ``wall_time + 1`` so that a busy loop reads as a timeout.
    memory_mb:        address-space limit (RLIMIT_AS); MemoryError -> ``limit-exceeded``.
    file_size_mb:     largest file it may write (RLIMIT_FSIZE).
    max_processes:    processes (and threads) it may have, itself included (RLIMIT_NPROC + audit hook).
    max_output_bytes: stdout and stderr are each cut here; more -> killed, ``limit-exceeded``.
    workers:          candidates run in parallel (threads driving subprocesses; with ``pool=True``
                      the pool's workers). Default min(4, cores), with ``pool=True`` min(8, 2 x cores).
    python:           interpreter for the candidates. Default: this one, or when
                      running as root one that the unprivileged sandbox uid can
                      execute (e.g. ``/usr/bin/python3`` when this one lives
                      under ``/root``), found by trying them; a UserWarning names it.
    isolate_network:  as root, give each candidate an empty network namespace.
    code_from_fence:  use the last fenced code block of a response when it has one.
    pool:             run candidates in a :class:`~bonft.verifiers.sandbox.pool.SandboxPool`:
                      ``workers`` pre-started processes that fork the two processes of each
                      candidate instead of starting two interpreters (the same layers, limits,
                      uids and verdicts; many times the throughput). Started at the first run,
                      stopped by :meth:`close` (or ``with CodeRunner(...) as runner``).

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
                 isolate_network: bool = True, code_from_fence: bool = True, pool: bool = False) -> None:
        if not isinstance(tests, Mapping):
            raise TypeError(f"tests must be a mapping prompt -> test code, got {type(tests).__name__}")
        unchecked = []
        for p, code in tests.items():
            if not isinstance(p, str) or not isinstance(code, str):
                raise TypeError(f"tests must map str prompts to str test code, got {type(p).__name__} -> {type(code).__name__}")
            try:
                if not check_tests_code(code):
                    unchecked.append(p)
            except ValueError as e:
                raise ValueError(f"tests[{p!r:.40}] {e}") from None
        if unchecked:
            warnings.warn(f"{len(unchecked)} of {len(tests)} prompts' tests check nothing (no assert, no raise, no "
                          f"assert...() or fail() call; the first: tests[{unchecked[0]!r:.40}]): they fail a candidate "
                          f"only when it raises or exits, so any solution that runs passes them; assert on the "
                          f"solution's results (bonft check-tests finds such tests)", UncheckedTestsWarning, stacklevel=2)
        self.tests = dict(tests)
        self.wall_time = _real("wall_time", wall_time, minimum=0.1)
        self.cpu_time = self.wall_time + 1 if cpu_time is None else _real("cpu_time", cpu_time, minimum=1)
        self.memory_mb = _int("memory_mb", memory_mb, lo=32, hi=1 << 20)
        self.file_size_mb = _int("file_size_mb", file_size_mb, lo=0, hi=1 << 20)
        self.max_processes = _int("max_processes", max_processes, lo=1, hi=4096)
        self.max_output_bytes = _int("max_output_bytes", max_output_bytes, lo=1, hi=1 << 30)
        if workers is None:  # a pool worker waits on pipes for part of each candidate: twice the cores keep them busy
            workers = min(8, 2 * (os.cpu_count() or 1)) if pool is True else min(4, os.cpu_count() or 1)
        self.workers = _int("workers", workers, lo=1, hi=999)
        if python is not None and not isinstance(python, str):
            raise TypeError(f"python must be None or a path to an interpreter, got {type(python).__name__}")
        self.python = python
        self.isolate_network = bool(isolate_network)
        self.code_from_fence = bool(code_from_fence)
        if not isinstance(pool, bool):
            raise TypeError(f"pool must be True or False, got {type(pool).__name__}")
        self.pool = pool
        self._pool = None
        self._root = os.geteuid() == 0
        self._uid0 = _UID_BASE + 2000 * secrets.randbelow(1_000_000)
        self._lock = threading.Lock()
        self._chosen_python: str | None = None
        self._boot_candidate, self._boot_judge = _boot("candidate.py"), _boot("judge.py")
        self._mountns = self._pidns = self._root
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
        jobs = list(jobs)
        for i, job in enumerate(jobs):
            if not (isinstance(job, (tuple, list)) and len(job) == 2 and all(isinstance(x, str) for x in job)):
                got = (f"({', '.join(type(x).__name__ for x in job)})" if isinstance(job, (tuple, list))
                       else type(job).__name__)
                raise TypeError(f"jobs[{i}] must be a (solution, tests) pair of str, got {got}")
        python = self._interpreter()
        if self.pool:
            return [RunResult(r["status"], r["reason"], r["returncode"], r["stdout"], r["stderr"], r["wall_s"],
                              tuple(r["os_layers"])) for r in self.sandbox_pool().run(jobs)]
        slots: Queue[int] = Queue()
        for s in range(self.workers):
            slots.put(s)

        def task(job: tuple[str, str]) -> RunResult:
            slot = slots.get()
            try:
                return self._run_one(job[0], job[1], slot, python)
            except Exception as e:  # noqa: BLE001 - a runner error ends this candidate, not the batch
                return RunResult("crashed", f"runner: {type(e).__name__}: {str(e)[:200]}", None, "", "", 0.0)
            finally:
                slots.put(slot)

        with ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="bonft-sandbox") as pool:
            futures = [pool.submit(task, j) for j in jobs]
            if progress:
                from tqdm.auto import tqdm

                for _ in tqdm(futures, desc="running candidates", unit="cand"):
                    _.result()
            return [f.result() for f in futures]

    # -- the pool ---------------------------------------------------------------------------
    def sandbox_pool(self):
        """The runner's :class:`~bonft.verifiers.sandbox.pool.SandboxPool`, started on first use
        (``pool=True`` only). Its ``layers`` name the OS layers that took effect for its workers."""
        if not self.pool:
            raise ValueError("sandbox_pool() needs CodeRunner(..., pool=True)")
        python = self._interpreter()
        with self._lock:
            if self._pool is None:
                limits = rlimits(cpu_time=self.cpu_time, memory_mb=self.memory_mb, file_size_mb=self.file_size_mb,
                                 nproc=self.max_processes)
                config = {"limits": [[r, s, h] for r, (s, h) in limits], "wall_time": self.wall_time,
                          "cpu_time": self.cpu_time, "file_size_mb": self.file_size_mb,
                          "max_output_bytes": self.max_output_bytes, "max_processes": self.max_processes,
                          "frame_cap": _FRAME_CAP, "netns": self.isolate_network,
                          "mountns": self._root and self._mountns, "pidns": self._root and self._pidns}
                self._pool = SandboxPool(workers=self.workers, python=python,
                                         config=config, root=self._root)
            return self._pool

    def close(self) -> None:
        """Stop the pool's workers, if any (a later run starts new ones)."""
        with self._lock:
            if self._pool is not None:
                self._pool.close()
                self._pool = None

    def __enter__(self) -> "CodeRunner":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- one candidate ----------------------------------------------------------------------
    def _uid(self, slot: int) -> int | None:
        """The candidate's uid for worker ``slot`` (root only); the test process gets the next one."""
        return self._uid0 + 2 * slot if self._root else None

    def _spawn(self, python: str, boot: str, fds: tuple[int, ...], cwd: str, uid: int | None, *,
               sandbox: bool, report_fd: int | None = None) -> subprocess.Popen:
        nproc = self.max_processes if uid is not None else user_tasks(os.getuid()) + self.max_processes
        soft, hard = resource.getrlimit(resource.RLIMIT_NPROC)
        if uid is None and hard != resource.RLIM_INFINITY:
            nproc = min(nproc, hard)
        limits = rlimits(cpu_time=self.cpu_time, memory_mb=self.memory_mb, file_size_mb=self.file_size_mb, nproc=nproc)
        pre = make_preexec(limits=limits, uid=uid, libc=self._libc, netns=sandbox and self.isolate_network,
                           mountns=sandbox and self._mountns, workdir=cwd, tmpfs_mb=self.file_size_mb,
                           report_fd=report_fd, pidns=sandbox and self._pidns, ipcns=sandbox and self._root,
                           deny_userns=sandbox)
        return subprocess.Popen(
            [python, "-s", "-B", "-c", boot, *map(str, fds)], cwd=cwd, env=env(cwd), stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, pass_fds=fds + ((report_fd,) if report_fd else ()),
            start_new_session=True, preexec_fn=pre,
        )

    def _start_candidate(self, python: str, workdir: str, uid: int | None, fds: tuple[int, ...]):
        """Start the candidate's process; (Popen, layers that took effect). Falls back without the
        private mount namespace (once, for this runner) if it cannot be set up."""
        while True:
            rep_r, rep_w = os.pipe()
            try:
                proc = self._spawn(python, self._boot_candidate, fds, workdir, uid, sandbox=True, report_fd=rep_w)
            except subprocess.SubprocessError:
                # preexec failed (MountSetupError): run without the PID namespace, then without the
                # mount namespace too (once each, for this runner), and say so in os_layers
                if self._pidns:
                    self._pidns = False
                elif self._mountns:
                    self._mountns = False
                else:
                    raise
                continue
            finally:
                os.close(rep_w)
                done = b""
                while chunk := os.read(rep_r, 16):
                    done += chunk
                os.close(rep_r)
            return proc, tuple(LAYER_NAMES[c] for c in done.decode("ascii", "replace") if c in LAYER_NAMES)

    def _run_one(self, solution: str, tests: str, slot: int, python: str) -> RunResult:
        cuid = self._uid(slot)
        juid = None if cuid is None else cuid + 1
        workdir = tempfile.mkdtemp(prefix="bonft-sandbox-")
        judgedir = tempfile.mkdtemp(prefix="bonft-tests-")
        t0 = time.monotonic()
        procs: list[tuple[subprocess.Popen, int | None, str, bool]] = []  # (process, uid, directory, has a waiter)
        pipes = [os.pipe() for _ in range(5)]  # judge cfg, verdict, requests, replies, candidate cfg
        (jcfg_r, jcfg_w), (ver_r, ver_w), (req_r, req_w), (rep_r, rep_w), (ccfg_r, ccfg_w) = pipes
        open_fds = {fd for p in pipes for fd in p}

        def close(*fds: int) -> None:
            for fd in fds:
                if fd in open_fds:
                    open_fds.discard(fd)
                    os.close(fd)

        def feed(fd: int, cfg: dict) -> None:
            close_after = os.fdopen(fd, "wb")
            open_fds.discard(fd)
            try:
                with close_after as f:
                    f.write(json.dumps(cfg).encode("utf-8"))
            except OSError:
                pass  # the child died before reading: its exit status tells why

        layers: tuple[str, ...] = ()
        try:
            if cuid is not None:
                os.chown(workdir, cuid, cuid)
                os.chown(judgedir, juid, juid)
            try:
                judge = self._spawn(python, self._boot_judge, (jcfg_r, ver_w, req_w, rep_r), judgedir, juid, sandbox=False)
                procs.append((judge, juid, judgedir, False))
                close(jcfg_r, ver_w, req_w, rep_r)
                feed(jcfg_w, {"tests": tests, "frame_cap": _FRAME_CAP, "same_uid": cuid is None})
                if cuid is None and not await_start(ver_r, t0 + self.wall_time):
                    raise OSError("the tests' process did not start")
                cand, layers = self._start_candidate(python, workdir, cuid, (ccfg_r, req_r, rep_w))
                procs.append((cand, cuid, workdir, "private-pids" in layers))
                close(ccfg_r, req_r, rep_w)
            except (OSError, subprocess.SubprocessError) as e:
                return RunResult("crashed", f"runner: could not start {python}: {e}", None, "", "", 0.0, layers)
            feed(ccfg_w, {"solution": solution, "max_processes": self.max_processes, "frame_cap": _FRAME_CAP})
            out, verdict, timed_out, over = collect(
                judge, cand, ver_r, deadline=t0 + self.wall_time, cap=self.max_output_bytes, frame_cap=_FRAME_CAP,
                on_candidate_exit=lambda: self._kill(*procs[1]))
            if verdict and not over:
                # both processes end by themselves after a verdict (and a candidate that died during
                # the tests must report its own exit status): a short wait saves a kill sweep. A pass
                # counts only once the candidate's process has ended normally, so wait up to the deadline.
                now = time.monotonic()
                if verdict.get("status") == "pass":
                    end = max(t0 + self.wall_time, now + 0.5)
                else:
                    end = min(now + (0.5 if verdict.get("status") == "gone" else 0.1), t0 + self.wall_time)
                for proc in (judge, cand):
                    try:
                        proc.wait(timeout=max(0.0, end - time.monotonic()))
                    except subprocess.TimeoutExpired:
                        pass
        finally:
            for entry in reversed(procs):
                self._kill(*entry)
            rcs = [entry[0].wait() for entry in procs]
            close(*list(open_fds))
            left = self._clean(workdir, judgedir)
        wall = time.monotonic() - t0
        stdout = (out["c_out"] + out["j_out"]).decode("utf-8", "replace")
        stderr = (out["c_err"] + out["j_err"]).decode("utf-8", "replace")
        status, reason = classify(verdict, rcs[1], rcs[0], timed_out=timed_out, over=over, wall_time=self.wall_time,
                                  cpu_time=self.cpu_time, file_size_mb=self.file_size_mb)
        if left:  # what it left could not be removed: this candidate's verdict says so, the batch goes on
            status, reason = "crashed", f"clean-up failed: {left}" + (f" (verdict was {status})" if status != "crashed" else "")
        return RunResult(status, reason, rcs[1], stdout, stderr, wall, layers)

    @staticmethod
    def _clean(*dirs: str) -> str | None:
        """Remove the run's directories (:func:`remove_tree`: no depth limit); None, or what failed."""
        failed = []
        for d in dirs:
            try:
                remove_tree(d)
            except Exception as e:  # noqa: BLE001 - one candidate's leftovers never end the batch
                failed.append(f"{type(e).__name__}: {e}")
        return "; ".join(failed)[:300] or None

    def _kill(self, proc: subprocess.Popen, uid: int | None, workdir: str, waiter: bool = False) -> None:
        if waiter:  # a PID namespace: its waiter kills and reaps the namespace's init, then ends itself
            try:
                proc.send_signal(signal.SIGTERM)
                proc.wait(timeout=2.0)
            except (ProcessLookupError, subprocess.TimeoutExpired):
                pass
        try:  # the group outlives its leader while members are left
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
                if py != sys.executable and self.python is None:
                    failed = ", ".join(t.split(": ")[0] for t in tried)
                    warnings.warn(f"CodeRunner runs candidates with {py}, not this process's {sys.executable} (the "
                                  f"sandbox user could not run {failed}): modules installed only for this one (a "
                                  "virtual environment's numpy) are missing to candidates; pass python= to choose")
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
