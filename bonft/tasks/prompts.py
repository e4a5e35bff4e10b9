"""Your own prompts: a local JSONL file with a prompt field and (optionally) an answer field.

One JSON object per line, e.g. ``{"prompt": "2+2=", "answer": "4"}``; blank lines
are skipped, and a malformed line (not UTF-8, not JSON, not an object, nested too
deeply, no prompt) raises ``ValueError`` naming the file and the line. With answers present, :func:`exact_match_verifier` scores a
response 1 when it equals the answer after trimming and collapsing whitespace.
An answer is a string or an integer (read as its decimal text, ``7`` -> ``"7"``);
a null or blank one is a missing answer, and a float, a boolean or any other
value is an error naming the line (:func:`answer_text`).

Caution: an exact-match verifier is only as good as the answers in the file,
and a model trained against any verifier learns what that verifier accepts
(reward hacking). For prompts whose answers are code to run, use a sandboxed
checker, never ``exec`` of model output in your own process.
"""
from __future__ import annotations

import numbers
import os
import random
from pathlib import Path
from typing import Any, Callable, Sequence

from bonft._core.checks import check_int
from bonft._core.jsonl import decode_utf8, parse_object
from bonft.tasks.base import ExactVerifier, Example, Task, _check_examples


def normalize_text(response: str) -> str | None:
    """Trim and collapse runs of whitespace; the answer extractor of user prompt sets."""
    if not isinstance(response, str):
        return None
    return " ".join(response.split())


def answer_text(value: Any, where: str, field: str) -> str | None:
    """A row's answer as the exact checker compares it: a string whitespace-normalised, an integer as its
    decimal text (``7`` -> ``"7"``), None when missing (null, or a blank string: a blank answer would
    reward an empty response). A float, a boolean or any other value raises ``ValueError`` naming
    ``where`` (the file and line): its text is Python's spelling (``7.0``, ``True``, ``100.0`` for
    ``1e2``), which no right response need match, so the file must spell the answer as a string."""
    if value is None:
        return None
    if isinstance(value, str):
        return normalize_text(value) or None
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        return str(int(value))
    raise ValueError(f"{where}: field {field!r} (the answer) must be a string or an integer, got "
                     f"{type(value).__name__} {value!r:.60}; write it as the string a right response must "
                     f"match (e.g. \"7\", \"true\", \"100\")")


def require_answers(examples: Sequence[Example], field: str | None, where: Callable[[Example], str]) -> None:
    """The exact checker compares each response with its prompt's answer: an example without one (absent, null
    or blank) is a ``ValueError`` naming ``where(example)`` (its file and line) and the answer ``field``."""
    for ex in examples:
        if ex.answer is None:
            if field is None:
                raise ValueError("the exact verifier compares each response with an answer, but answer_field is not set: "
                                 "set answer_field to the column of answers, or name your own verifier")
            raise ValueError(f"{where(ex)}: field {field!r} is missing (absent, null or blank), and the exact verifier "
                             "needs it (it compares each response with the answer); add it or name your own verifier")


def load_prompts_jsonl(
    path: str | os.PathLike,
    *,
    prompt_field: str = "prompt",
    answer_field: str = "answer",
    reference_field: str = "reference",
) -> list[Example]:
    """Examples from a local JSONL file, in file order.

    ``answer`` is the row's answer as :func:`answer_text` reads it (None when the file has no such
    field, or the row's is null or blank; a float or boolean raises ``ValueError`` naming the line);
    ``reference`` is ``row[reference_field]`` if present, else the answer (else ""); every other field
    goes to ``meta``.
    """
    return [ex for _, ex in _load_numbered(path, prompt_field=prompt_field, answer_field=answer_field,
                                           reference_field=reference_field)]


