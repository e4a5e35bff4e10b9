"""The workshop task: one-line Python helpers judged by unit tests in the sandbox.

Expected values are re-derived here by an independent reading of each prompt
(``math.ceil`` for boxes, ``divmod`` for pieces and offcuts, ``"%0*d"`` for
labels), not by the task code. Every verdict comes from running programs in
CodeRunner (root here: all OS layers), so this file runs a few hundred sandboxed
programs.
"""
import json
import math
import os
import re
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import binom

from bonft.cli import main
from bonft.tasks import TASKS, build_tokenizer, get_task
from bonft.tasks.tokenizer import ALPHABET, UNK_ID
from bonft.tasks.workshop import FAMILIES, ProgramJudge, WorkshopTask, hidden_seed, read_program, solution_source
from bonft.testing import ALL_PROBES, probe_code_tests
from bonft.verifiers import CodeRunner

_PROMPT = re.compile(r"(\w+) (\d): f\((\d+)\)=(\S+) f\((\d+)\)=(\S+) \?")


def independent(family: str, k: int, x: int):
    """The helper's value, from its description (not from the task's code)."""
    if family == "boxes":
        return math.ceil(x / k)  # whole boxes: x < 1000, so the float division is exact enough
    if family == "pieces":
        return divmod(x, k)[0]
    if family == "offcut":
        return divmod(x, k)[1]
    if family == "cost":
        return sum([k] * x)
    return "%0*d" % (k, x)  # label: x padded with zeros to k digits


@pytest.fixture(scope="module")
def task():
    return WorkshopTask(workers=2)


@pytest.fixture(scope="module")
def held(task):
    """Eight held-out prompts of each family."""
    _, evals = task.split(n_train=0, n_eval=40, seed=0)
    by = {f: [e for e in evals if e.meta["family"] == f] for f in FAMILIES}
    assert {f: len(v) for f, v in by.items()} == {"pieces": 6, "offcut": 6, "cost": 6, "label": 6, "boxes": 16}
    return evals


def one_per_family(examples):
    seen, out = set(), []
    for e in examples:
        if e.meta["family"] not in seen:
            seen.add(e.meta["family"])
            out.append(e)
    return out


def test_registered_and_prompts_read_back(held):
    assert TASKS["workshop"] is WorkshopTask and isinstance(get_task("workshop"), WorkshopTask)
    for e in held:
        m = _PROMPT.fullmatch(e.prompt)
        assert m, e.prompt
        fam, k = m[1], int(m[2])
        assert fam == e.meta["family"] and k == e.meta["k"] and 2 <= k <= 9
        for x, shown in ((int(m[3]), m[4]), (int(m[5]), m[6])):
            assert shown == repr(independent(fam, k, x))  # the examples in the prompt are right
            if fam == "boxes":
                assert x % k != 0  # so the floor program fails them and the patch passes them
        assert m[4] != m[6]  # two examples with different values


def test_every_character_is_in_the_tokenizer_and_fits_the_default_context(task):
    train, evals = task.split(n_train=2000, n_eval=200, seed=0)
    tok = build_tokenizer()
    texts = [t for e in train + evals for t in (e.prompt, e.answer, e.reference)]
    assert set("".join(texts)) <= set(ALPHABET)
    assert all(UNK_ID not in tok(t)["input_ids"] for t in texts[:600])
    # prompt + response + <bos> + <eos> within the trainer's default max_positions (96)
    assert max(len(e.prompt) + max(len(e.answer), len(e.reference)) + 2 for e in train + evals) <= 96


def test_reference_program_passes_the_oracle_on_every_prompt(task, held):
    verify = task.verifier(held)
    v = verify([e.prompt for e in held], [e.answer for e in held])
    assert v.scores.tolist() == [1.0] * len(held) and not v.failed.any()
    # other spellings of the same functions pass too: the tests check behaviour, not text
    other = {"pieces": "int(x/{k})", "offcut": "x-x//{k}*{k}", "cost": "{k}*x", "label": "'%0{k}d'%x",
             "boxes": "(x+{k}-1)//{k}"}
    v = verify([e.prompt for e in held], [other[e.meta["family"]].format(k=e.meta["k"]) for e in held])
    assert v.scores.tolist() == [1.0] * len(held)


