"""Nothing of a candidate outlives its run, and a candidate can only sink itself.

Expected behaviour is taken from the Linux manual pages: ipc_namespaces(7) ("when an IPC namespace
is destroyed (i.e., when the last process that is a member of the namespace terminates), all IPC
objects in the namespace are automatically destroyed"), pid_namespaces(7) (when the namespace's init
process terminates, the kernel terminates every other process of the namespace with SIGKILL),
setrlimit(2) (RLIMIT_NPROC counts the processes -- threads -- of the real user ID, zombies
included until reaped), user_namespaces(7) (an unprivileged process may create a user namespace)
and seccomp(2) (SECCOMP_RET_ERRNO makes the call fail with that errno), ioctl_iflags(2) for the
immutable and append-only attributes, and path_resolution(7) for PATH_MAX (4096 bytes on Linux).
"""
import glob
import os
import stat
import subprocess
import sys

import pytest
from sandbox_attacks import (
    ATTACKS,
    ATTACKS_2,
    FORKER,
    HOSTILE_CORRECT,
    IPC_KEY,
    SIX_THREADS,
    SYSV_IPC,
    SYSV_READ,
    TESTS,
    USERNS,
    pool_uids,
    runner_mode,
)

from bonft.verifiers import CodeRunner
from bonft.verifiers.sandbox.procs import remove_tree

ROOT = os.geteuid() == 0
CORRECT = ("def add(a, b):\n    return a + b", TESTS)


@pytest.fixture(scope="module", autouse=True, params=[False, True], ids=["one-at-a-time", "pool"])
def mode(request):
    """Each test of this file runs with the one-at-a-time runner and with the sandbox pool."""
    with runner_mode(request.param):
        yield request.param


def _kernel_allows(flag: int) -> bool:
    code = f"import ctypes, sys; sys.exit(ctypes.CDLL(None).unshare({flag}) != 0)"
    return subprocess.run([sys.executable, "-c", code]).returncode == 0


NAMESPACES = ROOT and _kernel_allows(0x00020000 | 0x08000000 | 0x20000000)  # CLONE_NEWNS | CLONE_NEWIPC | CLONE_NEWPID


def _sysv_keys() -> dict[str, set[int]]:
    """The keys of every System V shared memory segment, message queue and semaphore set (proc(5))."""
    out = {}
    for kind in ("shm", "msg", "sem"):
        with open(f"/proc/sysvipc/{kind}") as f:
            out[kind] = {int(line.split()[0]) for line in f.read().splitlines()[1:]}
    return out


def _processes_of(uids) -> list[tuple[int, int, str]]:
    """(pid, uid, state) of every process -- zombies included -- whose real uid is in ``uids``."""
    out = []
    for pid in filter(str.isdigit, os.listdir("/proc")):
        try:
            with open(f"/proc/{pid}/status") as f:
                fields = dict(line.split(":", 1) for line in f if ":" in line)
        except OSError:
            continue
        uid = int(fields["Uid"].split()[0])
        if uid in uids:
            out.append((int(pid), uid, fields["State"].strip(), fields["PPid"].strip(), fields["Name"].strip()))
    return out


def _runner_uids(runner: CodeRunner) -> set[int]:
    return ({runner._uid(s) + k for s in range(runner.workers) for k in (0, 1)} | pool_uids(runner)) if ROOT else set()


@pytest.mark.skipif(not NAMESPACES, reason="IPC namespaces need root and a kernel that allows them")
def test_system_v_objects_vanish_with_the_run():
    before = _sysv_keys()
    made = SYSV_IPC + "def made_all():\n    return all(x >= 0 for x in made)\n"
    first = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=1).run_code(
        [(made, "assert made_all()\nassert add(2, 3) == 5")])[0]
    assert first.status == "pass" and "private-ipc" in first.os_layers, (first.reason, first.stderr[-300:])
    assert _sysv_keys() == before  # none of the 3 segments, the queue or the semaphore set is left
    assert not any(IPC_KEY in keys for keys in _sysv_keys().values())
    # a later candidate of another runner finds no queue under that key
    later = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=1).run_code([(SYSV_READ, "assert peek() is None")])[0]
    assert later.status == "pass", (later.reason, later.stderr[-300:])


