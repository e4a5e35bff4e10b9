"""bonft.verifiers.testkit: check_verifier flags the verifiers it should, with figures; AUC and curves
are checked against brute-force definitions."""
import itertools
import json
import random
import re
from math import comb
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.cli import main as cli_main
from bonft.testing import check_verifier, read_examples, roc_auc, sample_pools
from bonft.verifiers import ExactMatch, NoisyProxy, NumericMatch, Verdicts

pytest_plugins = ["bonft.pytest_plugin"]

DOCS = Path(__file__).resolve().parents[1] / "docs" / "verifiers.md"
EXACT = ExactMatch({"2+2?": "4", "3*3?": "9"})
POOLS = [
    {"prompt": "2+2?", "responses": ["answer: 4"] * 3 + ["answer: 5", "answer: 22", "no idea", "answer: 4.", "4"]},
    {"prompt": "3*3?", "responses": ["answer: 9", "answer: 6", "answer: 33", "9", "answer: nine", "answer: 9", "x", "y"]},
]


def test_a_good_verifier_passes_and_the_report_is_complete(tmp_path):
    rep = check_verifier(EXACT, POOLS, repeats=3)
    assert rep.ok, str(rep)
    assert (rep.n_prompts, rep.n_samples, rep.n_nondeterministic, rep.failure_rate) == (2, 16, 0, 0.0)
    assert (rep.score_min, rep.score_max) == (0.0, 1.0)
    # 8 of 16 responses are correct (5 in pool 1, 3 in pool 2 counting the bare "9")
    assert (rep.n_labelled, rep.n_positive, rep.accuracy, rep.auc) == (16, 8, 1.0, 1.0)
    # a verifier whose scores are the rewards picks like the oracle: Chen et al. 2021 pass@k
    # 1 - C(n-c, k)/C(n, k), here n = 8 per pool, c = 5 and 3
    want = [np.mean([1 - comb(8 - c, k) / comb(8, k) for c in (5, 3)]) for k in (1, 2, 4, 8)]
    assert rep.ks == [1, 2, 4, 8]
    np.testing.assert_allclose(rep.pass_at_k, want, rtol=1e-12)
    np.testing.assert_allclose(rep.best_of_k, want, rtol=1e-12)
    text = str(rep)
    assert "verifier check: OK" in text and "ROC AUC            1.000" in text
    d = rep.to_dict()
    assert json.loads(json.dumps(d))["ok"] is True and d["latency_ms_per_call"] > 0
    out = rep.plot(str(tmp_path / "curve.png"))
    assert Path(out).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_non_deterministic_verifier_is_flagged():
    rng = random.Random(0)

    def jittery(prompts, responses):
        return [float(r.startswith("answer")) + rng.random() * 1e-2 for r in responses]

    rep = check_verifier(jittery, POOLS)
    assert not rep.ok
    msg = rep.problems[0]
    assert msg.startswith("non-deterministic: 16 of 16 re-scored samples (100.0%) changed score"), msg
    assert rep.n_nondeterministic == 16


def test_float32_rounding_of_a_padded_batch_is_not_non_determinism():
    # a float32 reward model scores a response alone and in a padded batch with other kernel shapes: the audit
    # measured 2.8e-7 on a score of -0.0556 (RewardModel, 4 layers x 256), which a purely relative 1e-6 called
    # non-deterministic; the tolerance follows the size of the scores (rtol x the largest |score|)
    def padded(prompts, responses):
        wobble = 3e-7 if len(responses) > 1 else 0.0  # what padding to the batch's longest text changes
        return [(0.9 if r.startswith("answer") else -0.0556) + wobble for r in responses]

    rep = check_verifier(padded, POOLS)
    assert rep.n_nondeterministic == 0 and not any(p.startswith("non-deterministic") for p in rep.problems)
    rep = check_verifier(padded, POOLS, rtol=1e-8)  # a tighter tolerance, asked for, still sees it
    assert rep.n_nondeterministic == 16  # every score moved by 3e-7 > 1e-8 x 0.9 (and > 1e-8 of itself)
    # the tolerance follows each pool's median |score|: one large score (1e5 x 1e-5 = 1) must not hide scores that
    # are drawn afresh on every call (the re-audit: a tolerance from the largest |score| read them as equal)
    rng = random.Random(1)

    def random_but_one(prompts, responses):
        return [1e5 if r == "y" else rng.random() for r in responses]

    rep = check_verifier(random_but_one, POOLS)
    assert rep.n_nondeterministic >= 14, rep.n_nondeterministic  # 15 random scores (pool 2's "y" is steady)


def test_a_wrong_response_at_the_top_of_a_pool_is_flagged():
    # a verifier that reads only the last digit ties "17" with "7": best-of-k picks the wrong one half the time
    # however large k is, while AUC (0.75 here) and the best-of-k curve (flat, no bend) pass
    def last_digit(prompts, responses):
        truth = {"3+4": "7", "9+6": "15"}
        return [float(r[-1:] == truth[p][-1:]) for p, r in zip(prompts, responses)]

    pools = [{"prompt": "3+4", "responses": ["7", "17", "6", "5"], "rewards": [1, 0, 0, 0]},
             {"prompt": "9+6", "responses": ["15", "14", "3", "2"], "rewards": [1, 0, 0, 0]}]
    rep = check_verifier(last_digit, pools)
    assert (rep.n_pools_mixed, rep.n_wrong_top) == (2, 1) and not rep.ok
    assert rep.pass_fail and rep.problems == [
        "wrong at the top: in 1 of 2 pools with responses labelled right and wrong, a wrong one scores at or above "
        "every right one (a pass/fail checker: its scores take two values, so each is a false pass), e.g. '17' scores 1 "
        "for prompt '3+4', the best right response 1: there best-of-n over the whole pool picks the wrong response (on "
        "a tie, it may)"]
    assert check_verifier(last_digit, pools, max_wrong_top=0.5).ok  # 1 of 2 pools is allowed
    # graded scores (a reward model) rank some wrong responses first: counted and shown, a problem only when asked
    def graded(prompts, responses):
        return [0.9 if r in ("7", "15") else 0.95 if r == "17" else 0.1 * len(r) for r in responses]

    rep = check_verifier(graded, pools)
    assert not rep.pass_fail and (rep.n_pools_mixed, rep.n_wrong_top) == (2, 1) and rep.ok, rep.problems
    assert "wrong at the top   1 of 2 pools with right and wrong responses" in str(rep)
    rep = check_verifier(graded, pools, max_wrong_top=0.0)
    assert [p[:63] for p in rep.problems] == ["wrong at the top: in 1 of 2 pools with responses labelled right"]
    assert "(max_wrong_top=0)" in rep.problems[0]
    exact = ExactMatch({"3+4": "7", "9+6": "15"})
    assert check_verifier(exact, pools).n_wrong_top == 0
    with pytest.raises(ValueError, match=r"max_wrong_top must be a finite number in \[0, 1\], got max_wrong_top=1.5"):
        check_verifier(exact, pools, max_wrong_top=1.5)


