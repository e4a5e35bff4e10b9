"""The sandboxed code runner contains the usual attacks and still runs honest candidates.

Expected behaviour is taken from the Linux manual pages: setrlimit(2) (RLIMIT_AS
makes allocations fail -> Python MemoryError; RLIMIT_NPROC makes fork fail with
EAGAIN and "is not enforced for processes with CAP_SYS_ADMIN or CAP_SYS_RESOURCE",
i.e. root -- hence the uid drop), signal(7) (SIGSEGV = 11), kill(2) (pid -1 reaches
every process the caller may signal), and PEP 578 for the audit hook.
"""
import os
import signal

import numpy as np
import pytest
from sandbox_attacks import pool_uids, runner_mode

from bonft.verifiers import CodeRunner, RunResult
from bonft.verifiers.sandbox.pool import _LOADER
from bonft.verifiers.sandbox.procs import pids_of as _pids_of
from bonft.verifiers.sandbox.runner import extract_code

ROOT = os.geteuid() == 0
OUTSIDE = "/tmp/bonft_sandbox_escape_test.txt"
_POOL_LOADER = _LOADER.encode()


def _children() -> int:
    """Number of live child processes of this test process (all threads), sandbox pool workers
    (which live as long as their runner) not counted."""
    n = 0
    for tid in os.listdir("/proc/self/task"):
        try:
            with open(f"/proc/self/task/{tid}/children") as f:
                pids = f.read().split()
        except FileNotFoundError:
            continue  # a thread that ended after the listing: it has no children left
        for pid in pids:
            try:
                with open(f"/proc/{pid}/cmdline", "rb") as f:
                    if _POOL_LOADER in f.read():  # a pool worker's (or its supervisor's) python -c text
                        continue
            except OSError:
                continue
            n += 1
    return n


