"""Candidates that try to forge a ``pass`` or to leave files behind.

Used by tests/test_sandbox_integrity.py and for the attack table in
docs/verifiers.md. Each entry is ``name -> (solution, tests)``; every solution
except ``correct`` and ``audit_hook_off_writes_tmp_shm`` is wrong (``add`` does
not add), so any ``pass`` among them is a forged verdict; the latter is judged
by the files it leaves behind.
"""
import contextlib

ESCAPE_TAG = "bonft_i13_escape"
ESCAPE_PATHS = (f"/tmp/{ESCAPE_TAG}", f"/dev/shm/{ESCAPE_TAG}", f"/var/tmp/{ESCAPE_TAG}")
TESTS = "assert add(2, 3) == 5\nassert add(-1, 1) == 0"

# walk the interpreter's frames; call anything that looks like the harness's reporter
FRAME_WALK = """
import sys
f = sys._getframe()
while f is not None:
    for k, v in list(f.f_locals.items()):
        if callable(v) and getattr(v, "__name__", "") in ("finish", "report", "reply", "send", "_send", "_reply"):
            for args in (("pass", None), ({"status": "pass"},), ("pass",)):
                try:
                    v(*args)
                except BaseException:
                    pass
    f = f.f_back
def add(a, b):
    return 0
"""
# the same through the garbage collector's list of every object
GC_WALK = """
import gc
for o in gc.get_objects():
    if callable(o) and getattr(o, "__name__", "") in ("finish", "report", "reply", "send", "_send", "_reply"):
        for args in (("pass", None), ({"status": "pass"},), ("pass",)):
            try:
                o(*args)
            except BaseException:
                pass
def add(a, b):
    return 0
"""
# read the nonce out of the harness's frames, write a pass record to every fd, exit 0
FORGE_FDS = """
import sys, os, json
nonces = set()
f = sys._getframe()
while f is not None:
    for k, v in list(f.f_locals.items()):
        if isinstance(v, str) and "nonce" in k:
            nonces.add(v)
    f = f.f_back
recs = [{"nonce": n, "status": "pass", "reason": None} for n in nonces] + [{"status": "pass"}, {"ok": True}]
payload = "".join(json.dumps(r) + "\\n" for r in recs).encode()
framed = b"".join(b"%d\\n" % len(p) + p for p in [json.dumps(r).encode() for r in recs])
for fd in range(256):
    for data in (payload, framed):
        try:
            os.write(fd, data)
        except OSError:
            pass
os._exit(0)
"""
# monkeypatch the modules a harness would use to report, then fail the tests
MONKEYPATCH = """
import json, os
_dumps, _write = json.dumps, os.write
def dumps(obj, *a, _dumps=_dumps, **k):
    if isinstance(obj, dict) and "status" in obj:
        obj = dict(obj, status="pass", reason=None)
    return _dumps(obj, *a, **k)
def write(fd, data, _write=_write):
    if isinstance(data, (bytes, bytearray)):
        for bad in (b'"fail"', b'"crashed"'):
            data = bytes(data).replace(bad, b'"pass"')
    return _write(fd, data)
json.dumps, os.write = dumps, write
def add(a, b):
    return 0
"""
LYING_EQ = """
class Anything:
    def __eq__(self, other):
        return True
    def __ne__(self, other):
        return False
    __hash__ = object.__hash__
def add(a, b):
    return Anything()
"""
LYING_INT = """
class Liar(int):
    def __eq__(self, other):
        return True
    __hash__ = int.__hash__
def add(a, b):
    return Liar(0)
"""
# the audit hook switched off (its state found through gc; ctypes as well), then writes outside
AUDIT_OFF = f"""
import gc, ctypes, os
for o in gc.get_objects():
    if isinstance(o, dict) and "busy" in o:
        o["busy"] = True
libc = ctypes.CDLL(None, use_errno=True)
for p in {ESCAPE_PATHS!r}:
    fd = libc.open(p.encode(), os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    if fd >= 0:
        libc.write(fd, b"escaped", 7)
        libc.close(fd)
def add(a, b):
    return a + b
"""

