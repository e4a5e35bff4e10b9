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
        ("answer is ４２", "42"),                      # full-width digits (folded to ASCII)
        ("the value is −7", "-7"),                    # U+2212 minus sign
        ("the value is ٤٢", None),                    # Arabic-Indic digits are not numbers here (documented choice)
        ("version2 has 3 parts", "3"),                # digits glued to a word are not a number
        # several markers on one line: the last counts (as the rule says for markers on several lines)
        ("answer: 12 #### 13", "13"),
        ("Answer is 12, so the answer = 14.", "14"),
        ("answer: 12. answer:", None),                # the last marker holds nothing: no answer
        ("answer:", None), ("####   ", None), ("answer: .", None),
        # a negated marker is no marker to read from, and no last number is read after it
        ("the answer is not 12", None),
        ("The answer isn't 12, it is 13.", None),
        ("The answer isn\u2019t 12", None),
        ("the answer isnt 12", None),
        ("answer is not 12. answer: 13", "13"),
        ("the answer is nothing", "nothing"),         # 'is' then a word starting with 'not'
        # dashes and minus-like signs before a number are minus signs
        ("answer: \u201012", "-12"), ("answer: \u201412", "-12"), ("answer: \u02d712", "-12"),
        ("answer: \u279612", "-12"), ("answer: \uff0d12", "-12"), ("so \u201312", "-12"),
        ("\uff21\uff4e\uff53\uff57\uff45\uff52\uff1a \uff14\uff12\uff0e\uff15", "42.5"),  # full-width forms
        # no fold beyond those: superscripts, fractions and circled digits stay as written
        ("answer: 2\u00b3", "2\u00b3"), ("answer: 1\u00bd", "1\u00bd"), ("answer: \u2460\u2461", "\u2460\u2461"),
        ("I get 2\u00b3", None), ("\u00bc", None), ("x is 1\u00bd", None),  # no number glued to them
        ("it is - 12", None), ("x - 12", None), ("I got 12-13", None),  # a sign cut off: unreadable
        ("5 - 3 = 2", "2"),
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
    [("1,234", 1234.0), ("3/4", 0.75), ("-2.5e1", -25.0), ("x", None), (None, None), ("1/0", None), ("−4", -4.0),
     ("x = -7", -7.0), ("42 apples", 42.0), ("\u201012", -12.0), ("\uff11\uff12", 12.0),
     # exactly one number, its sign attached, no negation before it; otherwise None
     ("12 or 13", None), ("12-13", None), ("3/4/5", None), ("- 12", None), ("+ 12", None), ("not 12", None),
     ("n't 12, it is 13", None), ("never 5", None), ("no, 5", None),
     ("2\u00b3", None), ("\u00bd", None), ("3\u00bd", None), ("1\u2044" + "4", None), ("\u2460\u2461", None),
     ("\u0664\u0662", None), ("\u06642", None)],
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
    out = score_batch(v, ["known", "unknown", "known"], ["answer: 1", "1", "answer: 2"])
    np.testing.assert_array_equal(out.scores, [1, 0, 0])  # the failed sample: the batch's lowest score (0)
    np.testing.assert_array_equal(out.failed, [False, True, False])
    out = score_batch(v, ["known", "unknown"], ["answer: 1", "1"], failure_score=-1.0)
    np.testing.assert_array_equal(out.scores, [1, -1])
    np.testing.assert_array_equal(out.failed, [False, True])


def test_checker_arguments_are_validated():
    with pytest.raises(TypeError, match="answers must be a mapping"):
        ExactMatch(["a"])
    with pytest.raises(TypeError, match=r"answers\['q'\] must be a str or an int, got float"):
        ExactMatch({"q": 1.5})
    with pytest.raises(ValueError, match=r"answers\['q'\] must be a finite number or a str holding exactly one .*got 'abc'"):
        NumericMatch({"q": "abc"})
    with pytest.raises(ValueError, match="abs_tol must be a finite number >= 0, got abs_tol=-1"):
        NumericMatch({"q": 1}, abs_tol=-1)
    with pytest.raises(TypeError, match="normalize must be None or a callable"):
        ExactMatch({"q": "a"}, normalize="lower")


