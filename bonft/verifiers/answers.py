"""Answer checkers: pull the final answer out of a response and compare it.

Extraction rule (default, ``pattern=None``), applied after the character
folding below:

1. the text after the **last** answer marker, up to the end of its line --
   markers are ``answer:``, ``answer is``, ``answer =`` (any case, e.g.
   ``"The final Answer: 42"``) and ``####``; one trailing ``.`` is dropped.
   Several markers on one line: the last one counts (``"answer: 12 #### 13"``
   -> ``"13"``). A negated marker (``answer is not``, ``answer isn't``) that is
   the last marker means no answer;
2. otherwise the **last number** in the text (``-3``, ``1,234``, ``2.5``,
   ``1e-3``, ``3/4``);
3. otherwise ``None`` (the response scores 0). An empty answer
   (``"answer:"``) is ``None`` too.

Numbers are ASCII ``0-9``. A number glued to a letter or to a digit of another
kind (``2³``, ``1½``, ``٤2``, ``7kg``) is not a number, and a sign cut off from
its number by spaces (``- 12``) makes the number unreadable: neither reads as
``12``. :func:`parse_number` (and so :class:`NumericMatch`) reads an answer
only when it holds exactly one number with no ``not`` / ``no`` / ``never``
before it: ``"12 or 13"``, ``"12-13"`` and ``"not 12"`` are no number.

Characters: full-width forms (U+FF01-U+FF5E) read as their ASCII
(``"４２"`` -> ``"42"``), the ideographic space as a space, and minus signs and
dashes (U+2212 ``"−"``, the hyphens and dashes U+2010-U+2015, U+02D7, U+2796
and the other dash punctuation) as ``-``, so ``"‐12"`` reads as ``-12``. No
other character is folded: superscripts, fractions (``¼``), circled digits
and other scripts' digits (``٤٢``) are not numbers for these checkers. This is
a choice, documented so that scores do not depend on Python's permissive
``float()`` or on Unicode's compatibility mappings (which read ``2³`` as ``23``).

Caution (reward hacking): these checkers look at one extracted answer, so a
response cannot win by listing many candidates (only the last counts), but a
policy under best-of-N will still find any quirk of the pattern you choose;
test custom patterns with :func:`bonft.testing.check_verifier`.
"""
from __future__ import annotations

import math
import numbers
import re
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from bonft._core.checks import check_nonnegative
from bonft.verifiers.base import Verdicts
from bonft.verifiers.scoring import check_batch

_MARKER = re.compile(r"\banswer\s*(?:(?P<negated>is\s*not\b|isn['\u2019]?t\b)|is\b\s*:?|:|=)|####", re.IGNORECASE)
# a number (ASCII digits) not glued to a word character (any script's letters and digits, "³", "½") or a
# decimal point on either side
_NUMBER = re.compile(r"(?<![\w.])[-+]?(?:[0-9]{1,3}(?:,[0-9]{3})+|[0-9]+)(?:\.[0-9]+)?(?:[eE][-+]?[0-9]+)?(?:/[0-9]+)?(?!\w)")
_CUT_SIGN = re.compile(r"[-+]\s*$")  # a sign right before a number but not part of it: "- 12", "x-12"
_NEGATION = re.compile(r"\b(?:not|no|never)\b|n['\u2019]t\b", re.IGNORECASE)
# dash punctuation (Unicode category Pd) and minus-like signs: all read as "-"
_DASHES = ("\u058a\u05be\u1400\u1806\u2010\u2011\u2012\u2013\u2014\u2015\u2e17\u2e1a\u2e3a\u2e3b\u2e40\u2e5d"
           "\u301c\u3030\u30a0\ufe31\ufe32\ufe58\ufe63\U00010ead"
           "\u2212\u02d7\u2796\u207b\u208b\u2043")
_FOLD = {**{cp: cp - 0xFEE0 for cp in range(0xFF01, 0xFF5F)}, 0x3000: " ", **{ord(c): "-" for c in _DASHES}}