def test_batch_order_dependence_is_flagged():
    def position_bias(prompts, responses):  # the first sample of each batch gets a bonus
        return [1.0 if i == 0 else 0.0 for i in range(len(responses))]

    rep = check_verifier(position_bias, POOLS, repeats=3)
    # run 2 reverses the batch, moving the bonus from the first to the last sample of each pool: 2 changes per
    # pool; run 3 scores each sample alone, where every sample is first: the 7 others of each pool change
    assert rep.n_nondeterministic == 4 + 14, str(rep)
    assert "non-deterministic: 18 of 32 re-scored samples (56.2%)" in rep.problems[0]
    assert check_verifier(position_bias, POOLS).n_nondeterministic == 14  # repeats=2: the run alone only


def test_a_score_that_depends_on_the_batch_make_up_is_flagged():
    # Like a reward model reading a pad position: the score depends on the batch's longest text, which
    # reversing the batch keeps; scoring each sample alone gives another score.
    def padded(prompts, responses):
        width = max(len(r) for r in responses)
        return [len(r) / width for r in responses]

    rep = check_verifier(padded, POOLS)
    # alone every score is 1.0; in its pool a sample scores len / longest, 1.0 only for the longest: "answer: 22"
    # and "answer: 4." (10 characters) in pool 1, "answer: nine" (12) in pool 2, so 16 - 3 samples change
    assert rep.n_nondeterministic == 13, str(rep)
    assert re.search(r"non-deterministic: 13 of 16 .* in the first batch then 1 alone", rep.problems[0]), rep.problems


@pytest.mark.parametrize("reward, which", [(0.0, "none"), (1.0, "all")])
def test_one_sided_labels_are_a_problem_not_ok(reward, which):
    # 0 correct of 16: no ROC AUC and a flat zero curve; the check said OK
    samples = [{"prompt": p["prompt"], "response": r, "reward": reward} for p in POOLS for r in p["responses"]]
    rep = check_verifier(EXACT, samples)
    assert not rep.ok and rep.auc is None
    assert any(re.match(rf"one-sided labels: {which} of the 16 labelled samples are correct, so "
                        r"agreement .* cannot be judged", p) for p in rep.problems), rep.problems


def test_crashing_verifier_is_flagged_with_the_rate():
    def fragile(prompts, responses):
        return [1.0 / (len(r) - 1) for r in responses]  # "4", "9", "x", "y" have length 1 -> ZeroDivisionError

    rep = check_verifier(fragile, POOLS)
    assert (rep.n_exceptions, rep.n_nan, rep.n_timeouts) == (4, 0, 0)
    msg = next(p for p in rep.problems if p.startswith("failures"))
    assert "failures: 25.0% of 16 samples > max_failure_rate=0 (exceptions 4, NaN 0, timeouts 0)" in msg, msg
    assert "ZeroDivisionError" in msg
    rep2 = check_verifier(fragile, POOLS, max_failure_rate=0.3)  # the tolerance is honoured
    assert not any(p.startswith("failures") for p in rep2.problems), rep2.problems


def _oom(prompts, responses):
    if len(responses) > 4:
        raise MemoryError()
    return EXACT(prompts, responses)


def _dedup(prompts, responses):
    """One score per distinct (prompt, response): 6 scores for the first pool's 8 samples."""
    ps, rs = zip(*dict.fromkeys(zip(prompts, responses)))
    return EXACT(list(ps), list(rs))


@pytest.mark.parametrize("verifier, repeats, cause", [
    (_oom, 2, "MemoryError"),
    (_dedup, 3, "ValueError: the verifier returned 6 scores for 8 (prompt, response) pairs"),
])
@pytest.mark.filterwarnings("ignore::bonft.verifiers.BatchFallbackWarning")
def test_a_broken_batch_call_is_a_problem(verifier, repeats, cause):
    rep = check_verifier(verifier, POOLS, repeats=repeats)
    # 2 pools of 8: every whole-pool call (2 per run but the last) fell back to 8 calls, one per sample
    assert (rep.n_batch_calls, rep.n_batch_fallbacks, rep.batch_fallback_samples) == (
        2 * (repeats - 1), 2 * (repeats - 1), 16 * (repeats - 1))
    assert rep.problems == [
        f"batch calls: the call on the whole pool failed though each sample scored alone passed, e.g. {cause}: every "
        "pool call fell back to one call per sample (8 times the calls); training scores such batches the same way, "
        "that much slower"]
    # the figures are those of the same verifier called one sample at a time
    good = check_verifier(EXACT, POOLS, repeats=repeats)
    assert good.ok and (rep.score_min, rep.score_max, rep.auc, rep.best_of_k) == (
        good.score_min, good.score_max, good.auc, good.best_of_k)


@pytest.mark.filterwarnings("ignore::bonft.verifiers.BatchFallbackWarning")
def test_cli_check_verifier_fails_a_verifier_whose_batch_call_is_broken(tmp_path, capsys):
    ver = tmp_path / "dedupver.py"
    ver.write_text("def score(prompts, responses):\n    return [float(r == '4') for r in dict.fromkeys(responses)]\n")
    ex = tmp_path / "ex.jsonl"
    rows = [{"prompt": "2+2?", "response": r, "reward": float(r == "4")} for r in ["4", "5", "4"]]
    ex.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    assert cli_main(["check-verifier", f"{ver}:score", "--examples", str(ex)]) == 1
    assert "returned 2 scores for 3 (prompt, response) pairs: every pool call fell back" in capsys.readouterr().out


