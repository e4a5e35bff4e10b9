"""The probe kit finds weak unit tests and leaves strong ones alone.

Which probe should pass which test follows from the test text alone (worked
out by hand below, beside each case): a test that checks one literal input is
passed by a lookup table of that input; a test that never compares a result is
passed by anything that does not raise; a try/except around the assert swallows
the failure. Strong tests (several inputs with different answers, type checks,
hidden inputs from a seeded generator compared with a reference) follow common
practice for test design; each is also checked to pass an honest solution, so
"no probe passed" is not bought by tests that nothing can pass.
"""
import json
import re
from pathlib import Path

import pytest

from bonft.testing import CodeTestsReport, probe_code_tests
from bonft.verifiers import CodeRunner
from bonft.verifiers.probes import (
    ALL_PROBES,
    PROBES,
    asserted_cases,
    build_probes,
    read_code_tests,
    solution_names,
    write_code_tests,
)

WEAK = {
    # one input, == a literal: the constant 5 and a table {(2, 3): 5} both pass
    "write add(a, b)": "assert add(2, 3) == 5",
    # results never compared: anything that does not raise passes, raising does not
    "write sort_list(xs)": "sort_list([3, 1, 2])",
    # the assert sits in try/except Exception: even raising passes
    "write halve(x)": "try:\n    assert halve(8) == 4\nexcept Exception:\n    pass",
}
STRONG = {
    "write add(a, b)": (
        "import random\n"
        "assert add(2, 3) == 5 and add(-4, 1) == -3 and add(0, 0) == 0\n"
        "rng = random.Random(20261202)\n"
        "for _ in range(30):\n"
        "    a, b = rng.randint(-10**9, 10**9), rng.randint(-10**9, 10**9)\n"
        "    r = add(a, b)\n"
        "    assert type(r) is int and r == a + b, (a, b, r)\n"
    ),
    "write sort_list(xs)": (
        "import random\n"
        "rng = random.Random(7)\n"
        "for n in (0, 1, 5, 20):\n"
        "    xs = [rng.randint(-50, 50) for _ in range(n)]\n"
        "    out = sort_list(list(xs))\n"
        "    assert type(out) is list and out == sorted(xs), (xs, out)\n"
    ),
}
HONEST = {"write add(a, b)": "def add(a, b):\n    return a + b",
          "write sort_list(xs)": "def sort_list(xs):\n    return sorted(xs)"}


@pytest.fixture(scope="module")
def runner():
    return CodeRunner({}, wall_time=3.0, memory_mb=256)


def test_reading_the_test_text():
    assert solution_names("import math\nx = 3\nassert add(x, math.pi) == f(len([1]))") == ["add", "f"]
    assert solution_names("def helper(n):\n    return n\nassert g(helper(1), key=lambda v: v)") == ["g"]
    cases = asserted_cases("assert add(2, 3) == 5\nassert 7 == add(3, 4)\nassert is_odd(3)\nassert not is_odd(2)\n"
                           "assert add(a, 1) == 2", ["add", "is_odd"])
    assert cases == [("add", (2, 3), (), 5), ("add", (3, 4), (), 7), ("is_odd", (3,), (), True),
                     ("is_odd", (2,), (), False)]
    probes = build_probes(WEAK["write add(a, b)"])
    # 5 (compared with the call), 2, 3 (its arguments), then True, False, None, 0, 1, "", []
    # (True and 1 differ in type: both kept)
    assert [s.split("return ")[1].strip() for s in probes["constant_reply"]] == \
        ["5", "2", "3", "True", "False", "None", "0", "1", "''", "[]"]
    assert "{'((2, 3), ())': 5}" in probes["memorised_asserts"][0]


