"""score_batch isolates failing samples; load_verifier finds verifiers by name."""
import logging
import math
import re
import time
import warnings
from dataclasses import dataclass

import numpy as np
import pytest

from bonft.verifiers import BatchFallbackWarning, Verdicts, VerifierError, load_verifier, score_batch


def picky(prompts, responses):
    """Fails the whole batch if any response is 'boom'; NaN for 'nan'."""
    out = []
    for r in responses:
        if r == "boom":
            raise ZeroDivisionError("division by zero")
        out.append(float("nan") if r == "nan" else float(len(r)))
    return out


def test_failures_are_isolated_and_counted(caplog):
    caplog.set_level(logging.WARNING, logger="bonft.verifiers")
    v = score_batch(picky, ["p"] * 4, ["ab", "boom", "nan", "abcd"], failure_score=-1.0)
    # the healthy samples keep their score len(r); the two bad ones get failure_score
    np.testing.assert_array_equal(v.scores, [2.0, -1.0, -1.0, 4.0])
    np.testing.assert_array_equal(v.failed, [False, True, True, False])
    assert v.reasons[1] == "ZeroDivisionError: division by zero"
    assert v.reasons[2] == "score is nan"
    assert v.n_failed == 2
    assert "failed on 2 of 4 samples" in caplog.text


def test_strict_raises_with_the_reason():
    with pytest.raises(VerifierError, match="ZeroDivisionError"):
        score_batch(picky, ["p"] * 2, ["a", "boom"], strict=True)
    with pytest.raises(VerifierError, match="sample 1: score is nan"):
        score_batch(picky, ["p"] * 2, ["a", "nan"], strict=True)


def test_timeout_marks_the_slow_sample():
    def slow(prompts, responses):
        if "slow" in responses:
            time.sleep(1.0)
        return [1.0] * len(responses)

    v = score_batch(slow, ["p", "p"], ["fast", "slow"], timeout=0.2)
    np.testing.assert_array_equal(v.failed, [False, True])
    assert v.reasons[1] == "timeout after 0.2 s"
    assert v.scores[0] == 1.0 and v.scores[1] == 0.0  # 0, or the batch's lowest judged score when that is below 0


def test_rewards_kept_and_nan_reward_is_a_failure():
    def with_rewards(prompts, responses):
        return Verdicts(scores=[0.5, 0.7], rewards=[1.0, float("nan")])

    v = score_batch(with_rewards, ["p", "q"], ["a", "b"])
    np.testing.assert_array_equal(v.rewards, [1.0, 0.0])  # a failure is never counted right, even when all else is
    np.testing.assert_array_equal(v.scores, [0.5, 0.0])
    assert v.reasons == [None, "reward is nan"]
    assert not np.isnan(v.scores).any() and not np.isnan(v.rewards).any()
    v = score_batch(with_rewards, ["p", "q"], ["a", "b"], failure_score=0.0)  # a fixed stand-in, as asked
    np.testing.assert_array_equal(v.scores, [0.5, 0.0])
    np.testing.assert_array_equal(v.rewards, [1.0, 0.0])


def test_a_failed_sample_never_ranks_above_a_judged_one():
    # a verifier whose honest scores are negative (a reward model's logits, a negative loss): a response that makes it
    # raise got the stand-in 0 and won best-of-n, so a policy trained against it learns to crash the verifier
    def negative(prompts, responses):
        return [-1.0 - len(r) / 10 if "~" not in r else {}["~"] for r in responses]

    v = score_batch(negative, ["p"] * 4, ["7", "seven", "~", "answer 7"])
    np.testing.assert_array_equal(v.failed, [False, False, True, False])
    np.testing.assert_allclose(v.scores, [-1.1, -1.5, -1.8, -1.8])  # the lowest judged score, -1 - 8/10
    assert int(np.argmax(v.scores)) == 0
    every = score_batch(negative, ["p"] * 2, ["~", "~~"])
    np.testing.assert_array_equal(every.scores, [0.0, 0.0])  # nothing judged: a constant batch
    assert score_batch(negative, ["p"] * 3, ["7", "~", "seven"], failure_score=-9.0).scores[1] == -9.0
    with pytest.raises(ValueError, match=r"failure_score must be 'lowest' or a finite number, got 'low'"):
        score_batch(negative, ["p"], ["7"], failure_score="low")
    with pytest.raises(ValueError, match=r"failure_score must be a finite number"):
        score_batch(negative, ["p"], ["7"], failure_score=float("nan"))