@pytest.mark.skipif(not NAMESPACES, reason="PID namespaces need root and a kernel that allows them")
def test_no_process_outlives_the_run_and_the_slot_starts_clean():
    # one worker: the three candidates share one uid. 6 threads + the main one = 7 of max_processes=8,
    # so one zombie or orphan left by the forking candidate would make the second thread test fail.
    # memory_mb=1024: each thread reserves a stack and a malloc arena of address space.
    runner = CodeRunner({}, wall_time=3.0, memory_mb=1024, max_processes=8, workers=1)
    first, forker, after = runner.run_code([SIX_THREADS, (FORKER, TESTS), SIX_THREADS])
    assert first.status == "pass", (first.reason, first.stderr[-300:])
    assert forker.status == "pass" and "private-pids" in forker.os_layers, forker
    assert after.status == "pass", (after.reason, after.stderr[-300:])
    assert _processes_of(_runner_uids(runner)) == []  # no zombie, no sleeping orphan


def test_user_namespaces_are_refused():
    res = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=1).run_code([(USERNS, "assert userns() == []")])[0]
    if "no-userns" not in res.os_layers:
        pytest.skip(f"the seccomp filter does not apply on {os.uname().machine}")
    assert res.status == "pass", (res.reason, res.stderr[-300:])


def test_remove_tree_takes_whatever_a_candidate_leaves(tmp_path):
    top, keep = tmp_path / "work", tmp_path / "outside"
    top.mkdir()
    keep.write_text("must survive")
    here = os.open(".", os.O_RDONLY)
    try:
        os.chdir(top)
        for _ in range(3000):  # "d/" * 3000 is 6000 bytes: past PATH_MAX, so only relative names reach it
            os.mkdir("d")
            os.chdir("d")
        with open("deepest", "w") as f:
            f.write("x")
    finally:
        os.fchdir(here)
        os.close(here)
    (top / "locked" / "inner").mkdir(parents=True)
    (top / "locked" / "inner" / "f").write_text("x")
    os.mkfifo(top / "fifo")
    os.mknod(top / "sock", stat.S_IFSOCK | 0o600)
    os.symlink(keep, top / "link")
    os.chmod(top / "locked" / "inner" / "f", 0)
    os.chmod(top / "locked", 0)
    remove_tree(str(top))
    assert not os.path.lexists(top)
    assert keep.read_text() == "must survive"  # the symlink was removed, not followed
    remove_tree(str(top))  # a missing directory is fine


@pytest.mark.skipif(not ROOT, reason="chattr +i/+a needs CAP_LINUX_IMMUTABLE")
def test_remove_tree_clears_immutable_and_append_only_flags(tmp_path):
    top = tmp_path / "work"
    (top / "dir").mkdir(parents=True)
    for name in ("immutable", "dir/append_only", "dir/inner_file"):
        (top / name).write_text("x")
    flags = {"immutable": "+i", "dir/append_only": "+a", "dir": "+i"}
    for name, flag in flags.items():
        if subprocess.run(["chattr", flag, str(top / name)], capture_output=True).returncode != 0:
            pytest.skip(f"this filesystem does not take chattr {flag}")
    with pytest.raises(PermissionError):  # the flags hold, even for root (ioctl_iflags(2))
        os.unlink(top / "immutable")
    remove_tree(str(top))
    assert not os.path.lexists(top)