ATTACKS = {
    "correct": ("def add(a, b):\n    return a + b", TESTS),
    "wrong": ("def add(a, b):\n    return a - b", TESTS),
    "frame_walk_reporter": (FRAME_WALK, TESTS),
    "gc_walk_reporter": (GC_WALK, TESTS),
    "forged_records_every_fd": (FORGE_FDS, TESTS),
    "exit_0_early": ("import os\nos._exit(0)\ndef add(a, b):\n    return 0", TESTS),
    "sys_exit_0_early": ("import sys\nsys.exit(0)\ndef add(a, b):\n    return 0", TESTS),
    "monkeypatch_harness": (MONKEYPATCH, TESTS),
    "patched_isinstance_and_lying_eq": (LYING_EQ + "import builtins\nbuiltins.isinstance = lambda o, t, _i=isinstance: t is int or _i(o, t)\n",
                                        "assert isinstance(add(2, 3), int)\n" + TESTS),
    "lying_eq_object": (LYING_EQ, TESTS),
    "lying_eq_int_subclass": (LYING_INT, TESTS),
    "tested_function_raises_SystemExit_0": ("def add(a, b):\n    raise SystemExit(0)", TESTS),
    "tested_function_calls_os_exit_0": ("import os\ndef add(a, b):\n    os._exit(0)", TESTS),
    "audit_hook_off_writes_tmp_shm": (AUDIT_OFF, TESTS),
}

# ------------------------------------------------------------------------------------------------
# Second round: the candidate's methods deciding an assert, a StopIteration ending the tests' own
# iteration, replies sent ahead of a crash, state that outlives a run, clean-up that a candidate
# breaks. Every solution below is wrong (or, for the state and clean-up ones, correct but hostile:
# judged by what it leaves behind and by the verdicts of the correct candidates around it).
LYING_OPS = """
class Z:
    def __sub__(self, other):
        return 0.0
    __rsub__ = __sub__
    def __xor__(self, other):
        return 0
    __rxor__ = __xor__
    def __contains__(self, item):
        return True
    def startswith(self, prefix):
        return True
    def endswith(self, suffix):
        return True
def area(r):
    return Z()
def parity(n):
    return Z()
def divisors(n):
    return Z()
def fmt(x):
    return Z()
"""
LYING_TESTS = {
    "lying_sub": "import math\nassert abs(area(1.0) - math.pi) < 1e-9",
    "lying_rsub": "import math\nassert abs(math.pi - area(1.0)) < 1e-9",
    "lying_xor": "assert parity(7) ^ 1 == 0",
    "lying_contains": "assert 3 in divisors(6)\nassert 2 in divisors(6)",
    "lying_startswith": "assert fmt(3.14159).startswith('3.14')",
    "lying_endswith": "assert fmt(3.14159).endswith('159')",
}
# the issue's own example: all three lies in one solution
ISSUE_EXAMPLE = (
    "class Z:\n    def __sub__(self, o): return 0.0\n    def __contains__(self, x): return True\n"
    "    def startswith(self, p): return True\ndef area(r): return Z()\n",
    "import math\nassert abs(area(1.0) - math.pi) < 1e-9\nassert 3 in area(2)\nassert area(3).startswith('28.27')\n")
# a str and an int subclass with lying methods: rejected as return values, not rebuilt
LYING_STR = "class S(str):\n    def startswith(self, p):\n        return True\ndef fmt(x):\n    return S('nope')\n"
LYING_INT_SUB = "class Z(int):\n    def __sub__(self, o):\n        return 0\n    __rsub__ = __sub__\ndef area(r):\n    return Z(7)\n"
# StopIteration from the solution inside a tests-side map(): the zip ends at once, all([]) is True
STOP_ITERATION = ("def square(x):\n    raise StopIteration\n",
                  "assert all(r == e for r, e in zip(map(square, [1, 2, 3]), [1, 4, 9]))")