def test_asserts_joined_by_and_are_memorised_one_check_at_a_time(runner):
    # by hand: each check joined by `and` is one literal input with its expected value, as on separate lines
    assert asserted_cases("assert add(2, 3) == 5 and add(1, 1) == 2\nassert is_prime(7) and (not is_prime(8) "
                          "and is_prime(2))", ["add", "is_prime"]) == [
        ("add", (2, 3), (), 5), ("add", (1, 1), (), 2),
        ("is_prime", (7,), (), True), ("is_prime", (8,), (), False), ("is_prime", (2,), (), True)]
    tests = {"add": "assert add(2, 3) == 5 and add(1, 1) == 2", "prime": "assert is_prime(7) and not is_prime(8)"}
    report = probe_code_tests(tests, probes=("memorised_asserts", "silent_none"), runner=runner)
    # a lookup table of the asserted inputs passes both; doing nothing (None) passes neither
    assert [r.passed for r in report.results] == [("memorised_asserts",), ("memorised_asserts",)], str(report)


def test_weak_tests_are_caught(runner):
    from bonft.verifiers import UncheckedTestsWarning

    with pytest.warns(UncheckedTestsWarning, match=r"^1 of 3 prompts' tests check nothing .*tests\['write sort_list\(xs\)'\]"):
        weak_runner = CodeRunner(WEAK, wall_time=3.0, memory_mb=256)  # sort_list's tests call it and check nothing
    report = probe_code_tests(WEAK, runner=weak_runner)
    got = {r.prompt: set(r.passed) for r in report.results}
    assert {"constant_reply", "memorised_asserts"} <= got["write add(a, b)"]
    assert not {"silent_none", "raise_everywhere", "equal_to_anything", "echo_expected"} & got["write add(a, b)"]
    assert {"silent_none", "constant_reply", "memorised_asserts", "echo_expected"} <= got["write sort_list(xs)"]
    assert "raise_everywhere" not in got["write sort_list(xs)"]
    # CodeRunner accepts only plain return values: the always-equal object is refused even where
    # the result is never looked at, like an exit
    assert not any("equal_to_anything" in g for g in got.values())
    assert "raise_everywhere" in got["write halve(x)"]  # the try/except swallowed the failure
    assert not any("early_exit" in g for g in got.values())  # the runner never passes an exit
    assert not report.ok
    lines = str(report).splitlines()
    assert lines[0].startswith("GAMEABLE  write add(a, b): passed by constant_reply, memorised_asserts")
    assert "3/3 prompts have tests a probe passes" in lines[-1]
    assert json.loads(json.dumps(report.to_dict()))["ok"] is False


def test_strong_tests_pass_no_probe_and_an_honest_solution(runner, tmp_path):
    honest = runner.run_code([(HONEST[p], t) for p, t in STRONG.items()])
    assert [r.status for r in honest] == ["pass", "pass"], [(r.reason, r.stderr[-300:]) for r in honest]
    path = write_code_tests(str(tmp_path / "tests.jsonl"), STRONG)
    assert read_code_tests(path) == STRONG
    report = probe_code_tests(CodeRunner(read_code_tests(path), wall_time=3.0, memory_mb=256))
    assert isinstance(report, CodeTestsReport) and report.ok, str(report)
    assert all(r.passed == () and r.advice == () for r in report.results)
    assert "0/2 prompts have tests a probe passes" in str(report)


def test_probe_arguments_are_validated(tmp_path):
    with pytest.raises(TypeError, match="tests must be a mapping prompt -> test code or a CodeRunner, got list"):
        probe_code_tests(["assert True"])
    with pytest.raises(ValueError, match="probes must be a non-empty list from equal_to_anything, .*got \\['guess'\\]"):
        probe_code_tests({"p": "pass"}, probes=["guess"])
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"prompt": "p"}\n')
    with pytest.raises(ValueError, match='line 1 must be {"prompt": str, "tests": str}'):
        read_code_tests(str(bad))


