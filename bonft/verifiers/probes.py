"""Can these unit tests be passed without solving the task? Gaming candidates, run for real.

Unit tests become a reward, and a policy trained against a reward searches for
whatever earns it. :func:`probe_code_tests` answers, per prompt and before any
compute is spent, whether a generic gaming candidate -- one that never tries
to solve the task -- passes the prompt's tests when run through
:class:`~bonft.verifiers.CodeRunner`. Each probe is built from the test text
alone (as a policy that saw the tests in its prompt could), defining every
name the tests take from the solution:

``equal_to_anything``  every function returns an object whose ``__eq__`` is
                       always true (and ``__bool__`` true). CodeRunner accepts
                       only plain data as a result (``unsupported return
                       type``), so this never passes: a check of the runner.
``constant_reply``     every function returns one constant: each literal the
                       asserts compare against, and ``True, False, None, 0, 1,
                       "", []``, one candidate per constant.
``memorised_asserts``  a lookup table read from the asserts: the exact literal
                       inputs of each ``f(...) == expected`` (also ``assert
                       f(...)``, ``assert not f(...)``, ``is``, and each of
                       several such checks joined by ``and`` in one assert)
                       return the expected value; anything else returns None.
``silent_none``        accepts any arguments, does nothing, returns None.
``raise_everywhere``   every call raises ``ValueError``: passes tests that
                       catch and swallow exceptions around their asserts.
``echo_expected``      prints every literal found in the asserts, returns None:
                       passes tests that check printed output loosely.
``early_exit``         exits with status 0 at import, or raises SystemExit(0)
                       from every call. CodeRunner never passes an exit; a
                       check of the runner too.
``changed_arguments``  the lookup table of ``memorised_asserts``; any other
                       call changes every list, dict, set and bytearray
                       argument in place (empties it, or sets a list to
                       ``[0]`` / ``[1]``) and returns a constant (as
                       ``constant_reply``, or that 0 / 1); a call with no such
                       argument raises. CodeRunner copies an argument changed
                       in place back into the tests' object (Python's own
                       semantics), so tests that compute the expected value
                       from the same object *after* calling the solution
                       compare with the answer for the changed input. Reported
                       only where ``constant_reply``, ``memorised_asserts``
                       and ``silent_none`` all fail (they run with it, reported
                       or not): otherwise the change is not what fooled the tests.

One more probe is not run by default, because CodeRunner cannot be fooled by it:

``lying_operators``    every function returns an object whose operators,
                       comparisons and methods all say yes (``x - y`` is
                       itself, ``x < tol``, ``3 in x``, ``x.startswith(...)``
                       and ``x == y`` are true), and the tests run **in the
                       same process** as that object, as an in-process
                       runner (``exec`` of solution and tests together) would
                       run them. It passes the tests such a runner would let
                       a wrong solution through; run it (``probes=ALL_PROBES``)
                       if the same tests are ever run in process.

A probe that passes gets a recommendation (:data:`ADVICE`): hidden inputs
drawn at random from a seeded generator and compared with a reference,
several inputs with different answers, type checks (``type(r) is int``),
property checks, exact output comparisons, no try/except around asserts.
"""
from __future__ import annotations

import ast
import builtins
import json
from dataclasses import dataclass, field
from typing import Mapping

from bonft._core.jsonl import decode_utf8
from bonft.verifiers.sandbox.runner import CodeRunner, check_tests_code

PROBES = ("equal_to_anything", "constant_reply", "memorised_asserts", "silent_none", "raise_everywhere",
          "echo_expected", "early_exit", "changed_arguments")