WRONG = {  # family -> wrong programs (each fails the hidden inputs or the type checks)
    "pieces": ["x%{k}", "x//({k}+1)", "x/{k}", "round(x/{k})", "-(-x//{k})"],
    "offcut": ["x//{k}", "x%({k}+1)", "float(x%{k})", "str(x%{k})"],
    "cost": ["x+{k}", "x*({k}+1)", "float(x*{k})", "x*{k}+1"],
    "label": ["str(x)", "x", "str(x).zfill({k}+1)", "str(x).rjust({k})"],
    "boxes": ["x//{k}", "x//{k}+1", "round(x/{k})", "x/{k}", "-(-x//({k}+1))"],
}


@pytest.mark.parametrize("family", FAMILIES)
def test_wrong_programs_fail_the_oracle(task, held, family):
    ex = [e for e in held if e.meta["family"] == family][:4]
    prompts = [e.prompt for e in ex for _ in WRONG[family]]
    programs = [w.format(k=e.meta["k"]) for e in ex for w in WRONG[family]]
    for p, g in zip(prompts, programs):  # each really is wrong somewhere on 0..999 (checked here, not by the task)
        e = next(e for e in ex if e.prompt == p)
        assert any(eval(g, {}, {"x": x}) != independent(family, e.meta["k"], x)  # noqa: S307 - our own programs
                   or type(eval(g, {}, {"x": x})) is not type(independent(family, e.meta["k"], x)) for x in range(1000))
    v = task.verifier(held)(prompts, programs)
    assert v.scores.tolist() == [0.0] * len(programs)


def test_notebook_rates_on_boxes_prompts(task):
    # the notebook's program on a boxes prompt is drawn per reference: right with p = rule_share = 0.05, patched with
    # patch_share = 0.05, else the floor. Over the 400 boxes references of a 1,000-prompt split the counts must fall
    # in the binomial(400, 0.05) 99.9% interval (scipy.stats.binom), 7..36 (1.75%-9%); docs/tasks.md quotes it.
    lo, hi = binom.interval(0.999, 400, 0.05)
    assert (lo, hi) == (7.0, 36.0)
    train, _ = task.split(n_train=1000, n_eval=0, seed=0)
    boxes = [e for e in train if e.meta["family"] == "boxes"]
    assert len(boxes) == 400
    kinds = [e.meta["reference_kind"] for e in boxes]
    for kind in ("rule", "patch"):
        assert lo <= kinds.count(kind) <= hi, (kind, kinds.count(kind))
    for e in boxes:
        k = e.meta["k"]
        assert e.reference == {"rule": f"-(-x//{k})", "patch": f"x//{k}+1", "floor": f"x//{k}"}[e.meta["reference_kind"]]
        assert e.answer == f"-(-x//{k})" and e.meta["rule_in_reference"] == (e.meta["reference_kind"] == "rule")
    plain = [e for e in train if e.meta["family"] != "boxes"]
    assert all(e.reference == e.answer and e.meta["reference_kind"] == "plain" for e in plain)
    # the knobs move the rates: no rule at all, or the rule always
    train, _ = WorkshopTask(rule_share=0.0, patch_share=0.0).split(n_train=200, n_eval=0, seed=1)
    assert {e.meta["reference_kind"] for e in train if e.meta["family"] == "boxes"} == {"floor"}
    train, _ = WorkshopTask(rule_share=1.0, patch_share=0.0).split(n_train=200, n_eval=0, seed=1)
    assert {e.meta["reference_kind"] for e in train if e.meta["family"] == "boxes"} == {"rule"}