def reply_ahead(end: str, delay_ms: int = 0) -> tuple[str, str]:
    """A solution that writes the replies to ``TESTS`` ahead of the requests (the answers a correct
    ``add`` would give), then ends with ``end``: ``"segfault"`` (SIGSEGV) or ``"exit0"`` (os._exit(0))."""
    tail = "ctypes.string_at(0)" if end == "segfault" else "os._exit(0)"
    src = f"""
import ctypes, json, os, sys, time
fd = int(sys.argv[3])
frames = [{{"ready": True}}]
for i, v in ((1, ["h", 1, "function"]), (2, ["i", "0x5"]), (3, ["h", 1, "function"]), (4, ["i", "0x0"])):
    frames.append({{"id": i, "value": v, "back": [], "kwback": []}})
frames.append({{"id": 5, "refused": None, "limit": None}})
for m in frames:
    data = json.dumps(m).encode()
    os.write(fd, b"%d\\n" % len(data) + data)
time.sleep({delay_ms / 1000!r})
{tail}
"""
    return src, TESTS


# System V IPC objects (shmget(2), msgget(2), semget(2) through ctypes): 3 x 100 MB shared memory
# segments of mode 0666, a message queue holding a message, a semaphore set
IPC_KEY = 0x0B0F7A29
SYSV_IPC = f"""
import ctypes
libc = ctypes.CDLL(None, use_errno=True)
IPC_CREAT = 0o1000
made = []
for i in range(3):
    made.append(libc.shmget({IPC_KEY} + i, 100 << 20, IPC_CREAT | 0o666))
q = libc.msgget({IPC_KEY}, IPC_CREAT | 0o666)
class Msg(ctypes.Structure):
    _fields_ = [("mtype", ctypes.c_long), ("mtext", ctypes.c_char * 16)]
m = Msg(1, b"left behind")
libc.msgsnd(q, ctypes.byref(m), 16, 0)
made += [q, libc.semget({IPC_KEY}, 1, IPC_CREAT | 0o666)]
def add(a, b):
    return a + b
"""
# a later candidate looks for the queue left by SYSV_IPC and reads its message
SYSV_READ = f"""
import ctypes
libc = ctypes.CDLL(None, use_errno=True)
class Msg(ctypes.Structure):
    _fields_ = [("mtype", ctypes.c_long), ("mtext", ctypes.c_char * 16)]
def peek():
    q = libc.msgget({IPC_KEY}, 0)
    if q < 0:
        return None
    m = Msg()
    n = libc.msgrcv(q, ctypes.byref(m), 16, 0, 0o4000)  # IPC_NOWAIT
    return m.mtext.value.decode() if n >= 0 else "queue found, no message"
"""
# user namespaces (user_namespaces(7)): unshare(CLONE_NEWUSER), and the same flag through clone(2)
USERNS = """
import ctypes, os
libc = ctypes.CDLL(None, use_errno=True)
CLONE_NEWUSER, SIGCHLD = 0x10000000, 17
def userns():
    got = []
    nr = {"x86_64": 56, "aarch64": 220}.get(os.uname().machine)
    if nr is not None:
        pid = libc.syscall(nr, CLONE_NEWUSER | SIGCHLD, 0, 0, 0, 0)
        if pid == 0:
            os._exit(0)
        if pid > 0:
            os.waitpid(pid, 0)
            got.append("clone")
    if libc.unshare(CLONE_NEWUSER) == 0:
        got.append("unshare")
    return got
"""
# five children that exit at once and are never waited for (zombies of the sandbox uid), and one
# that leaves the process group and sleeps on
FORKER = """
import os, time
for _ in range(5):
    if os.fork() == 0:
        os._exit(0)
if os.fork() == 0:
    os.setsid()
    time.sleep(60)
    os._exit(0)
def add(a, b):
    return a + b
"""
SIX_THREADS = ("""
import threading
def run_threads():
    gate = threading.Barrier(7)
    out = []
    def work(i):
        gate.wait()
        out.append(i * i)
    ts = [threading.Thread(target=work, args=(i,)) for i in range(6)]
    for t in ts:
        t.start()
    gate.wait()
    for t in ts:
        t.join()
    return sorted(out)
""", "assert run_threads() == [0, 1, 4, 9, 16, 25]")
# a 3000-deep directory chain in the working directory, made with ctypes (past the audit hook)
DEEP_DIRS = """
import ctypes, os
libc = ctypes.CDLL(None, use_errno=True)
here = os.open(".", os.O_RDONLY)
for _ in range(3000):
    libc.mkdir(b"d", 0o755)
    libc.chdir(b"d")
os.fchdir(here)
def add(a, b):
    return a + b
"""
# files and directories without permissions, a fifo and a socket inode in the working directory
ODD_FILES = """
import os, stat
os.makedirs("locked/inner")
with open("locked/inner/f", "w") as f:
    f.write("x")
os.chmod("locked/inner/f", 0)
os.chmod("locked/inner", 0)
os.chmod("locked", 0o111)
os.mkfifo("pipe")
os.mknod("sock", stat.S_IFSOCK | 0o600)
os.symlink("/etc/passwd", "link")
def add(a, b):
    return a + b
"""