def test_a_crash_in_one_run_only_is_a_failure_not_a_changed_score():
    def shy(prompts, responses):
        if responses == ["x"]:  # "x" of the second pool crashes when scored alone, never in a batch
            raise RuntimeError("flaky")
        return EXACT(prompts, responses)

    rep = check_verifier(shy, POOLS)
    assert rep.n_nondeterministic == 0 and (rep.n_exceptions, rep.n_nan, rep.n_timeouts) == (1, 0, 0)
    assert rep.failure_examples == ["failed when scored alone: RuntimeError: flaky"]
    assert rep.problems == ["failures: 6.2% of 16 samples > max_failure_rate=0 (exceptions 1, NaN 0, timeouts 0), "
                            "e.g. failed when scored alone: RuntimeError: flaky"], rep.problems


def test_statistics_leave_out_the_samples_that_failed():
    ex = [{"prompt": "2+2?", "responses": ["4", "5"], "rewards": [1.0, 0.0]}]
    rep = check_verifier(lambda p, r: [float("nan")] * len(r), ex)
    # every sample failed: no score range, no constant scores, no AUC from the stand-in failure score
    assert rep.n_scored == 0 and rep.n_labelled == 0 and rep.auc is None and np.isnan(rep.score_min)
    assert rep.problems == ["failures: 100.0% of 2 samples > max_failure_rate=0 (exceptions 0, NaN 2, timeouts 0), "
                            "e.g. score is nan"], rep.problems
    assert "score range        n/a (every sample failed)" in str(rep)
    # NaN on the correct "4"s: the others are "5", "6" (0.3, wrong) and "four" (0.9, right), so the AUC over them
    # is 1 (the one positive outscores both negatives, by hand); with the failed 4s at score 0 it would be 2/6
    ex = [{"prompt": "2+2?", "responses": ["4", "5", "6", "4", "four"], "rewards": [1.0, 0.0, 0.0, 1.0, 1.0]}]
    rep = check_verifier(lambda p, r: [{"4": float("nan"), "four": 0.9}.get(x, 0.3) for x in r], ex)
    assert (rep.n_scored, rep.n_labelled, rep.n_positive, rep.auc) == (3, 3, 1, 1.0)
    assert (rep.score_min, rep.score_max) == (0.3, 0.9)
    assert [p.split(":")[0] for p in rep.problems] == ["failures"], rep.problems
    rep = check_verifier(lambda p, r: [{"4": float("nan")}.get(x, 0.3) for x in r], ex)
    assert "constant scores: all 3 samples that did not fail score 0.3, so best-of-k cannot select" in rep.problems


def test_the_determinism_line_says_within_one_process():
    # hash() of a str is salted per process: a check in one process cannot see scores built on it change
    assert "0 of 16 re-scored samples differ over 2 runs within one process" in str(check_verifier(EXACT, POOLS))


def test_nan_scores_are_counted():
    rep = check_verifier(lambda p, r: [float("nan") if x == "x" else 1.0 for x in r], POOLS)
    assert rep.n_nan == 1 and "NaN 1" in rep.problems[0]


def test_gameable_length_proxy_bends_down_while_pass_at_k_rises():
    # 32 responses per prompt: 8 short correct, 22 short wrong, 2 long wrong.
    # The proxy adds 0.5 per 100 characters, so the long wrong ones outscore everything.
    answers = {f"q{i}": str(i) for i in range(4)}
    exact = ExactMatch(answers)
    pools = []
    for p, a in answers.items():
        wrong = [f"answer: {int(a) + 1 + j}" for j in range(22)]
        long_wrong = ["answer: " + str(int(a) + 50) + " " + "because " * 60 + str(j) for j in range(2)]
        pools.append({"prompt": p, "responses": [f"answer: {a}"] * 8 + wrong + long_wrong})
    proxy = NoisyProxy(exact, length_bias=0.5, score_noise=0.01, seed=3)
    rep = check_verifier(proxy, pools)
    assert rep.ks == [1, 2, 4, 8, 16, 32]
    peak = int(np.argmax(rep.best_of_k))
    assert 0 < peak < len(rep.ks) - 1, f"best-of-k {rep.best_of_k} should rise, then fall"
    assert rep.best_of_k[-1] == 0.0, f"at k=32 a long wrong answer is always picked, got {rep.best_of_k[-1]}"
    assert np.all(np.diff(rep.pass_at_k) > 0) and rep.pass_at_k[-1] == 1.0, f"pass@k {rep.pass_at_k} should keep rising"
    msg = next(p for p in rep.problems if p.startswith("over-optimisation"))
    assert re.search(r"peaks at k=\d+ \(0\.\d{3}\) and falls to 0\.000 at k=32", msg), msg
    # the same pools scored by the exact checker: no bend
    assert check_verifier(exact, pools).ok


def test_bon_curve_matches_brute_force_subsets():
    # brute force: average over all C(n, k) subsets of the true reward of the top-scored member
    scores = [0.9, 0.1, 0.5, 0.7, 0.3]
    rewards = [0.0, 1.0, 1.0, 0.0, 1.0]
    resp = [f"r{i}" for i in range(5)]
    table = dict(zip(resp, zip(scores, rewards)))
    ver = lambda p, r: Verdicts(scores=[table[x][0] for x in r], rewards=[table[x][1] for x in r])  # noqa: E731
    rep = check_verifier(ver, [{"prompt": "p", "responses": resp}], ks=[1, 2, 3, 5], min_auc=0.0, bend_tol=1.0)
    for k, got in zip(rep.ks, rep.best_of_k):
        subsets = list(itertools.combinations(range(5), k))
        want = np.mean([rewards[max(s, key=lambda i: scores[i])] for s in subsets])
        assert got == pytest.approx(want, abs=1e-12), (k, got, want)


def test_roc_auc_worked_example():
    # Hanley & McNeil 1982: the AUC is the Mann-Whitney probability P(s_pos > s_neg). Positives
    # {0.35, 0.8} against negatives {0.1, 0.4}: 3 of the 4 pairs are ordered (0.35 < 0.4 is not) -> 0.75
    assert roc_auc([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1]) == pytest.approx(0.75)
    assert roc_auc([1, 2], [1, 1]) is None  # one class only