@pytest.mark.parametrize(
    "want, response",
    [
        ("12", "The answer isn't 12, it is 13."), ("12", "the answer is not 12"), ("12", "answer: not 12"),
        ("12", "answer: - 12"), ("12", "answer: \u201012"), ("12", "answer: \u201412"), ("12", "answer: \u02d712"),
        ("12", "answer: \u279612"), ("12", "answer: 12-13"), ("12", "answer: 12 or 13"), ("12", "answer: \u2460\u2461"),
        ("23", "answer: 2\u00b3"), ("8", "answer: 2\u00b3"), ("11", "answer: 1\u00bd"), ("1", "answer: \u00bc"),
        ("4", "\u00bc"), ("12", "answer: 12 #### 13"), ("-12", "answer: - 12"), ("0", "answer:"),
    ],
)
def test_no_checker_reads_a_wrong_or_missing_answer_as_right(want, response):
    # each response is wrong (or holds no answer) for a careful reader; neither checker may reward it
    assert ExactMatch({"q": want})(["q"], [response]).scores.tolist() == [0.0]
    assert NumericMatch({"q": want})(["q"], [response]).scores.tolist() == [0.0]


def test_dashes_before_a_number_read_as_minus():
    numeric, exact = NumericMatch({"q": -12}), ExactMatch({"q": "-12"})
    responses = ["answer: \u201012", "answer: \u201412", "answer: \u02d712", "answer: \u279612", "answer: \u221212"]
    assert numeric(["q"] * 5, responses).scores.tolist() == [1.0] * 5
    assert exact(["q"] * 5, responses).scores.tolist() == [1.0] * 5


@pytest.mark.parametrize("answer", ["\u00bd", "3\u00bd", "12 or 13", "2\u00b3", "3/4/5", "- 12", "not 12", "", "  "])
def test_numeric_answer_table_refuses_what_is_not_one_number(answer):
    with pytest.raises(ValueError, match=rf"answers\['q'\] must be a finite number or a str holding exactly one .*got {re.escape(repr(answer))}"):
        NumericMatch({"q": answer})


@pytest.mark.parametrize("answer", ["", "   ", "\n"])
def test_exact_answer_table_refuses_blank_answers(answer):
    with pytest.raises(ValueError, match=rf"answers\['q'\] must be a non-blank answer .*got {re.escape(repr(answer))}"):
        ExactMatch({"q": answer})
    with pytest.raises(ValueError, match=r"answers\['q'\] must be a non-blank answer"):
        ExactMatch({"q": answer}, normalize=None)
    with pytest.raises(ValueError, match=r"answers\['q'\] must not normalise to '' .*got '\.', which canonical_answer makes ''"):
        ExactMatch({"q": "."})


# Hand-written reading cases (common practice, no published source): what a careful reader takes each
# response to say; a denied, hedged or doubly signed answer is no answer.
DENIED_12 = [
    "12 is not the answer.", "The answer != 12", "the answer \u2260 12", "answer\u226012", "The answer cannot be 12.",
    "The answer isn`t 12", "The answer isn\u02bct 12", "The answer isn\u00b4t 12", "the answer ain't 12",
    "answer is nt 12", "The answer is NOT 12", "The answer wasn't 12.", "I got 12. That is wrong.",
    "answer: 12 is wrong", "answer: 12? No.", "answer: \u226012", "answer: != 12", "answer: anything but 12",
    "answer: 12 (not 13)", "Answer: 12; it is not 13", "answer: -$12", "answer: -(12)", "answer: \u2212(12)",
    "answer: (-)12", "answer: - $12", "answer: \u2212 $12", "Answer: minus 12", "answer: negative 12",
    "answer: \u254c12", "answer: ~12", "12 or 13", "12 / 13", "12 (or 13)", "answer: 12 (13)",
    "The answer is 12 apples and 0 pears.", "answer: 12 (maybe 13)", "It costs -$12", "the result is minus 12",
]


