"""The verifier protocol.

A verifier maps a batch of (prompt, response) pairs to verifier scores, and,
when it knows them (toy tasks, labelled sets), to the true rewards::

    class MyVerifier:
        def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts | array-like:
            ...

A plain function with the same signature that returns a list/array of floats
is a verifier too. :func:`as_verdicts` normalises any return value to
:class:`Verdicts`. Scores are "higher is better"; best-of-k keeps the sample
with the highest score. Rewards are what you actually care about (often 0/1).

Caution (reward hacking): best-of-N and the objectives in :mod:`bonft.objectives.credit`
push the policy towards whatever the verifier scores highly. A verifier that
can be gamed (length, formatting, keywords) will be gamed; check it with
:func:`bonft.testing.check_verifier` before spending compute.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol, Sequence, runtime_checkable

import numpy as np


def verifier_name(verifier: Any) -> str:
    """``module:qualname`` of a verifier (a function, or the class of a callable object): the spelling a user
    gives to name one (``--verifier module:function``), used wherever bonft names a verifier."""
    fn = verifier if hasattr(verifier, "__qualname__") else type(verifier)
    module = getattr(fn, "__module__", None)
    name = getattr(fn, "__qualname__", None) or type(verifier).__name__
    return f"{module}:{name}" if module else name


class _TextNotNumbers(TypeError):
    """A verifier returned text where numbers belong."""


def _numbers(name: str, x: Any) -> np.ndarray:
    """(N,) float64 of a verifier's numbers; text is refused, not parsed (``"1"`` is a verifier's bug, not a score)."""
    a = np.asarray(x)
    if a.dtype.kind in "USO":
        for v in a.reshape(-1):
            if isinstance(v, (str, bytes)):
                text = str(v) if isinstance(v, str) else bytes(v)
                raise _TextNotNumbers(f"{name} must be numbers, got {type(text).__name__} {text!r}: a verifier returns floats")
    return np.asarray(a, dtype=np.float64).reshape(-1)


@dataclass
class Verdicts:
    """Scores for a batch of N (prompt, response) pairs.

    scores:   (N,) float64, verifier score, higher is better.
    rewards:  (N,) float64 true reward, or None when the verifier does not know it.
    failed:   (N,) bool, True where the verifier failed on that sample
              (raised, timed out, returned NaN) and ``scores`` holds the failure score.
    reasons:  length-N list, a short reason string where ``failed`` (else None).
    batch_failure: set by :func:`bonft.verifiers.score_batch` where the call on the whole batch (of 2
              or more) failed and the batch was scored one sample per call: the cause, such as
              ``"MemoryError"`` or ``"ValueError: the verifier returned 2 scores for 3 ..."``; else None.
    """

    scores: np.ndarray
    rewards: np.ndarray | None = None
    failed: np.ndarray | None = None
    reasons: list[str | None] | None = None
    batch_failure: str | None = None

    def __post_init__(self) -> None:
        self.scores = _numbers("scores", self.scores)
        n = self.scores.shape[0]
        if self.rewards is not None:
            self.rewards = _numbers("rewards", self.rewards)
            if self.rewards.shape[0] != n:
                raise ValueError(f"rewards must have length {n} like scores, got {self.rewards.shape[0]}")
        self.failed = np.zeros(n, dtype=bool) if self.failed is None else np.asarray(self.failed, dtype=bool).reshape(-1)
        if self.failed.shape[0] != n:
            raise ValueError(f"failed must have length {n} like scores, got {self.failed.shape[0]}")
        self.reasons = [None] * n if self.reasons is None else list(self.reasons)
        if len(self.reasons) != n:
            raise ValueError(f"reasons must have length {n} like scores, got {len(self.reasons)}")

    def __len__(self) -> int:
        return int(self.scores.shape[0])

    @property
    def n_failed(self) -> int:
        return int(self.failed.sum())


@runtime_checkable
class Verifier(Protocol):
    """Anything callable as ``verifier(prompts, responses)``."""

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Any: ...


def _check_flat(name: str, x: Any, n: int) -> None:
    """A verifier's scores (or rewards) must be one number per pair: a flat sequence, not a lone number nor a 2-D array."""
    try:
        shape = np.shape(x)
    except ValueError:  # ragged nesting: Verdicts refuses it with its own message
        return
    pairs = f"{n} (prompt, response) pair" + ("" if n == 1 else "s")
    if x is None:
        raise TypeError(f"the verifier returned None as {name} for {pairs} (a missing return?): return a list of {n} numbers")
    if len(shape) == 0 and hasattr(x, "__float__"):  # a Python, numpy or torch number
        raise ValueError(f"the verifier returned a single number {x!r:.30} as {name} for {pairs}: "
                         f"return a list of {n} {name[:-1] if n == 1 else name}, one per pair")
    if len(shape) > 1:
        raise ValueError(f"the verifier returned {name} of shape {shape} for {pairs}: "
                         f"return a flat list of {n} {name[:-1] if n == 1 else name}, one per pair")


def as_verdicts(out: Any, n: int) -> Verdicts:
    """Normalise a verifier's return value (Verdicts, array of scores, or (scores, rewards)).

    Raw scores and rewards must be flat, one number per pair: a lone number or a 2-D array is a ValueError.
    """
    if isinstance(out, Verdicts):
        v = out
    elif isinstance(out, tuple) and len(out) == 2:
        _check_flat("scores", out[0], n)
        if out[1] is not None:
            _check_flat("rewards", out[1], n)
        v = Verdicts(scores=out[0], rewards=out[1])
    else:
        _check_flat("scores", out, n)
        try:
            v = Verdicts(scores=out)
        except _TextNotNumbers:
            raise
        except (TypeError, ValueError):
            raise TypeError(
                f"a verifier must return Verdicts, an array of {n} scores or (scores, rewards), got {type(out).__name__}"
            ) from None
    if len(v) != n:
        raise ValueError(f"the verifier returned {len(v)} scores for {n} (prompt, response) pairs")
    return v
