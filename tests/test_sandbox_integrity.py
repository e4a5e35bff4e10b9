"""A verdict the candidate cannot forge, and an OS layer that holds without the Python one.

Every solution in tests/sandbox_attacks.py except ``correct`` is wrong, so a
``pass`` among them would be a forged verdict. Expected behaviour of the OS
layer is taken from the Linux manual pages: mount_namespaces(7) (mounts made
in a private namespace are invisible outside it and go away with it) and
tmpfs(5) (a tmpfs lives in memory and its contents vanish when unmounted).
"""
import os

import pytest
from sandbox_attacks import ATTACKS, ESCAPE_PATHS, runner_mode

from bonft.verifiers import CodeRunner

ROOT = os.geteuid() == 0


def _kernel_allows(flag: int) -> bool:
    """Whether unshare(2) with ``flag`` succeeds here (a container may refuse it even to root)."""
    import subprocess
    import sys

    code = f"import ctypes, sys; sys.exit(ctypes.CDLL(None).unshare({flag}) != 0)"
    return subprocess.run([sys.executable, "-c", code]).returncode == 0


MOUNT_NS = ROOT and _kernel_allows(0x00020000)  # CLONE_NEWNS
NET_NS = ROOT and _kernel_allows(0x40000000)  # CLONE_NEWNET


@pytest.fixture(scope="module", autouse=True, params=[False, True], ids=["one-at-a-time", "pool"])
def mode(request):
    """Each test of this file runs with the one-at-a-time runner and with the sandbox pool."""
    with runner_mode(request.param):
        yield request.param


@pytest.fixture(scope="module")
def attacks(mode):
    for p in ESCAPE_PATHS:
        if os.path.exists(p):
            os.remove(p)
    runner = CodeRunner({}, wall_time=3.0, memory_mb=256, max_processes=4, workers=4)
    results = dict(zip(ATTACKS, runner.run_code(list(ATTACKS.values()))))
    left = [p for p in ESCAPE_PATHS if os.path.exists(p)]
    for p in left:
        os.remove(p)
    return results, left


def test_no_attack_gets_a_pass(attacks):
    r, _ = attacks
    assert r["correct"].status == "pass", r["correct"]
    forged = {k: v.reason for k, v in r.items() if v.passed and k not in ("correct", "audit_hook_off_writes_tmp_shm")}
    assert forged == {}
    # the lying __eq__ never reaches the comparison: only plain data of exact built-in types crosses
    assert (r["lying_eq_object"].status, r["lying_eq_object"].reason) == ("fail", "unsupported return type: Anything")
    assert (r["lying_eq_int_subclass"].status, r["lying_eq_int_subclass"].reason) == (
        "fail", "unsupported return type: Liar")
    assert r["monkeypatch_harness"].status == "fail"  # patched json/os only change what the candidate sends
    assert r["tested_function_raises_SystemExit_0"].status == "fail"
    assert "SystemExit(0) raised by the solution during the tests" in r["tested_function_raises_SystemExit_0"].reason
    for name in ("exit_0_early", "tested_function_calls_os_exit_0"):
        assert (r[name].status, r[name].reason) == ("crashed", "exited with code 0 before the tests finished"), r[name]
    assert r["forged_records_every_fd"].status == "crashed"
    assert "broke the call protocol" in r["forged_records_every_fd"].reason
    for name in ("frame_walk_reporter", "gc_walk_reporter", "patched_isinstance_and_lying_eq"):
        assert r[name].status in ("fail", "crashed"), r[name]


def test_files_written_with_the_audit_hook_off_do_not_outlive_the_run(attacks):
    r, left = attacks
    res = r["audit_hook_off_writes_tmp_shm"]
    if not MOUNT_NS:
        assert "private-tmp" not in res.os_layers  # said so in the result; the files may have landed
        pytest.skip("private /tmp needs root and a kernel that allows mount namespaces")
    # its code is correct, so it passes: the layer below the audit hook is what holds
    assert res.status == "pass" and set(res.os_layers) == {"private-tmp", "private-pids", "private-ipc", "own-uid",
                                                           "no-userns"} | ({"no-network"} if NET_NS else set())
    assert left == []