@settings(max_examples=60)
@given(st.lists(st.tuples(st.integers(0, 4), st.booleans()), min_size=2, max_size=12))
def test_roc_auc_equals_mann_whitney_pair_count(pairs):
    # Mann & Whitney 1947: U counts pairs (positive, negative) with the positive higher, ties 1/2;
    # AUC = U / (n1 * n0). Small integer scores force many ties.
    s = [float(a) for a, _ in pairs]
    y = [b for _, b in pairs]
    pos = [a for a, b in zip(s, y) if b]
    neg = [a for a, b in zip(s, y) if not b]
    got = roc_auc(s, y)
    if not pos or not neg:
        assert got is None
        return
    u = sum(1.0 if a > b else 0.5 if a == b else 0.0 for a in pos for b in neg)
    assert got == pytest.approx(u / (len(pos) * len(neg)), abs=1e-12)


@settings(max_examples=25)
@given(sample_pools(n=4))
def test_builtin_checkers_survive_awkward_pools(pools):
    answers = {p["prompt"]: "42" for p in pools}
    for verifier in (ExactMatch(answers), NumericMatch(answers)):
        rep = check_verifier(verifier, pools)
        assert rep.failure_rate == 0.0 and rep.n_nondeterministic == 0, str(rep)
        assert 0.0 <= rep.score_min <= rep.score_max <= 1.0


def test_docs_example_runs(capsys):
    code = re.search(r"<!-- example:start -->\n```python\n(.*?)```", DOCS.read_text(), re.S).group(1)
    assert len(code.strip().splitlines()) == 10
    exec(compile(code, str(DOCS), "exec"), {})
    assert "over-optimisation" in capsys.readouterr().out


def test_pytest_fixture(verifier_check):
    rep = verifier_check(EXACT, POOLS)
    assert rep.auc == 1.0
    bad = verifier_check(lambda p, r: [1.0] * len(r), POOLS, expect_ok=False)
    assert "constant scores: all 16 samples score 1" in bad.problems[0]


def test_cli_check_verifier(tmp_path, capsys):
    ver = tmp_path / "myver.py"
    ver.write_text("def score(prompts, responses):\n    return [float('4' in r) for r in responses]\n")
    ex = tmp_path / "ex.jsonl"
    rows = [{"prompt": "2+2?", "response": r, "reward": float(r == "4")} for r in ["4", "5", "4", "x"]]
    ex.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    out_json = tmp_path / "rep.json"
    assert cli_main(["check-verifier", f"{ver}:score", "--examples", str(ex), "--json", str(out_json)]) == 0
    assert "verifier check: OK" in capsys.readouterr().out
    assert json.loads(out_json.read_text())["n_samples"] == 4
    ver.write_text("def score(prompts, responses):\n    return [1.0 / (r != 'x') for r in responses]\n")
    assert cli_main(["check-verifier", f"{ver}:score", "--examples", str(ex)]) == 1
    assert "failures: 25.0% of 4 samples" in capsys.readouterr().out
    assert cli_main(["check-verifier", f"{ver}:score", "--examples", str(tmp_path / "none.jsonl")]) == 2
    assert "--examples must be an existing JSONL file" in capsys.readouterr().err


def test_examples_and_arguments_are_validated(tmp_path):
    with pytest.raises(ValueError, match="examples must not be empty"):
        check_verifier(EXACT, [])
    with pytest.raises(TypeError, match=r"examples\[0\]\['prompt'\] must be a str, got int"):
        check_verifier(EXACT, [{"prompt": 3, "response": "x"}])
    with pytest.raises(ValueError, match=r"examples\[0\]\['rewards'\] must have 2 entries like 'responses', got 1"):
        check_verifier(EXACT, [{"prompt": "2+2?", "responses": ["a", "b"], "rewards": [1]}])
    with pytest.raises(ValueError, match="repeats must be >= 2 to test determinism, got repeats=1"):
        check_verifier(EXACT, POOLS, repeats=1)
    with pytest.raises(TypeError, match="verifier must be callable"):
        check_verifier("exact", POOLS)
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"prompt": "p", "response": "r"}\nnot json\n')
    with pytest.raises(ValueError, match=r"bad.jsonl line 2: not valid JSON \(Expecting value at column 1\)"):
        read_examples(str(bad))


_SAMPLE = {"prompt": "2+2?", "response": "answer: 4"}
_POOL = {"prompt": "2+2?", "responses": ["answer: 4", "5"]}


@pytest.mark.parametrize("examples, message", [
    # a misspelt key would drop what it holds while the check still reports OK
    ([{**_POOL, "reward": [1, 0]}], r"examples\[0\] has unknown key 'reward': a pool takes only the keys prompt, "
                                    r"responses, rewards, labels, row \(a sample takes prompt, response, reward, label, "
                                    r"row\)"),
    ([{**_POOL, "rewards": [1, 0], "lables": [1, 0]}], r"examples\[0\] has unknown key 'lables'"),
    ([{**_SAMPLE, "rewrd": 1}], r"examples\[0\] has unknown key 'rewrd': a sample takes only the keys prompt, response, "
                                r"reward, label, row"),
    ([{**_POOL, "response": "x"}], r"examples\[0\] has unknown key 'response': a pool takes only"),
    # rewards on some samples only: labels and curves would rest on part of the data
    ([{**_POOL, "rewards": [1, 0]}, {"prompt": "3*3?", "responses": ["9"]}],
     r"rewards must come with every sample or with none: 2 of 3 samples have one, examples\[1\] \(prompt '3\*3\?'\) "
     r"has none"),
    ([{**_SAMPLE, "reward": 1}, {**_SAMPLE, "response": "5"}],
     r"2 samples have one, examples\[1\] \(prompt '2\+2\?'\) has none"),
    ([{**_POOL, "rewards": [1, None]}], r"examples\[0\] rewards must be finite numbers, got None"),
    ([{"prompt": "p", "responses": [], "rewards": []}],
     r"examples\[0\]\['responses'\] must hold at least one response, got an empty list \(prompt 'p'\)"),
])
def test_example_keys_rewards_and_pools_are_checked(examples, message):
    with pytest.raises(ValueError, match=message):
        check_verifier(EXACT, examples)