def _ppid(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/stat") as f:
            return int(f.read().rsplit(")", 1)[1].split()[1])
    except (OSError, ValueError, IndexError):
        return 0


def _ours_or_orphan(pid: int) -> bool:
    """Whether ``pid`` descends from this test process or was left to the host's init: a sandbox
    process of another program running on the same machine (its ancestors alive) is not ours."""
    for _ in range(64):
        pid = _ppid(pid)
        if pid == os.getpid():
            return True
        if pid <= 1:
            return True
    return False


def _sandbox_processes() -> list[int]:
    """Live processes still running a sandbox bootstrap (the wire protocol's text is on their command
    line) that this test started or that outlived their parents; asked again for up to 5 s while any
    is listed (another program's sandbox dying on the same machine is briefly an orphan)."""
    import time

    end = time.monotonic() + 5
    while True:
        out = _sandbox_processes_now()
        if not out or time.monotonic() > end:
            return out
        time.sleep(0.1)


def _sandbox_processes_now() -> list[int]:
    out = []
    for pid in filter(str.isdigit, os.listdir("/proc")):
        try:
            with open(f"/proc/{pid}/cmdline", "rb") as f:
                cmd = f.read()
            with open(f"/proc/{pid}/stat") as f:
                state = f.read().rsplit(")", 1)[1].split()[0]
        except OSError:
            continue
        if b"def wire_send(" in cmd and state != "Z" and _ours_or_orphan(int(pid)):
            out.append(int(pid))
    return out


@pytest.fixture(scope="module", autouse=True, params=[False, True], ids=["one-at-a-time", "pool"])
def mode(request):
    """Each test of this file runs with the one-at-a-time runner and with the sandbox pool."""
    with runner_mode(request.param):
        yield request.param


ATTACKS = {
    "correct": ("def add(a, b):\n    return a + b", "assert add(2, 3) == 5"),
    "incorrect": ("def add(a, b):\n    return a - b", "assert add(2, 3) == 5, 'add(2, 3) should be 5'"),
    "infinite_loop": ("while True:\n    pass", "pass"),
    "memory_bomb": ("x = ' ' * (2 ** 34)", "pass"),  # 16 GiB > memory_mb=256
    "fork_bomb": ("import os\nwhile True:\n    os.fork()", "pass"),
    "ctypes_fork_bomb": ("import ctypes\nlibc = ctypes.CDLL(None)\nwhile True:\n    libc.fork()", "pass"),
    "huge_output": ("while True:\n    print('x' * 1000)", "pass"),
    "write_outside": (f"open({OUTSIDE!r}, 'w').write('escaped')", "pass"),
    "os_open_outside": (f"import os\nos.open({OUTSIDE!r}, os.O_WRONLY | os.O_CREAT)", "pass"),
    "write_inside": ("open('notes.txt', 'w').write('ok')\ndef exists(p):\n    import os\n    return os.path.exists(p)",
                     "assert exists('notes.txt')"),
    "read_secret": ("import os\nseen = os.environ.get('BONFT_TEST_SECRET')", "assert seen is None, seen"),
    "kill_parent": ("import os, signal\nos.kill(os.getppid(), signal.SIGTERM)", "pass"),
    "exit_3": ("import sys\nsys.exit(3)", "pass"),
    "exit_0_early": ("import os\nos._exit(0)", "assert False, 'never reached'"),
    "segfault": ("import ctypes\nctypes.string_at(0)", "pass"),
    "unprivileged": ("import os\nuid = os.getuid()", "assert uid != 0" if ROOT else "pass"),
    "after_attacks": ("def add(a, b):\n    return a + b", "assert add(2, 3) == 5"),
}


@pytest.fixture(scope="module")
def attack_results():
    if os.path.exists(OUTSIDE):
        os.remove(OUTSIDE)
    os.environ["BONFT_TEST_SECRET"] = "hunter2"
    runner = CodeRunner({}, wall_time=2.0, memory_mb=256, max_processes=4, max_output_bytes=10_000, workers=4)
    before = _children()
    try:
        results = runner.run_code(list(ATTACKS.values()))
    finally:
        del os.environ["BONFT_TEST_SECRET"]
    return runner, dict(zip(ATTACKS, results)), before


def _check(res: RunResult, status: str, reason_part: str | None = None) -> None:
    assert res.status == status, f"expected {status}, got {res.status} ({res.reason}); stderr: {res.stderr[-300:]}"
    if reason_part is not None:
        assert reason_part in (res.reason or ""), f"expected {reason_part!r} in reason {res.reason!r}"


def test_honest_candidates(attack_results):
    _, r, _ = attack_results
    _check(r["correct"], "pass")
    assert r["correct"].reason is None
    _check(r["incorrect"], "fail", "AssertionError: add(2, 3) should be 5")
    _check(r["after_attacks"], "pass")  # the parent keeps working after the attacks
    _check(r["write_inside"], "pass")   # its own temporary directory is writable


def test_time_and_memory(attack_results):
    runner, r, _ = attack_results
    _check(r["infinite_loop"], "timeout", "wall time 2 s")
    assert r["infinite_loop"].wall_s >= 2.0  # not killed before its limit
    _check(r["memory_bomb"], "limit-exceeded", "MemoryError")


def test_fork_bombs_are_contained(attack_results):
    runner, r, before = attack_results
    _check(r["fork_bomb"], "limit-exceeded", "process limit (max_processes=4)")
    # the ctypes bomb bypasses the audit hook; RLIMIT_NPROC bounds it and the wall clock ends it
    assert r["ctypes_fork_bomb"].status in ("timeout", "limit-exceeded"), r["ctypes_fork_bomb"]
    assert _children() == before  # every candidate process was reaped
    assert _sandbox_processes() == []  # and none escaped to run on
    if ROOT:
        uids = [runner._uid(s) + k for s in range(runner.workers) for k in (0, 1)]  # candidate, tests
        uids += sorted(pool_uids(runner))
        leftover = {u: _pids_of(u) for u in uids}
        assert all(not v for v in leftover.values()), f"sandbox processes left: {leftover}"


def test_output_is_capped(attack_results):
    _, r, _ = attack_results
    _check(r["huge_output"], "limit-exceeded", "stdout over max_output_bytes=10000")
    assert len(r["huge_output"].stdout) == 10_000


def test_files_env_and_signals(attack_results):
    _, r, _ = attack_results
    _check(r["write_outside"], "refused", f"write outside the working directory refused ({OUTSIDE})")
    _check(r["os_open_outside"], "refused", "write outside the working directory refused")
    assert not os.path.exists(OUTSIDE)
    _check(r["read_secret"], "pass")  # the assertion in its tests checks the variable was not visible
    _check(r["kill_parent"], "refused", "signal to a process outside the sandbox refused")
    _check(r["unprivileged"], "pass")


def test_exits_and_crashes(attack_results):
    _, r, _ = attack_results
    _check(r["exit_3"], "fail", "exit code 3")
    _check(r["exit_0_early"], "crashed", "exited with code 0 before the tests finished")
    # signal(7): SIGSEGV is signal 11; the child dies by it and the exit status is -11
    _check(r["segfault"], "crashed", "killed by SIGSEGV")
    assert r["segfault"].returncode == -signal.SIGSEGV == -11


def test_verdicts_from_prompts_and_fenced_code():
    tests = {"write add": "assert add(1, 2) == 3", "write neg": "assert neg(4) == -4"}
    runner = CodeRunner(tests, wall_time=2.0, memory_mb=256, workers=2)
    responses = [
        "Here it is:\n```python\ndef add(a, b):\n    return a + b\n```\nDone.",
        "def add(a, b):\n    return 3",           # passes this weak test: the tests decide
        "```py\ndef neg(x):\n    return x\n```",
        "```python\ndef neg(x:\n```",             # syntax error in the solution
    ]
    v = runner(["write add", "write add", "write neg", "write neg"], responses)
    np.testing.assert_array_equal(v.scores, [1, 1, 0, 0])
    np.testing.assert_array_equal(v.rewards, v.scores)
    assert not v.failed.any()  # candidate outcomes are scores, not verifier failures
    res = runner.run(["write neg"], [responses[3]])
    _check(res[0], "crashed", "SyntaxError")
    again = runner(["write add", "write neg"], [responses[0], responses[2]])
    np.testing.assert_array_equal(again.scores, [1, 0])  # same input, same verdict


def test_extract_code():
    assert extract_code("a\n```python\nx = 1\n```\nb\n```\ny = 2\n```") == "y = 2\n"
    assert extract_code("x = 3") == "x = 3"


@pytest.mark.parametrize("code", ["", "   \n\n", "# TODO write tests", "# a\n    # b\n"])
def test_tests_without_a_statement_are_refused(code):
    # common practice (no source): code with no statement runs to the end for any solution, so it cannot be a reward
    with pytest.raises(ValueError, match=r"tests\['p'\] must hold at least one statement, got none \(only blanks or "
                                         r"comments\): any code would pass"):
        CodeRunner({"p": code})
    assert CodeRunner({"p": "# a comment\nassert f() == 1"}).tests == {"p": "# a comment\nassert f() == 1"}


@pytest.mark.parametrize("code, checks", [
    ("f(2)", False), ("print(f(2))\nx = f(3)", False),
    ("assert f(2) == 4", True), ("if f(2) != 4:\n    raise SystemExit(1)", True),
    ("def check():\n    assert f(2) == 4\ncheck()", True),  # a helper's body counts
    ("import unittest\nunittest.TestCase().assertEqual(f(2), 4)", True),  # unittest's assert methods
    ("import numpy.testing as nt\nnt.assert_allclose(f(2), 4)", True),
])
def test_tests_that_check_nothing_are_named_in_a_warning(code, checks, recwarn):
    # common practice (no source): tests with statements but no check fail a candidate only when it raises or exits
    from bonft.verifiers import UncheckedTestsWarning

    CodeRunner({"p": code, "q": "assert f(1) == 2"})
    got = [str(w.message) for w in recwarn if issubclass(w.category, UncheckedTestsWarning)]
    assert got == ([] if checks else [
        "1 of 2 prompts' tests check nothing (no assert, no raise, no assert...() or fail() call; the first: tests['p']): "
        "they fail a candidate only when it raises or exits, so any solution that runs passes them; assert on the "
        "solution's results (bonft check-tests finds such tests)"])
    if code == "f(2)":  # why it warns: a wrong solution passes them
        assert CodeRunner({"p": code}, workers=1)(["p"], ["def f(x):\n    return 0"]).scores.tolist() == [1.0]


def test_runner_arguments_are_validated():
    with pytest.raises(ValueError, match=r"tests\['p'\] must be valid Python, got a SyntaxError at line 1"):
        CodeRunner({"p": "assert ("})
    with pytest.raises(ValueError, match=r"tests\['p'\] must be valid Python, got a SyntaxError at line 2: 'return' "
                                         r"outside function"):
        CodeRunner({"p": "assert f(1) == 2\nreturn"})  # parses, but the compiler refuses it (CPython's compile)
    with pytest.raises(TypeError, match="tests must be a mapping"):
        CodeRunner(["assert True"])
    with pytest.raises(ValueError, match="wall_time must be a finite number >= 0.1, got wall_time=0"):
        CodeRunner({}, wall_time=0)
    with pytest.raises(ValueError, match=r"workers must be >= 1, got workers=0"):
        CodeRunner({}, workers=0)
    with pytest.raises(TypeError, match="memory_mb must be an int, got float"):
        CodeRunner({}, memory_mb=256.0)
    with pytest.raises(ValueError, match="prompts must all have tests; 1 do not, e.g. 'q'"):
        CodeRunner({"p": "pass"}).run(["q"], ["x = 1"])


def test_fallback_path_without_uid_drop():
    """The path used when not running as root (no uid drop; cleanup by working directory).

    As root RLIMIT_NPROC is not enforced on this path (setrlimit(2)), so only the audit
    hook stops the fork bomb here; the point is that the path works and cleans up.
    """
    runner = CodeRunner({}, wall_time=2.0, memory_mb=256, max_processes=4, workers=3)
    runner._root = runner._mountns = False  # force the unprivileged code path
    before = _children()
    ok, loop, bomb = runner.run_code([
        ("x = 2", "assert x == 2"),
        ("import os, time\nif os.fork() == 0:\n    os.setsid()\n    time.sleep(30)\nwhile True:\n    pass", "pass"),
        ("import os\nwhile True:\n    os.fork()", "pass"),
    ])
    _check(ok, "pass")
    # this path claims none of the layers that need root (the user-namespace filter, seccomp under
    # no_new_privs, needs none; the network namespace is attempted and, being root after all, applies)
    assert {"own-uid", "private-tmp", "private-pids", "private-ipc"}.isdisjoint(ok.os_layers), ok.os_layers
    _check(loop, "timeout")  # its child left the process group; found by its working directory and killed
    _check(bomb, "limit-exceeded", "process limit (max_processes=4)")
    assert _children() == before
    assert _sandbox_processes() == []
