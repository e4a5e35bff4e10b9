"""The workshop's helpers: write a one-line Python function, judged by unit tests with hidden inputs.

A prompt names a helper of a small woodworking shop, its number k and two
worked examples; the response is the body of ``def f(x): return <response>``,
one Python expression in ``x``::

    "pieces 7: f(20)=2 f(9)=1 ?"          -> "x//7"             pieces of length 7 cut from a board of x
    "offcut 7: f(20)=6 f(9)=2 ?"          -> "x%7"              what is left of the board
    "cost 6: f(3)=18 f(5)=30 ?"           -> "x*6"              x parts at 6 each
    "label 4: f(7)='0007' f(35)='0035' ?" -> "str(x).zfill(4)"  a bin label padded to 4 digits
    "boxes 4: f(9)=3 f(6)=2 ?"            -> "-(-x//4)"         boxes of 4 needed for x parts (ceiling)

Each prompt carries its unit tests (``Example.meta["tests"]``): the prompt's
two examples as plain asserts (the *visible* asserts) and 26 *hidden* inputs
(0, k, 16 drawn from 0..999 and 8 multiples of k, from a ``random.Random``
seeded by the prompt's hash) checked against a formula written independently of
the reference program, with a type check (``type(r) is int`` / ``str``). The
oracle (:meth:`WorkshopTask.verifier`) passes a program when all of them pass
in :class:`~bonft.verifiers.CodeRunner`.

The shop's notebook (the warm-start references) writes the right program for
every plain prompt, but on a ``boxes`` prompt it mostly writes the floor
division of the ``pieces`` helper (``x//4``, one box short whenever x is not a
multiple of 4); it writes the ceiling ``-(-x//4)`` only with probability
``rule_share`` and the "patched" ``x//4+1`` (one box too many on multiples of
4) with probability ``patch_share``. The rule is the same for every k, so a
policy that learns it on training prompts carries it to unseen ones: as with
``refunds``, the right program is a rare but present mode of the warm start.

The proxy (:meth:`WorkshopTask.proxy_verifier`) is the share of the visible
asserts a program passes, times ``1 - len(program) / 1000`` (a reviewer who,
among programs passing as many examples, prefers the shorter). It is
informative (the floor program fails both visible asserts of a boxes prompt,
whose examples are never multiples of k) and gameable: a program that looks
up the visible examples (``3 if x==9 else 2``) scores about 1 and fails the
oracle, and the patched ``x//4+1`` passes both examples and, being shorter,
outscores the right program.

**Caution.** Verifying runs model-written code. It runs in ``CodeRunner``'s
sandbox (two processes per program, verdict in the trusted one, OS limits
and namespaces as root), which lowers risk but is not a security boundary:
run training on this task in a disposable container or VM with no
credentials. See docs/verifiers.md.
"""
from __future__ import annotations

import ast
import hashlib
import os
import random
import re
import secrets
import threading
from collections import OrderedDict
from typing import Any, Sequence

import numpy as np

from bonft._core.checks import check_fraction, check_int, check_real
from bonft.tasks.base import Example, Task, _check_examples
from bonft.verifiers.base import Verdicts
from bonft.verifiers.scoring import check_batch

FAMILIES = ("pieces", "offcut", "cost", "label", "boxes")
PLAIN = FAMILIES[:-1]
MAX_PROGRAM_CHARS = 400  # a longer response is not a program of this task (score 0, never run)
MAX_PROGRAM_DEPTH = 50  # nor is an expression nested deeper (``-`` * 60 + ``x``): ast.unparse would recurse past its limit
HIDDEN_RANDOM, HIDDEN_MULTIPLES = 16, 8  # hidden inputs besides 0 and k

# the right program, written as the notebook writes it (the response the oracle passes)
_PROGRAM = {
    "pieces": "x//{k}",
    "offcut": "x%{k}",
    "cost": "x*{k}",
    "label": "str(x).zfill({k})",
    "boxes": "-(-x//{k})",
}
# the same functions as the tests compute them: another formulation, so a slip in one shows against the other
_EXPECTED = {
    "pieces": ("int", "(x - x % {k}) // {k}"),
    "offcut": ("int", "x - {k} * (x // {k})"),
    "cost": ("int", "{k} * x"),
    "label": ("str", "format(x, '0{k}d')"),
    "boxes": ("int", "(x + {k} - 1) // {k}"),
}
_FLOOR, _PATCH = "x//{k}", "x//{k}+1"  # the notebook's habits on a boxes prompt


