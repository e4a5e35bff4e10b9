"""The sandbox pool: the verdicts of one-at-a-time runs, and nothing crosses between candidates.

Expected behaviour is taken from the Linux manual pages: pid_namespaces(7) (a process sees and can
signal only the processes of its own PID namespace and its descendants; /proc mounted in it lists
only those), kill(2) (kill(-1) reaches every process the caller may signal, itself excepted, and
a process may signal only processes of its own real or effective uid unless privileged), ptrace(2)
"Ptrace access mode checking" (another uid -> EPERM; proc(5): /proc/PID/mem and environ need that
same access), ipc_namespaces(7), mount_namespaces(7) with tmpfs(5), network_namespaces(7) (abstract
unix socket names belong to a network namespace, unix(7)), and fork(2) (the child gets a copy of the
parent's memory: hence the worker must never hold a job's text when it forks a candidate).
"""
import glob
import os
import re
import signal
import subprocess
import sys
import tempfile
import threading
import time

import pytest
from sandbox_attacks import (
    ATTACKS,
    ATTACKS_2,
    FD_LIST,
    FIND_LEFTOVERS,
    HOSTILE_CORRECT,
    LEAVE_BEHIND,
    MEMORY_SCAN,
    SEE_PROC,
    SIX_THREADS,
    TESTS,
    reach_out,
)

from bonft.verifiers import CodeRunner
from bonft.verifiers.sandbox import pool as pool_module
from bonft.verifiers.sandbox.procs import remove_tree

ROOT = os.geteuid() == 0
CORRECT = ("def add(a, b):\n    return a + b", TESTS)


def _kernel_allows(flag: int) -> bool:
    code = f"import ctypes, sys; sys.exit(ctypes.CDLL(None).unshare({flag}) != 0)"
    return subprocess.run([sys.executable, "-c", code]).returncode == 0


NAMESPACES = ROOT and _kernel_allows(0x00020000 | 0x08000000 | 0x20000000 | 0x40000000)  # NS | IPC | PID | NET
needs_ns = pytest.mark.skipif(not NAMESPACES, reason="the cross-candidate layers need root and namespaces")


def _processes_of(uids) -> list[tuple[int, int, str]]:
    out = []
    for pid in filter(str.isdigit, os.listdir("/proc")):
        try:
            with open(f"/proc/{pid}/status") as f:
                fields = dict(line.split(":", 1) for line in f if ":" in line)
        except OSError:
            continue
        if int(fields["Uid"].split()[0]) in uids:
            out.append((int(pid), int(fields["Uid"].split()[0]), fields["State"].strip()))
    return out


def _left_dirs(pids) -> list[str]:
    return [d for p in pids for d in glob.glob(os.path.join(tempfile.gettempdir(), f"bonft-*-{p}.*"))]


# the hostile candidates of the three attack files whose verdict does not depend on timing
RESOURCE = {
    "infinite_loop": ("while True:\n    pass", "pass"),
    "memory_bomb": ("x = ' ' * (2 ** 34)", "pass"),
    "fork_bomb": ("import os\nwhile True:\n    os.fork()", "pass"),
    "huge_output": ("while True:\n    print('x' * 1000)", "pass"),
    "segfault": ("import ctypes\nctypes.string_at(0)", "pass"),
    "exit_3": ("import sys\nsys.exit(3)", "pass"),
    "sigterm_self": ("import os, signal\nos.kill(os.getpid(), signal.SIGTERM)", "pass"),
    "abort": ("import os\nos.abort()", "pass"),
    "kill_parent": ("import os, signal\nos.kill(os.getppid(), signal.SIGTERM)", "pass"),
    "write_outside": ("open('/tmp/bonft_pool_outside.txt', 'w').write('x')", "pass"),
    "syntax_error": ("def f(:\n    pass", "pass"),
    "tests_syntax_error": ("x = 1", "assert ("),
    "six_threads": SIX_THREADS,
}
# timing decides between two statuses or two wordings: compared by status only
TIMING = {"reply_ahead_then_segfault", "huge_output", "fork_bomb"}