def _load_numbered(path: Any, *, prompt_field: str, answer_field: str, reference_field: str) -> list[tuple[int, Example]]:
    """``[(line, Example)]`` of :func:`load_prompts_jsonl`."""
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike, got {type(path).__name__}")
    for name, value in (("prompt_field", prompt_field), ("answer_field", answer_field), ("reference_field", reference_field)):
        if not isinstance(value, str):
            raise TypeError(f"{name} must be a str, got {type(value).__name__}")
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"path must be a JSONL file, got {str(path)!r} (no such file)")
    numbered = _read_jsonl(path)
    cols = set().union(*(row for _, row in numbered)) if numbered else set()
    if numbered and prompt_field not in cols:
        raise ValueError(f"prompt_field must name a field of {str(path)!r} (fields: {sorted(cols)}), got {prompt_field!r}")
    has_answer = answer_field in cols
    out = []
    for no, row in numbered:
        prompt = row.get(prompt_field)
        if not isinstance(prompt, str) or not prompt:
            raise ValueError(f"{path} line {no}: field {prompt_field!r} must be a non-empty string, got {prompt!r}")
        answer = answer_text(row.get(answer_field), f"{path} line {no}", answer_field) if has_answer else None
        ref = row.get(reference_field) if reference_field in cols else None
        reference = str(ref) if ref is not None else (answer or "")
        meta = {k: v for k, v in row.items() if k not in (prompt_field, answer_field, reference_field)}
        out.append((no, Example(prompt=prompt, answer=answer, reference=reference, meta=meta)))
    if not out:
        raise ValueError(f"path must hold at least one JSON line, got an empty file {str(path)!r}")
    return out


def _read_jsonl(path: Path) -> list[tuple[int, dict]]:
    """``(line number, object)`` for each non-blank line; errors name the file and the line."""
    text = decode_utf8(path.read_bytes(), str(path))
    return [(no, parse_object(line, str(path), no, "a prompt with its fields"))
            for no, line in enumerate(text.split("\n"), start=1) if line.strip()]


def exact_match_verifier(examples: Sequence[Example]) -> ExactVerifier:
    """Reward 1 where the whitespace-normalised response equals the example's answer, else 0."""
    return ExactVerifier(_check_examples(examples), normalize_text)


class PromptFileTask(Task):
    """A user's JSONL prompt set as a task (``get_task("jsonl", path=...)``).

    ``split`` shuffles the file's examples with ``seed`` and takes eval first,
    then train (disjoint by position). A line repeating a prompt with the same fields is read once; the
    same prompt with another answer or other fields is an error naming both lines (verifiers look
    answers up by prompt).
    """

    name = "jsonl"
    description = "your own prompts from a local JSONL file (prompt and answer fields)"

    def __init__(self, *, path: str | os.PathLike, prompt_field: str = "prompt", answer_field: str = "answer"):
        super().__init__(path=str(path), prompt_field=prompt_field, answer_field=answer_field)
        rows = _load_numbered(path, prompt_field=prompt_field, answer_field=answer_field, reference_field="reference")
        self.examples: list[Example] = []
        self._where: dict[str, str] = {}
        first: dict[str, Example] = {}
        for no, ex in rows:
            where = f"{path} line {no}"
            if ex.prompt in first:
                seen = first[ex.prompt]
                if (seen.answer, seen.reference, seen.meta) != (ex.answer, ex.reference, ex.meta):
                    raise ValueError(f"{where}: the prompt {ex.prompt[:60]!r} is also at {self._where[ex.prompt]} with "
                                     "other fields; verifiers look answers up by prompt, so each prompt needs one row")
                continue
            first[ex.prompt], self._where[ex.prompt] = ex, where
            self.examples.append(ex)

    def split(self, *, n_train: int, n_eval: int, seed: int = 0) -> tuple[list[Example], list[Example]]:
        n_train = check_int("n_train", n_train, min=0)
        n_eval = check_int("n_eval", n_eval, min=0)
        seed = check_int("seed", seed, min=0)
        if n_train + n_eval > len(self.examples):
            raise ValueError(
                f"n_train + n_eval must be <= {len(self.examples)} (distinct prompts in {self.params['path']!r}), "
                f"got {n_train} + {n_eval}"
            )
        order = list(range(len(self.examples)))
        random.Random(f"jsonl/{seed}").shuffle(order)
        picked = [self.examples[i] for i in order]
        return picked[n_eval:n_eval + n_train], picked[:n_eval]

    def extract_answer(self, response: str) -> str | None:
        return normalize_text(response)

    def verifier(self, examples: Sequence[Example]) -> ExactVerifier:
        """The exact checker; a prompt without an answer (absent, null or blank) is an error naming its line."""
        examples = _check_examples(examples)
        require_answers(examples, self.params["answer_field"],
                        lambda ex: self._where.get(ex.prompt, f"prompt {ex.prompt!r:.60}"))
        return ExactVerifier(examples, self.extract_answer)
