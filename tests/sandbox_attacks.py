"""Candidates that try to forge a ``pass`` or to leave files behind.

Used by tests/test_sandbox_integrity.py and for the attack table in
docs/verifiers.md. Each entry is ``name -> (solution, tests)``; every solution
except ``correct`` and ``audit_hook_off_writes_tmp_shm`` is wrong (``add`` does
not add), so any ``pass`` among them is a forged verdict; the latter is judged
by the files it leaves behind.
"""
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