@pytest.mark.parametrize("kw, message", [
    ({"min_auc": 2}, r"min_auc must be a finite number in \[0, 1\], got min_auc=2.0"),
    ({"min_auc": -0.1}, r"min_auc must be a finite number in \[0, 1\], got min_auc=-0.1"),
    ({"rtol": -1}, r"rtol must be a finite number >= 0, got rtol=-1.0"),
    ({"rtol": float("nan")}, r"rtol must be a finite number >= 0, got rtol=nan"),
    ({"bend_tol": -0.01}, r"bend_tol must be a finite number >= 0, got bend_tol=-0.01"),
])
def test_thresholds_are_checked(kw, message):
    with pytest.raises(ValueError, match=message):
        check_verifier(EXACT, POOLS, **kw)


@pytest.mark.parametrize("kw, message", [
    ({"n": 0}, r"n must be >= 1, got n=0"),  # pools of no response, which check_verifier refuses
    ({"max_prompts": 0}, r"max_prompts must be >= 1, got max_prompts=0"),
])
def test_sample_pools_sizes_are_checked(kw, message):
    with pytest.raises(ValueError, match=message):
        sample_pools(**kw)


def test_examples_file_with_a_misspelt_key_or_rewards_on_some_lines(tmp_path, capsys):
    ver = tmp_path / "myver.py"
    ver.write_text("def score(prompts, responses):\n    return [float('4' in r) for r in responses]\n")
    cases = {
        "typo.jsonl": ('{"prompt": "p", "response": "4", "rewrd": 1}\n',
                       r"typo.jsonl line 1 has unknown key 'rewrd': a sample takes only the keys prompt, response, "
                       r"reward, label, row"),
        "partial.jsonl": ('{"prompt": "p", "response": "4", "reward": 1}\n\n{"prompt": "p", "response": "5"}\n',
                          r"partial.jsonl line 3 has no reward but line 1 has one: give every sample a reward or none"),
    }
    for name, (text, message) in cases.items():
        (tmp_path / name).write_text(text)
        with pytest.raises(ValueError, match=message):
            read_examples(str(tmp_path / name))
        assert cli_main(["check-verifier", f"{ver}:score", "--examples", str(tmp_path / name)]) == 2
        err = capsys.readouterr().err
        assert re.search(message, err) and "Traceback" not in err, err


def test_slow_verifier_timeouts_are_counted():
    import time

    def slow_on_long(prompts, responses):
        if any(len(r) > 20 for r in responses):
            time.sleep(1.0)
        return [1.0] * len(responses)

    pools = [{"prompt": "p", "responses": ["a", "b", "c" * 30]}]
    rep = check_verifier(slow_on_long, pools, timeout=0.2)
    assert (rep.n_timeouts, rep.n_exceptions, rep.n_nan) == (1, 0, 0)
    assert "timeouts 1), e.g. timeout after 0.2 s" in rep.problems[0], rep.problems


# ----------------------------------------------------------------------------- verifiers that read data rows
def loose(prompts, responses, rows):
    """A `rows` grader like the jars one in docs/your-task.md: 1 when the response ends in the total's last digit."""
    return [float(r.strip()[-1:] == str(row["total"])[-1]) for r, row in zip(responses, rows)]


def strict(prompts, responses, rows):
    return [float(r.strip() == str(row["total"])) for r, row in zip(responses, rows)]


# two prompts, three samples each; the reward is 1 for the exact total (hand-written truth)
JARS = [{"prompt": "jars 3+4", "response": r, "reward": float(r == "7"), "row": {"total": 7}} for r in ("7", "17", "6")]
JARS += [{"prompt": "jars 9+6", "response": r, "reward": float(r == "15"), "row": {"total": 15}} for r in ("15", "5", "25")]


def test_a_rows_grader_is_bound_to_the_examples_rows():
    rep = check_verifier(loose, JARS, min_auc=0.0)
    # loose scores 7:1 17:1 6:0 | 15:1 5:1 25:1 against labels 1 0 0 | 1 0 0 (reward > 0.5)
    # accuracy at 0.5: right on "7", "6", "15" -> 3/6
    # AUC (Mann & Whitney 1947, pairs positive > negative, ties 1/2): each positive (score 1) against the
    # negatives 1, 0, 1, 1 gets 0.5 + 1 + 0.5 + 0.5 = 2.5 -> 5 / (2 * 4) = 0.625
    assert (rep.n_labelled, rep.n_positive, rep.failure_rate) == (6, 2, 0.0)
    assert rep.accuracy == pytest.approx(0.5) and rep.auc == pytest.approx(0.625)
    # best-of-k by enumerating the k-subsets, ties broken at random (expected reward among the tied top):
    # pool 1 scores 1 1 0, rewards 1 0 0: k=2 {7,17} 1/2, {7,6} 1, {17,6} 0 -> 1/2; k=3 -> 1/2
    # pool 2 scores 1 1 1: every pick is a random one -> 1/3 at each k
    assert rep.ks == [1, 2, 3]
    np.testing.assert_allclose(rep.best_of_k, [1 / 3, (1 / 2 + 1 / 3) / 2, (1 / 2 + 1 / 3) / 2], rtol=1e-12)
    # pass@k with one correct of 3 (Chen et al. 2021): 1 - C(2, k)/C(3, k) = 1/3, 2/3, 1
    np.testing.assert_allclose(rep.pass_at_k, [1 / 3, 2 / 3, 1.0], rtol=1e-12)
    # the pool form, rows once per pool: the strict grader agrees with the truth everywhere
    pools = [{"prompt": p, "responses": rs, "rewards": [float(r == str(t)) for r in rs], "row": {"total": t}}
             for p, rs, t in (("jars 3+4", ["7", "17", "6"], 7), ("jars 9+6", ["15", "5", "25"], 15))]
    rep = check_verifier(strict, pools)
    assert rep.ok and (rep.accuracy, rep.auc) == (1.0, 1.0), str(rep)


class TotalsCheck:
    """A verifier object that declares its fields and is bound to rows (the UnitTests shape)."""

    fields = {"total": "the right total"}

    def bind(self, rows):
        totals = {p: str(row["total"]) for p, row in rows.items()}
        return lambda prompts, responses: [float(r == totals[p]) for p, r in zip(prompts, responses)]

    def __call__(self, prompts, responses):
        raise TypeError("bind me first")