@pytest.mark.parametrize("text, message", [
    # a prompt -> tests mapping keeps one test code per prompt: a second line would replace the first unseen
    ('{"prompt": "p", "tests": "assert f(1) == 2"}\n\n{"prompt": "q", "tests": "assert g()"}\n'
     '{"prompt": "p", "tests": "assert f(2) == 3"}\n',
     r"dup.jsonl lines 1 and 4 both give tests for prompt 'p': each prompt has one test code"),
    ('{"prompt": "p", "tests": "assert f(1) == 2", "wall_time": 3}\n',
     r"dup.jsonl line 1 has unknown key 'wall_time': a line takes only the keys prompt, tests"),
])
def test_tests_file_with_a_repeated_prompt_or_an_unknown_key(tmp_path, capsys, text, message):
    from bonft.cli import main

    path = tmp_path / "dup.jsonl"
    path.write_text(text)
    with pytest.raises(ValueError, match=message):
        read_code_tests(str(path))
    assert main(["check-tests", str(path), "--probes", "constant_reply"]) == 2
    err = capsys.readouterr().err
    assert re.search(message, err) and "Traceback" not in err, err


def _documented_example() -> str:
    """The probe example of docs/verifiers.md (test_documented_probe_example_runs runs it whole)."""
    root = Path(__file__).resolve().parents[1]
    return re.search(r"```python\n(from bonft.testing import probe_code_tests\n.*?)```",
                     (root / "docs" / "verifiers.md").read_text(), re.S).group(1)


def test_documented_probe_example_runs():
    # the example's own asserts: the first prompt's test is gamed by a constant and a lookup table, the second by none
    exec(compile(_documented_example(), "docs/verifiers.md probe example", "exec"), {"__name__": "__doc__"})


def test_check_tests_command_on_the_documented_example(tmp_path, capsys):
    from bonft.cli import main

    ns = {}
    exec(_documented_example().split("report = ")[0], ns)  # the tests mapping only; test_readme runs the rest
    path = write_code_tests(str(tmp_path / "tests.jsonl"), ns["tests"])
    out_json = tmp_path / "report.json"
    assert main(["check-tests", path, "--wall-time", "3", "--memory-mb", "256", "--json", str(out_json)]) == 1
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "GAMEABLE  Write add(a, b).: passed by constant_reply, memorised_asserts"
    assert lines[3] == "ok        Write add3(a, b, c).: no probe passed"
    assert "memorised_asserts               1/2" in lines and "silent_none                     0/2" in lines
    assert lines[-2:] == ["1/2 prompts have tests a probe passes", f"json: {out_json}"]
    assert json.loads(out_json.read_text())["prompts"][1]["passed"] == []
    strong = write_code_tests(str(tmp_path / "strong.jsonl"), {"write sort_list(xs)": STRONG["write sort_list(xs)"]})
    assert main(["check-tests", strong, "--probes", "memorised_asserts,silent_none", "--wall-time", "3"]) == 0
    # the in-process probe runs when named: the sort_list tests check type(out) is list first, so it fails
    assert main(["check-tests", strong, "--probes", "lying_operators", "--wall-time", "3"]) == 0
    assert main(["check-tests", str(tmp_path / "none.jsonl")]) == 2
    assert "TESTS.jsonl must be an existing file" in capsys.readouterr().err


# Tests that an object with lying operators passes when it runs in one process with them (worked
# out by hand: x - y, abs(x), x < tol, 3 in x and x.startswith(p) are all the object itself or True),
# and the same tests with a type check first, which it fails (type(r) is float is False for it).
IN_PROCESS = {
    "area, tolerance": "import math\nassert abs(area(1.0) - math.pi) < 1e-9",
    "area, reversed": "import math\nassert abs(math.pi - area(1.0)) < 1e-9",
    "divisors, membership": "assert 3 in divisors(6)",
    "fmt, prefix": "assert fmt(3.14159).startswith('3.14')",
    "area, typed": "import math\nr = area(1.0)\nassert type(r) is float and abs(r - math.pi) < 1e-9",
}