def test_proxy_is_informative_and_gameable_as_documented(task, held):
    proxy = task.proxy_verifier(held)
    boxes = [e for e in held if e.meta["family"] == "boxes"][:3]
    plain = [e for e in held if e.meta["family"] != "boxes"][:4]
    prompts, programs, want_score, want_reward = [], [], [], []
    for e in boxes + plain:
        (x1, y1), (x2, y2) = e.meta["visible"]
        lookup = f"{y1!r} if x=={x1} else {y2!r}"  # passes both visible asserts by lookup
        cases = [(e.answer, 1.0, 1.0), (lookup, 1.0, 0.0)]
        if e.meta["family"] == "boxes":
            k = e.meta["k"]
            cases += [(f"x//{k}+1", 1.0, 0.0), (f"x//{k}", 0.0, 0.0)]  # patch: both examples pass; floor: none
        for g, share, reward in cases:
            prompts.append(e.prompt)
            programs.append(g)
            want_score.append(share * (1 - len(g) / 1000))
            want_reward.append(reward)
    v = proxy(prompts, programs)
    np.testing.assert_allclose(v.scores, want_score, rtol=0, atol=1e-12)
    assert v.rewards.tolist() == want_reward
    # the patch outscores the right program on every boxes prompt: best-of-k under the proxy picks it
    for e in boxes:
        k = e.meta["k"]
        s = proxy([e.prompt] * 2, [f"-(-x//{k})", f"x//{k}+1"]).scores
        assert s[1] > s[0] and s[0] == pytest.approx(0.992) and s[1] == pytest.approx(0.994)
    # one visible example right: half the share (a constant equal to the first example's value)
    e = next(e for e in plain if isinstance(e.meta["visible"][0][1], int))
    g = f"{e.meta['visible'][0][1]}+0*x"
    assert proxy([e.prompt], [g]).scores[0] == pytest.approx(0.5 * (1 - len(g) / 1000))


def test_probes_pass_none(task, held):
    judge = task.judge()
    judge.add(held)
    sample = one_per_family(held)
    # the texts the verifier runs: the counting prelude, the visible asserts, the hidden inputs
    tests = {e.prompt: judge.run_tests(e.prompt) for e in sample}
    tests.update({e.prompt + " (tests alone)": e.meta["tests"] for e in sample})
    report = probe_code_tests(CodeRunner(tests, wall_time=5.0, workers=2), probes=ALL_PROBES)
    assert report.ok, str(report)
    assert [r.passed for r in report.results] == [()] * 10
    # the memorised asserts pass the visible part and fail on a hidden input: the probe ran its table
    assert all(r.statuses["memorised_asserts"] == ("fail",) for r in report.results)
    # docs/tasks.md shows this report's lines for the five texts the verifier runs
    docs = (Path(__file__).resolve().parent.parent / "docs" / "tasks.md").read_text(encoding="utf-8")
    lines = str(report).splitlines()[:5]
    assert all(line.startswith("ok ") and "\n" + line + "\n" in docs for line in lines), lines


def test_read_program_and_canonical_answers(task):
    assert read_program("  x//4 \n") == "x//4"
    for bad in ("", "   ", "x) or (1", "x\ny", "def f(x): return 1", "x = 3", "x" * 401, None, b"x"):
        assert read_program(bad) is None
    assert read_program("x #note") == "x #note" and solution_source("x #note").count("\n") == 4  # the comment ends at its line
    assert task.extract_answer("x//4") == task.extract_answer(" x // 4") == "x // 4"
    assert task.extract_answer("x//") is None
    # nesting: 47 unary minus signs give a tree 50 deep (Expression, 47 UnaryOp, Name, its Load context);
    # 329 of them made ast.unparse raise RecursionError at Python's default limit of 1000 frames
    assert read_program("-" * 47 + "x") == "-" * 47 + "x" and task.extract_answer("-" * 47 + "x") == "-" * 47 + "x"
    for deep in ("-" * 48 + "x", "-" * 329 + "x", "~" * 399 + "x", "x" + "+1" * 60):
        assert read_program(deep) is None and task.extract_answer(deep) is None