IN_PROCESS_PROBES = ("lying_operators",)  # not run by default: they test an in-process runner, not CodeRunner
ALL_PROBES = PROBES + IN_PROCESS_PROBES
ADVICE = {
    "equal_to_anything": "an object that claims to equal anything passes: the runner should never allow this "
                         "(it accepts only plain return values); report it as a bonft bug",
    "lying_operators": "in one process with the tests, an object whose operators and methods lie passes "
                       "(CodeRunner refuses it as a return value): check each result's type first "
                       "(type(r) is float) wherever these tests may run in process",
    "constant_reply": "one constant passes: test several inputs whose expected results differ",
    "memorised_asserts": "a lookup table of the asserted inputs passes: add hidden inputs drawn from a "
                         "seeded random generator and compare with a reference implementation or a property",
    "silent_none": "a function that does nothing passes: assert on every result, and check its type",
    "raise_everywhere": "raising an exception passes: do not wrap asserts in try/except; check expected "
                        "exceptions explicitly",
    "echo_expected": "printing the expected literals passes: compare the exact printed output for several inputs",
    "early_exit": "exiting early passes: the runner should never allow this; report it as a bonft bug",
    "changed_arguments": "a solution that empties or overwrites its list/dict/set arguments passes: the tests "
                         "compute expected values from arguments the solution may change: compute the expected "
                         "value first, or pass copies (r = f(list(xs)))",
}
# probes that pass without changing any argument: where one of them passes, changed_arguments is not reported
_WITHOUT_CHANGES = ("constant_reply", "memorised_asserts", "silent_none")
NO_SOLUTION_CALL = ("the tests call no function of the solution (they read no name it defines): any code passes; "
                    "a problem of the tests, not of the runner: call the solution's functions in the asserts")
_DEFAULT_CONSTANTS = (True, False, None, 0, 1, "", [])
_MAX_CONSTANTS = 12


@dataclass(frozen=True)
class ProbeResult:
    """One prompt's probes: ``passed`` names the probes that passed; ``statuses[probe]`` lists the
    runner's statuses of that probe's candidates; ``advice`` one sentence per passing probe."""

    prompt: str
    passed: tuple[str, ...]
    statuses: dict[str, tuple[str, ...]]
    advice: tuple[str, ...]


@dataclass(frozen=True)
class CodeTestsReport:
    """Probe results per prompt. ``ok`` when no probe passed anywhere; ``str()`` is one line per
    prompt and a summary table (probe -> prompts it passed)."""

    results: list[ProbeResult] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not any(r.passed for r in self.results)

    def to_dict(self) -> dict:
        return {"ok": self.ok, "prompts": [
            {"prompt": r.prompt, "passed": list(r.passed), "statuses": {k: list(v) for k, v in r.statuses.items()},
             "advice": list(r.advice)} for r in self.results]}

    def __str__(self) -> str:
        lines = []
        for r in self.results:
            head = r.prompt.replace("\n", " ")
            head = head if len(head) <= 50 else head[:47] + "..."
            if r.passed:
                lines.append(f"GAMEABLE  {head}: passed by {', '.join(r.passed)}")
                lines += [f"          - {a}" for a in r.advice]
            else:
                lines.append(f"ok        {head}: no probe passed")
        n = len(self.results)
        lines += ["", f"{'probe':<20} {'prompts passed':>14}"]
        ran = [p for p in ALL_PROBES if any(p in r.statuses for r in self.results)]  # a probe not run has no row
        for p in ran:
            k = sum(p in r.passed for r in self.results)
            lines.append(f"{p:<20} {f'{k}/{n}':>14}")
        gameable = sum(bool(r.passed) for r in self.results)
        lines.append(f"{gameable}/{n} prompts have tests a probe passes")
        return "\n".join(lines)


# ----------------------------------------------------------------------------- reading the tests
def solution_names(tests: str) -> list[str]:
    """Names the tests read but never define, import or take from builtins: the solution's, sorted."""
    tree = ast.parse(tests)
    loaded, defined = set(), set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Name):
            (loaded if isinstance(node.ctx, ast.Load) else defined).add(node.id)
        elif isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            defined.add(node.name)
            a = node.args if not isinstance(node, ast.ClassDef) else None
            if a is not None:
                defined.update(x.arg for x in a.args + a.kwonlyargs + a.posonlyargs)
                defined.update(x.arg for x in (a.vararg, a.kwarg) if x is not None)
        elif isinstance(node, (ast.Import, ast.ImportFrom)):
            defined.update((al.asname or al.name).split(".")[0] for al in node.names)
        elif isinstance(node, ast.ExceptHandler) and node.name:
            defined.add(node.name)
        elif isinstance(node, ast.arg):
            defined.add(node.arg)
    return sorted(loaded - defined - set(vars(builtins)))


def _literal(node):
    try:
        return True, ast.literal_eval(node)
    except (ValueError, TypeError, SyntaxError, MemoryError, RecursionError):
        return False, None