def test_a_fields_and_bind_verifier_is_bound_to_the_examples_rows():
    rep = check_verifier(TotalsCheck(), JARS)
    assert rep.ok and (rep.accuracy, rep.auc, rep.failure_rate) == (1.0, 1.0, 0.0), str(rep)


def _no_row(examples):
    return [{k: v for k, v in ex.items() if k != "row"} for ex in examples]


@pytest.mark.parametrize("verifier, examples, error, message", [
    (loose, _no_row(JARS), ValueError,
     r"verifier loose reads each prompt's data row, but examples\[0\] \(prompt 'jars 3\+4'\) has no 'row': give every "
     r"example its prompt's data fields"),
    (loose, JARS[:5] + _no_row(JARS[5:]), ValueError, r"but examples\[5\] \(prompt 'jars 9\+6'\) has no 'row'"),
    (TotalsCheck(), _no_row(JARS), ValueError, r"verifier TotalsCheck reads each .* \"row\": \{\"total\": \.\.\.\}"),
    (EXACT, [{**_SAMPLE, "row": {"total": 4}}], ValueError,
     r"examples\[0\] has a 'row', but verifier ExactMatch reads no data rows .* cannot take effect; drop 'row'"),
    (TotalsCheck(), [{**ex, "row": {"sum": 7}} for ex in JARS], ValueError,
     r"examples\[0\]: field 'total' is missing, and verifier TotalsCheck needs it \(the right total\); the row has \['sum'\]"),
    (loose, [*JARS[:1], {**JARS[1], "row": {"total": 8}}], ValueError,
     r"examples\[1\]\['row'\] differs from examples\[0\]\['row'\] for the same prompt 'jars 3\+4': a prompt has one "
     r"data row"),
    (loose, [{**JARS[0], "row": [7]}], TypeError, r"examples\[0\]\['row'\] must be a dict of the prompt's data fields"),
])
def test_rows_that_are_missing_superfluous_or_incomplete_are_refused(verifier, examples, error, message):
    with pytest.raises(error, match=message):
        check_verifier(verifier, examples)


@pytest.mark.parametrize("content, message", [
    (b'{"prompt": "p", "response": "4"}\n{"prompt": "\xff", "response": "5"}\n',
     r"ex.jsonl line 2: not UTF-8 text \(byte 0xff at column 13\); save the file as UTF-8"),
    (b'{"prompt": "p", "response": "4"}\n' + b"[" * 100_000 + b"]" * 100_000 + b"\n",
     r"ex.jsonl line 2: JSON nested too deeply \(an example is one flat JSON object\)"),
    (b'[1, 2]\n', r"ex.jsonl line 1: expected a JSON object \(an example\), got list"),
    (b'{"prompt_id": 0, "prompt": "p", "response": "4", "reward": 1, "scroe": 0.5}\n',
     r"ex.jsonl line 1 has unknown key 'scroe': a samples-file line \(it has 'prompt_id'\) takes the keys"),
    (b'{"prompt_id": 0, "response": "4", "reward": 1, "score": 0.5}\n',
     r"ex.jsonl line 1 is a samples-file line \(it has 'prompt_id'\) without 'prompt'"),
])
def test_examples_files_that_cannot_be_read_name_the_line(tmp_path, content, message):
    (tmp_path / "ex.jsonl").write_bytes(content)
    with pytest.raises(ValueError, match=message):
        read_examples(str(tmp_path / "ex.jsonl"))


def test_a_runs_samples_file_is_read_as_examples(tmp_path):
    # the lines bonft.trainer.evaluation.sample_rows writes for a run's heldout_samples.jsonl
    lines = [{"prompt_id": 0, "prompt": "jars 3+4", "sample": i, "score": 1.0, "reward": float(r == "7"),
              "temperature": 1.0, "response": r, "n_tokens": 2, "answer": r, "score_kit_jar_grader:loose": 1.0}
             for i, r in enumerate(["7", "17"])]
    # a JSON string may hold U+2028 unescaped: it is not a line break here
    lines.append({"prompt_id": 1, "prompt": "jars 9+6", "sample": 0, "score": 0.0, "reward": 0.0, "response": "1\u20285"})
    (tmp_path / "s.jsonl").write_text("\n".join(json.dumps(x, ensure_ascii=False) for x in lines) + "\n", encoding="utf-8")
    assert read_examples(str(tmp_path / "s.jsonl")) == [
        {"prompt": "jars 3+4", "response": "7", "reward": 1.0}, {"prompt": "jars 3+4", "response": "17", "reward": 0.0},
        {"prompt": "jars 9+6", "response": "1\u20285", "reward": 0.0}]



def test_a_samples_file_of_several_temperatures_needs_one_chosen(tmp_path, capsys):
    # bonft sample --temperatures 0.7,1.0 writes both into one file; they were pooled without a word
    lines = [{"prompt_id": 0, "prompt": "jars 3+4", "sample": i, "score": 1.0, "reward": float(r == "7"),
              "temperature": t, "response": r} for t in (0.7, 1.0) for i, r in enumerate(["7", "17", "71"])]
    path = tmp_path / "s.jsonl"
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    with pytest.raises(ValueError, match=r"s.jsonl holds samples drawn at 2 temperatures, 0.7 \(3 lines\), 1 \(3 lines\): "
                                         r"pools mixing them .*choose one with --temperature T"):
        read_examples(str(path))
    assert [ex["response"] for ex in read_examples(str(path), temperature=1.0)] == ["7", "17", "71"]
    with pytest.raises(ValueError, match=r"temperature=0.5 matches no line of .*s.jsonl: its samples were drawn at 0.7 "):
        read_examples(str(path), temperature=0.5)
    plain = tmp_path / "plain.jsonl"
    plain.write_text('{"prompt": "jars 3+4", "response": "7", "reward": 1.0}\n')
    with pytest.raises(ValueError, match=r"plain.jsonl line 1 has no temperature, so choosing a temperature cannot take effect"):
        read_examples(str(plain), temperature=1.0)
    grader = tmp_path / "kit_len_grader.py"
    grader.write_text("def score(prompts, responses):\n    return [float(len(r) == 1) for r in responses]\n")
    assert cli_main(["check-verifier", f"{grader}:score", "--examples", str(path)]) == 2
    assert "holds samples drawn at 2 temperatures" in capsys.readouterr().err
    assert cli_main(["check-verifier", f"{grader}:score", "--examples", str(path), "--temperature", "0.7"]) == 0
    assert "prompts / samples  1 / 3" in capsys.readouterr().out

