"""Answer checkers: pull the final answer out of a response and compare it.

Extraction rule (default, ``pattern=None``), applied after Unicode
normalisation (below):

1. the text after the **last** answer marker, up to the end of its line --
   markers are ``answer:``, ``answer is``, ``answer =`` (any case, e.g.
   ``"The final Answer: 42"``) and ``####``; one trailing ``.`` is dropped;
2. otherwise the **last number** in the text (``-3``, ``1,234``, ``2.5``,
   ``1e-3``, ``3/4``);
3. otherwise ``None`` (the response scores 0).

Unicode: text is NFKC-normalised first, so full-width digits ``"４２"`` read
as ``"42"``; the minus sign U+2212 ``"−"`` reads as ``"-"``. Other scripts'
digits (e.g. Arabic-Indic ``"٤٢"``) are *not* numbers for these checkers:
only ASCII ``0-9`` after NFKC count. This is a choice, documented so that
scores do not depend on Python's permissive ``float()``.

Caution (reward hacking): these checkers look at one extracted answer, so a
response cannot win by listing many candidates (only the last counts), but a
policy under best-of-N will still find any quirk of the pattern you choose;
test custom patterns with :func:`bonft.testing.check_verifier`.
"""
from __future__ import annotations

import math
import numbers
import re
import unicodedata
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from bonft._core.checks import check_nonnegative
from bonft.verifiers.base import Verdicts
from bonft.verifiers.scoring import check_batch

_MARKER = re.compile(r"(?:\banswer\s*(?:is\s*:?|:|=)|####)[ \t]*([^\n]*)", re.IGNORECASE)
# a number not glued to a word or a decimal point on its left
_NUMBER = re.compile(
    r"(?<![\w.])[-+]?(?:\d{1,3}(?:,\d{3})+|\d+)(?:\.\d+)?(?:[eE][-+]?\d+)?(?:/\d+)?(?![\w])",
    re.ASCII,
)
_MINUS = {"\u2212": "-", "\u2012": "-", "\u2013": "-", "\ufe63": "-"}


def unify_text(text: str) -> str:
    """NFKC-normalise and map Unicode minus signs to ``-``."""
    text = unicodedata.normalize("NFKC", text)
    return text.translate(str.maketrans(_MINUS))


def _check_pattern(pattern: Any) -> re.Pattern[str] | None:
    if pattern is None or isinstance(pattern, re.Pattern):
        return pattern
    if not isinstance(pattern, str):
        raise TypeError(f"pattern must be None, a regex str or a compiled re.Pattern, got {type(pattern).__name__}")
    try:
        return re.compile(pattern)
    except re.error as e:
        raise ValueError(f"pattern must be a valid regular expression, got {pattern!r} ({e})") from None


def _extract(text: str, pattern: re.Pattern[str] | None) -> str | None:
    text = unify_text(text)
    if pattern is not None:
        last = None
        for last in pattern.finditer(text):
            pass
        if last is None:
            return None
        if "answer" in pattern.groupindex:
            got = last.group("answer")
        elif pattern.groups:
            got = last.group(1)
        else:
            got = last.group(0)
        return None if got is None else got.strip()
    last = None
    for last in _MARKER.finditer(text):
        pass
    if last is not None:
        got = last.group(1).strip()
        return got[:-1].rstrip() if got.endswith(".") else got
    nums = _NUMBER.findall(text)
    return nums[-1] if nums else None


def extract_answer(text: str, *, pattern: str | re.Pattern[str] | None = None) -> str | None:
    """The final answer in ``text`` (see the module docstring for the rule), or None.

    pattern: a regex; its last match is the answer -- the group named
             ``answer`` if there is one, else group 1, else the whole match.
             Matching runs on the NFKC-normalised text.

    >>> extract_answer("2 + 2 is 4, so the answer is 4.")
    '4'
    >>> extract_answer("I got 12 then 15")
    '15'
    """
    if not isinstance(text, str):
        raise TypeError(f"text must be a str, got {type(text).__name__}")
    return _extract(text, _check_pattern(pattern))


def parse_number(text: str | None) -> float | None:
    """The first number in ``text`` as a float (``"1,234"`` -> 1234, ``"3/4"`` -> 0.75), or None."""
    if text is None:
        return None
    m = _NUMBER.search(unify_text(text))
    if m is None:
        return None
    tok = m.group(0).replace(",", "")
    if "/" in tok:
        num, den = tok.split("/")
        return float(num) / float(den) if float(den) != 0 else None
    value = float(tok)
    return value if math.isfinite(value) else None