@pytest.mark.skipif(not ROOT, reason="a mount point (EBUSY) needs root")
def test_remove_tree_names_what_it_cannot_remove(tmp_path):
    top = tmp_path / "work"
    (top / "a" / "busy").mkdir(parents=True)
    if subprocess.run(["mount", "-t", "tmpfs", "none", str(top / "a" / "busy")]).returncode != 0:
        pytest.skip("cannot mount a tmpfs here")
    try:
        with pytest.raises(OSError, match=r"could not remove busy 1 levels below .*work: Device or resource busy"):
            remove_tree(str(top))
    finally:
        subprocess.run(["umount", str(top / "a" / "busy")])
    remove_tree(str(top))
    assert not top.exists()


def test_a_failed_clean_up_sinks_only_its_own_candidate(monkeypatch, mode):
    """A candidate whose directory cannot be removed gets a non-pass verdict naming it; the batch goes on."""
    import bonft.verifiers.sandbox.runner as sandbox

    if mode:
        pytest.skip("the pool's workers remove directories in their own processes, out of monkeypatch's reach")

    real = sandbox.remove_tree

    def remove(path):
        marked = os.path.exists(os.path.join(path, "cannot-remove-me"))
        real(path)
        if marked:
            raise OSError(16, "simulated: Device or resource busy")

    monkeypatch.setattr(sandbox, "remove_tree", remove)
    mark = ("open('cannot-remove-me', 'w').close()\ndef add(a, b):\n    return a + b", TESTS)
    res = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=2).run_code([CORRECT, mark, CORRECT])
    assert [r.status for r in res] == ["pass", "crashed", "pass"]
    assert res[1].reason == "clean-up failed: OSError: [Errno 16] simulated: Device or resource busy (verdict was pass)"


RESOURCE = {  # the resource attacks of tests/test_sandbox.py that stay within a few seconds
    "infinite_loop": ("while True:\n    pass", "pass"),
    "memory_bomb": ("x = ' ' * (2 ** 34)", "pass"),
    "fork_bomb": ("import os\nwhile True:\n    os.fork()", "pass"),
    "ctypes_fork_bomb": ("import ctypes\nlibc = ctypes.CDLL(None)\nwhile True:\n    libc.fork()", "pass"),
    "segfault": ("import ctypes\nctypes.string_at(0)", "pass"),
    "userns": (USERNS + "userns()\n", "pass"),
}


def test_a_hostile_batch_leaves_nothing_and_every_correct_candidate_passes(monkeypatch, mode):
    import tempfile

    import bonft.verifiers.sandbox.runner as sandbox

    made = []
    real_mkdtemp = tempfile.mkdtemp

    def mkdtemp(*a, **k):
        made.append(real_mkdtemp(*a, **k))
        return made[-1]

    monkeypatch.setattr(sandbox.tempfile, "mkdtemp", mkdtemp)
    hostile = {**{k: v for k, v in ATTACKS.items() if k != "correct"}, **ATTACKS_2, **HOSTILE_CORRECT, **RESOURCE,
               "six_threads": SIX_THREADS}
    jobs, names = [], []
    for name, job in hostile.items():  # each hostile candidate followed by a correct one
        jobs += [job, CORRECT]
        names += [name, "correct"]
    ipc_before = _sysv_keys()
    # 12 s: the fork bombs, loops and memory bombs spin 8 processes at a time on a shared machine; a correct candidate
    # must not time out for want of CPU (it needs well under 1 s alone)
    runner = CodeRunner({}, wall_time=12.0, memory_mb=1024, max_processes=8, workers=4)
    results = runner.run_code(jobs)
    after = {names[i - 1]: (r.status, r.reason) for i, r in enumerate(results) if names[i] == "correct"}
    assert {k: v for k, v in after.items() if v[0] != "pass"} == {}  # keyed by the hostile one before it
    passed = {n for r, n in zip(results, names) if n != "correct" and r.passed}
    # 0 forged verdicts: a hostile candidate may pass only where its code is correct and it merely tries
    # to leave something behind (whether those pass in time depends on the machine's load: the
    # 3000 directories take seconds on a busy disk; their own tests above check them)
    harmless = set(HOSTILE_CORRECT) | {"audit_hook_off_writes_tmp_shm", "six_threads", "userns"}
    assert passed <= harmless, passed - harmless
    assert {"sysv_ipc_left_behind", "forks_zombies_and_an_orphan", "odd_permissions_fifo_socket"} <= passed
    if mode:  # the pool's workers name their directories after themselves
        pids = runner.sandbox_pool().worker_pids()
        left = [d for p in pids for d in glob.glob(os.path.join(tempfile.gettempdir(), f"bonft-*-{p}.*"))]
        assert pids and left == []
    else:
        assert len(made) >= 2 * len(jobs) and [d for d in made if os.path.lexists(d)] == []  # (+ interpreter probes)
    assert _sysv_keys() == ipc_before
    assert _processes_of(_runner_uids(runner)) == []
    assert not [p for p in glob.glob("/tmp/bonft_i13_escape*")]