def test_a_pool_batch_gives_the_verdicts_of_one_at_a_time_runs():
    """Every candidate of a mixed batch (honest, wrong, forging, resource-hungry, hostile but correct,
    each followed by a correct one) gets from the pool the status, reason, exit status and OS
    layers it gets from the one-at-a-time runner."""
    hostile = {**ATTACKS, **ATTACKS_2, **RESOURCE,
               **{k: v for k, v in HOSTILE_CORRECT.items() if k != "deep_directory_chain"}}  # disk-bound: timing
    jobs, names = [], []
    for name, job in hostile.items():
        jobs += [job, CORRECT]
        names += [name, "correct after " + name]
    opts = dict(wall_time=4.0, memory_mb=1024, max_processes=8, max_output_bytes=10_000, workers=2)
    single = CodeRunner({}, **opts).run_code(jobs)
    with CodeRunner({}, pool=True, **opts) as runner:
        pooled = runner.run_code(jobs)
        assert runner.sandbox_pool().restarts == 0
    diff = {}
    for name, a, b in zip(names, single, pooled):
        key_a = (a.status,) if name in TIMING else (a.status, a.reason, a.returncode, a.os_layers)
        key_b = (b.status,) if name in TIMING else (b.status, b.reason, b.returncode, b.os_layers)
        if key_a != key_b:
            diff[name] = (key_a, key_b)
    assert diff == {}
    assert [r.status for n, r in zip(names, pooled) if n.startswith("correct after")] == ["pass"] * len(hostile)
    forged = {n for n, r in zip(names, pooled) if r.passed and not n.startswith("correct")}
    assert forged <= set(HOSTILE_CORRECT) | {"audit_hook_off_writes_tmp_shm", "six_threads"}, forged
    assert pooled[names.index("infinite_loop")].reason == "wall time 4 s"
    assert not os.path.exists("/tmp/bonft_pool_outside.txt")


@needs_ns
def test_a_candidate_cannot_signal_or_reach_into_siblings_the_worker_or_the_caller():
    """kill(-1), kill(ppid), signals, /proc/PID/mem writes, environ reads and ptrace against the pool's
    workers, this test process and the parent it sees, while a sibling sleeps in another worker: all
    fail, the sibling passes and no worker is replaced."""
    sleeper = ("import time\ntime.sleep(1.5)\ndef add(a, b):\n    return a + b", TESTS)
    with CodeRunner({}, wall_time=6.0, memory_mb=256, max_processes=4, workers=3, pool=True) as runner:
        pool = runner.sandbox_pool()
        workers = pool.worker_pids()
        attack = (reach_out(workers + [os.getpid()]), "assert hits() == []")
        see = (SEE_PROC, "assert visible() == [1, 2], visible()")
        results = runner.run_code([sleeper, attack, attack, see, sleeper, CORRECT])
        assert [(r.status, r.reason) for r in results] == [("pass", None)] * 6, [r.stderr[-300:] for r in results]
        assert pool.worker_pids() == workers and pool.restarts == 0


@needs_ns
def test_nothing_a_candidate_leaves_reaches_the_next_one_in_the_same_worker():
    """One worker: files in its directory and in /tmp, /dev/shm, /var/tmp, /run/lock, a fifo, a System V
    queue and a daemon holding an abstract unix socket; the next candidate finds none of them, and no
    process of the pool's uids is left."""
    with CodeRunner({}, wall_time=4.0, memory_mb=256, max_processes=4, workers=1, pool=True) as runner:
        leave, find = runner.run_code([(LEAVE_BEHIND, TESTS), (FIND_LEFTOVERS, "assert found() == [], found()")])
        assert (leave.status, find.status) == ("pass", "pass"), (leave.reason, find.reason, find.stderr[-300:])
        pool = runner.sandbox_pool()
        assert _processes_of(pool.uids()) == []
        assert _left_dirs(pool.worker_pids()) == []


@needs_ns
def test_a_candidate_holds_only_its_own_descriptors():
    """0, 1, 2 and its two protocol pipes, as in a one-at-a-time run: no descriptor of the worker, the
    supervisor or a sibling (each could carry another candidate's output or verdict)."""
    job = (FD_LIST, "print(fds())")
    single = CodeRunner({}, wall_time=4.0, memory_mb=256, workers=1).run_code([job])[0]
    with CodeRunner({}, wall_time=4.0, memory_mb=256, workers=2, pool=True) as runner:
        pooled = runner.run_code([job, job, job])
    expected = "[(0, '/dev/null'), (1, 'pipe'), (2, 'pipe'), (%d, 'pipe'), (%d, 'pipe')]"
    for r in [single, *pooled]:
        assert r.status == "pass", (r.reason, r.stderr[-300:])
        got = eval(r.stdout.strip())  # noqa: S307 - our own test's printed list
        assert len(got) == 5 and got[:3] == [(0, "/dev/null"), (1, "pipe"), (2, "pipe")], got
        assert r.stdout.strip() == expected % (got[3][0], got[4][0])


