"""Answer checkers on hand-written cases (the expected values are worked out by hand)."""
import re

import numpy as np
import pytest

from bonft.verifiers import ExactMatch, NumericMatch, extract_answer, score_batch
from bonft.verifiers.answers import canonical_answer, parse_number


@pytest.mark.parametrize(
    "text, want",
    [
        ("so the answer is 42.", "42"),
        ("Answer: Paris", "Paris"),
        ("answer: 3\nwait, answer: 5", "5"),          # the last marker wins
        ("The final answer is: x = 7", "x = 7"),
        ("#### 1,234", "1,234"),                      # GSM8K-style marker
        ("I got 12 then 15", "15"),                   # no marker: last number
        ("temperature -3.5 and then 2e3", "2e3"),
        ("ratio 3/4", "3/4"),
        ("no digits at all", None),
        ("", None),
        ("answer is ４２", "42"),                      # full-width digits (NFKC)
        ("the value is −7", "-7"),                    # U+2212 minus sign
        ("the value is ٤٢", None),                    # Arabic-Indic digits are not numbers here (documented choice)
        ("version2 has 3 parts", "3"),                # digits glued to a word are not a number
    ],
)
def test_extract_answer_default_rule(text, want):
    assert extract_answer(text) == want


def test_extract_answer_custom_pattern():
    # \boxed{...} convention: the last match, group 1
    assert extract_answer(r"\boxed{1} then \boxed{2}", pattern=r"\\boxed\{([^}]*)\}") == "2"
    assert extract_answer("<a>x</a><a>y</a>", pattern=re.compile(r"<a>(?P<answer>.*?)</a>")) == "y"
    assert extract_answer("abc", pattern=r"\d") is None
    with pytest.raises(ValueError, match="pattern must be a valid regular expression"):
        extract_answer("x", pattern="(")
    with pytest.raises(TypeError, match="pattern must be None, a regex str"):
        extract_answer("x", pattern=5)
    with pytest.raises(TypeError, match="text must be a str, got int"):
        extract_answer(5)


@pytest.mark.parametrize(
    "text, want",
    [("1,234", 1234.0), ("3/4", 0.75), ("-2.5e1", -25.0), ("x", None), (None, None), ("1/0", None), ("−4", -4.0)],
)
def test_parse_number(text, want):
    assert parse_number(text) == want


def test_exact_match_scores_and_rewards():
    v = ExactMatch({"capital of France?": "Paris", "2+2?": 4})
    out = v(
        ["capital of France?", "capital of France?", "capital of France?", "2+2?", "2+2?"],
        ["Answer: paris.", "answer: Lyon", "I don't know", "answer: ４", "the answer is 4 or 5"],
    )
    # casefold + trailing '.' dropped; full-width 4 == 4; "4 or 5" is not "4"
    np.testing.assert_array_equal(out.scores, [1, 0, 0, 1, 0])
    np.testing.assert_array_equal(out.rewards, out.scores)
    strict = ExactMatch({"q": "Paris"}, normalize=None)
    np.testing.assert_array_equal(strict(["q", "q"], ["answer: paris", "answer: Paris"]).scores, [0, 1])
    assert canonical_answer("  New   York. ") == "new york"


def test_numeric_match_tolerances():
    v = NumericMatch({"pi?": 3.14159, "big?": "1,000,000", "neg?": -7}, abs_tol=1e-3, rel_tol=0.0)
    out = v(
        ["pi?", "pi?", "big?", "big?", "neg?", "neg?", "neg?"],
        ["answer: 3.1416", "answer: 3.15", "#### 1,000,000", "about 1e6", "answer is −7", "answer: 7", "answer: seven"],
    )
    # |3.1416-3.14159| = 1e-5 <= 1e-3; |3.15-3.14159| = 8.4e-3 > 1e-3; 1e6 == 1,000,000; U+2212 minus reads as -
    np.testing.assert_array_equal(out.scores, [1, 0, 1, 1, 1, 0, 0])
    rel = NumericMatch({"q": 100.0}, abs_tol=0.0, rel_tol=0.01)
    np.testing.assert_array_equal(rel(["q", "q"], ["answer: 100.9", "answer: 101.5"]).scores, [1, 0])


def test_unknown_prompt_is_a_value_error_and_isolated_by_score_batch():
    v = ExactMatch({"known": "1"})
    with pytest.raises(ValueError, match="prompts must all have an expected answer; 1 do not, e.g. 'unknown'"):
        v(["known", "unknown"], ["1", "1"])
    out = score_batch(v, ["known", "unknown"], ["answer: 1", "1"])
    np.testing.assert_array_equal(out.scores, [1, 0])
    np.testing.assert_array_equal(out.failed, [False, True])


def test_checker_arguments_are_validated():
    with pytest.raises(TypeError, match="answers must be a mapping"):
        ExactMatch(["a"])
    with pytest.raises(TypeError, match=r"answers\['q'\] must be a str or an int, got float"):
        ExactMatch({"q": 1.5})
    with pytest.raises(ValueError, match=r"answers\['q'\] must be a finite number, got 'abc'"):
        NumericMatch({"q": "abc"})
    with pytest.raises(ValueError, match="abs_tol must be a finite number >= 0, got abs_tol=-1"):
        NumericMatch({"q": 1}, abs_tol=-1)
    with pytest.raises(TypeError, match="normalize must be None or a callable"):
        ExactMatch({"q": "a"}, normalize="lower")