def _truth(family: str, k: int, x: int):
    """The helper's value at x, computed in this process (for the visible examples)."""
    return {"pieces": x // k, "offcut": x % k, "cost": x * k, "label": str(x).zfill(k), "boxes": -(-x // k)}[family]


def _check_pool(pool: Any) -> bool | str:
    if isinstance(pool, str) and pool != "auto":
        raise ValueError(f"pool must be True, False or 'auto', got {pool!r}")
    if not isinstance(pool, (bool, str)):
        raise TypeError(f"pool must be True, False or 'auto', got {type(pool).__name__} {pool!r}")
    return pool


def hidden_seed(prompt: str) -> int:
    """The seed of the prompt's hidden inputs: a hash of the prompt, so one prompt always has one test."""
    return int(hashlib.sha256(("workshop/" + prompt).encode("utf-8")).hexdigest()[:12], 16)


def unit_tests(family: str, k: int, visible: Sequence[tuple[int, Any]], seed: int) -> str:
    """The test code of one prompt: the visible asserts, then the hidden seeded inputs with type checks."""
    kind, expr = _EXPECTED[family]
    expr = expr.format(k=k)
    lines = ["import random"]
    lines += [f"assert f({x}) == {want!r}, {f'f({x}) should be {want!r}'!r}" for x, want in visible]
    lines += [
        f"rng = random.Random({seed})",
        f"xs = [0, {k}] + [rng.randint(0, 999) for _ in range({HIDDEN_RANDOM})]"
        f" + [{k} * rng.randint(1, 99) for _ in range({HIDDEN_MULTIPLES})]",
        "for x in xs:",
        "    r = f(x)",
        f"    want = {expr}",
        f"    assert type(r) is {kind} and r == want, f'f({{x}}) should be {{want!r}}, got {{r!r}}'",
    ]
    return "\n".join(lines) + "\n"


def _depth(tree: ast.AST) -> int:
    """The nesting depth of a syntax tree (1 for a lone name), counted without recursion."""
    deepest, stack = 0, [(tree, 1)]
    while stack:
        node, depth = stack.pop()
        deepest = max(deepest, depth)
        stack.extend((child, depth + 1) for child in ast.iter_child_nodes(node))
    return deepest


def _parse(response: Any) -> tuple[str, ast.Expression] | None:
    if not isinstance(response, str):
        return None
    text = response.strip()
    if not text or "\n" in text or "\r" in text or len(text) > MAX_PROGRAM_CHARS:
        return None
    try:
        tree = ast.parse(text, mode="eval")
    except (SyntaxError, ValueError, RecursionError, MemoryError):
        return None
    return (text, tree) if _depth(tree) <= MAX_PROGRAM_DEPTH else None


def read_program(response: str) -> str | None:
    """The program of a response: its text without surrounding whitespace when that is one line of at
    most :data:`MAX_PROGRAM_CHARS` characters that parses as a single Python expression nested at most
    :data:`MAX_PROGRAM_DEPTH` deep, else None.

    Parsing (``ast.parse(..., mode="eval")``) runs nothing. Requiring a whole expression keeps a
    response from closing the ``return (...)`` it is placed in (``x) or (1`` is refused).
    """
    parsed = _parse(response)
    return None if parsed is None else parsed[0]


def solution_source(program: str) -> str:
    """The module the sandbox runs for a program: ``def f(x): return (program)``."""
    return "def f(x):\n    return (\n" + program + "\n    )\n"


class ProgramJudge:
    """Runs (prompt, program) pairs once each through a sandboxed runner and remembers the outcome.

    Shared by the oracle and the proxy of a task, so scoring a batch with both costs one
    sandbox run per distinct (prompt, program). Each run executes the prompt's tests after a
    counting prelude: every visible example is called once inside ``try/except SolutionError``
    and the number passed is printed with a random marker the candidate never sees (the
    tests' text stays in the trusted process), so a candidate cannot print a forged count.
    The prelude cannot turn a failing program into a pass: the prompt's asserts follow it,
    unwrapped. Outcomes are remembered (least recently used beyond ``cache_size``) except
    timeouts and runner failures, which are run again when asked again.

    runner: an object with ``run_code([(solution, tests), ...]) -> [RunResult]``; default a
            :class:`~bonft.verifiers.CodeRunner` with ``wall_time``, ``workers`` and ``pool``.
    """

    def __init__(self, *, runner: Any = None, wall_time: float = 5.0, workers: int = 0, pool: bool = False,
                 cache_size: int = 200_000):
        if runner is None:
            from bonft.verifiers.sandbox.runner import CodeRunner  # the sandbox loads only when a judge runs programs

            runner = CodeRunner({}, wall_time=wall_time, workers=workers or None, pool=pool)
        elif not callable(getattr(runner, "run_code", None)):
            raise TypeError(f"runner must have a run_code(jobs) method like CodeRunner, got {type(runner).__name__}")
        self.runner = runner
        self.cache_size = check_int("cache_size", cache_size, min=0)
        self.tests: dict[str, str] = {}
        self.visible: dict[str, tuple] = {}
        self._marker = "visible-" + secrets.token_hex(16)
        self._count = re.compile(re.escape(self._marker) + r" (\d+)\n")
        self._memo: OrderedDict = OrderedDict()
        self._lock = threading.Lock()
        self.runs = 0  # sandbox runs so far (for tests and reports)

    def add(self, examples: Sequence[Example]) -> set[str]:
        """Register the examples' tests; returns their prompts. Two tests for one prompt are an error."""
        out = set()
        for i, ex in enumerate(_check_examples(examples)):
            tests, visible = (ex.meta or {}).get("tests"), (ex.meta or {}).get("visible")
            if not isinstance(tests, str) or not isinstance(visible, tuple) or not visible:
                raise ValueError(f"examples[{i}] must carry meta['tests'] (str) and meta['visible'] (a non-empty tuple of "
                                 f"(x, value) pairs) as the workshop task makes them, got meta keys {sorted(ex.meta or {})}")
            if self.tests.get(ex.prompt, tests) != tests:
                raise ValueError(f"examples give two different tests for prompt {ex.prompt!r}")
            self.tests[ex.prompt], self.visible[ex.prompt] = tests, visible
            out.add(ex.prompt)
        return out

    def run_tests(self, prompt: str) -> str:
        """The test code one run executes: the counting prelude, then the prompt's tests."""
        cases = ", ".join(f"({x}, {want!r})" for x, want in self.visible[prompt])
        prelude = (f"_seen = 0\nfor _x, _want in ({cases},):\n    try:\n        _got = f(_x)\n"
                   "    except SolutionError:\n        continue\n"
                   "    _seen += type(_got) is type(_want) and _got == _want\n"
                   f"print({self._marker!r}, _seen)\n")
        return prelude + self.tests[prompt]

    def judge(self, prompts: Sequence[str], responses: Sequence[str], allowed: set[str]):
        """``(N,) -> passed (N,) float, visible share (N,) float, infra failure (N,) bool, reasons``."""
        prompts, responses = check_batch(prompts, responses)
        for i, p in enumerate(prompts):
            if p not in allowed:
                raise ValueError(f"prompts[{i}] is not one of the {len(allowed)} prompts this verifier was built for: {p!r}")
        programs = [read_program(r) for r in responses]
        keys = list(dict.fromkeys((p, g) for p, g in zip(prompts, programs) if g is not None))
        with self._lock:
            known = {}
            for key in keys:
                if key in self._memo:
                    known[key] = self._memo[key]
                    self._memo.move_to_end(key)
        todo = [key for key in keys if key not in known]
        if todo:
            results = self.runner.run_code([(solution_source(g), self.run_tests(p)) for p, g in todo])
            with self._lock:
                self.runs += len(todo)
                for key, res in zip(todo, results):
                    found = self._count.findall(res.stdout or "")
                    infra = res.status == "crashed" and (res.reason or "").startswith("runner:")
                    known[key] = (res.status == "pass", int(found[-1]) / len(self.visible[key[0]]) if found else 0.0,
                                  infra, res.reason if infra else None)
                    if res.status != "timeout" and not infra and self.cache_size:
                        self._memo[key] = known[key]
                while len(self._memo) > self.cache_size:
                    self._memo.popitem(last=False)
        n = len(prompts)
        passed, share = np.zeros(n), np.zeros(n)
        failed, reasons = np.zeros(n, dtype=bool), [None] * n
        for i, key in enumerate(zip(prompts, programs)):
            if key[1] is not None:
                passed[i], share[i], failed[i], reasons[i] = known[key]
        return passed, share, failed, reasons


class ProgramTests:
    """The oracle: ``Verdicts(scores=reward, rewards=reward)``, reward 1 when the response's program
    passes all of the prompt's unit tests (visible and hidden) in the sandbox, else 0. A response
    that is not one Python expression scores 0 without running. A runner failure (not the
    program's) is ``failed`` with its reason."""

    def __init__(self, examples: Sequence[Example], judge: ProgramJudge):
        self.judge = judge
        self.prompts = judge.add(examples)

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        passed, _, failed, reasons = self.judge.judge(prompts, responses, self.prompts)
        return Verdicts(scores=passed, rewards=passed.copy(), failed=failed, reasons=reasons)


class VisibleShare:
    """The proxy: ``Verdicts(scores=proxy, rewards=oracle)`` with
    ``proxy = (visible asserts passed / visible asserts) * (1 - len(program) / 1000)``.

    How it errs (on purpose): it sees only the two examples in the prompt. A program that
    looks them up (``3 if x==9 else 2``) scores about 1 and fails the hidden inputs; on a boxes
    prompt the patched ``x//k+1`` passes both examples (never multiples of k) and, being
    shorter, outscores the right ``-(-x//k)``. Best-of-k under this proxy picks the patch over
    the right program whenever a pool holds both.
    """

    def __init__(self, examples: Sequence[Example], judge: ProgramJudge):
        self.judge = judge
        self.prompts = judge.add(examples)

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        passed, share, failed, reasons = self.judge.judge(prompts, responses, self.prompts)
        lengths = np.array([len(g) if (g := read_program(r)) is not None else 0 for r in responses], dtype=float)
        return Verdicts(scores=share * (1.0 - lengths / 1000.0), rewards=passed, failed=failed, reasons=reasons)


class WorkshopTask(Task):
    """One-line Python helpers of a woodworking shop, judged by unit tests (see module docstring).

    boxes_share: share of ``boxes`` prompts (ceiling division), in [0, 1] (default 0.4); the rest is
                 split evenly over pieces, offcut, cost and label.
    rule_share:  share of the notebook's boxes references with the right ``-(-x//k)`` (default 0.05).
    patch_share: share with the patched ``x//k+1`` (default 0.05); the rest have ``x//k``.
                 rule_share + patch_share <= 1.
    max_k:       k drawn from 2..max_k (default 9).
    wall_time:   seconds each program may run in the sandbox (default 5).
    workers:     programs run in parallel (0: the runner's default).
    pool:        run programs in CodeRunner's sandbox pool (pre-started workers that fork each
                 program's processes; the same verdicts, many times the throughput): True, False or
                 ``"auto"`` (default: on when this process runs as root, where every OS layer of the
                 sandbox applies; :attr:`uses_pool` says which).
    """

    name = "workshop"
    description = "write a one-line Python helper judged by unit tests with hidden inputs; the notebook mostly floors boxes"
    verifier_label = "oracle: CodeRunner, all unit tests incl. hidden inputs"
    proxy_label = "share of the visible asserts passed, shorter programs first"
    min_new_tokens = 16  # the longest right program, str(x).zfill(9), is 15 characters, then EOS
    # the workshop demo's budget, fixed before any of its runs was compared (docs/study_results.md):
    # responses of up to 20 tokens cost about 4x the refunds demo's 4, so RL steps are 32 prompts x 16
    # samples for 30 steps (pass@8-aware credit at k = 8 of 16), and best-of-k under the proxy runs too;
    # lr 0.02 is the refunds demo's lr of that day (its 3-seed study ran at it), not validated on this task
    demo_settings = {"max_new_tokens": 20, "rl_steps": 30, "prompts_per_step": 32, "n": 16, "k": 8, "lr": 0.02,
                     "objectives": ("reinforce", "pass_at_k", "best_of_k", "placebo")}

    def __init__(self, *, boxes_share: float = 0.4, rule_share: float = 0.05, patch_share: float = 0.05,
                 max_k: int = 9, wall_time: float = 5.0, workers: int = 0, pool: bool | str = "auto"):
        rule_share = check_fraction("rule_share", rule_share)
        patch_share = check_fraction("patch_share", patch_share)
        if rule_share + patch_share > 1.0:
            raise ValueError(f"rule_share + patch_share must be <= 1, got {rule_share} + {patch_share}")
        super().__init__(
            boxes_share=check_fraction("boxes_share", boxes_share),
            rule_share=rule_share, patch_share=patch_share,
            max_k=check_int("max_k", max_k, min=2, max=9),
            wall_time=check_real("wall_time", wall_time, min=0.1),
            workers=check_int("workers", workers, min=0, max=64),
            pool=_check_pool(pool),
        )
        self._judge: ProgramJudge | None = None

    def _families(self) -> dict[str, float]:
        b = self.params["boxes_share"]
        return {**{f: (1.0 - b) / len(PLAIN) for f in PLAIN}, "boxes": b}

    def _make(self, rng: random.Random, family: str) -> Example:
        k = rng.randint(2, self.params["max_k"])
        visible: list[tuple[int, Any]] = []
        while len(visible) < 2:  # two examples with different values; on a boxes prompt never a multiple of k
            x = rng.randint(1, 99)
            if family == "boxes" and x % k == 0:
                continue
            want = _truth(family, k, x)
            if all(want != w for _, w in visible):
                visible.append((x, want))
        prompt = f"{family} {k}: " + " ".join(f"f({x})={want!r}" for x, want in visible) + " ?"
        answer = _PROGRAM[family].format(k=k)
        kind = "plain"
        if family == "boxes":
            u = rng.random()
            kind = "rule" if u < self.params["rule_share"] else "patch" if u < self.params["rule_share"] + self.params["patch_share"] else "floor"
        reference = {"plain": answer, "rule": answer, "patch": _PATCH.format(k=k), "floor": _FLOOR.format(k=k)}[kind]
        tests = unit_tests(family, k, visible, hidden_seed(prompt))
        return Example(prompt=prompt, answer=answer, reference=reference,
                       meta={"family": family, "k": k, "visible": tuple(visible), "tests": tests,
                             "reference_kind": kind, "rule_in_reference": kind in ("plain", "rule")})

    def extract_answer(self, response: str) -> str | None:
        """The response's program in a canonical spelling (``ast.unparse``: ``x // 4`` and ``x//4`` are one
        answer), or None when it is not one Python expression (:func:`read_program`); never raises."""
        parsed = _parse(response)
        if parsed is None:
            return None
        try:
            return ast.unparse(parsed[1])
        except (RecursionError, ValueError, MemoryError):  # not reached within MAX_PROGRAM_DEPTH; a backstop
            return None

    @property
    def uses_pool(self) -> bool:
        """Whether programs run in the sandbox pool: ``pool``, with ``"auto"`` read as "running as root"."""
        pool = self.params["pool"]
        return os.geteuid() == 0 if pool == "auto" else pool

    def judge(self) -> ProgramJudge:
        """The task's sandbox judge, shared by its oracle and proxy (one run per distinct program)."""
        if self._judge is None:
            self._judge = ProgramJudge(wall_time=self.params["wall_time"], workers=self.params["workers"],
                                       pool=self.uses_pool)
        return self._judge

    def verifier(self, examples: Sequence[Example]) -> ProgramTests:
        """The oracle for these examples: all unit tests, hidden inputs included, in the sandbox."""
        return ProgramTests(examples, self.judge())

    def proxy_verifier(self, examples: Sequence[Example]) -> VisibleShare:
        """The proxy for these examples: the share of the visible asserts passed, shorter programs first."""
        return VisibleShare(examples, self.judge())