@needs_ns
def test_no_earlier_job_or_its_own_tests_are_in_a_candidates_memory():
    """The worker forks each candidate before anyone reads the job: neither the tests and solution of
    the job before it in the same worker nor its own tests are in the memory it can read."""
    tag = "%08x" % (os.getpid() * 2654435761 % (1 << 32))
    earlier = f"# BONFT_EARLIER_{tag}\ndef add(a, b):\n    return a + b  # BONFT_EARLIER_{tag}"
    earlier_tests = f"# BONFT_EARLIER_{tag}\nassert add(2, 3) == 5"
    own_tests = (f"# BONFT_OWNTESTS_{tag}\n"
                 f"print(count(['BONFT_', 'EARLIER_', '{tag}']), count(['BONFT_', 'OWNTESTS_', '{tag}']),"
                 f" count(['BONFT_', 'NEVERSEEN_', '{tag}']), count(['BONFT_', 'OWNSOLUTION_', '{tag}']))")
    own_solution = MEMORY_SCAN + f"# BONFT_OWNSOLUTION_{tag}\n"
    with CodeRunner({}, wall_time=10.0, memory_mb=1024, workers=1, pool=True) as runner:
        first, scan = runner.run_code([(earlier, earlier_tests), (own_solution, own_tests)])
    assert first.status == "pass" and scan.status == "pass", (scan.reason, scan.stderr[-300:])
    earlier_n, own_n, never_n, own_solution_n = map(int, scan.stdout.split())
    assert never_n >= 1  # the needle's own copies
    assert own_solution_n > never_n  # the scan finds text that is there: its own solution
    assert (earlier_n, own_n) == (never_n, never_n)


@needs_ns
def test_no_name_an_earlier_candidate_or_its_tests_left_is_in_a_later_candidates_memory():
    """File names are data too: a candidate and its tests leave files whose names carry a marker (in the
    working directory, a subdirectory and the tests' directory); whoever removes them reads the names,
    so that must be a process no candidate is forked from. The next candidate of the same worker scans
    its readable memory for the markers and finds only its own needles' copies."""
    tag = "%08x" % (os.getpid() * 2246822519 % (1 << 32))
    # many names of several lengths, so that some outlive the allocator's reuse of freed memory
    leave = (f"import os\nname = 'BONFT_' + 'LEFTNAME_' + '{tag}'\nos.mkdir('sub')\n"
             "for i in range(40):\n"
             "    open(name + 'x' * (5 * i) + str(i), 'w').close()\n"
             "    open(os.path.join('sub', name + 'y' * (4 * i) + str(i)), 'w').close()\n"
             "def add(a, b):\n    return a + b")
    leave_tests = (f"for i in range(40):\n    open('BONFT_' + 'TESTSNAME_' + '{tag}' + 'z' * (5 * i) + str(i), 'w').close()\n"
                   "assert add(2, 3) == 5")
    scan_tests = (f"print(count(['BONFT_', 'LEFTNAME_', '{tag}']), count(['BONFT_', 'TESTSNAME_', '{tag}']),"
                  f" count(['BONFT_', 'NEVERNAME_', '{tag}']))")
    with CodeRunner({}, wall_time=10.0, memory_mb=1024, workers=1, pool=True) as runner:
        first, scan = runner.run_code([(leave, leave_tests), (MEMORY_SCAN, scan_tests)])
    assert first.status == "pass" and scan.status == "pass", (first.reason, scan.reason, scan.stderr[-300:])
    left_n, tests_n, never_n = map(int, scan.stdout.split())
    assert never_n >= 1  # the needle's own copies
    assert (left_n, tests_n) == (never_n, never_n)