def test_wrong_length_falls_back_per_sample():
    calls = []

    def sometimes_short(prompts, responses):
        calls.append(len(prompts))
        return [1.0] if len(prompts) > 1 else [2.0]

    v = score_batch(sometimes_short, ["p"] * 3, ["a", "b", "c"])
    assert calls == [3, 1, 1, 1]
    np.testing.assert_array_equal(v.scores, [2.0, 2.0, 2.0])


def oom(prompts, responses):
    """Runs out of memory on a batch of more than 2; scores len(r) otherwise."""
    if len(responses) > 2:
        raise MemoryError()
    return [float(len(r)) for r in responses]


@dataclass
class Dedup:
    """One score per distinct response (a dataclass instance: unhashable, remembered by name)."""

    def __call__(self, prompts, responses):
        return [float(len(r)) for r in dict.fromkeys(responses)]


@pytest.mark.parametrize("make, batch, cause", [
    (lambda: oom, ["a", "bb", "ccc"], "MemoryError"),
    (Dedup, ["a", "bb", "a"], "ValueError: the verifier returned 2 scores for 3 (prompt, response) pairs"),
])
def test_a_broken_batch_call_is_warned_once_and_scored_as_before(make, batch, cause):
    verifier = make()
    with pytest.warns(BatchFallbackWarning, match=rf"verifier \S+ failed on a batch of 3 \({re.escape(cause)}\); bonft "
                                                  r"scored the batch one sample per call though each of its samples "
                                                  r"scored fine alone: its batched call is broken\. .*\(3 calls "
                                                  r"instead of 1 here\)"):
        v = score_batch(verifier, ["p"] * 3, batch)
    # the one-sample calls give the scores: len(r) of each response (hand-counted)
    np.testing.assert_array_equal(v.scores, [float(len(r)) for r in batch])
    assert not v.failed.any() and v.batch_failure == cause
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # shown once per verifier (an unhashable one by its name): the second is silent
        again = score_batch(make() if make is Dedup else verifier, ["p"] * 3, batch)
        assert again.batch_failure == cause
        assert score_batch(verifier, ["p"] * 2, ["a", "bb"]).batch_failure is None  # the batch call worked


def test_a_batch_fallback_that_isolates_failures_says_so():
    def crashes_on_boom(prompts, responses):
        return [1.0 / (r != "boom") for r in responses]

    # named as a user names a verifier (--verifier module:function), the spelling plan's cache key uses too
    with pytest.warns(BatchFallbackWarning, match=r"verifier test_verifiers_scoring:test_a_batch_fallback_that_isolates_"
                                                  r"failures_says_so\.<locals>\.crashes_on_boom failed on a batch of 3 \(ZeroDivisionError: "
                                                  r"float division by zero\); .* to isolate the 1 sample\(s\) it fails on"):
        v = score_batch(crashes_on_boom, ["p"] * 3, ["a", "boom", "c"])
    np.testing.assert_array_equal(v.failed, [False, True, False])


def test_bad_arguments_name_themselves():
    with pytest.raises(TypeError, match="verifier must be callable"):
        score_batch(3, ["p"], ["r"])
    with pytest.raises(ValueError, match=r"responses must have the same length as prompts \(2\), got 1"):
        score_batch(picky, ["p", "q"], ["r"])
    with pytest.raises(TypeError, match=r"responses\[0\] must be a str, got int"):
        score_batch(picky, ["p"], [5])
    with pytest.raises(TypeError, match="prompts must be a sequence of str, got str"):
        score_batch(picky, "p", ["r"])
    with pytest.raises(ValueError, match="failure_score must be a finite number"):
        score_batch(picky, ["p"], ["r"], failure_score=math.nan)
    with pytest.raises(ValueError, match="timeout must be a finite number of seconds > 0, got timeout=0"):
        score_batch(picky, ["p"], ["r"], timeout=0)