JAR_GRADER = '''
def loose(prompts, responses, rows):
    return [float(r.strip()[-1:] == str(row["total"])[-1]) for r, row in zip(responses, rows)]

def plain(prompts, responses):
    return [float(r.isdigit()) for r in responses]
'''


def test_cli_rows_on_the_examples_lines(tmp_path, capsys):
    (tmp_path / "kit_jar_grader.py").write_text(JAR_GRADER)
    (tmp_path / "ex.jsonl").write_text("".join(json.dumps(x) + "\n" for x in JARS))
    grader, ex = f"{tmp_path / 'kit_jar_grader.py'}", str(tmp_path / "ex.jsonl")
    # loose scores "17" as "7" and "5", "25" as "15": a wrong response at the top of both pools, a problem (exit 1)
    # unless --max-wrong-top allows it
    assert cli_main(["check-verifier", f"{grader}:loose", "--examples", ex]) == 1
    assert "PROBLEM: wrong at the top: in 2 of 2 pools" in capsys.readouterr().out
    assert cli_main(["check-verifier", f"{grader}:loose", "--examples", ex, "--max-wrong-top", "1",
                     "--json", str(tmp_path / "r.json")]) == 0
    rep = json.loads((tmp_path / "r.json").read_text())  # the figures of test_a_rows_grader_is_bound_to_the_examples_rows
    assert (rep["accuracy"], rep["auc"], rep["failure_rate"], rep["problems"]) == (0.5, 0.625, 0.0, [])
    assert (rep["n_pools_mixed"], rep["n_wrong_top"]) == (2, 2)
    capsys.readouterr()
    assert cli_main(["check-verifier", f"{grader}:plain", "--examples", ex]) == 2
    assert "examples[0] has a 'row', but verifier plain reads no data rows" in capsys.readouterr().err


def test_cli_without_recipe_loads_no_torch(tmp_path):
    import subprocess
    import sys

    (tmp_path / "kit_jar_grader.py").write_text(JAR_GRADER)
    (tmp_path / "ex.jsonl").write_text("".join(json.dumps(x) + "\n" for x in JARS))
    code = ("import sys; from bonft.cli import main; "
            f"c = main(['check-verifier', 'kit_jar_grader:loose', '--examples', {str(tmp_path / 'ex.jsonl')!r}, "
            "'--max-wrong-top', '1']); "
            "print(c, 'torch' in sys.modules, 'transformers' in sys.modules)")
    res = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert res.stdout.strip().splitlines()[-1] == "0 False False", res.stdout + res.stderr


@pytest.fixture
def jars_recipe(tmp_path, monkeypatch):
    """Ten prompts in a JSONL file, a `rows` grader module in the working directory and a recipe splitting
    them 5 + 3 (two prompts in neither part)."""
    data = [{"question": f"jars {a}+{b}", "total": a + b} for a in (1, 2) for b in range(1, 6)]
    (tmp_path / "jars.jsonl").write_text("".join(json.dumps(x) + "\n" for x in data))
    (tmp_path / "kit_jar_grader.py").write_text(JAR_GRADER)
    monkeypatch.chdir(tmp_path)
    recipe = tmp_path / "mine.toml"
    recipe.write_text('task = "user"\nverifier = "kit_jar_grader:loose"\nrl_steps = 1\ntrain_prompts = 5\nheldout_prompts = 3\nseed = 4\n'
                      '[task_params]\ndata = "jars.jsonl"\nprompt_field = "question"\n')
    return recipe, {x["question"]: x["total"] for x in data}


def test_cli_recipe_binds_the_rows_of_the_trainers_split(jars_recipe, tmp_path, capsys):
    from bonft.trainer.config import load_config
    from bonft.trainer.run import build_run

    recipe, totals = jars_recipe
    run = build_run(load_config(recipe), training=False)  # the trainer's own split: its held-out prompts
    held = [e.prompt for e in run.eval]
    assert len(held) == 3 and len({e.prompt for e in run.train + run.eval}) == 8
    # a heldout_samples.jsonl of these prompts: per prompt the total (right), total + 10 (same last digit,
    # wrong) and total + 1 (wrong); loose scores 1 1 0 against rewards 1 0 0
    lines = []
    for b, p in enumerate(held):
        t = totals[p]
        for i, r in enumerate([str(t), str(t + 10), str(t + 1)]):
            lines.append({"prompt_id": b, "prompt": p, "sample": i, "score": 0.0, "reward": float(r == str(t)),
                          "temperature": 1.0, "response": r, "n_tokens": 1})
    samples = tmp_path / "heldout_samples.jsonl"
    samples.write_text("".join(json.dumps(x) + "\n" for x in lines))
    argv = ["check-verifier", "kit_jar_grader:loose", "--examples", str(samples), "--recipe", str(recipe)]
    assert cli_main([*argv, "--max-wrong-top", "1", "--json", str(tmp_path / "r.json")]) == 0
    rep = json.loads((tmp_path / "r.json").read_text())
    # 3 positives (score 1) against 6 negatives (three 1s, three 0s): each positive 3 * 0.5 + 3 * 1 = 4.5,
    # AUC = 13.5 / 18 = 0.75 (Mann & Whitney 1947); accuracy: right on the total and on total + 1 -> 6/9
    assert (rep["n_prompts"], rep["n_samples"], rep["failure_rate"]) == (3, 9, 0.0)
    assert rep["auc"] == pytest.approx(0.75) and rep["accuracy"] == pytest.approx(2 / 3)
    # k-subsets of (1 1 0 | rewards 1 0 0): k=2 -> (1/2 + 1 + 0)/3 = 1/2, k=3 -> 1/2; pass@k 1/3, 2/3, 1
    np.testing.assert_allclose(rep["best_of_k"], [1 / 3, 1 / 2, 1 / 2], rtol=1e-12)
    np.testing.assert_allclose(rep["pass_at_k"], [1 / 3, 2 / 3, 1.0], rtol=1e-12)
    capsys.readouterr()
    # without --recipe the grader has no rows: refused, not scored as 100% failures
    assert cli_main(argv[:4]) == 2
    assert "verifier loose reads each prompt's data row, but examples[0]" in capsys.readouterr().err