@pytest.mark.skipif(not MOUNT_NS, reason="private /tmp needs root and mount namespaces")
def test_each_run_sees_its_own_empty_tmp():
    plant = ("import ctypes, os\nlibc = ctypes.CDLL(None)\n"  # ctypes: past the audit hook
             "for d in ('/tmp', '/dev/shm', '/var/tmp'):\n"
             "    libc.close(libc.open(os.path.join(d, 'planted').encode(), os.O_WRONLY | os.O_CREAT, 0o644))\n"
             "def listing(d):\n    return sorted(os.listdir(d))\n")
    look = "import os\ndef listing(d):\n    return sorted(os.listdir(d))\n"
    tests = ("assert listing('/dev/shm') == {shm}\nassert listing('/var/tmp') == {var}\n"
             "assert [n for n in listing('/tmp') if not n.startswith('bonft-sandbox-')] == {tmp}")
    runner = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=1)
    first, second = runner.run_code([
        (plant, tests.format(shm=["planted"], var=["planted"], tmp=["planted"])),
        (look, tests.format(shm=[], var=[], tmp=[])),  # the next run starts from empty dirs
    ])
    assert first.status == "pass", (first.reason, first.stderr)
    assert second.status == "pass", (second.reason, second.stderr)
    assert not any(os.path.exists(os.path.join(d, "planted")) for d in ("/tmp", "/dev/shm", "/var/tmp"))


STACK = """
class Stack:
    def __init__(self):
        self.items = []
    def push(self, x):
        self.items.append(x)
def make_stack():
    return Stack()
def squares(n):
    for i in range(n):
        yield i * i
def squares_list(n):
    return [i * i for i in range(n)]
def sort_in_place(xs):
    xs.sort()
def shout(s):
    print(s.upper())
def parse(s):
    return int(s)
def counts(s):
    import collections
    return collections.Counter(s)
def len(x):
    return -1
def apply(f, x):
    return f(x)
def add1(x):
    return x + 1
import os
LIMIT = 10
"""

SEMANTICS = {
    "plain_results": "assert squares_list(4) == [0, 1, 4, 9]\nassert len([1]) == 1\nassert LIMIT == 10",
    "mutated_argument": "xs = [3, 1, 2]\nsort_in_place(xs)\nassert xs == [1, 2, 3]",
    "printed_output": "import io, contextlib\nbuf = io.StringIO()\nwith contextlib.redirect_stdout(buf):\n"
                      "    shout('hi')\nassert buf.getvalue() == 'HI\\n'",
    "exceptions_as_one_type": "try:\n    parse('x')\nexcept SolutionError as e:\n    assert e.type_name == 'ValueError'\n"
                              "    assert str(e).startswith('ValueError: invalid literal')\nelse:\n    raise AssertionError",
    "builtin_exception_not_raised_as_itself": "try:\n    parse('x')\nexcept ValueError:\n    pass",
    "stdlib_dict_subclass": "c = counts('aab')\nassert type(c) is dict and c == {'a': 2, 'b': 1}",
    "solution_functions_as_arguments": "assert apply(add1, 1) == 2",
    "an_instance": "s = make_stack()",
    "a_class_instance": "s = Stack()",
    "a_generator": "assert list(squares(3)) == [0, 1, 4]",
    "a_module": "assert os.sep == '/'",
    "attribute_of_a_function": "assert add1.__name__ == 'add1' or add1.x",
    "truth_of_a_function": "assert add1",
    "tests_callable_argument": "assert apply(lambda x: x + 1, 1) == 2",
}