def _call_of(node, names):
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id in names:
        args = [_literal(a) for a in node.args]
        kws = [(k.arg, _literal(k.value)) for k in node.keywords if k.arg is not None]
        if all(ok for ok, _ in args) and all(ok for _, (ok, _) in kws):
            return node.func.id, tuple(v for _, v in args), tuple(sorted((k, v) for k, (_, v) in kws))
    return None


def _conjuncts(test) -> list:
    """The parts of an assert's test joined by ``and`` (``a and (b and not c)`` -> a, b, not c); else the test."""
    if isinstance(test, ast.BoolOp) and isinstance(test.op, ast.And):
        return [part for value in test.values for part in _conjuncts(value)]
    return [test]


def asserted_cases(tests: str, names) -> list[tuple[str, tuple, tuple, object]]:
    """``(function, args, kwargs, expected)`` for each assert on a call with literal arguments; an assert
    of several checks joined by ``and`` gives one case per check (``assert f(7) and not f(8)``: two)."""
    names, out = set(names), []
    checks = [t for node in ast.walk(ast.parse(tests)) if isinstance(node, ast.Assert) for t in _conjuncts(node.test)]
    for t in checks:
        if isinstance(t, ast.UnaryOp) and isinstance(t.op, ast.Not) and _call_of(t.operand, names):
            out.append(_call_of(t.operand, names) + (False,))
        elif _call_of(t, names):
            out.append(_call_of(t, names) + (True,))
        elif isinstance(t, ast.Compare) and len(t.ops) == 1 and isinstance(t.ops[0], (ast.Eq, ast.Is)):
            for call, other in ((t.left, t.comparators[0]), (t.comparators[0], t.left)):
                ok, value = _literal(other)
                if ok and _call_of(call, names):
                    out.append(_call_of(call, names) + (value,))
                    break
    return out


def _literals(tests: str) -> list:
    """Literal values the asserts compare against, in order of first appearance."""
    seen = []
    for node in ast.walk(ast.parse(tests)):
        if isinstance(node, ast.Assert):
            for sub in ast.walk(node.test):
                if isinstance(sub, (ast.Constant, ast.List, ast.Tuple, ast.Dict, ast.Set, ast.UnaryOp)):
                    ok, v = _literal(sub)
                    if ok and not any(type(v) is type(s) and v == s for s in seen):
                        seen.append(v)
    return seen


# ----------------------------------------------------------------------------- building probes
def _define(names, body: str, prefix: str = "") -> str:
    defs = "".join(f"def {n}(*args, **kwargs):\n    {body}\n" for n in names)
    return prefix + defs


def build_probes(tests: str) -> dict[str, list[str]]:
    """Probe name -> the solution sources that make it up, for one prompt's tests."""
    names = solution_names(tests)
    lits = _literals(tests)
    consts = []
    for v in lits + list(_DEFAULT_CONSTANTS):
        if not any(type(v) is type(c) and v == c for c in consts):
            consts.append(v)
    table = {}
    for fn, args, kwargs, expected in asserted_cases(tests, names):
        table.setdefault(fn, {}).setdefault(repr((args, kwargs)), expected)
    memo = "".join(
        f"def {n}(*args, **kwargs):\n    return {table.get(n, {})!r}.get(repr((args, tuple(sorted(kwargs.items())))))\n"
        for n in names)
    changed = [_changing(names, table, "None", repr(c)) for c in consts[:_MAX_CONSTANTS]]
    changed += [_changing(names, table, fill, fill) for fill in ("0", "1")]
    anything = ("class _Anything:\n    def __eq__(self, other):\n        return True\n"
                "    def __ne__(self, other):\n        return False\n    def __bool__(self):\n        return True\n"
                "    __hash__ = object.__hash__\n")
    echo = "\n".join(f"    print({str(v)!r})" for v in lits) or "    pass"
    in_process = (_LIAR + _define(names, "return _Liar()")
                  + f"_BONFT_TESTS = {tests!r}\n" + _IN_PROCESS)
    return {
        "equal_to_anything": [_define(names, "return _Anything()", anything)],
        "constant_reply": [_define(names, f"return {c!r}") for c in consts[:_MAX_CONSTANTS]],
        "memorised_asserts": [memo],
        "silent_none": [_define(names, "return None")],
        "raise_everywhere": [_define(names, "raise ValueError('probe')")],
        "echo_expected": ["".join(f"def {n}(*args, **kwargs):\n{echo}\n" for n in names)],
        "early_exit": ["import os\nos._exit(0)\n", _define(names, "raise SystemExit(0)")],
        "changed_arguments": changed,
        "lying_operators": [in_process],
    }