@pytest.mark.parametrize("response", DENIED_12)
def test_denied_hedged_or_negative_answers_do_not_score_for_12(response):
    assert ExactMatch({"q": "12"})(["q"], [response]).scores.tolist() == [0.0]
    assert NumericMatch({"q": 12})(["q"], [response]).scores.tolist() == [0.0]


@pytest.mark.parametrize(
    "text, want",
    [("-$12", -12.0), ("-(12)", -12.0), ("\u2212 $12", -12.0), ("$-12", -12.0), ("+$12", 12.0),
     ("minus 12", -12.0), ("negative 12", -12.0), ("Negative $3.5", -3.5),
     ("-(-12)", None), ("--12", None), ("(-)12", None), ("minus -12", None), ("\u254c12", None), ("~12", None),
     ("12 is wrong", None), ("12? No.", None), ("anything but 12", None), ("12 (not 13)", None),
     ("12 (3 \u00d7 4)", 12.0), ("12 because 3 groups of 4 make 12", 12.0), ("12, since 3*4=12", 12.0),
     ("12 (3 x 4 = 12)", 12.0), ("12 out of 20", 12.0), ("12 (13)", None), ("12 (or 3 x 4)", None),
     ("12 (maybe 13)", None), ("12 apples and 0 pears", None), ("12, 13", None), ("3*4 => 12", None)],
)
def test_parse_number_signs_negations_and_explanations(text, want):
    assert parse_number(text) == want


@pytest.mark.parametrize(
    "text, want",
    [("Answer - 12", "12"), ("Answer \u2013 12", "12"), ("Answer \u2014 12", "12"), ("Answer -12", "-12"),
     ("It costs -$12", "-12"), ("the result is minus 12", "-12"), ("Hence, 12", "12"), ("12 or 13", None),
     ("12 (or 13)", None), ("12, 13", None), ("12 is not the answer.", None), ("The answer cannot be 12.", None),
     ("Is it 13? No. It is 12.", "12"), ("The answer isn`t 12", None), ("answer \u2260 12", None),
     ("It is minus 12", "-12"), ("terminus 12", "12"),
     ("5 minus 12", None), ("x minus 12", None), ("5 -$12", None),  # "minus" between operands is an operation, not a sign
     ("Total \u2013 12", None)],  # a spaced dash before the last number may be an operator ("x - 12")
)
def test_extract_answer_separator_dash_negation_and_set_off_signs(text, want):
    assert extract_answer(text) == want


@pytest.mark.parametrize(
    "response",
    ["Answer \u2013 12", "Answer - 12", "Answer \u2014 12", "The answer is 12 (3 \u00d7 4).",
     "The answer is 12 because 3 groups of 4 make 12.", "answer: 12 out of 20", "The answer is 12, since 3*4=12.",
     "Hence, 12"],
)
def test_numeric_match_reads_a_separator_dash_and_an_explained_answer(response):
    assert NumericMatch({"q": 12})(["q"], [response]).scores.tolist() == [1.0]


def test_signs_set_off_by_currency_read_as_negative_and_no_stays_an_answer():
    numeric = NumericMatch({"q": -12})
    responses = ["answer: -$12", "answer: -(12)", "answer: \u2212 $12", "Answer: minus 12", "It costs -$12",
                 "answer: -(-12)"]
    assert numeric(["q"] * 6, responses).scores.tolist() == [1.0] * 5 + [0.0]
    assert NumericMatch({"q": "-$12"}).answers == {"q": -12.0}
    assert NumericMatch({"q": "negative 12"}).answers == {"q": -12.0}
    # a yes/no answer "no" is an answer, not a negation of one (ExactMatch compares the text)
    assert ExactMatch({"q": "no"})(["q", "q"], ["The answer is no.", "answer: yes"]).scores.tolist() == [1.0, 0.0]