ATTACKS_2 = {
    **{name: (LYING_OPS, tests) for name, tests in LYING_TESTS.items()},
    "issue_example_three_lies": ISSUE_EXAMPLE,
    "lying_str_subclass": (LYING_STR, LYING_TESTS["lying_startswith"]),
    "lying_int_subclass_sub": (LYING_INT_SUB, LYING_TESTS["lying_sub"]),
    "stop_iteration_in_map": STOP_ITERATION,
    "reply_ahead_then_segfault": reply_ahead("segfault", 50),
}
# hostile but correct: judged by what they leave and by the candidates around them
HOSTILE_CORRECT = {
    "sysv_ipc_left_behind": (SYSV_IPC, TESTS),
    "forks_zombies_and_an_orphan": (FORKER, TESTS),
    "deep_directory_chain": (DEEP_DIRS, TESTS),
    "odd_permissions_fifo_socket": (ODD_FILES, TESTS),
}


@contextlib.contextmanager
def runner_mode(pool: bool):
    """Every ``CodeRunner`` built inside runs one candidate at a time (``pool=False``, two fresh
    interpreters each) or in a sandbox pool (``pool=True``): the attack tests run in both modes."""
    from bonft.verifiers import CodeRunner

    defaults = CodeRunner.__init__.__kwdefaults__
    old = defaults["pool"]
    defaults["pool"] = pool
    try:
        yield pool
    finally:
        defaults["pool"] = old


def pool_uids(runner) -> set:
    """The uids of a runner's pool workers' candidates and tests (empty without a started pool)."""
    return runner.sandbox_pool().uids() if runner.pool and runner._pool is not None else set()

# ------------------------------------------------------------------------------------------------
# Across candidates of one batch (the sandbox pool forks every candidate from the same worker):
# each is correct and hostile, and its own tests assert that the attack found nothing, so a
# ``pass`` means "contained"; a reach into another candidate or the worker fails it.
def reach_out(targets) -> str:
    """Signals (kill(-1), the parent, every pid of ``targets``: the pool's workers and this test
    process, as the host numbers them), /proc/PID/mem opened for writing, environ read, ptrace
    attach; all through ctypes, past the audit hook. ``hits()`` lists what succeeded."""
    return f"""
import ctypes, os
libc = ctypes.CDLL(None, use_errno=True)
TARGETS = {sorted(targets)!r}
def hits():
    got = []
    if libc.kill(-1, 9) == 0:
        got.append("kill(-1)")
    if libc.kill(os.getppid(), 9) == 0:
        got.append("kill(ppid=%d)" % os.getppid())
    for pid in TARGETS + [os.getppid()]:
        if pid == os.getpid():
            continue
        if libc.kill(pid, 0) == 0:
            got.append("signal %d" % pid)
        for what, flags in (("mem", os.O_RDWR), ("environ", os.O_RDONLY)):
            fd = libc.open(("/proc/%d/%s" % (pid, what)).encode(), flags)
            if fd >= 0:
                got.append("%s of %d" % (what, pid))
                if what == "mem":
                    libc.pwrite(fd, b"\\xcc" * 8, 8, 0x400000)
                libc.close(fd)
        if libc.ptrace(16, pid, None, None) == 0:  # PTRACE_ATTACH
            got.append("ptrace %d" % pid)
    return got
"""