def _child_of(pid: int, timeout: float = 10.0) -> int:
    """The first child of ``pid`` (a worker's first child is its supervisor, forked before any job)."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        try:
            with open(f"/proc/{pid}/task/{pid}/children") as f:
                kids = f.read().split()
        except OSError:
            kids = []
        if kids:
            return int(kids[0])
        time.sleep(0.01)
    raise AssertionError(f"no supervisor appeared under worker {pid}")


def _children(pid: int) -> list[int]:
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as f:
            return [int(x) for x in f.read().split()]
    except OSError:
        return []


def _alive(pid: int) -> bool:
    """Whether ``pid`` is a live process (not gone, not a zombie)."""
    try:
        with open(f"/proc/{pid}/status") as f:
            return not next(line for line in f if line.startswith("State:")).split()[1].startswith("Z")
    except OSError:
        return False


def _uid_of(pid: int) -> int:
    with open(f"/proc/{pid}/status") as f:
        return int(next(line for line in f if line.startswith("Uid:")).split()[1])


@needs_ns
def test_a_candidate_is_three_processes_and_the_supervisor_forks_none():
    """While a candidate sleeps, the worker's children are its supervisor (root, the same one before and
    after the job), the tests' process (its own uid) and the PID namespace's init (root), whose only
    child is the candidate's process (its own uid); the supervisor, which reads every job, has no
    child at any time (fork(2): a child would hold a copy of what it read)."""
    sleeper = ("import time\ntime.sleep(1.5)\ndef add(a, b):\n    return a + b", TESTS)
    with CodeRunner({}, wall_time=8.0, memory_mb=256, workers=1, pool=True) as runner:
        pool = runner.sandbox_pool()
        runner.run_code([CORRECT])
        worker = pool.worker_pids()[0]
        sup = _child_of(worker)
        assert _children(worker) == [sup] and _children(sup) == []
        seen = []

        def look() -> None:
            end = time.monotonic() + 6
            while time.monotonic() < end and len(_children(worker)) < 3:
                time.sleep(0.01)
            time.sleep(0.3)
            kids = _children(worker)
            seen.append((kids, {k: _children(k) for k in kids}, {k: _uid_of(k) for k in kids}))
            seen.append({k: _uid_of(k) for v in seen[0][1].values() for k in v})

        t = threading.Thread(target=look)
        t.start()
        res = runner.run_code([sleeper])[0]
        t.join()
        assert res.status == "pass", (res.reason, res.stderr[-300:])
        (kids, grandkids, uids), cand_uids = seen
        assert len(kids) == 3 and kids[0] == sup, kids
        judge, init = kids[1], kids[2]
        cuid = min(pool.uids())
        assert uids == {sup: 0, judge: cuid + 1, init: 0}, (uids, cuid)
        assert grandkids[sup] == [] and grandkids[judge] == [] and len(grandkids[init]) == 1
        assert cand_uids == {grandkids[init][0]: cuid}
        assert _children(worker) == [sup] and _children(sup) == [] and pool.restarts == 0


# prints the environment as Python and as the C library hold it, with the working directory's path
# (HOME and TMPDIR name it) written <cwd>; the tests' process prints its own the same way
SHOW_ENV = """import ctypes, os
def show(tag):
    cwd = os.getcwd()
    env = ctypes.POINTER(ctypes.c_char_p).in_dll(ctypes.CDLL(None), "environ")
    c, i = [], 0
    while env[i]:
        c.append(env[i].decode())
        i += 1
    print(tag, [(k, '<cwd>' if v == cwd else v) for k, v in os.environ.items()],
          [x.replace(cwd, '<cwd>') for x in c])