def canonical_answer(text: str) -> str:
    """Default normalisation for :class:`ExactMatch`: NFKC, minus signs, trim,
    collapse whitespace, casefold, drop one trailing ``.``."""
    text = " ".join(unify_text(text).split()).casefold()
    return text[:-1].rstrip() if text.endswith(".") else text


def _check_answers(answers: Any, *, numeric: bool) -> dict[str, Any]:
    if not isinstance(answers, Mapping):
        raise TypeError(f"answers must be a mapping prompt -> expected answer, got {type(answers).__name__}")
    out = {}
    for p, a in answers.items():
        if not isinstance(p, str):
            raise TypeError(f"answers keys must be prompt strings, got {type(p).__name__} {p!r:.40}")
        if numeric:
            if isinstance(a, bool) or not isinstance(a, (numbers.Real, str)):
                raise TypeError(f"answers[{p!r:.40}] must be a number or a numeric str, got {type(a).__name__}")
            value = parse_number(a) if isinstance(a, str) else float(a)
            if value is None or not math.isfinite(value):
                raise ValueError(f"answers[{p!r:.40}] must be a finite number, got {a!r}")
            out[p] = value
        else:
            if isinstance(a, bool) or not isinstance(a, (str, numbers.Integral)):
                raise TypeError(f"answers[{p!r:.40}] must be a str or an int, got {type(a).__name__}")
            out[p] = str(a)
    return out


def _lookup(answers: Mapping[str, Any], prompts: Sequence[str]) -> list[Any]:
    missing = [p for p in prompts if p not in answers]
    if missing:
        raise ValueError(f"prompts must all have an expected answer; {len(missing)} do not, e.g. {missing[0]!r:.60}")
    return [answers[p] for p in prompts]


class ExactMatch:
    """1 if the extracted answer equals the expected one after ``normalize``, else 0.

    ``prompts, responses: (N,) -> Verdicts(scores (N,), rewards = scores)``.

    answers:   prompt -> expected answer (str or int).
    pattern:   extraction regex (see :func:`extract_answer`); None = default rule.
    normalize: applied to both sides before comparing; None = compare as extracted.
    """

    def __init__(self, answers: Mapping[str, str | int], *, pattern: str | re.Pattern[str] | None = None,
                 normalize: Callable[[str], str] | None = canonical_answer) -> None:
        self.answers = _check_answers(answers, numeric=False)
        self.pattern = _check_pattern(pattern)
        if normalize is not None and not callable(normalize):
            raise TypeError(f"normalize must be None or a callable str -> str, got {type(normalize).__name__}")
        self.normalize = normalize

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        norm = self.normalize or (lambda s: s)
        scores = np.zeros(len(prompts))
        for i, (want, resp) in enumerate(zip(_lookup(self.answers, prompts), responses)):
            got = _extract(resp, self.pattern)
            scores[i] = float(got is not None and norm(got) == norm(unify_text(want)))
        return Verdicts(scores=scores, rewards=scores.copy())


class NumericMatch:
    """1 if the first number of the extracted answer is close to the expected value, else 0.

    ``prompts, responses: (N,) -> Verdicts(scores (N,), rewards = scores)``.

    Close means ``|got - want| <= max(rel_tol * max(|got|, |want|), abs_tol)``
    (:func:`math.isclose`). A response with no number scores 0.

    answers: prompt -> expected number (or a numeric str such as ``"1,024"``).
    """

    def __init__(self, answers: Mapping[str, float | str], *, abs_tol: float = 1e-6, rel_tol: float = 1e-9,
                 pattern: str | re.Pattern[str] | None = None) -> None:
        self.answers = _check_answers(answers, numeric=True)
        self.abs_tol, self.rel_tol = check_nonnegative("abs_tol", abs_tol), check_nonnegative("rel_tol", rel_tol)
        self.pattern = _check_pattern(pattern)

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        scores = np.zeros(len(prompts))
        for i, (want, resp) in enumerate(zip(_lookup(self.answers, prompts), responses)):
            got = parse_number(_extract(resp, self.pattern))
            scores[i] = float(got is not None and math.isclose(got, want, rel_tol=self.rel_tol, abs_tol=self.abs_tol))
        return Verdicts(scores=scores, rewards=scores.copy())