def test_only_plain_values_cross_and_calls_keep_their_meaning():
    runner = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=4)
    r = dict(zip(SEMANTICS, runner.run_code([(STACK, t) for t in SEMANTICS.values()])))
    for name in ("plain_results", "mutated_argument", "printed_output", "exceptions_as_one_type",
                 "stdlib_dict_subclass", "solution_functions_as_arguments"):
        assert r[name].status == "pass", (name, r[name].reason, r[name].stderr[-400:])
    got = {name: (r[name].status, r[name].reason) for name in SEMANTICS if r[name].status != "pass"}
    expected = {
        "builtin_exception_not_raised_as_itself": (
            "crashed", "SolutionError: ValueError: invalid literal for int() with base 10: 'x' in the tests"),
        "an_instance": ("fail", "unsupported return type: Stack"),
        "a_class_instance": ("fail", "unsupported return type: Stack"),
        "a_generator": ("fail", "unsupported return type: generator"),
        "a_module": ("fail", "unsupported value: module (the solution's name os)"),
        "attribute_of_a_function": (
            "crashed", "AttributeError: __name__: the tests can only call the solution's function, not read its "
                       "attributes in the tests"),
        "truth_of_a_function": (  # the reason is cut at 200 characters
            "crashed", "TypeError: truth value of the solution's function: the tests can only call the solution's "
                       "functions and classes; their results arrive as plain values (None, bool, int"),
        "tests_callable_argument": (
            "crashed", "TypeError: tests can pass only plain values and the solution's own objects into the "
                       "solution, got function in the tests"),
    }
    assert set(got) == set(expected)
    for name, (status, reason) in expected.items():
        assert got[name][0] == status and got[name][1].startswith(reason), (name, got[name])


REACH = """
import ctypes, os
libc = ctypes.CDLL(None, use_errno=True)
def reach():
    got = []
    for pid in filter(str.isdigit, os.listdir('/proc')):
        try:
            with open('/proc/%s/cmdline' % pid, 'rb') as f:
                if b'def _run_tests(' not in f.read():
                    continue
        except OSError:
            continue
        got.append('found')
        for what, path, flags in (('environ', 'environ', os.O_RDONLY), ('mem', 'mem', os.O_RDWR), ('fd', 'fd/3', os.O_RDONLY)):
            fd = libc.open(('/proc/%s/%s' % (pid, path)).encode(), flags)
            if fd >= 0:
                got.append(what)
                libc.close(fd)
        if libc.ptrace(16, int(pid), None, None) == 0:  # PTRACE_ATTACH
            got.append('ptrace')
        if libc.kill(int(pid), 0) == 0:  # may it be signalled?
            got.append('signal')
    return got
"""


@pytest.mark.skipif(not ROOT, reason="the tests' process has a uid of its own only as root")
def test_the_candidate_cannot_reach_into_the_tests_process():
    # ptrace(2) "Ptrace access mode checking": another uid and a non-dumpable target -> EPERM;
    # proc(5): /proc/PID/mem, environ and fd need that same access; kill(2): EPERM across uids.
    # pid_namespaces(7): with a PID namespace and its own /proc the tests' process is not even listed.
    runner = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=1)
    res = runner.run_code([(REACH, "print(reach())")])[0]
    assert res.status == "pass", (res.reason, res.stderr[-400:])
    assert res.stdout.strip() == ("[]" if "private-pids" in res.os_layers else "['found']")


