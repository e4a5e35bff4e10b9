"""The training verifier and the evaluation verifier, named apart (bonft.verifiers.roles).

The rewards asserted here are worked by hand from the rows below (which response passes which prompt's
check), not computed by the code under test.
"""
import json

import numpy as np
import pytest

from bonft.tasks import get_task
from bonft.verifiers import CodeRunner, RewardModel
from bonft.verifiers.roles import build_roles, check_eval_rewards, check_spec

ROWS = [
    {"q": "jars: 2 + 2", "tests": "assert jars() == 4", "ans": "4"},
    {"q": "jars: 3 + 5", "tests": "assert jars() == 8", "ans": "8"},
]


def user_task(tmp_path, rows=ROWS, **kw):
    path = tmp_path / "jars.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    return get_task("user", data=str(path), prompt_field="q", **kw)


def test_builtin_task_keeps_the_exact_checker_beside_its_proxy():
    task = get_task("ledger")
    train, held = task.split(n_train=4, n_eval=2, seed=0)
    roles = build_roles(task, train + held, verifier="proxy")
    assert (roles.verifier_name, roles.eval_verifier_name, roles.eval_is_verifier) == ("proxy", "exact", False)
    assert list(roles.evaluation_verifiers()) == ["exact", "proxy"]
    ex = held[0]
    v = roles.eval_verifier([ex.prompt, ex.prompt], [ex.answer, str(int(ex.answer) + 1)])
    assert v.rewards.tolist() == [1.0, 0.0]
    exact = build_roles(task, train + held)
    assert (exact.verifier_name, exact.eval_verifier_name) == ("exact", "exact") and exact.eval_verifier is exact.verifier
    assert list(exact.evaluation_verifiers()) == ["exact", "proxy"]


def test_user_function_verifier_is_the_default_eval_verifier_and_must_give_0_1(tmp_path, monkeypatch):
    (tmp_path / "shelf_grader_roles.py").write_text(
        "def grade(prompts, responses, rows):\n"
        "    return [float(r.strip() == row['ans']) for r, row in zip(responses, rows)]\n"
        "def closeness(prompts, responses, rows):\n"
        "    return [1.0 / (1 + abs(float(r) - float(row['ans']))) for r, row in zip(responses, rows)]\n")
    monkeypatch.chdir(tmp_path)
    monkeypatch.syspath_prepend(str(tmp_path))
    task = user_task(tmp_path)  # 'ans' is an extra column here, not an answer_field: no exact checker
    roles = build_roles(task, task.examples, verifier="shelf_grader_roles:grade")
    assert roles.eval_verifier is roles.verifier and roles.eval_is_verifier and roles.eval_verifier_name == "shelf_grader_roles:grade"
    assert list(roles.evaluation_verifiers()) == ["shelf_grader_roles:grade"]
    assert list(roles.verifier(["jars: 3 + 5", "jars: 2 + 2"], ["8", "5"])) == [1.0, 0.0]
    check_eval_rewards(np.array([[0.0, 1.0], [1.0, 1.0]]), roles)
    soft = build_roles(task, task.examples, verifier="shelf_grader_roles:closeness")
    with pytest.raises(ValueError, match=r"eval_verifier must be set: the verifier 'shelf_grader_roles:closeness' is the default evaluation verifier "
                                         r"but gave rewards other than 0 and 1 \(1 of 2, e.g. 0.5\)"):
        check_eval_rewards(np.array(soft.verifier(["jars: 3 + 5", "jars: 2 + 2"], ["8", "5"])), soft)
    named = build_roles(task, task.examples, verifier="shelf_grader_roles:closeness", eval_verifier="unit_tests",
                        eval_verifier_params={"wall_time": 3.0})
    assert isinstance(named.eval_verifier, CodeRunner) and not named.eval_is_verifier
    assert list(named.evaluation_verifiers()) == ["unit_tests", "shelf_grader_roles:closeness"]
    assert named.eval_verifier(["jars: 2 + 2", "jars: 3 + 5"], ["def jars(): return 4", "def jars(): return 4"]).scores.tolist() == [1.0, 0.0]
    check_eval_rewards(np.array([0.3]), named)  # an evaluation verifier named by the user is not held to 0/1