def test_lying_operators_probe_finds_tests_an_in_process_runner_would_pass():
    from bonft.testing import ALL_PROBES as exported

    assert "lying_operators" not in PROBES and "lying_operators" in ALL_PROBES and exported == ALL_PROBES  # opt-in
    probes = ("memorised_asserts", "silent_none", "lying_operators")
    report = probe_code_tests(CodeRunner(IN_PROCESS, wall_time=3.0, memory_mb=256), probes=probes)
    got = {r.prompt: r.passed for r in report.results}
    # no assert compares a call with ==, so the lookup table answers None everywhere, as does silent_none
    assert got == {
        "area, tolerance": ("lying_operators",),
        "area, reversed": ("lying_operators",),
        "divisors, membership": ("lying_operators",),
        "fmt, prefix": ("lying_operators",),
        "area, typed": (),
    }, str(report)
    assert report.results[0].statuses["lying_operators"] == ("pass",)
    assert report.results[4].statuses["lying_operators"] == ("crashed",)  # an AssertionError in process
    assert "lying_operators                 4/5" in str(report).splitlines()
    # through CodeRunner itself the same object is refused as a return value
    runner = CodeRunner({}, wall_time=3.0, memory_mb=256)
    liar = build_probes(IN_PROCESS["area, tolerance"])["lying_operators"][0]
    res = runner.run_code([(liar, IN_PROCESS["area, tolerance"])])[0]
    assert (res.status, res.reason) == ("fail", "unsupported return type: _Liar")


def test_tests_that_call_no_solution_function_are_blamed_not_the_runner(tmp_path, capsys):
    # "assert True" and a test of math alone pass any code, an exit at import included: that is a problem of the
    # tests; the runner's advice ("report it as a bonft bug") was printed for them
    from bonft.cli import main

    tests = {"a": "assert True", "b": "import math\nassert math.sqrt(4) == 2"}
    path = write_code_tests(str(tmp_path / "trivial.jsonl"), tests)
    assert main(["check-tests", path, "--probes", "constant_reply,early_exit", "--wall-time", "3"]) == 1
    out = capsys.readouterr().out
    assert out.count("- the tests call no function of the solution (they read no name it defines): any code passes") == 2
    assert "bonft bug" not in out, out


@pytest.mark.parametrize("code", ["", "   \n", "# to do\n"])
def test_empty_tests_are_refused(code):
    with pytest.raises(ValueError, match=r"the tests of prompt 'p' must hold at least one statement, got none \(only "
                                         r"blanks or comments\): any code would pass"):
        probe_code_tests({"p": code, "q": "assert f(1) == 2"}, runner=CodeRunner({}))


# hidden random inputs compared with a reference, the reference called on the same list *after* the solution:
# CodeRunner copies a list the solution changed in place back into the tests' list (Python's semantics), so a
# solution that empties it is compared with sum([]) == 0 (worked out by hand)
_SUM_HEAD = ("assert total([1, 2]) == 3\nassert total([]) == 0\nassert total([0, 3, 4]) == 7\nimport random\n"
             "def _ref_total(xs):\n    return sum(xs)\nrng = random.Random(7)\nfor _ in range(15):\n"
             "    args = ([rng.randint(0, 9) for _ in range(rng.randint(0, 5))],)\n")
_SUM_TAIL = "    assert type(r) is type(e) and r == e, (args, r, e)\n"
CHANGED = {
    "reference after the solution": _SUM_HEAD + "    r = total(*args)\n    e = _ref_total(*args)\n" + _SUM_TAIL,
    "reference first": _SUM_HEAD + "    e = _ref_total(*args)\n    r = total(*args)\n" + _SUM_TAIL,
    "solution on a copy": _SUM_HEAD + "    r = total(list(args[0]))\n    e = _ref_total(*args)\n" + _SUM_TAIL,
}