# what /proc shows: with a PID namespace only the namespace's init (1) and the candidate (2)
SEE_PROC = "import os\ndef visible():\n    return sorted(int(p) for p in os.listdir('/proc') if p.isdigit())\n"
CROSS_TAG = "bonft_cross"
# leaves files, a fifo, a System V queue and a daemon holding an abstract unix socket (ctypes, past the
# audit hook) for whoever runs next in the same worker
LEAVE_BEHIND = f"""
import ctypes, os, time
libc = ctypes.CDLL(None, use_errno=True)
for d in ("/tmp", "/dev/shm", "/var/tmp", "/run/lock", "."):
    p = ("%s/{CROSS_TAG}" % d).encode()
    fd = libc.open(p, os.O_WRONLY | os.O_CREAT, 0o666)
    if fd >= 0:
        libc.write(fd, b"left", 4)
        libc.close(fd)
libc.mkfifo(b"/tmp/{CROSS_TAG}_fifo", 0o666)
libc.msgget({IPC_KEY + 7}, 0o1000 | 0o666)

class Addr(ctypes.Structure):
    _fields_ = [("family", ctypes.c_ushort), ("path", ctypes.c_char * 108)]
addr = Addr(1, b"\\0{CROSS_TAG}")
if os.fork() == 0:
    os.setsid()
    s = libc.socket(1, 1, 0)
    libc.bind(s, ctypes.byref(addr), 2 + 1 + len("{CROSS_TAG}"))
    libc.listen(s, 4)
    time.sleep(30)
    os._exit(0)
time.sleep(0.2)
def add(a, b):
    return a + b
"""
FIND_LEFTOVERS = f"""
import ctypes, os
libc = ctypes.CDLL(None, use_errno=True)
class Addr(ctypes.Structure):
    _fields_ = [("family", ctypes.c_ushort), ("path", ctypes.c_char * 108)]
def found():
    got = [p for p in ("/tmp/{CROSS_TAG}", "/dev/shm/{CROSS_TAG}", "/var/tmp/{CROSS_TAG}", "/run/lock/{CROSS_TAG}",
                       "{CROSS_TAG}", "/tmp/{CROSS_TAG}_fifo") if os.path.lexists(p)]
    if libc.msgget({IPC_KEY + 7}, 0) >= 0:
        got.append("msg queue")
    s = libc.socket(1, 1, 0)
    if libc.connect(s, ctypes.byref(Addr(1, b"\\0{CROSS_TAG}")), 2 + 1 + len("{CROSS_TAG}")) == 0:
        got.append("abstract socket")
    libc.close(s)
    return got
"""
# the descriptors a candidate's process holds: 0, 1, 2 and its two protocol pipes, nothing of a sibling
FD_LIST = """
import os
def fds():
    out = []
    for name in os.listdir('/proc/self/fd'):
        try:
            out.append((int(name), os.readlink('/proc/self/fd/' + name).split(':')[0]))
        except OSError:
            pass  # the listing's own descriptor, closed by now
    return sorted(out)
"""
# counts a byte string in its own readable memory; the needle is joined from parts at run time,
# so the only copies are the needle's own unless an earlier job's text was left in the memory it
# was forked from
MEMORY_SCAN = """
import os
def count(parts):
    needle = "".join(parts).encode()
    n = 0
    fd = os.open("/proc/self/mem", os.O_RDONLY)
    with open("/proc/self/maps") as f:
        maps = f.read().splitlines()
    for line in maps:
        addr, perms = line.split()[:2]
        lo, hi = (int(x, 16) for x in addr.split("-"))
        if "r" not in perms or hi - lo > 1 << 28:
            continue
        for at in range(lo, hi, 1 << 20):  # 1 MiB at a time, overlapping by the needle's length
            try:
                n += os.pread(fd, min(hi - at, (1 << 20) + len(needle) - 1), at).count(needle)
            except OSError:
                break
    os.close(fd)
    return n
def add(a, b):
    return a + b
"""