# changes every mutable argument in place (CodeRunner copies the change back into the tests' objects)
_CHANGE = """def _bonft_change(args, kwargs, fill):
    changed = False
    for a in list(args) + list(kwargs.values()):
        if isinstance(a, list):
            a[:] = [] if fill is None else [fill]
            changed = True
        elif isinstance(a, (dict, set, bytearray)):
            a.clear()
            changed = True
    if not changed:
        raise ValueError("probe: no argument to change")
"""


def _changing(names, table: dict, fill: str, result: str) -> str:
    """A solution that answers the asserted literal calls from ``table`` and on any other call changes its
    mutable arguments (emptied, or a list set to ``[fill]``) and returns ``result`` (source literals)."""
    defs = "".join(
        f"def {n}(*args, **kwargs):\n"
        f"    key = repr((args, tuple(sorted(kwargs.items()))))\n"
        f"    if key in {table.get(n, {})!r}:\n"
        f"        return {table.get(n, {})!r}[key]\n"
        f"    _bonft_change(args, kwargs, {fill})\n"
        f"    return {result}\n"
        for n in names)
    return _CHANGE + defs


# an object whose every operator, comparison and method says yes (all return itself, which is true)
_LIAR = """class _Liar:
    def __eq__(self, other):
        return True
    def __ne__(self, other):
        return False
    __lt__ = __le__ = __gt__ = __ge__ = __eq__
    def __bool__(self):
        return True
    def __hash__(self):
        return 0
    def __contains__(self, item):
        return True
    def __iter__(self):
        return iter(())
    def __getattr__(self, name):
        if name.startswith("__"):
            raise AttributeError(name)
        return lambda *args, **kwargs: self
    def _same(self, *args, **kwargs):
        return self
    __call__ = __getitem__ = __neg__ = __pos__ = __abs__ = __invert__ = __round__ = _same
for _op in ("add", "sub", "mul", "truediv", "floordiv", "mod", "pow", "matmul", "lshift", "rshift", "and",
            "or", "xor"):
    setattr(_Liar, "__%s__" % _op, _Liar._same)
    setattr(_Liar, "__r%s__" % _op, _Liar._same)
"""
# the tests run in the candidate's own process, next to the liar: what an in-process runner does
_IN_PROCESS = """def _bonft_in_process():
    ns = dict(globals(), __name__="__main__")
    exec(compile(_BONFT_TESTS, "tests.py", "exec"), ns)
    return True
"""
_IN_PROCESS_TESTS = "assert _bonft_in_process() is True"