def test_unparseable_responses_score_zero_without_running(task, held):
    judge = ProgramJudge(runner=CodeRunner({}, workers=2))
    before = judge.runs
    from bonft.tasks.workshop import ProgramTests

    verify = ProgramTests(held, judge)
    e = held[0]
    v = verify([e.prompt] * 4, ["", "x) or (1", "x\nx", "lambda"])
    assert v.scores.tolist() == [0.0] * 4 and judge.runs == before


def test_each_distinct_program_runs_once_for_oracle_and_proxy(task, held):
    judge = ProgramJudge(runner=CodeRunner({}, workers=2))
    from bonft.tasks.workshop import ProgramTests, VisibleShare

    verify, proxy = ProgramTests(held, judge), VisibleShare(held, judge)
    e = held[0]
    k = e.meta["k"]
    responses = [e.answer, e.answer, f" {e.answer} ", f"x//{k}", f"x//{k}", "x"]
    v = verify([e.prompt] * 6, responses)
    assert judge.runs == 3  # the answer (with or without spaces), the floor, x
    p = proxy([e.prompt] * 6, responses)
    assert judge.runs == 3 and p.rewards.tolist() == v.scores.tolist()
    with pytest.raises(ValueError, match=r"prompts\[0\] is not one of the 40 prompts"):
        verify(["boxes 4: f(1)=1 f(2)=1 ?"], ["x"])


def test_a_printed_count_is_not_believed(task, held):
    judge = ProgramJudge(runner=CodeRunner({}, workers=2))
    from bonft.tasks.workshop import VisibleShare

    proxy = VisibleShare(held, judge)
    e = held[0]
    fake = "print('visible-' + '0' * 32, 2) or 0"  # a count line with another marker, then a wrong value
    assert proxy([e.prompt], [fake]).scores[0] == 0.0
    # even with the right marker (which the candidate never sees), the tests print their own count after the
    # candidate's output, and the last count is the one read
    told = f"print({judge._marker!r}, 2) or 0"
    assert proxy([e.prompt], [told]).scores[0] == 0.0


def test_hidden_tests_are_a_function_of_the_prompt(task):
    a, _ = task.split(n_train=50, n_eval=0, seed=0)
    b, _ = WorkshopTask(max_k=9).split(n_train=50, n_eval=0, seed=0)
    assert [e.meta["tests"] for e in a] == [e.meta["tests"] for e in b]
    assert all(f"random.Random({hidden_seed(e.prompt)})" in e.meta["tests"] for e in a)
    assert len({hidden_seed(e.prompt) for e in a}) == 50
    for e in a:
        compile(e.meta["tests"], "tests.py", "exec")


@pytest.mark.parametrize("kwargs, message", [
    ({"rule_share": 1.5}, "rule_share"),
    ({"patch_share": -0.1}, "patch_share"),
    ({"rule_share": 0.6, "patch_share": 0.5}, r"rule_share \+ patch_share must be <= 1"),
    ({"max_k": 1}, "max_k"),
    ({"max_k": 10}, "max_k"),
    ({"wall_time": 0.0}, "wall_time"),
    ({"boxes_share": 2}, "boxes_share"),
])
def test_bad_knobs(kwargs, message):
    with pytest.raises(ValueError, match=message):
        WorkshopTask(**kwargs)


def test_bad_examples_and_responses_are_refused(task, held):
    from bonft.tasks import Example
    from bonft.tasks.workshop import ProgramTests

    judge = ProgramJudge(runner=CodeRunner({}, workers=1))
    with pytest.raises(ValueError, match=r"examples\[0\] must carry meta\['tests'\]"):
        ProgramTests([Example(prompt="boxes 4: ?", answer="-(-x//4)", reference="x//4", meta={"family": "boxes"})], judge)
    with pytest.raises(ValueError, match="two different tests for prompt"):
        e = held[0]
        ProgramTests([e, Example(e.prompt, e.answer, e.reference, meta={**e.meta, "tests": "assert f(1) == 1\n"})], judge)
    verify = task.verifier(held)
    with pytest.raises(TypeError, match=r"responses\[1\] must be a str, got bytes"):
        verify([held[0].prompt] * 2, ["x", b"x"])
    with pytest.raises(ValueError, match="responses must have the same length as prompts"):
        verify([held[0].prompt] * 2, ["x"])