def test_a_verifier_returning_text_is_a_failure_not_a_parsed_score():
    # "1" from a verifier is a bug (a str where a float belongs); it was parsed to 1.0 without a word
    with pytest.raises(TypeError, match=r"scores must be numbers, got str '1': a verifier returns floats"):
        Verdicts(scores=["1", "0"])
    with pytest.raises(TypeError, match=r"rewards must be numbers, got str 'yes'"):
        Verdicts(scores=[1.0], rewards=["yes"])
    v = score_batch(lambda ps, rs: ["1"] * len(rs), ["p"] * 2, ["a", "b"])
    assert v.n_failed == 2 and v.scores.tolist() == [0.0, 0.0]
    assert "scores must be numbers, got str '1'" in v.reasons[0]
    assert Verdicts(scores=[True, 0, 2.5]).scores.tolist() == [1.0, 0.0, 2.5]  # bools and ints are numbers


def test_empty_batch():
    assert len(score_batch(picky, [], [])) == 0


def test_load_verifier_from_module_and_file(tmp_path):
    f = tmp_path / "myver.py"
    f.write_text(
        "class Length:\n"
        "    def __call__(self, prompts, responses):\n"
        "        return [float(len(r)) for r in responses]\n"
        "def first(prompts, responses):\n"
        "    return [1.0 if r.startswith('a') else 0.0 for r in responses]\n"
    )
    fn = load_verifier(f"{f}:first")
    assert list(fn(["p", "p"], ["abc", "xyz"])) == [1.0, 0.0]
    inst = load_verifier(f"{f}:Length")  # a class is instantiated with no arguments
    assert inst(["p"], ["abcd"]) == [4.0]
    mod_fn = load_verifier("bonft.verifiers.scoring:score_batch")
    assert mod_fn is score_batch


def test_load_verifier_errors(tmp_path):
    with pytest.raises(ValueError, match="spec must look like 'module:function'"):
        load_verifier("no_colon_here")
    with pytest.raises(TypeError, match="spec must be a str"):
        load_verifier(3)
    with pytest.raises(ValueError, match="cannot be imported"):
        load_verifier("surely_not_a_module_xyz:f")
    with pytest.raises(ValueError, match="has no attribute 'nope'"):
        load_verifier("bonft.verifiers.scoring:nope")
    with pytest.raises(FileNotFoundError, match="does not exist"):
        load_verifier(str(tmp_path / "missing.py") + ":f")
    with pytest.raises(TypeError, match="must name a callable verifier, got Logger"):
        load_verifier("bonft.verifiers.scoring:log")


@pytest.mark.parametrize("returned, match", [
    (lambda ps, rs: 0.7, r"returned a single number 0.7 as scores for 3 \(prompt, response\) pairs: return a list of 3 scores"),
    (lambda ps, rs: np.full((1, len(rs)), 0.5), r"returned scores of shape \(1, 3\) for 3 .*return a flat list of 3 scores"),
    (lambda ps, rs: [[1.0] for _ in rs], r"returned scores of shape \(3, 1\) for 3 "),
    (lambda ps, rs: ([1.0] * len(rs), np.ones((len(rs), 1))), r"returned rewards of shape \(3, 1\) for 3 "),
])
def test_a_lone_number_or_a_2d_array_is_refused_not_spread(returned, match):
    # A lone 0.7 for 3 samples was copied to every sample, and a (1, N) array flattened, without a word.
    with pytest.raises(VerifierError, match=match):
        score_batch(returned, ["p"] * 3, ["a", "b", "c"], strict=True)
    v = score_batch(returned, ["p"] * 3, ["a", "b", "c"])  # one at a time, each call is refused the same way
    assert v.failed.tolist() == [True] * 3 and v.scores.tolist() == [0.0] * 3
    assert "for 1 (prompt, response) pair: return a" in v.reasons[0]


def test_a_verifier_returning_none_names_it():
    with pytest.raises(VerifierError, match=r"returned None as scores for 2 \(prompt, response\) pairs \(a missing return\?\)"):
        score_batch(lambda ps, rs: None, ["p"] * 2, ["a", "b"], strict=True)