def test_tests_that_compute_the_expected_value_from_a_changed_argument_are_caught():
    runner = CodeRunner(CHANGED, wall_time=3.0, memory_mb=256)
    honest = runner.run(list(CHANGED), ["def total(xs):\n    return sum(xs)"] * 3)
    assert [r.status for r in honest] == ["pass"] * 3, [r.reason for r in honest]
    # the hand-written forgery: memorise the visible asserts, empty the list otherwise
    forged = "def total(xs):\n    memo = {(1, 2): 3, (): 0, (0, 3, 4): 7}\n    if tuple(xs) in memo:\n" \
             "        return memo[tuple(xs)]\n    xs.clear()\n    return 0\n"
    assert [r.status for r in runner.run(list(CHANGED), [forged] * 3)] == ["pass", "fail", "fail"]
    report = probe_code_tests(runner)
    got = {r.prompt: r for r in report.results}
    assert got["reference after the solution"].passed == ("changed_arguments",)
    assert got["reference after the solution"].advice == (
        "a solution that empties or overwrites its list/dict/set arguments passes: the tests compute expected values "
        "from arguments the solution may change: compute the expected value first, or pass copies (r = f(list(xs)))",)
    assert got["reference first"].passed == () and got["solution on a copy"].passed == ()
    assert re.search(r"^changed_arguments +1/3$", str(report), re.M), str(report)


def test_changed_arguments_is_not_blamed_where_a_constant_already_passes():
    # results never compared: a constant passes, so changing the list is not what fooled these tests
    report = probe_code_tests({"p": "total([3, 1, 2])"}, probes=["constant_reply", "changed_arguments"],
                              runner=CodeRunner({}, wall_time=3.0, memory_mb=256))
    assert report.results[0].passed == ("constant_reply",)
    assert "pass" in report.results[0].statuses["changed_arguments"]
    # a call with no list, dict or set argument raises instead of changing anything
    one = probe_code_tests({"p": "x = 3\nassert total(x) == 3"}, probes=["changed_arguments"],
                           runner=CodeRunner({}, wall_time=3.0, memory_mb=256))
    assert one.results[0].passed == ()
    # asked alone, it still runs the probes that pass without a change: integer asserts that a lookup table
    # answers are not blamed on changed arguments (its advice would be wrong), and the table lists only it
    sq = probe_code_tests({"p": "assert sq(2) == 4\nassert sq(3) == 9"}, probes=["constant_reply", "changed_arguments"],
                          runner=CodeRunner({}, wall_time=3.0, memory_mb=256))
    assert sq.results[0].passed == () and set(sq.results[0].statuses) == {"constant_reply", "changed_arguments"}
    rows = str(sq).split("prompts passed")[-1]
    assert "changed_arguments" in rows and "memorised_asserts" not in rows and "silent_none" not in rows


def test_tests_file_that_is_not_utf8_names_the_line(tmp_path, capsys):
    from bonft.cli import main

    path = tmp_path / "latin1.jsonl"
    path.write_bytes(b'{"prompt": "p", "tests": "assert f(1) == 2"}\n{"prompt": "caf\xe9", "tests": "assert g()"}\n')
    message = r"latin1.jsonl line 2: not UTF-8 text \(byte 0xe9 at column 16\); save the file as UTF-8"
    with pytest.raises(ValueError, match=message):
        read_code_tests(str(path))
    assert main(["check-tests", str(path)]) == 2
    assert re.search(message, capsys.readouterr().err)


def test_check_tests_reads_a_data_file_with_more_columns_through_field_options(tmp_path, capsys):
    from bonft.cli import main

    # a user's data file as the trainer reads it: prompts, tests and columns of its own
    rows = [{"prompt": "write add(a, b)", "tests": "assert add(2, 3) == 5", "visible": "assert add(2, 3) == 5",
             "reference": "def add(a, b):\n    return a + b"},
            {"prompt": "write sort_list(xs)", "tests": STRONG["write sort_list(xs)"], "visible": "",
             "reference": HONEST["write sort_list(xs)"]}]
    path = tmp_path / "code.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    assert main(["check-tests", str(path), "--probes", "constant_reply"]) == 2
    err = capsys.readouterr().err
    assert "line 1 has unknown key 'reference': a line takes only the keys prompt, tests (bonft check-tests reads a " \
           "data file with more columns through --prompt-field / --tests-field, or a recipe's data through --recipe)" \
           in err, err
    assert main(["check-tests", str(path), "--tests-field", "tests", "--probes", "constant_reply",
                 "--wall-time", "3"]) == 1
    out = capsys.readouterr().out
    assert "GAMEABLE  write add(a, b): passed by constant_reply" in out and "ok        write sort_list(xs)" in out
    # CSV, columns named by the options; a comment-only test names its line (the header is line 1)
    csv_path = tmp_path / "code.csv"
    csv_path.write_text('q,checks\nwrite add(a b),"assert add(2, 3) == 5"\nwrite neg(x),# TODO write tests\n')
    assert main(["check-tests", str(csv_path), "--prompt-field", "q", "--tests-field", "checks"]) == 2
    assert "code.csv line 3: field 'checks' of prompt 'write neg(x)' must hold at least one statement" \
        in capsys.readouterr().err
    csv_path.write_text('q,checks\nwrite add(a b),"assert add(2, 3) == 5"\n')
    assert main(["check-tests", str(csv_path), "--prompt-field", "q", "--tests-field", "checks",
                 "--probes", "constant_reply", "--wall-time", "3"]) == 1
    assert "GAMEABLE  write add(a b): passed by constant_reply" in capsys.readouterr().out