def test_wire_rebuilds_plain_values_and_refuses_anything_else():
    """The strict decoder of the pipe protocol (bonft/verifiers/sandbox/wire.py), in process.

    Round trips follow the Python docs: float.hex/float.fromhex are exact (incl. inf, nan),
    hex(int) has no digit limit. RFC 8259 section 6: NaN and Infinity are not JSON, so the
    JSON constants must be refused.
    """
    import collections
    import fractions
    import math

    from bonft.verifiers.sandbox.wire import WireClosed, WireError, wire_decode, wire_encode, wire_recv, wire_send

    def no_ref(obj):
        raise TypeError(type(obj).__name__)

    class Liar(int):
        def __eq__(self, other):
            return True

        __hash__ = int.__hash__

    class Text(str):
        pass

    value = [None, True, 3 ** 5000, -0.0, math.inf, 1 + 2j, "é", b"\x00", bytearray(b"a"), (1, [2]),
             {"k": {1, 2}}, frozenset({3}), fractions.Fraction(1, 3), collections.Counter("aab"),
             collections.OrderedDict(a=1), collections.defaultdict(int, b=2)]
    back = wire_decode(wire_encode(value, no_ref), None)
    assert back == value[:-3] + [{"a": 2, "b": 1}, {"a": 1}, {"b": 2}]
    assert [type(x) for x in back[-3:]] == [dict, dict, dict]  # the three stdlib dicts arrive as dict
    for sub in (Liar(0), Text("x"), [1, (2, Liar(3))], {"k": Text("v")}):  # other subclasses are not plain data
        with pytest.raises(TypeError, match="Liar|Text"):
            wire_encode(sub, no_ref)
    with pytest.raises(ValueError, match="more than 200000 parts"):
        wire_encode([0] * 200_001, no_ref)
    assert math.copysign(1, back[3]) == -1 and math.isnan(wire_decode(["f", "nan"], None))
    import numpy as np

    scalars = wire_decode(wire_encode([np.int64(5), np.float32(0.5), np.bool_(True)], no_ref), None)
    assert scalars == [5, 0.5, True] and [type(x) for x in scalars] == [int, float, bool]

    class Half(np.float64):  # numpy's own scalar types only: a subclass's item() could be anything
        pass

    with pytest.raises(TypeError, match="Half"):
        wire_encode(Half(0.5), no_ref)
    assert wire_decode(["h", 7, "Thing"], lambda ref, t: (ref, t)) == (7, "Thing")
    with pytest.raises(TypeError, match="function"):
        wire_encode([len, lambda: 0], no_ref)
    for bad in (["x"], ["i", 5], ["i", "12g"], ["s", 1], ["l", "ab"], ["d", [[["l", []], ["N"]]]],
                ["q", "0x1", "0x0"], ["b", 1], "N", [], ["N", 1], ["h", "1", "t"]):
        with pytest.raises(WireError):
            wire_decode(bad, lambda ref, t: None)
    deep = ["N"]
    for _ in range(80):
        deep = ["l", [deep]]
    with pytest.raises(WireError, match="nested deeper"):
        wire_decode(deep, None)

    r, w = os.pipe()
    try:
        wire_send(w, {"id": 1})
        for raw in (b"2\n[]", b"x\n{}", b"9\n{}", b"3\nNaN", b"99999999\n"):
            os.write(w, raw)
        assert wire_recv(r, 100) == {"id": 1}
        with pytest.raises(WireError, match="not an object"):
            wire_recv(r, 100)
        with pytest.raises(WireError, match="bad frame header"):
            wire_recv(r, 100)
    finally:
        os.close(w)
        os.close(r)
    r, w = os.pipe()
    os.write(w, b"3\nNaN99999999\n")
    os.close(w)
    with pytest.raises(WireError, match="JSON constant NaN"):
        wire_recv(r, 100)
    with pytest.raises(WireError, match="over the 100-byte cap"):
        wire_recv(r, 100)
    with pytest.raises(WireClosed):
        wire_recv(r, 100)
    os.close(r)


def _plain_values():
    from hypothesis import strategies as st

    leaves = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=False), st.text(max_size=8),
                       st.binary(max_size=8), st.complex_numbers(allow_nan=False), st.fractions())
    keys = st.one_of(st.integers(), st.text(max_size=4), st.tuples(st.integers()))
    return st.recursive(leaves, lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.tuples(inner, inner), st.dictionaries(keys, inner, max_size=3),
        st.frozensets(st.integers(), max_size=3)), max_leaves=20)