def test_unit_tests_read_the_tasks_tests_field_unless_their_field_knob_names_another(tmp_path, monkeypatch):
    # the tests live in a column named 'checks': task_params.tests_field = "checks" is enough for unit_tests
    (tmp_path / "any_grader_roles.py").write_text("def grade(prompts, responses):\n    return [1.0] * len(prompts)\n")
    monkeypatch.chdir(tmp_path)
    monkeypatch.syspath_prepend(str(tmp_path))
    rows = [{"q": r["q"], "checks": r["tests"]} for r in ROWS]
    task = user_task(tmp_path, rows, tests_field="checks")
    roles = build_roles(task, task.examples, verifier="any_grader_roles:grade", eval_verifier="unit_tests",
                        eval_verifier_params={"wall_time": 3.0})
    # by hand: jars() == 4 passes the first prompt's test and fails the second's (8)
    assert roles.eval_verifier(["jars: 2 + 2", "jars: 3 + 5"], ["def jars(): return 4"] * 2).scores.tolist() == [1.0, 0.0]
    # a field knob of its own wins: 'tests' is no column of these rows, so the error names it
    with pytest.raises(ValueError, match=r"field 'tests' is missing, and verifier UnitTests needs it"):
        build_roles(task, task.examples, verifier="any_grader_roles:grade", eval_verifier="unit_tests",
                    eval_verifier_params={"field": "tests"})


def test_exact_needs_answers_and_row_verifiers_need_rows(tmp_path):
    task = user_task(tmp_path)
    with pytest.raises(ValueError, match=r"the exact verifier compares each response with an answer, but answer_field is not set"):
        build_roles(task, task.examples)
    with_answers = user_task(tmp_path, answer_field="ans")
    roles = build_roles(with_answers, with_answers.examples, verifier="unit_tests")
    assert roles.eval_verifier_name == "unit_tests" and roles.eval_is_verifier
    roles = build_roles(with_answers, with_answers.examples, verifier="unit_tests", eval_verifier="exact")
    assert roles.eval_verifier(["jars: 2 + 2"], [" 4 "]).rewards.tolist() == [1.0]
    ledger = get_task("ledger")
    train, held = ledger.split(n_train=2, n_eval=1)
    with pytest.raises(ValueError, match=r"verifier = 'unit_tests' reads fields of each prompt's data row \(tests\), which only task = 'user' has"):
        build_roles(ledger, train + held, verifier="unit_tests")
    with pytest.raises(ValueError, match=r"eval_verifier = 'proxy' needs a task with a proxy verifier; task 'user' has none"):
        build_roles(with_answers, with_answers.examples, eval_verifier="proxy")


def test_reward_model_verifier_needs_a_threshold_or_an_eval_verifier(tmp_path):
    from test_verifiers_user import save_reward_model

    save_reward_model(tmp_path / "rm")
    task = user_task(tmp_path, answer_field="ans")
    with pytest.raises(ValueError, match=r"eval_verifier must be set: the verifier 'reward_model' gives scores, not 0/1 rewards"):
        build_roles(task, task.examples, verifier="reward_model", verifier_params={"path": str(tmp_path / "rm")})
    roles = build_roles(task, task.examples, verifier="reward_model", verifier_params={"path": str(tmp_path / "rm")},
                        eval_verifier="exact", device="cpu")
    assert isinstance(roles.verifier, RewardModel) and roles.eval_verifier_name == "exact"
    same = build_roles(task, task.examples, verifier="reward_model", verifier_params={"path": str(tmp_path / "rm"), "threshold": 0.0},
                       eval_verifier="reward_model", eval_verifier_params={"path": str(tmp_path / "rm"), "threshold": 0.0})
    assert same.eval_verifier is same.verifier  # one model in memory


def test_check_spec():
    check_spec("eval_verifier", "", {}, allow_empty=True)
    with pytest.raises(ValueError, match=r"eval_verifier must be 'exact', 'proxy', one of \('unit_tests', 'reward_model'\) "
                                         r"or 'module:function', got 'best'"):
        check_spec("eval_verifier", "best", {})
    with pytest.raises(ValueError, match=r"verifier_params cannot take effect with verifier = 'exact' "
                                         r"\(the task's own checker takes no knobs\), got \['path'\]"):
        check_spec("verifier", "exact", {"path": "x"})
    with pytest.raises(ValueError, match=r"eval_verifier_params cannot take effect with eval_verifier = '' "
                                         r"\(the default evaluation verifier takes no knobs\)"):
        check_spec("eval_verifier", "", {"threshold": 1}, allow_empty=True)
    with pytest.raises(TypeError, match=r"verifier_params must be a table"):
        check_spec("verifier", "exact", [1])