def test_check_tests_reads_a_recipes_split_and_tests_column(tmp_path, monkeypatch, capsys):
    from bonft.cli import main
    from bonft.tasks import get_task

    # four prompts, a split of 2 + 1 (one prompt in neither part), the tests column named by the verifier's knob
    data = [{"question": f"jars {a}", "checks": f"assert total() == {a}"} for a in range(1, 5)]
    (tmp_path / "jars.jsonl").write_text("".join(json.dumps(x) + "\n" for x in data))
    monkeypatch.chdir(tmp_path)
    recipe = tmp_path / "mine.toml"
    recipe.write_text('task = "user"\nverifier = "unit_tests"\nrl_steps = 1\ntrain_prompts = 2\nheldout_prompts = 1\n'
                      'seed = 3\n[task_params]\ndata = "jars.jsonl"\nprompt_field = "question"\n'
                      '[verifier_params]\nfield = "checks"\n')
    train, held = get_task("user", data="jars.jsonl", prompt_field="question").split(n_train=2, n_eval=1, seed=3)
    out_json = tmp_path / "r.json"
    assert main(["check-tests", "--recipe", str(recipe), "--probes", "constant_reply", "--wall-time", "3",
                 "--json", str(out_json)]) == 1
    report = json.loads(out_json.read_text())
    assert sorted(r["prompt"] for r in report["prompts"]) == sorted(e.prompt for e in train + held)
    assert all(r["passed"] == ["constant_reply"] for r in report["prompts"])  # total() == a: the constant a passes


@pytest.mark.parametrize("argv, message", [
    (["t.jsonl", "--recipe", "mine.toml"], r"TESTS and --recipe are two sources of tests, got both"),
    (["--recipe", "mine.toml", "--tests-field", "checks"],
     r"--tests-field cannot take effect with --recipe: the recipe's task_params name the columns"),
    (["--recipe", "mine.toml"], r"recipe mine.toml has task = 'ledger', which has no tests column: drop --recipe"),
    ([], r"check-tests needs tests: give TESTS.jsonl \(or a data file\) or --recipe RECIPE.toml"),
    (["data.csv"], r"TESTS must be an existing data file or saved datasets directory, got 'data.csv'"),
    (["q.csv"], r"--prompt-field must name a column of 'q.csv' \(columns: \['question', 'tests'\]\), got 'prompt'"),
])
def test_check_tests_source_refusals(tmp_path, monkeypatch, capsys, argv, message):
    from bonft.cli import main

    monkeypatch.chdir(tmp_path)
    (tmp_path / "t.jsonl").write_text('{"prompt": "p", "tests": "assert f(1) == 2"}\n')
    (tmp_path / "q.csv").write_text('question,tests\n"write f","assert f(1) == 2"\n')  # the option, not the task key
    (tmp_path / "mine.toml").write_text('task = "ledger"\nrl_steps = 1\n')
    assert main(["check-tests", *argv]) == 2
    assert re.search(message, capsys.readouterr().err)
