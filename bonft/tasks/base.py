"""What every task shares: the example record, the task interface, exact-answer verifiers."""
from __future__ import annotations

import random
import re
import sys
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np

from bonft._core.checks import check_int, check_items
from bonft.verifiers.base import Verdicts

_INT = re.compile(r"(-?)0*([0-9]+)")  # ASCII digits only: "\u0669" (Arabic-Indic nine) or "\U0001d7d7" is no digit
#: the most digits an integer answer may have: the fewest Python's int() is ever limited to
#: (sys.set_int_max_str_digits refuses less), so reading an answer as int never raises
MAX_INTEGER_DIGITS = sys.int_info.str_digits_check_threshold


def extract_integer(response: str) -> str | None:
    """The answer of a response that is exactly one integer in ASCII digits ``0-9`` (surrounding spaces
    allowed), normalised (``" 09 " -> "9"``, ``"-0" -> "0"``); anything else -> None, including digits of
    other scripts and integers of more than :data:`MAX_INTEGER_DIGITS` digits. Strict on purpose: a
    lenient parser ("the last number in the text") can be gamed by responses that list many numbers."""
    if not isinstance(response, str):
        return None
    m = _INT.fullmatch(response.strip())
    if m is None:
        return None
    sign, digits = m.groups()
    if len(digits) > MAX_INTEGER_DIGITS:
        return None
    return "0" if digits.strip("0") == "" else sign + digits  # str(int(text)), without int()'s length limit


@dataclass(frozen=True)
class Example:
    """One prompt with its exact answer.

    prompt:    the text the model sees.
    answer:    the exact answer (compared with ``Task.extract_answer(response)``); None when unknown.
    reference: a full correct response text (what supervised warm-starting trains on).
    meta:      task-specific facts, e.g. ``{"family": "hard"}``.
    """

    prompt: str
    answer: str | None
    reference: str
    meta: dict = field(default_factory=dict, compare=False, hash=False)


def _check_examples(examples: Any) -> list[Example]:
    return check_items("examples", examples, Example, "Example")


def _answer_table(examples: list[Example]) -> dict[str, str]:
    table: dict[str, str] = {}
    for i, ex in enumerate(examples):
        if ex.answer is None:
            raise ValueError(f"examples must all have an answer for an exact verifier, got answer=None at index {i} (prompt {ex.prompt!r})")
        if not isinstance(ex.answer, str) or not ex.answer.strip():
            raise ValueError(f"examples must all have a non-blank str answer for an exact verifier (a blank one rewards "
                             f"an empty response), got answer={ex.answer!r} at index {i} (prompt {ex.prompt!r})")
        if table.get(ex.prompt, ex.answer) != ex.answer:
            raise ValueError(f"examples give two answers for prompt {ex.prompt!r}: {table[ex.prompt]!r} and {ex.answer!r}")
        table[ex.prompt] = ex.answer
    return table


def _check_pairs(prompts: Sequence[str], responses: Sequence[str]) -> tuple[list[str], list[str]]:
    if isinstance(prompts, str) or isinstance(responses, str):
        raise TypeError("prompts and responses must be sequences of str, got a single str")
    prompts, responses = list(prompts), list(responses)
    if len(prompts) != len(responses):
        raise ValueError(f"responses must have one entry per prompt (len(prompts)={len(prompts)}), got {len(responses)}")
    return prompts, responses


class AnswerLookup:
    """Base of the task verifiers: maps each prompt to its example's answer."""

    def __init__(self, examples: Sequence[Example], extract: Callable[[str], str | None]):
        self.answers = _answer_table(_check_examples(examples))
        self.extract = extract

    def _truth(self, prompts: list[str]) -> list[str]:
        out = []
        for i, p in enumerate(prompts):
            if p not in self.answers:
                raise ValueError(f"prompts[{i}] is not one of the {len(self.answers)} prompts this verifier was built for: {p!r}")
            out.append(self.answers[p])
        return out

    def exact(self, prompts: list[str], responses: list[str]) -> np.ndarray:
        truth = self._truth(prompts)
        return np.array([float(self.extract(r) == t) for r, t in zip(responses, truth)])


class NumericProxy(AnswerLookup):
    """Base of the tasks' imperfect proxies: ``Verdicts(scores=proxy score, rewards=exact match)``.

    A subclass gives :meth:`proxy_score` of an extracted integer answer against the truth; a
    response without an answer scores 0. The true reward (exact match) rides along, so best-of-k
    under the proxy can be compared with pass@k under the truth.
    """

    def proxy_score(self, answer: int, truth: int) -> float:  # pragma: no cover - abstract
        raise NotImplementedError

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = _check_pairs(prompts, responses)
        truth = self._truth(prompts)
        scores = np.zeros(len(prompts))
        rewards = np.zeros(len(prompts))
        for i, (r, t) in enumerate(zip(responses, truth)):
            got = self.extract(r)
            if got is None:
                continue
            scores[i] = self.proxy_score(int(got), int(t))
            rewards[i] = float(got == t)
        return Verdicts(scores=scores, rewards=rewards)