def _json_like():
    from hypothesis import strategies as st

    leaves = st.one_of(st.none(), st.booleans(), st.integers(), st.text(max_size=6),
                       st.sampled_from(["N", "b", "i", "f", "s", "l", "d", "h", "q", "0x10", "nan", "-0x1p+3"]))
    return st.recursive(leaves, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                        st.dictionaries(st.text(max_size=3), inner, max_size=2)),
                        max_leaves=15)


def test_wire_round_trip_and_strictness_properties():
    """Any plain value comes back equal and of the same type; any JSON value decodes or raises
    WireError, never another exception (common practice for strict decoders: a single error type)."""
    from hypothesis import given

    from bonft.verifiers.sandbox.wire import WireError, wire_decode, wire_encode

    def no_ref(obj):
        raise TypeError(type(obj).__name__)

    @given(_plain_values())
    def round_trip(v):
        back = wire_decode(wire_encode(v, no_ref), None)
        assert back == v and type(back) is type(v)

    @given(_json_like())
    def strict(node):
        try:
            wire_decode(node, lambda ref, t: None)
        except WireError:
            pass

    round_trip()
    strict()


# ------------------------------------------------------------------------------------------------
# Second round. Every solution of ATTACKS_2 is wrong; CORRECT_2 solves the same tests, so that a
# non-pass of an attack is the runner's doing, not a broken test.
CORRECT_2 = """
import math
def area(r):
    return math.pi * r * r
def parity(n):
    return n % 2
def divisors(n):
    return [d for d in range(1, n + 1) if n % d == 0]
def fmt(x):
    return "%.5f" % x
def square(x):
    return x * x
"""


def test_second_round_attacks_get_no_pass():
    from sandbox_attacks import ATTACKS_2, LYING_TESTS, STOP_ITERATION

    runner = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=4)
    names = list(ATTACKS_2)
    controls = [*LYING_TESTS.values(), STOP_ITERATION[1]]
    results = runner.run_code(list(ATTACKS_2.values()) + [(CORRECT_2, t) for t in controls])
    r = dict(zip(names, results))
    assert [c.status for c in results[len(names):]] == ["pass"] * len(controls), results[len(names):]
    got = {k: (v.status, v.reason) for k, v in r.items()}
    lie = ("fail", "unsupported return type: Z")
    assert got == {
        **{name: lie for name in LYING_TESTS}, "issue_example_three_lies": lie,
        "lying_str_subclass": ("fail", "unsupported return type: S"),
        "lying_int_subclass_sub": lie,
        # the solution's StopIteration reaches the tests as SolutionError: the tests' zip does not end early
        "stop_iteration_in_map": ("crashed", "SolutionError: StopIteration in the tests"),
        "reply_ahead_then_segfault": ("crashed", "killed by SIGSEGV after its last reply"),
    }


def test_replies_ahead_of_a_crash_never_pass():
    """The replies a correct ``add`` would give, written before any request, then a segfault after
    0-90 ms: the tests' process may read them all and finish, but the candidate's process did not end
    normally, so the verdict is never pass (signal(7): SIGSEGV is 11). The same replies followed by
    os._exit(0) pass: the judge accepts them as answers, so the crash alone decides the others."""
    from sandbox_attacks import reply_ahead

    runner = CodeRunner({}, wall_time=3.0, memory_mb=256, workers=4)
    reps = 40
    results = runner.run_code([reply_ahead("segfault", (i % 10) * 10) for i in range(reps)]
                              + [reply_ahead("exit0", 150)])
    crashes, control = results[:reps], results[reps]
    assert sum(c.passed for c in crashes) == 0
    assert all(c.status == "crashed" and "killed by SIGSEGV" in c.reason and c.returncode == -11 for c in crashes), \
        [(c.status, c.reason) for c in crashes if "SIGSEGV" not in (c.reason or "")]
    assert control.status == "pass", (control.reason, control.stderr[-300:])