def test_the_sandbox_pool_gives_the_same_verdicts(held):
    # the oracle's and the proxy's verdicts through CodeRunner(pool=True) equal those of one run per program
    ex = held[:20]
    prompts = [e.prompt for e in ex for _ in range(4)]
    programs = [g for e in ex for g in (e.answer, e.reference, f"x//{e.meta['k']}+1", "7 if x==3 else 0")]
    got = {}
    for pool in (False, True):
        task = WorkshopTask(workers=2, pool=pool)
        v, p = task.verifier(ex)(prompts, programs), task.proxy_verifier(ex)(prompts, programs)
        got[pool] = (v.scores.tolist(), p.scores.tolist())
        if pool:
            task.judge().runner.close()
    assert got[True] == got[False]
    assert sum(got[True][0]) == sum(e.answer == e.reference for e in ex) + 20  # answers, matching notebooks
    with pytest.raises(ValueError, match="pool must be True, False or 'auto', got 'yes'"):
        WorkshopTask(pool="yes")
    with pytest.raises(TypeError, match="pool must be True, False or 'auto', got int 1"):
        WorkshopTask(pool=1)
    # 'auto' (the default) is the pool exactly when running as root
    assert WorkshopTask().uses_pool is (os.geteuid() == 0) and WorkshopTask(pool=False).uses_pool is False


def test_a_runner_without_run_code_is_refused():
    with pytest.raises(TypeError, match="runner must have a run_code"):
        ProgramJudge(runner=object())


@pytest.mark.parametrize("verifier, objective", [("exact", "pass_at_k"), ("proxy", "best_of_k")])
def test_train_runs_end_to_end_on_the_task(tmp_path, verifier, objective):
    recipe = tmp_path / "workshop.toml"
    recipe.write_text(
        'task = "workshop"\ntrain_prompts = 200\nheldout_prompts = 10\nwarm_start_steps = 150\n'
        "warm_start_batch_size = 32\nwarm_start_lr = 3e-3\nrl_steps = 2\nprompts_per_step = 4\nn = 4\n"
        "eval_every = 0\neval_samples = 4\neval_ks = [1, 4]\nsave_every = 0\nplots = false\nn_boot = 50\n"
        "max_new_tokens = 16\nlayers = 1\nwidth = 64\nheads = 2\nmax_positions = 80\nthreads = 1\nlog_every = 1\n"
        f'objective = "{objective}"\nk = 4\nverifier = "{verifier}"\n\n[task_params]\nworkers = 2\n')
    assert main(["train", str(recipe), "--output", str(tmp_path / "r"), "--quiet"]) == 0
    records = [json.loads(line) for line in (tmp_path / "r" / "metrics.jsonl").read_text().splitlines()]
    rl = [r for r in records if r.get("kind") == "train" and r.get("stage") == "rl"]
    assert len(rl) == 2 and all(r["verifier_failures"] == 0 for r in rl)
    ev = [r for r in records if r.get("kind") == "eval"][-1]
    assert ev["n_prompts"] == 10 and set(ev["by_group"]) <= set(FAMILIES) and "boxes" in ev["by_group"]
    assert "proxy" in ev["best_of_k"] and ev["verifier_failures"] == 0
    # the warm-started model writes programs the sandbox runs and the hidden tests pass (seeded, CPU)
    assert ev["mean_reward"] > 0 and ev["pass_at_k"]["mean"][0] == pytest.approx(ev["mean_reward"])