"""


def test_the_environment_is_a_fresh_interpreters():
    """The candidate's and the tests' environment, as ``os.environ`` (names, values, order) and as the C
    library's ``environ`` array (environ(7)), are in the pool what a fresh interpreter started by
    execve(2) with the runner's environment holds in a one-at-a-time run: the pool's forker keeps that
    environment but for the variables naming the working directory, which each child sets."""
    job = (SHOW_ENV + "show('solution')\ndef f():\n    return 1", SHOW_ENV + "show('tests')\nassert f() == 1")
    opts = dict(wall_time=4.0, memory_mb=256, workers=1)
    single = CodeRunner({}, **opts).run_code([job])[0]
    with CodeRunner({}, pool=True, **opts) as runner:
        pooled = runner.run_code([job, job])
    assert single.status == "pass", (single.reason, single.stderr[-300:])
    lines = single.stdout.splitlines()
    assert [line.split()[0] for line in lines] == ["solution", "tests"]
    assert "('HOME', '<cwd>')" in lines[0] and "'TMPDIR=<cwd>'" in lines[0] and "('PATH', " in lines[1]
    assert [(r.status, r.stdout) for r in pooled] == [("pass", single.stdout)] * 2


def test_a_supervisor_that_dies_between_batches_is_replaced_before_the_next():
    """SIGKILL to an idle worker's supervisor: the next batch runs every candidate on a fresh worker
    (none is lost or given a runner verdict) and the pool counts one restart."""
    with CodeRunner({}, wall_time=4.0, memory_mb=256, workers=1, pool=True) as runner:
        pool = runner.sandbox_pool()
        old = pool.worker_pids()[0]
        os.kill(_child_of(old), signal.SIGKILL)
        end = time.monotonic() + 10
        while _alive(old) and time.monotonic() < end:  # the worker exits after saying so
            time.sleep(0.02)
        assert not _alive(old)
        results = runner.run_code([CORRECT, ("def add(a, b):\n    return 0", TESTS), CORRECT])
        assert [(r.status, r.reason is None) for r in results] == [("pass", True), ("fail", False), ("pass", True)]
        assert pool.restarts == 1 and pool.worker_pids() != [old]


@pytest.mark.parametrize("victim", ["worker", "supervisor"])
def test_a_worker_that_dies_mid_batch_sinks_only_its_candidate(victim):
    """SIGKILL to the worker (or to the supervisor of its job) while a candidate runs: that candidate
    gets a ``crashed`` verdict naming the cause (a runner failure, not a score), a fresh worker
    starts and the rest of the batch passes; nothing of the dead one is left."""
    sleeper = ("import time\ntime.sleep(3)\ndef add(a, b):\n    return a + b", TESTS)
    with CodeRunner({}, wall_time=8.0, memory_mb=256, workers=1, pool=True) as runner:
        pool = runner.sandbox_pool()
        old = pool.worker_pids()[0]

        seen = []

        def kill() -> None:
            sup = _child_of(old)
            time.sleep(0.5)
            seen.extend(_left_dirs([old]))  # the job's two directories, named after the worker
            os.kill(old if victim == "worker" else sup, signal.SIGKILL)

        t = threading.Thread(target=kill)
        t.start()
        results = runner.run_code([sleeper, CORRECT, CORRECT])
        t.join()
        reason = {
            "worker": "runner: sandbox pool worker 0 failed while running this candidate: it ended (killed by SIGKILL)",
            "supervisor": "runner: the pool worker's supervisor of this candidate ended (killed by SIGKILL)"}[victim]
        assert (results[0].status, results[0].reason) == ("crashed", reason)
        assert [r.status for r in results[1:]] == ["pass", "pass"]
        assert pool.restarts == 1 and pool.worker_pids() != [old]
        assert len(seen) == 2 and _left_dirs([old]) == []
        # the dead worker's children die by their parent-death signal; the host's init reaps them
        end = time.monotonic() + 10
        while _processes_of(pool.uids()) and time.monotonic() < end:
            time.sleep(0.05)
        assert _processes_of(pool.uids()) == []


@needs_ns
def test_a_directory_the_worker_cannot_remove_sinks_only_its_candidate():
    """A tmpfs mounted from outside (as root) on a directory the candidate made in its working
    directory: rmdir(2) fails with EBUSY on a mount point, so that candidate's verdict is ``crashed``
    naming what could not be removed (its tests had passed: said too), and the next candidate of the
    same worker passes. The candidate's own mount namespace is private (mount_namespaces(7)): it never
    sees the mount."""
    maker = ("import os, time\nos.mkdir('busy')\ntime.sleep(2)\ndef add(a, b):\n    return a + b", TESTS)
    with CodeRunner({}, wall_time=8.0, memory_mb=256, workers=1, pool=True) as runner:
        worker = runner.sandbox_pool().worker_pids()[0]
        mounted, tried = [], []

        def mount() -> None:
            end = time.monotonic() + 6
            while time.monotonic() < end and not tried:
                for d in glob.glob(os.path.join(tempfile.gettempdir(), f"bonft-sandbox-{worker}.*", "busy")):
                    tried.append(d)
                    if subprocess.run(["mount", "-t", "tmpfs", "none", d]).returncode == 0:
                        mounted.append(d)
                time.sleep(0.01)

        t = threading.Thread(target=mount)
        t.start()
        try:
            first, second = runner.run_code([maker, CORRECT])
        finally:
            t.join()
            for d in mounted:
                subprocess.run(["umount", d])
                remove_tree(os.path.dirname(d))
    if not mounted:
        pytest.skip("cannot mount a tmpfs here")
    assert first.status == "crashed", (first.reason, first.stderr[-300:])
    assert re.fullmatch(r"clean-up failed: OSError: \[Errno 16\] could not remove busy 0 levels below "
                        r".*/bonft-sandbox-\d+\.\d+\.\w+: Device or resource busy \(verdict was pass\)",
                        first.reason), first.reason
    assert (second.status, second.reason) == ("pass", None)


def test_the_workers_loader_compiles_what_compile_compiles():
    """A worker compiles nothing itself (the parser's scratch memory would be copied into every fork):
    its loader's ``_compiled`` has a child compile and send the code back. Reference: the built-in
    compile() of the same text in this process; code objects compare equal when their bytecode,
    constants, names, line table and flags are equal (CPython's code comparison)."""
    ns = {}
    exec(pool_module._COMPILED, ns)
    text = "def f(x, *a, k=2):\n    return [i * x for i in range(3)], f'{x!r}', k\nr = f(2)\n"
    got, other = ns["_compiled"]([(text, "f.py"), ("y = 1 + 2\n", "<string>")])
    assert got == compile(text, "f.py", "exec") and got.co_filename == "f.py"
    assert other == compile("y = 1 + 2\n", "<string>", "exec")
    g = {}
    exec(got, g)
    assert g["r"] == ([0, 2, 4], "2", 2)
    with pytest.raises(SyntaxError) as err:  # the child sends nothing: compiled here, so the error is compile's
        ns["_compiled"]([("x = 1\n", "a.py"), ("x = (\n", "bad.py")])
    assert err.value.filename == "bad.py" and err.value.lineno == 1


def test_pool_bad_input_and_layers():
    with pytest.raises(TypeError, match="pool must be True or False, got int"):
        CodeRunner({}, pool=1)
    with pytest.raises(ValueError, match=r"sandbox_pool\(\) needs CodeRunner\(\.\.\., pool=True\)"):
        CodeRunner({}).sandbox_pool()
    with CodeRunner({}, wall_time=4.0, memory_mb=256, workers=1, pool=True) as runner:
        with pytest.raises(TypeError, match=r"jobs\[1\] must be a \(solution, tests\) pair of str, got \(bytes, str\)"):
            runner.run_code([CORRECT, (b"x = 1", "pass")])
        pool = runner.sandbox_pool()
        if NAMESPACES:
            assert set(pool.layers) == {"own-uid", "no-network", "private-tmp", "private-pids", "private-ipc",
                                        "no-userns"} and pool.missing_layers == ()
    runner.close()  # closing twice is fine
    with pytest.raises(RuntimeError, match="the sandbox pool is closed"):
        pool.run([CORRECT])


def test_a_pool_without_root_names_the_layers_it_lacks():
    """The unprivileged path (forced here): no uid of its own and no namespaces, said in ``layers``,
    ``missing_layers`` and every result's ``os_layers``; verdicts still come from the tests."""
    runner = CodeRunner({}, wall_time=4.0, memory_mb=256, max_processes=4, workers=2, pool=True)
    runner._root = runner._mountns = runner._pidns = False
    try:
        ok, bad = runner.run_code([CORRECT, ("def add(a, b):\n    return 0", TESTS)])
        pool = runner.sandbox_pool()
        assert {"own-uid", "private-tmp", "private-pids", "private-ipc"} <= set(pool.missing_layers)
        assert (ok.status, bad.status) == ("pass", "fail")
        assert set(ok.os_layers) == set(pool.layers) and "own-uid" not in ok.os_layers
    finally:
        runner.close()


def test_a_worker_without_a_result_is_replaced():
    """A supervisor that sends no result long after its wall time (forced here: the pool's patience set
    to 0.5 s against a 3 s sleep) is taken for stuck: its candidate gets a runner verdict, the worker is
    replaced and the batch goes on."""
    sleeper = ("import time\ntime.sleep(3)\ndef add(a, b):\n    return a + b", TESTS)
    with CodeRunner({}, wall_time=8.0, memory_mb=256, workers=1, pool=True) as runner:
        pool = runner.sandbox_pool()
        pool._patience = 0.5
        first = runner.run_code([sleeper])[0]
        assert (first.status, first.reason) == (
            "crashed", "runner: sandbox pool worker 0 failed while running this candidate: no result 0.5 s after "
                       "the job was sent")
        pool._patience = 60.0
        assert [r.status for r in runner.run_code([CORRECT, CORRECT])] == ["pass", "pass"]
        assert pool.restarts == 1