def test_signals_keep_their_meaning_in_the_pid_namespace():
    """The candidate's process is not the namespace's init, which (pid_namespaces(7)) would ignore
    every signal it has no handler for, SIGXCPU and its own kill(2) included. setrlimit(2): at the
    RLIMIT_CPU soft limit the process gets SIGXCPU (24); signal(7): SIGTERM is 15, SIGABRT 6."""
    runner = CodeRunner({}, wall_time=4.0, cpu_time=1, memory_mb=256, workers=3)
    busy, term, abort = runner.run_code([("while True:\n    pass", "pass"),
                                         ("import os, signal\nos.kill(os.getpid(), signal.SIGTERM)", "pass"),
                                         ("import os\nos.abort()", "pass")])
    assert (busy.status, busy.reason, busy.returncode) == ("limit-exceeded", "cpu time limit 1 s (SIGXCPU)", -24)
    assert (term.status, term.reason, term.returncode) == ("crashed", "killed by SIGTERM", -15)
    assert (abort.status, abort.reason, abort.returncode) == ("crashed", "killed by SIGABRT", -6)


@pytest.mark.skipif(not ROOT, reason="runs the removal as another, unprivileged uid, which needs root to set up")
def test_remove_tree_without_root_gives_back_rights():
    """Without CAP_DAC_OVERRIDE a directory of mode 0 cannot be listed or entered, and one without
    write permission cannot lose entries (path_resolution(7), unlink(2)); the owner may chmod them."""
    import shutil

    python = shutil.which("python3", path="/usr/bin:/usr/local/bin:/bin")
    if python is None:
        pytest.skip("no system python3 the unprivileged uid can run")
    src = os.path.join(os.path.dirname(os.path.abspath(remove_tree.__code__.co_filename)), "procs.py")
    import tempfile

    base = tempfile.mkdtemp(prefix="bonft-rmtree-")  # pytest's tmp_path is not reachable by another uid
    os.chmod(base, 0o777)
    script = f"""
import importlib.util, os
spec = importlib.util.spec_from_file_location("procs", {src!r})
procs = importlib.util.module_from_spec(spec)
spec.loader.exec_module(procs)
top = os.path.join({base!r}, "work")
os.makedirs(top + "/a/b/c")
for d in ("a", "a/b", "a/b/c"):
    with open(os.path.join(top, d, "f"), "w") as f:
        f.write("x")
os.chmod(top + "/a/b/c/f", 0)
os.chmod(top + "/a/b/c", 0)
os.chmod(top + "/a/b", 0o500)
os.chmod(top + "/a", 0)
try:
    os.listdir(top + "/a")
    raise SystemExit("mode 0 did not hold")
except PermissionError:
    pass
procs.remove_tree(top)
print(os.path.lexists(top))
"""
    uid = 65534  # nobody
    try:
        out = subprocess.run([python, "-c", script], capture_output=True, text=True, timeout=60,
                             preexec_fn=lambda: (os.setgid(uid), os.setuid(uid)), env={"PATH": "/usr/bin:/bin"})
    finally:
        remove_tree(base)
    assert (out.returncode, out.stdout.strip()) == (0, "False"), out.stderr[-500:]