class ExactVerifier(AnswerLookup):
    """``verifier(prompts, responses) -> Verdicts(scores=reward, rewards=reward)``, reward in {0, 1}:
    1 when the answer extracted from the response equals the example's answer."""

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = _check_pairs(prompts, responses)
        r = self.exact(prompts, responses)
        return Verdicts(scores=r, rewards=r.copy())


def family_counts(n: int, shares: dict[str, float]) -> dict[str, int]:
    """Split ``n`` over families by largest remainder, so the counts sum to ``n`` exactly."""
    raw = {f: n * s for f, s in shares.items()}
    counts = {f: int(np.floor(v)) for f, v in raw.items()}
    left = n - sum(counts.values())
    for f in sorted(raw, key=lambda f: (counts[f] - raw[f], f))[:left]:
        counts[f] += 1
    return counts


def _progress(total: int, desc: str):
    """A progress bar on stderr for generating ``total`` prompts when that takes more than about a second."""
    if total < 200_000:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit=" prompts", unit_scale=True, leave=False)


class Task:
    """A generator of prompts with exact answers, and its verifiers.

    Subclasses set ``name``, ``description``, validate their knobs into
    ``self.params`` and implement ``_families()`` (family -> share) and
    ``_make(rng, family) -> Example``.
    """

    name = "task"
    description = ""
    #: what ``verifier(examples)`` checks and what ``proxy_verifier(examples)`` scores, in a few words
    #: (the demo's tables name the training and the evaluation verifier with them)
    verifier_label = "exact answer"
    proxy_label = "the task's proxy"
    #: the fewest response tokens (EOS included) that hold every right answer; the demo refuses fewer
    min_new_tokens = 1
    #: ``bonft demo --task NAME``'s settings for this task where they differ from DemoConfig's defaults
    demo_settings: dict = {}

    def __init__(self, **params: Any):
        self.params: dict[str, Any] = dict(params)

    def __repr__(self) -> str:
        knobs = ", ".join(f"{k}={v!r}" for k, v in self.params.items())
        return f"{type(self).__name__}({knobs})"

    # -- to implement
    def _families(self) -> dict[str, float]:
        return {"all": 1.0}

    def _make(self, rng: random.Random, family: str) -> Example:  # pragma: no cover
        raise NotImplementedError

    # -- public
    def split(self, *, n_train: int, n_eval: int, seed: int = 0) -> tuple[list[Example], list[Example]]:
        """Reproducible, disjoint train and eval examples.

        Same ``(params, seed, n_eval)`` -> the same eval set, whatever ``n_train``
        (eval prompts are drawn first). No prompt is in both sets, and each
        family gets its share of each set (largest-remainder rounding).
        """
        n_train = check_int("n_train", n_train, min=0)
        n_eval = check_int("n_eval", n_eval, min=0)
        seed = check_int("seed", seed, min=0)
        shares = self._families()
        c_eval, c_train = family_counts(n_eval, shares), family_counts(n_train, shares)
        train, evals = [], []
        for i, fam in enumerate(shares):
            rng = random.Random(f"{self.name}/{seed}/{fam}")  # one stream per family: stable under other families' counts
            need, seen, pool = c_eval[fam] + c_train[fam], set(), []
            attempts = 0
            bar = _progress(need, f"{self.name} {fam!r} prompts")  # None below ~1 s of work
            while len(pool) < need and attempts < 200 * need + 1000:
                ex = self._make(rng, fam)
                attempts += 1
                if ex.prompt not in seen:
                    seen.add(ex.prompt)
                    pool.append(ex)
                    if bar is not None and len(pool) % 10_000 == 0:
                        bar.update(10_000)
            if bar is not None:
                bar.close()
            if len(pool) < need:
                raise ValueError(
                    f"n_train + n_eval asks for {need} distinct {fam!r} prompts, but {self!r} made only "
                    f"{len(pool)}; lower n_train/n_eval or widen the task's number range"
                )
            evals += pool[:c_eval[fam]]
            train += pool[c_eval[fam]:]
        mix = random.Random(f"{self.name}/{seed}/mix")
        mix.shuffle(evals)
        mix.shuffle(train)
        return train, evals

    def extract_answer(self, response: str) -> str | None:
        """The answer in a response, or None when it has none (default: exactly one integer)."""
        return extract_integer(response)

    def verifier(self, examples: Sequence[Example]) -> ExactVerifier:
        """Exact verifier for these examples: ``Verdicts(scores=reward, rewards=reward)``, reward in {0, 1}."""
        return ExactVerifier(examples, self.extract_answer)

    def proxy_verifier(self, examples: Sequence[Example]):
        """An imperfect verifier, ``Verdicts(scores=proxy, rewards=exact)``, or None if the task has none."""
        return None