def unify_text(text: str) -> str:
    """Full-width forms as ASCII, the ideographic space as a space, minus signs and dashes as ``-``;
    nothing else changes (see the module docstring)."""
    return text.translate(_FOLD)


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
        return (got or "").strip() or None
    last = None
    for last in _MARKER.finditer(text):
        pass
    if last is not None:
        if last.group("negated"):
            return None
        got = text[last.end():].split("\n", 1)[0].strip()
        return (got[:-1].rstrip() if got.endswith(".") else got) or None
    found = None
    for found in _NUMBER.finditer(text):
        pass
    if found is None or _CUT_SIGN.search(text, 0, found.start()):
        return None
    return found.group(0)


def extract_answer(text: str, *, pattern: str | re.Pattern[str] | None = None) -> str | None:
    """The final answer in ``text`` (see the module docstring for the rule), or None.

    pattern: a regex; its last match is the answer -- the group named
             ``answer`` if there is one, else group 1, else the whole match (empty: no answer).
             Matching runs on the folded text (full-width forms as ASCII, dashes as ``-``).

    >>> extract_answer("2 + 2 is 4, so the answer is 4.")
    '4'
    >>> extract_answer("I got 12 then 15")
    '15'
    """
    if not isinstance(text, str):
        raise TypeError(f"text must be a str, got {type(text).__name__}")
    return _extract(text, _check_pattern(pattern))


def parse_number(text: str | None) -> float | None:
    """The number in ``text`` as a float (``"1,234"`` -> 1234, ``"3/4"`` -> 0.75, ``"x = -2"`` -> -2), or None
    unless ``text`` holds exactly one number (module docstring: ASCII digits, not glued to a letter or another
    kind of digit), its sign not cut off by spaces (``"- 12"``) and no ``not`` / ``no`` / ``never`` before it."""
    if text is None:
        return None
    text = unify_text(text)
    found = list(_NUMBER.finditer(text))
    if len(found) != 1:
        return None
    m = found[0]
    if _CUT_SIGN.search(text, 0, m.start()) or _NEGATION.search(text, 0, m.start()):
        return None
    tok = m.group(0).replace(",", "")
    if "/" in tok:
        num, den = tok.split("/")
        return float(num) / float(den) if float(den) != 0 else None
    value = float(tok)
    return value if math.isfinite(value) else None


def canonical_answer(text: str) -> str:
    """Default normalisation for :class:`ExactMatch`: full-width forms, minus signs and dashes folded, trim,
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
                raise ValueError(f"answers[{p!r:.40}] must be a finite number or a str holding exactly one (ASCII "
                                 f"digits, such as '1,024' or '-3/4'), got {a!r}")
            out[p] = value
        else:
            if isinstance(a, bool) or not isinstance(a, (str, numbers.Integral)):
                raise TypeError(f"answers[{p!r:.40}] must be a str or an int, got {type(a).__name__}")
            if not str(a).strip():
                raise ValueError(f"answers[{p!r:.40}] must be a non-blank answer (a blank one would reward a response "
                                 f"with no answer), got {a!r}")
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

    answers:   prompt -> expected answer (str or int); a blank one (or one that ``normalize`` makes ``''``) is
               an error.
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
        if normalize is not None:
            for p, a in self.answers.items():
                if not normalize(unify_text(a)):
                    raise ValueError(f"answers[{p!r:.40}] must not normalise to '' (a blank answer would reward a "
                                     f"response with no answer), got {a!r}, which {getattr(normalize, '__name__', 'normalize')} "
                                     "makes ''")

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        norm = self.normalize or (lambda s: s)
        scores = np.zeros(len(prompts))
        for i, (want, resp) in enumerate(zip(_lookup(self.answers, prompts), responses)):
            got = _extract(resp, self.pattern)
            scores[i] = float(got is not None and norm(got) == norm(unify_text(want)))
        return Verdicts(scores=scores, rewards=scores.copy())


class NumericMatch:
    """1 if the extracted answer's number (:func:`parse_number`) is close to the expected value, else 0.

    ``prompts, responses: (N,) -> Verdicts(scores (N,), rewards = scores)``.

    Close means ``|got - want| <= max(rel_tol * max(|got|, |want|), abs_tol)``
    (:func:`math.isclose`). A response whose answer is not exactly one number scores 0.

    answers: prompt -> expected number, or a str holding exactly one number such as ``"1,024"`` (read by
             :func:`parse_number`: ``"½"``, ``"2³"`` or ``"12 or 13"`` are errors).
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