# ----------------------------------------------------------------------------- running
def probe_code_tests(tests: Mapping[str, str] | CodeRunner, *, probes=PROBES, runner: CodeRunner | None = None,
                     progress: bool = False) -> CodeTestsReport:
    """Run the gaming probes against each prompt's tests; ``(P prompts) -> CodeTestsReport``.

    tests:  prompt -> test code, or a :class:`CodeRunner` (its tests and limits are used).
    probes: which probes to run (names from :data:`PROBES`, default; or :data:`ALL_PROBES`, which
            adds ``lying_operators``: the tests run in process with a lying object).
    runner: the runner to use with a tests mapping (default ``CodeRunner(tests, wall_time=5)``).

    Tests that read no name of the solution get one advice line, :data:`NO_SOLUTION_CALL` (any code
    passes them); tests with no statement (blank or comments only) are a ValueError.

    Caution: a clean report means these generic probes fail, not that the tests cannot be
    gamed; a policy under optimisation pressure searches far wider. It runs only our probe
    code, never model output, but it does run your tests.
    """
    if isinstance(tests, CodeRunner):
        runner, tests = tests, tests.tests
    if not isinstance(tests, Mapping):
        raise TypeError(f"tests must be a mapping prompt -> test code or a CodeRunner, got {type(tests).__name__}")
    if isinstance(probes, str) or not all(p in ALL_PROBES for p in probes) or not probes:
        raise ValueError(f"probes must be a non-empty list from {', '.join(ALL_PROBES)}, got {probes!r}")
    if runner is None:
        runner = CodeRunner(tests)
    elif not isinstance(runner, CodeRunner):
        raise TypeError(f"runner must be a CodeRunner, got {type(runner).__name__}")
    for prompt, code in tests.items():
        if isinstance(code, str):
            try:
                check_tests_code(code)
            except ValueError as e:
                raise ValueError(f"the tests of prompt {prompt!r:.60} {e}") from None
    # changed_arguments is told apart from the probes that pass without changing an argument: those run with it
    run = set(probes) | (set(_WITHOUT_CHANGES) if "changed_arguments" in probes else set())
    jobs, owners = [], []
    for prompt, code in tests.items():
        for probe, sources in build_probes(code).items():
            if probe in run:
                jobs += [(src, _IN_PROCESS_TESTS if probe in IN_PROCESS_PROBES else code) for src in sources]
                owners += [(prompt, probe)] * len(sources)
    results = runner.run_code(jobs, progress=progress)
    statuses: dict[str, dict[str, list[str]]] = {p: {} for p in tests}
    for (prompt, probe), res in zip(owners, results):
        statuses[prompt].setdefault(probe, []).append(res.status)
    out = []
    for prompt in tests:
        passed = tuple(p for p in probes if "pass" in statuses[prompt].get(p, ()))
        if any("pass" in statuses[prompt].get(p, ()) for p in _WITHOUT_CHANGES):  # passed unchanged: not the change
            passed = tuple(p for p in passed if p != "changed_arguments")
        # without a name of the solution every candidate passes: the runner's checks are not at fault
        advice = (NO_SOLUTION_CALL,) if passed and not solution_names(tests[prompt]) else tuple(ADVICE[p] for p in passed)
        out.append(ProbeResult(prompt, passed, {k: tuple(v) for k, v in statuses[prompt].items() if k in probes},
                               advice))
    return CodeTestsReport(out)


def read_code_tests(path: str) -> dict[str, str]:
    """Read a tests file: JSON Lines, one ``{"prompt": str, "tests": str}`` per line.

    Bytes that are not UTF-8, another key, or a prompt on two lines is a ``ValueError`` naming the line(s): the result maps each
    prompt to one test code, as :class:`CodeRunner` does, so a second line would replace the first unseen.
    """
    out: dict[str, str] = {}
    first_line: dict[str, int] = {}
    with open(path, "rb") as f:
        text = decode_utf8(f.read(), str(path))
    for i, line in enumerate(text.split("\n"), 1):  # only "\n" ends a line: a JSON string may hold U+2028
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except ValueError as e:
            raise ValueError(f"{path} line {i} must be a JSON object, got invalid JSON ({e})") from None
        if not isinstance(rec, dict) or not isinstance(rec.get("prompt"), str) or not isinstance(rec.get("tests"), str):
            raise ValueError(f"{path} line {i} must be {{\"prompt\": str, \"tests\": str}}, got {line.strip()[:80]}")
        extra = sorted(set(rec) - {"prompt", "tests"})
        if extra:
            raise ValueError(f"{path} line {i} has unknown key {extra[0]!r}: a line takes only the keys prompt, tests "
                             "(bonft check-tests reads a data file with more columns through --prompt-field / "
                             "--tests-field, or a recipe's data through --recipe)")
        prompt = rec["prompt"]
        if prompt in first_line:
            raise ValueError(f"{path} lines {first_line[prompt]} and {i} both give tests for prompt {prompt!r:.60}: "
                             f"each prompt has one test code (join the two into one 'tests' string)")
        first_line[prompt] = i
        out[prompt] = rec["tests"]
    return out


def write_code_tests(path: str, tests: Mapping[str, str]) -> str:
    """Write ``prompt -> tests`` as the JSON Lines file :func:`read_code_tests` reads; returns ``path``."""
    with open(path, "w", encoding="utf-8") as f:
        for prompt, code in tests.items():
            f.write(json.dumps({"prompt": prompt, "tests": code}) + "\n")
    return path
