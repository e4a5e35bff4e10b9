"""Answer checkers: pull the final answer out of a response and compare it.

Extraction rule (default, ``pattern=None``), applied after the character
folding below:

1. the text after the **last** answer marker, up to the end of its line --
   markers are ``answer:``, ``answer is``, ``answer =``, ``answer -`` with a
   space after the dash (``"Answer - 12"``, ``"Answer – 12"``: the dash is a
   separator), any case (``"The final Answer: 42"``), and ``####``; one
   trailing ``.`` is dropped. Several markers on one line: the last one counts
   (``"answer: 12 #### 13"`` -> ``"13"``). A negated marker (``answer is not``,
   ``answer is nt``, ``answer isn't`` with any apostrophe -- ``' ’ ‘ ʼ ´ `` and
   the backtick -- or none, ``answer != ``, ``answer ≠``) that is the last
   marker means no answer;
2. otherwise the **last number** in the text (``-3``, ``1,234``, ``2.5``,
   ``1e-3``, ``3/4``), unless the sentence holding it or anything after it
   has a negation (below: ``"12 is not the answer."``, ``"The answer cannot be
   12."``), the number is joined to the number before it by ``or``, ``/`` or
   ``,`` (``"12 or 13"``), or what stands before it makes it unreadable (below);
   a sign set off by currency or a bracket, or ``minus`` / ``negative``, is
   read into it (``"It costs -$12"`` -> ``"-12"``);
3. otherwise ``None`` (the response scores 0). An empty answer
   (``"answer:"``) is ``None`` too.

Negations: ``not``, ``no``, ``never``, ``nor``, ``cannot``, ``n't`` with any of
the apostrophes above or none (``isnt``, ``aint``, ``cant``, ``dont`` ...),
``nt``, ``wrong``, ``incorrect``, ``false``, ``≠``, ``!=``, ``=/=``, ``anything
but``, ``other than``, ``rather than``, ``instead of``, ``except``.

Numbers are ASCII ``0-9``. A number glued to a letter or to a digit of another
kind (``2³``, ``1½``, ``٤2``, ``7kg``) is not a number. Between the last word
and a number may stand spaces, currency (``$ € £ ¥ ₹``), brackets, markup
(``* _ ` # \\``), ``,``, ``=``, ``:`` and arrows (``->``, ``=>``, ``→``); a sign
there counts only when currency or an opening bracket sets it off from the
digits (``-$12``, ``-(12)``, ``- $12`` read as ``-12``) and no number stands
right before it (``5 -$12`` is an operation). Anything else makes
the number unreadable: a sign cut off by spaces only (``- 12``; also
``"Total – 12"``, where the dash may be a separator but equally an operator, as
in ``"x - 12"``) or glued to a word (``x-12``), two signs (``-(-12)``, ``--12``), ``(-)12``, and any other
character (``~12``, ``≈12``, ``>12``, a box-drawing ``╌12``).

:func:`parse_number` (and so :class:`NumericMatch`, on the extracted answer and
on the strings of its answer table) reads the first number of the answer,
with its sign as above, and only when the answer has no negation anywhere
(``"12 is wrong"``, ``"12? No."``, ``"12 (not 13)"`` are no number) and any
later number stands in an explanation of the first: ``"out of N"``
(``"12 out of 20"``), or a bracket or a clause starting with ``because``,
``since``, ``as``, ``from``, ``by``, ``via``, ``using`` or ``given`` that has no
``or`` and no hedge (``maybe``, ``perhaps``, ``possibly``, ``probably``,
``either``, ``alternatively``, ``?``) and repeats the number or derives it by
arithmetic (``"12 (3 × 4)"``, ``"12 because 3 groups of 4 make 12"``,
``"12, since 3*4=12"``). A second candidate is no number: ``"12 or 13"``,
``"12, 13"``, ``"12-13"``, ``"12 (13)"``, ``"12 apples and 0 pears"``.
``"minus 12"`` and ``"negative 12"`` read as ``-12`` ("minus" only at the start or
after ``is``, ``was``, ``be``, ``are``, ``equals``, ``get``, ``got``, ``gives``,
``makes``, ``answer``, ``:``, ``=``, ``(``, ``,``: ``"5 minus 12"`` and ``"x minus 12"``
are an operation, so the number is unreadable).

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

# apostrophes a writer may type in "isn't": ASCII, curly, modifier letter, acute accent, backtick, prime
_APOS = "'\u2019\u2018\u02bc\u02bb\u02bd\u00b4`\u2032"
# a negation: the answer is denied or qualified away ("not 12", "12 is wrong", "!= 12", "anything but 12")
_NEGATION = re.compile(
    r"\b(?:not|no|never|nor|cannot|nt|aint|isnt|wasnt|arent|cant|dont|doesnt|wont|wrong|incorrect|false)\b"
    rf"|n[{_APOS}]t\b|\u2260|!=|=/=|\banything\s+but\b|\bother\s+than\b|\brather\s+than\b|\binstead\s+of\b"
    r"|\bexcept\b", re.IGNORECASE)
_MARKER = re.compile(
    rf"\banswer\s*(?P<negated>is\s*(?:not|nt|never)\b|isn[{_APOS}]?t\b|is\s+n[{_APOS}]t\b|!=|\u2260|=/=)"
    r"|\banswer\s*(?:is\b\s*:?|:|=|-(?=\s))|####", re.IGNORECASE)
# a number (ASCII digits) not glued to a word character (any script's letters and digits, "³", "½") or a
# decimal point on either side
_NUMBER = re.compile(r"(?<![\w.])[-+]?(?:[0-9]{1,3}(?:,[0-9]{3})+|[0-9]+)(?:\.[0-9]+)?(?:[eE][-+]?[0-9]+)?(?:/[0-9]+)?(?!\w)")
# what may stand between the last word and a number without changing it: spaces, currency, brackets, markup,
# ",", "=", ":" and arrows ("->", "=>" are read as arrows, not as signs)
_PLAIN_LEAD = frozenset(" \t\r\n\f\v$\u20ac\u00a3\u00a5\u20b9([{*_,=:\"'`#\\\u2192\u21d2")
_ARROW = re.compile(r"(?<!-)-+>|(?<!=)=+>")  # a run starts only at its first character: linear in a run of dashes
_SIGN_WORD = re.compile(r"(?<![^\W\d_])(?:minus|negative)$", re.IGNORECASE)
# "minus" is a sign (not an operation, as in "5 minus 12" or "x minus 12") only at the start or after these
_UNARY_AFTER = frozenset({"is", "was", "be", "are", "equals", "get", "got", "gives", "makes", "answer"})
_SET_OFF = frozenset(" \t\r\n\f\v$\u20ac\u00a3\u00a5\u20b9([")  # may stand between a sign and its digits
# the end of a sentence before a number: . ! ? ; followed by a space, or a line break
_SENTENCE_END = re.compile(r"[.!?;](?=\s)|\n")
# what joins two candidates: "12 or 13", "12 / 13", "12, 13", "12 (or 13)"
_JOINED = re.compile(r"[(\[]?\s*(?:,|/|(?:,\s*)?or|and/or)")  # matched on the stripped text between them
# after the number, what starts an explanation of it: a bracket, or because / since / as / from / by / via /
# using / given (after an optional comma); "out of N" is a denominator, not a second answer
_EXPLAINS = re.compile(r"\s*(?:,\s*)?(?:[(\[]|(?:because|since|as|from|by|via|using|given)\b)", re.IGNORECASE)
_OUT_OF = re.compile(r"\s*out\s+of\s+[0-9]+(?:,[0-9]{3})*\s*(?:[.!)]\s*)?$", re.IGNORECASE)
# a second candidate or a hedge inside the explanation: "12 (or 13)", "12 (maybe 13)", "12 (13?)"
_ALTERNATIVE = re.compile(r"\b(?:or|either|maybe|perhaps|possibly|probably|alternatively)\b|\?", re.IGNORECASE)
# arithmetic between numbers: the explanation derives the answer ("12 (3 x 4)", "since 3*4=12")
_DERIVATION = re.compile(r"[0-9)]\s*(?:[-+*/=^\u00d7\u00f7\u00b7xX]|\\times|\\cdot)\s*[0-9(]")
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


def _lead_sign(text: str, m: re.Match[str]) -> int | None:
    """What the characters between the last word and the number ``m`` do to it: 1 (nothing), -1 (a sign
    set off by currency or a bracket, ``-$12``, ``-(12)``, or the word ``minus`` / ``negative``), None (the
    number is unreadable: a sign cut off by spaces ``- 12`` or glued to a word ``x-12``, two signs ``-(-12)``,
    a set-off sign right after a number (``5 -$12``, an operation), or a character that may change the number,
    such as ``~``, ``<`` or a box-drawing dash)."""
    i = m.start()
    while i > 0 and not (text[i - 1].isalnum() or text[i - 1] == "_"):
        i -= 1
    lead = _ARROW.sub("\u2192", text[i:m.start()])
    own_sign = m.group(0)[0] in "+-"
    signs = [k for k, c in enumerate(lead) if c in "+-"]
    if any(c not in _PLAIN_LEAD and c not in "+-" for c in lead):
        return None
    word = _SIGN_WORD.search(text[max(0, i - 8):i])
    if word:  # "minus 12", "negative $12", "It is minus 12"; not "5 minus 12"
        before = text[:i - len(word.group(0))].rstrip()
        prev = re.search(r"[^\W\d_]+$", before[-20:])
        unary = (word.group(0).lower() == "negative" or not before or before[-1] in ":=([,"
                 or (prev is not None and prev.group(0).lower() in _UNARY_AFTER))
        return -1 if unary and not own_sign and not signs and lead and set(lead) <= _SET_OFF else None
    if not signs:
        return 1
    if own_sign or len(signs) > 1:
        return None
    between = lead[signs[0] + 1:]
    if not between.strip() or not set(between) <= _SET_OFF:  # "- 12", "x-12", "(-)12"
        return None
    if not lead[:signs[0]].strip() and i > 0 and text[i - 1].isdigit():  # "5 -$12" is an operation
        return None
    return -1 if lead[signs[0]] == "-" else 1


def _explains(tail: str, first: str) -> bool:
    """Whether ``tail``, the text after the first number of an answer, explains that number rather than
    offering a second one: "out of N", or a bracket or a because / since / as ... clause without "or" or a
    hedge that repeats the number or derives it by arithmetic."""
    if _OUT_OF.match(tail):
        return True
    if not _EXPLAINS.match(tail) or _ALTERNATIVE.search(tail):
        return False
    repeated = any(n.group(0).lstrip("+-") == first.lstrip("+-") for n in _NUMBER.finditer(tail))
    return repeated or bool(_DERIVATION.search(tail))


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
    if found is None:
        return None
    sentence = 0
    for end in _SENTENCE_END.finditer(text, 0, found.start()):
        sentence = end.end()
    if _NEGATION.search(text, sentence):  # "12 is not the answer.", "The answer cannot be 12."
        return None
    before = None
    for before in _NUMBER.finditer(text, sentence, found.start()):
        pass
    if before is not None and _JOINED.fullmatch(text[before.end():found.start()].strip()):
        return None
    sign = _lead_sign(text, found)
    if sign is None:
        return None
    tok = found.group(0)
    return "-" + tok if sign < 0 else tok


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
    """The number in ``text`` as a float (``"1,234"`` -> 1234, ``"3/4"`` -> 0.75, ``"x = -2"`` -> -2,
    ``"-$12"`` -> -12), or None unless ``text`` holds one number -- later numbers only in an explanation of it
    (``"12 (3 x 4)"``, ``"12 because 3*4=12"``, ``"12 out of 20"``) -- with nothing before it that may change it
    (``"- 12"``, ``"-(-12)"``, ``"~12"``) and no negation anywhere (``not``, ``no``, ``n't``, ``wrong``, ``!=``,
    ``anything but``; the module docstring lists them)."""
    if text is None:
        return None
    text = unify_text(text)
    if _NEGATION.search(text):
        return None
    found = list(_NUMBER.finditer(text))
    if not found:
        return None
    m = found[0]
    sign = _lead_sign(text, m)
    if sign is None or (len(found) > 1 and not _explains(text[m.end():], m.group(0))):
        return None
    tok = m.group(0).replace(",", "")
    if "/" in tok:
        num, den = tok.split("/")
        return sign * float(num) / float(den) if float(den) != 0 else None
    value = sign * float(tok)
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
    (:func:`math.isclose`). A response whose answer :func:`parse_number` cannot read as one number (two
    candidates, a negation, an unreadable sign) scores 0.

    answers: prompt -> expected number, or a str holding one number such as ``"1,024"`` or ``"-$12"`` (read by
             :func:`parse_number`: ``"½"``, ``"2³"``, ``"12 or 13"`` or ``"not 12"`` are errors).
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
