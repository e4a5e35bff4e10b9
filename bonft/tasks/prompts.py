"""Your own prompts: a local JSONL file with a prompt field and (optionally) an answer field.

One JSON object per line, e.g. ``{"prompt": "2+2=", "answer": "4"}``; blank lines
are skipped, and a malformed line (not UTF-8, not JSON, not an object, nested too
deeply, no prompt) raises ``ValueError`` naming the file and the line. With answers present, :func:`exact_match_verifier` scores a
response 1 when it equals the answer after trimming and collapsing whitespace.

Caution: an exact-match verifier is only as good as the answers in the file,
and a model trained against any verifier learns what that verifier accepts
(reward hacking). For prompts whose answers are code to run, use a sandboxed
checker, never ``exec`` of model output in your own process.
"""
from __future__ import annotations

import os
import random
from pathlib import Path
from typing import Sequence

from bonft._core.checks import check_int
from bonft._core.jsonl import decode_utf8, parse_object
from bonft.tasks.base import ExactVerifier, Example, Task, _check_examples


def normalize_text(response: str) -> str | None:
    """Trim and collapse runs of whitespace; the answer extractor of user prompt sets."""
    if not isinstance(response, str):
        return None
    return " ".join(response.split())


def load_prompts_jsonl(
    path: str | os.PathLike,
    *,
    prompt_field: str = "prompt",
    answer_field: str = "answer",
    reference_field: str = "reference",
) -> list[Example]:
    """Examples from a local JSONL file, in file order.

    ``answer`` is ``str(row[answer_field])`` (whitespace-normalised) or None when the file has no such
    field; ``reference`` is ``row[reference_field]`` if present, else the answer (else ""); every
    other field goes to ``meta``.
    """
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
        answer = None
        if has_answer and row.get(answer_field) is not None:
            answer = normalize_text(str(row[answer_field]))
        ref = row.get(reference_field) if reference_field in cols else None
        reference = str(ref) if ref is not None else (answer or "")
        meta = {k: v for k, v in row.items() if k not in (prompt_field, answer_field, reference_field)}
        out.append(Example(prompt=prompt, answer=answer, reference=reference, meta=meta))
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
    then train (disjoint by position; duplicate prompts in the file are dropped).
    """

    name = "jsonl"
    description = "your own prompts from a local JSONL file (prompt and answer fields)"

    def __init__(self, *, path: str | os.PathLike, prompt_field: str = "prompt", answer_field: str = "answer"):
        super().__init__(path=str(path), prompt_field=prompt_field, answer_field=answer_field)
        rows = load_prompts_jsonl(path, prompt_field=prompt_field, answer_field=answer_field)
        seen, self.examples = set(), []
        for ex in rows:
            if ex.prompt not in seen:
                seen.add(ex.prompt)
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