def test_cli_recipe_refusals(jars_recipe, tmp_path, capsys):
    from bonft.tasks import get_task

    recipe, totals = jars_recipe
    train, held = get_task("user", data="jars.jsonl", prompt_field="question").split(n_train=5, n_eval=3, seed=4)
    outside = sorted(set(totals) - {e.prompt for e in train + held})
    assert len(outside) == 2

    def run(lines, verifier="kit_jar_grader:loose", recipe=recipe):
        (tmp_path / "ex.jsonl").write_text("".join(json.dumps(x) + "\n" for x in lines))
        code = cli_main(["check-verifier", verifier, "--examples", str(tmp_path / "ex.jsonl"), "--recipe", str(recipe)])
        return code, capsys.readouterr().err

    good = [{"prompt": held[0].prompt, "response": "3"}]
    code, err = run(good + [{"prompt": outside[0], "response": "3"}])
    assert code == 2 and f"the prompt {outside[0]!r} (example 2) has no row in recipe" in err, err
    code, err = run([{**good[0], "row": {"total": 3}}])
    assert code == 2 and "gives rows of its own (example 1 has 'row'): use one or the other" in err, err
    code, err = run(good, verifier="kit_jar_grader:plain")
    assert code == 2 and "--recipe cannot take effect: verifier kit_jar_grader:plain reads no data rows" in err, err
    (tmp_path / "ledger.toml").write_text('task = "ledger"\nrl_steps = 1\ntrain_prompts = 5\nheldout_prompts = 3\n')
    code, err = run(good, recipe=tmp_path / "ledger.toml")
    assert code == 2 and "but recipe" in err and "has task = 'ledger', which has no rows: drop --recipe" in err, err


def test_cli_recipe_with_a_chat_template_matches_the_rendered_prompts(jars_recipe, tmp_path, capsys):
    from bonft.tasks import build_tokenizer, get_task

    recipe, totals = jars_recipe
    tok = build_tokenizer()
    tok.chat_template = ("{{ bos_token }}{% for m in messages %}{{ m['role'] }}: {{ m['content'] }}\n{% endfor %}"
                         "{% if add_generation_prompt %}assistant: {% endif %}")
    tok.save_pretrained(str(tmp_path / "tok"))  # start_from's tokenizer is all --recipe reads: no weights here
    recipe.write_text('start_from = "tok"\n' + recipe.read_text() + 'chat_template = true\nsystem = "count jars"\n')
    _, held = get_task("user", data="jars.jsonl", prompt_field="question", chat_template=True, system="count jars",
                       tokenizer=tok).split(n_train=5, n_eval=3, seed=4)
    raw = held[0].meta["fields"]["question"]
    assert held[0].prompt.startswith("system: count jars\nuser: jars ") and held[0].prompt != raw
    t = totals[raw]
    lines = [{"prompt": held[0].prompt, "response": r, "reward": float(r == str(t))} for r in (str(t), str(t + 1))]
    (tmp_path / "ex.jsonl").write_text("".join(json.dumps(x) + "\n" for x in lines))
    argv = ["check-verifier", "kit_jar_grader:loose", "--examples", str(tmp_path / "ex.jsonl"), "--recipe", str(recipe)]
    assert cli_main([*argv, "--json", str(tmp_path / "r.json")]) == 0
    assert json.loads((tmp_path / "r.json").read_text())["auc"] == 1.0  # loose scores 1 0 against rewards 1 0
    (tmp_path / "ex.jsonl").write_text(json.dumps({"prompt": raw, "response": "3"}) + "\n")  # the prompt as in the data
    assert cli_main(argv) == 2
    assert f"the prompt {raw!r} (example 1) has no row in recipe" in capsys.readouterr().err


def test_cli_checks_a_built_in_verifier_name_with_the_recipes_knobs(tmp_path, monkeypatch, capsys):
    # the unit_tests kind a recipe names, with its verifier_params (the tests column is "checks"), bound as training
    # binds it; per prompt the right total (reward 1) and total + 1 (reward 0): unit tests score 1 and 0, so accuracy
    # and ROC AUC are 1 (hand count)
    data = [{"question": f"jars {a}+{b}", "checks": f"assert total() == {a + b}", "total": a + b}
            for a in (1, 2) for b in range(1, 4)]
    (tmp_path / "jars.jsonl").write_text("".join(json.dumps(x) + "\n" for x in data))
    monkeypatch.chdir(tmp_path)
    recipe = tmp_path / "mine.toml"
    recipe.write_text('task = "user"\nverifier = "unit_tests"\nrl_steps = 1\ntrain_prompts = 3\nheldout_prompts = 3\n'
                      '[task_params]\ndata = "jars.jsonl"\nprompt_field = "question"\n'
                      '[verifier_params]\nfield = "checks"\nwall_time = 3.0\n')
    lines = [{"prompt": x["question"], "response": f"def total():\n    return {t}", "reward": float(t == x["total"])}
             for x in data[:2] for t in (x["total"], x["total"] + 1)]
    (tmp_path / "ex.jsonl").write_text("".join(json.dumps(x) + "\n" for x in lines))
    argv = ["check-verifier", "unit_tests", "--examples", str(tmp_path / "ex.jsonl")]
    assert cli_main([*argv, "--recipe", str(recipe), "--json", str(tmp_path / "r.json")]) == 0
    rep = json.loads((tmp_path / "r.json").read_text())
    assert (rep["n_samples"], rep["accuracy"], rep["auc"], rep["failure_rate"]) == (4, 1.0, 1.0, 0.0)
    capsys.readouterr()
    assert cli_main(argv) == 2
    assert "verifier 'unit_tests' is a built-in name, built from a recipe's task, data and knobs: give --recipe" \
        in capsys.readouterr().err
    assert cli_main(["check-verifier", "unit_test", "--examples", str(tmp_path / "ex.jsonl")]) == 2
    assert "verifier must be 'module:function', 'path/to/file.py:function' or, with --recipe, one of exact, proxy, " \
        "unit_tests, reward_model; got 'unit_test'" in capsys.readouterr().err
