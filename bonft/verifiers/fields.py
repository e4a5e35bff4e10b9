"""Verifiers that read fields of the prompt's data row (unit tests, references, extra columns).

A verifier is called as ``verifier(prompts, responses)``. Some need more than
the prompt text: the unit tests of each prompt, a reference solution, a column
of hints. Such a verifier declares the fields it reads and is *bound* to the
data rows before any step runs (:func:`bind_rows`), so a row without a field
the verifier needs is an error naming the field, the row and why, not a crash
mid-run:

* an object with ``fields`` (a mapping field -> why it is needed, or a tuple
  of field names) and ``bind(rows) -> verifier``, ``rows`` mapping each prompt
  to its row (a dict of the row's fields), e.g. :class:`UnitTests`;
* a function with a parameter named ``rows``: it is called as
  ``fn(prompts, responses, rows=[row of each prompt])``; give it a ``fields``
  attribute to have the fields it needs checked up front;
* any other verifier is used as it is.

Caution: :class:`UnitTests` runs model-written code (see
:class:`~bonft.verifiers.CodeRunner` for what its sandbox does and does not
stop); run it in a disposable container or VM.
"""
from __future__ import annotations

import inspect
from typing import Any, Callable, Mapping, Sequence

from bonft.verifiers.sandbox.runner import CodeRunner, check_tests_code


def needed_fields(verifier: Any) -> dict[str, str]:
    """Field -> why, for the row fields ``verifier`` reads (empty for a plain verifier)."""
    fields = getattr(verifier, "fields", None)
    if fields is None:
        return {}
    if isinstance(fields, str):
        fields = (fields,)
    if isinstance(fields, Mapping):
        out = {str(k): str(v) for k, v in fields.items()}
    elif isinstance(fields, (tuple, list)):
        out = {str(f): f"{_label(verifier)} reads it" for f in fields}
    else:
        raise TypeError(f"verifier.fields must be a mapping field -> why or a tuple of field names, got {type(fields).__name__}")
    for f in out:
        if not f:
            raise ValueError("verifier.fields must name fields, got an empty name")
    return out


def _label(verifier: Any) -> str:
    return getattr(verifier, "__name__", None) or type(verifier).__name__


def _takes(fn: Any, name: str) -> bool:
    try:
        params = inspect.signature(fn).parameters
    except (TypeError, ValueError):
        return False
    return name in params


def _takes_rows(fn: Any) -> bool:
    return _takes(fn, "rows")


def reads_rows(verifier: Any) -> bool:
    """Does :func:`bind_rows` bind ``verifier`` to data rows (it has ``bind``, or a parameter named ``rows``)?"""
    return hasattr(verifier, "bind") or _takes_rows(verifier)


def bind_rows(verifier: Any, rows: Sequence[tuple[str, Mapping[str, Any], str]]) -> Callable:
    """``verifier`` ready to score the prompts of ``rows``.

    rows: ``(prompt, fields, where)`` per data row: the prompt text the verifier
          will be called with, the row's fields (a dict) and where the row is
          (``"data.jsonl line 4"``), for error messages.

    Every field the verifier needs (:func:`needed_fields`) is checked on every
    row first; a missing or None (JSON null) value raises ``ValueError`` naming the field,
    the row and why the verifier needs it.
    """
    if not callable(verifier) and not hasattr(verifier, "bind"):
        raise TypeError(f"verifier must be callable as verifier(prompts, responses), got {type(verifier).__name__}")
    rows = list(rows)
    need = needed_fields(verifier)
    for f, why in need.items():
        for prompt, fields, where in rows:
            if fields.get(f) is None:
                have = sorted(k for k in fields if fields[k] is not None)
                state = "is null" if f in fields else "is missing"
                raise ValueError(f"{where}: field {f!r} {state}, and verifier {_label(verifier)} needs it ({why}); "
                                 f"the row has {have}: add the field to every row or map it (task_params)")
    by_prompt = {p: dict(fields) for p, fields, _ in rows}
    if hasattr(verifier, "bind"):
        if _takes(verifier.bind, "where"):  # a bind that can name the row of a bad value
            return verifier.bind(by_prompt, where={p: where for p, _, where in rows})
        return verifier.bind(by_prompt)
    if _takes_rows(verifier):
        def with_rows(prompts: Sequence[str], responses: Sequence[str]) -> Any:
            missing = [p for p in prompts if p not in by_prompt]
            if missing:
                raise ValueError(f"prompts must be prompts of the data; {len(missing)} are not, e.g. {missing[0]!r:.60}")
            return verifier(prompts, responses, rows=[by_prompt[p] for p in prompts])

        with_rows.__name__ = _label(verifier)
        return with_rows
    return verifier


class UnitTests:
    """Unit tests per prompt, taken from a field of the prompt's row and run by :class:`CodeRunner`.

    ``UnitTests(field="tests", wall_time=5.0)`` declares that it reads the row
    field ``field``: Python source using ``assert`` (a list of such strings is
    joined by newlines). :meth:`bind` (called by the task before any step)
    checks every row and returns the :class:`CodeRunner` that scores a response
    1.0 when all of its prompt's tests pass, else 0.0 (``rewards = scores``).
    Other keyword arguments go to :class:`CodeRunner` (``wall_time``,
    ``memory_mb``, ``workers``...).

    Caution: this runs model-written code. CodeRunner's sandbox lowers the risk
    but is not a security boundary; use a disposable container or VM.
    """

    def __init__(self, field: str = "tests", **runner_options: Any) -> None:
        if not isinstance(field, str) or not field:
            raise TypeError(f"field must be the name of the row field holding the unit tests, got {field!r}")
        self.field = field
        self.runner_options = dict(runner_options)
        CodeRunner({}, **self.runner_options)  # bad options fail here, before any data is read
        self.fields = {field: "the prompt's unit tests, Python source with assert statements run against each response"}

    def bind(self, rows: Mapping[str, Mapping[str, Any]], *, where: Mapping[str, str] | None = None) -> CodeRunner:
        """The runner for these rows (prompt -> row fields). Tests that are not Python or have no statement
        (blank or comments only: any code would pass) are a ValueError naming the prompt, and the row's
        place in the data when ``where`` (prompt -> ``"data.jsonl line 4"``) gives it."""
        tests = {}
        for prompt, fields in rows.items():
            at = f"{where[prompt]}: " if where and prompt in where else ""
            value = fields.get(self.field)
            if isinstance(value, (list, tuple)) and all(isinstance(v, str) for v in value):
                value = "\n".join(value)
            if not isinstance(value, str):
                raise ValueError(f"{at}field {self.field!r} must hold the prompt's unit tests as Python source (a str or a list "
                                 f"of str), got {type(value).__name__} {value!r:.60} for prompt {prompt!r:.60}")
            try:
                check_tests_code(value)
            except ValueError as e:
                raise ValueError(f"{at}field {self.field!r} of prompt {prompt!r:.60} {e}") from None
            tests[prompt] = value
        return CodeRunner(tests, **self.runner_options)

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Any:
        raise TypeError(f"UnitTests(field={self.field!r}) reads each prompt's tests from its data row: bind it to the rows "
                        f"first (task.bind_verifier(verifier, examples)), or use CodeRunner(tests) with a mapping prompt -> tests")

    def __repr__(self) -> str:
        return f"UnitTests(field={self.field!r})"
