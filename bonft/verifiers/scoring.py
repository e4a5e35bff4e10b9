"""Calling a verifier safely on a batch, and loading a verifier by name.

:func:`score_batch` is the one place where the library calls user verifiers.
A verifier that raises, hangs or returns NaN on one sample must not end a
long run nor poison an estimate silently: the batch is retried one sample at a
time to isolate the bad samples, which get ``failure_score``, ``failed=True``
and a reason; failures are counted and logged (logger ``bonft.verifiers``).
A verifier whose call on a batch fails while its samples score fine one at a
time (it runs out of memory on a batch, or returns one score per distinct
response) costs one call per sample on every batch: the first such fallback of
each verifier is a :class:`BatchFallbackWarning` naming it and the cause.

Caution: :func:`load_verifier` imports and runs the named module or file, with
the rights of the current process (the working directory, or the file's folder,
goes first on the import path). Only load verifiers you have read.
"""
from __future__ import annotations

import collections
import logging
import math
import numbers
import threading
import warnings
import weakref
from typing import Any, Callable, Sequence

import numpy as np

from bonft._core.checks import check_real
from bonft._core.specs import load_spec
from bonft.verifiers.base import Verdicts, as_verdicts, verifier_name

log = logging.getLogger("bonft.verifiers")


class VerifierError(RuntimeError):
    """Raised by :func:`score_batch` with ``strict=True`` when the verifier fails."""


class BatchFallbackWarning(UserWarning):
    """The verifier's call on a whole batch failed and :func:`score_batch` scored it one sample per call.

    Shown once per verifier: training then pays one verifier call per sample on every such batch.
    """


# verifiers whose batch fallback was already shown (by object where it can be weakly referenced, else by name)
_fallback_shown: weakref.WeakSet = weakref.WeakSet()
_fallback_shown_names: set[str] = set()


def _warn_fallback(verifier: Any, n: int, reason: str, n_failed: int) -> None:
    """One :class:`BatchFallbackWarning` per verifier: its first batch that was scored one sample per call."""
    name = verifier_name(verifier)
    try:
        if verifier in _fallback_shown:
            return
        _fallback_shown.add(verifier)
    except TypeError:  # not weakly referenceable: remembered by name
        if name in _fallback_shown_names:
            return
        _fallback_shown_names.add(name)
    if n_failed:
        why = f"to isolate the {n_failed} sample(s) it fails on"
    else:
        why = "though each of its samples scored fine alone: its batched call is broken"
    warnings.warn(
        f"verifier {name} failed on a batch of {n} ({reason}); bonft scored the batch one sample per call {why}. "
        f"Every batch whose call fails costs one call per sample ({n} calls instead of 1 here); "
        "this warning is shown once per verifier",
        BatchFallbackWarning, stacklevel=3,
    )


def check_batch(prompts: Any, responses: Any) -> tuple[list[str], list[str]]:
    """Validate a batch of prompts and responses: two equal-length sequences of str."""
    out = []
    for name, seq in (("prompts", prompts), ("responses", responses)):
        if isinstance(seq, (str, bytes)) or not isinstance(seq, Sequence):
            raise TypeError(f"{name} must be a sequence of str, got {type(seq).__name__}")
        for i, s in enumerate(seq):
            if not isinstance(s, str):
                raise TypeError(f"{name}[{i}] must be a str, got {type(s).__name__} {s!r:.40}")
        out.append(list(seq))
    if len(out[0]) != len(out[1]):
        raise ValueError(f"responses must have the same length as prompts ({len(out[0])}), got {len(out[1])}")
    return out[0], out[1]


def _check_timeout(timeout: Any) -> float | None:
    if timeout is None:
        return None
    if isinstance(timeout, bool) or not isinstance(timeout, numbers.Real):
        raise TypeError(f"timeout must be None or a number of seconds, got {type(timeout).__name__} {timeout!r}")
    if not (math.isfinite(timeout) and timeout > 0):
        raise ValueError(f"timeout must be a finite number of seconds > 0, got timeout={timeout}")
    return float(timeout)


class _Timeout(Exception):
    pass


def _call(fn: Callable[[], Any], timeout: float | None) -> Any:
    """Run ``fn()``; with a timeout, in a daemon thread that is abandoned if it overruns.

    Python cannot kill a thread: an overrunning call keeps running in the
    background until it returns. Verifiers that may hang for long should run
    their work in a subprocess (as :class:`~bonft.verifiers.CodeRunner` does).
    """
    if timeout is None:
        return fn()
    box: dict[str, Any] = {}

    def target() -> None:
        try:
            box["value"] = fn()
        except BaseException as e:  # noqa: BLE001 - reported to the caller
            box["error"] = e

    t = threading.Thread(target=target, name="bonft-verifier-call", daemon=True)
    t.start()
    t.join(timeout)
    if t.is_alive():
        raise _Timeout(f"timeout after {timeout:g} s")
    if "error" in box:
        raise box["error"]
    return box["value"]


def _reason(e: BaseException) -> str:
    if isinstance(e, _Timeout):
        return str(e)
    msg = str(e).strip().splitlines()[0] if str(e).strip() else ""
    return f"{type(e).__name__}: {msg}"[:200] if msg else type(e).__name__


def _one(verifier: Any, prompt: str, response: str, timeout: float | None) -> Verdicts | str:
    """Score one sample; a Verdicts of length 1 or the failure reason."""
    try:
        return as_verdicts(_call(lambda: verifier([prompt], [response]), timeout), 1)
    except Exception as e:  # noqa: BLE001 - isolated and reported
        return _reason(e)


def score_batch(
    verifier: Any,
    prompts: Sequence[str],
    responses: Sequence[str],
    *,
    strict: bool = False,
    failure_score: float | str = "lowest",
    timeout: float | None = None,
) -> Verdicts:
    """Score N (prompt, response) pairs, isolating the samples the verifier fails on.

    ``prompts, responses: (N,) str -> Verdicts (N,)``.

    The verifier is called once on the whole batch. If that call raises, times
    out, or returns the wrong number of scores, it is retried one sample at a
    time (``batch_failure`` then holds the cause; the first time for each
    verifier, a :class:`BatchFallbackWarning` names the verifier and the cause).
    A sample whose call raises or times out, or whose score (or reward)
    is NaN or infinite, gets ``failed = True``, a reason such as
    ``"ZeroDivisionError: division by zero"`` or ``"timeout after 2 s"``, and
    the stand-in score (and reward, when the verifier reports rewards) that
    ``failure_score`` names. Samples the verifier itself marked failed keep
    their flag and reason. The number of failures and the most common reasons
    are logged as a warning on the ``bonft.verifiers`` logger.

    strict:        raise :class:`VerifierError` on the first failure instead.
    failure_score: ``"lowest"`` (default): 0, or the lowest score (reward)
                   the verifier gave a sample of this batch that did not fail
                   when that is below 0. A failure then never ranks above a
                   judged sample nor earns more reward than the worst one, and
                   never more than 0: a fixed 0 would beat every judged sample
                   of a verifier whose scores are negative (a reward model's
                   logits), and a policy trained against it would learn to make
                   the verifier fail; the lowest judged value alone would count
                   a failure as right in a batch whose judged samples are all
                   right. A number: that score and reward (finite), whatever the
                   others are.
    timeout:       seconds allowed for each verifier call (None = no limit).
                   Calls run in a background thread; one that overruns is
                   abandoned, not killed (Python cannot kill threads), so a
                   verifier that may hang should do its work in a subprocess.
    """
    if not callable(verifier):
        raise TypeError(f"verifier must be callable as verifier(prompts, responses), got {type(verifier).__name__}")
    prompts, responses = check_batch(prompts, responses)
    if not isinstance(strict, bool):
        raise TypeError(f"strict must be a bool, got {type(strict).__name__} {strict!r}")
    lowest = isinstance(failure_score, str) and failure_score == "lowest"
    if not lowest:
        if isinstance(failure_score, str):
            raise ValueError(f"failure_score must be 'lowest' or a finite number, got {failure_score!r}")
        failure_score = check_real("failure_score", failure_score)
    timeout = _check_timeout(timeout)
    n = len(prompts)
    if n == 0:
        return Verdicts(scores=np.zeros(0))

    # 1) the whole batch at once; 2) on any error, one sample at a time
    try:
        v = as_verdicts(_call(lambda: verifier(prompts, responses), timeout), n)
    except Exception as e:  # noqa: BLE001
        if strict:
            raise VerifierError(f"the verifier failed on a batch of {n}: {_reason(e)}") from e
        reason = _reason(e)
        log.info("verifier failed on a batch of %d (%s); retrying one sample at a time", n, reason)
        v = _per_sample(verifier, prompts, responses, timeout)
        if n > 1:
            v.batch_failure = reason
            _warn_fallback(verifier, n, reason, v.n_failed)

    # non-finite scores / rewards are failures too
    scores = v.scores.copy()
    rewards = None if v.rewards is None else v.rewards.copy()
    failed = v.failed.copy()
    reasons = list(v.reasons)
    for i in range(n):
        bad = None
        if not math.isfinite(scores[i]):
            bad = f"score is {scores[i]}"
        elif rewards is not None and not math.isfinite(rewards[i]):
            bad = f"reward is {rewards[i]}"
        if bad is not None:
            if strict:
                raise VerifierError(f"the verifier failed on sample {i}: {bad}")
            failed[i], reasons[i] = True, bad
        if failed[i] and reasons[i] is None:
            reasons[i] = "marked failed by the verifier"
    if failed.any():
        judged = ~failed

        def stand_in(values: np.ndarray) -> float:  # 0, or the lowest judged value below it
            return failure_score if not lowest else min(0.0, float(values[judged].min()) if judged.any() else 0.0)

        scores[failed] = stand_in(scores)
        if rewards is not None:
            rewards[failed] = stand_in(rewards)
    if strict and failed.any():
        i = int(np.argmax(failed))
        raise VerifierError(f"the verifier failed on sample {i}: {reasons[i]}")
    out = Verdicts(scores=scores, rewards=rewards, failed=failed, reasons=reasons, batch_failure=v.batch_failure)
    if out.n_failed:
        common = collections.Counter(r for r, f in zip(reasons, failed) if f).most_common(3)
        log.warning(
            "verifier failed on %d of %d samples (scored %g, %s): %s",
            out.n_failed, n, float(scores[failed][0]), "0 or the batch's lowest" if lowest else "failure_score",
            "; ".join(f"{r} x{c}" for r, c in common),
        )
    return out


def _per_sample(verifier: Any, prompts: list[str], responses: list[str], timeout: float | None) -> Verdicts:
    """One call per sample; a failed sample's score and reward are placeholders (0) that the caller replaces."""
    n = len(prompts)
    scores = np.zeros(n)
    rewards = np.zeros(n)
    has_rewards = False
    failed = np.zeros(n, dtype=bool)
    reasons: list[str | None] = [None] * n
    for i in range(n):
        r = _one(verifier, prompts[i], responses[i], timeout)
        if isinstance(r, str):
            failed[i], reasons[i] = True, r
            continue
        scores[i] = r.scores[0]
        failed[i], reasons[i] = bool(r.failed[0]), r.reasons[0]
        if r.rewards is not None:
            rewards[i], has_rewards = r.rewards[0], True
    return Verdicts(scores=scores, rewards=rewards if has_rewards else None, failed=failed, reasons=reasons)


def load_verifier(spec: str) -> Callable[..., Any]:
    """Load a verifier from ``"module:name"`` or ``"path/to/file.py:name"`` (:func:`bonft._core.specs.load_spec`).

    * ``"module:name"`` imports ``module`` with the current working directory
      first on the import path, so ``verifier = "myverifier:score"`` finds
      ``./myverifier.py`` whichever program runs (the ``bonft`` command included).
    * ``"path/to/file.py:name"`` runs that file as a module with its folder first
      on the import path (``sys.path``), so the file's own imports of its
      neighbours (``from helpers import ...``) work.

    Both folders stay on ``sys.path`` for the rest of the process (a verifier
    may import lazily). ``name`` may be dotted (``"pkg.mod:Holder.verify"``).
    If it names a class, the class is instantiated with no arguments. The result
    must be callable. Every failure is one ``ValueError``/``TypeError`` line
    naming the spec and the cause (an import error inside the file included).

    Caution: loading a verifier imports and runs its module's code with your
    rights, as ``python file.py`` would. Only load verifiers you have read.

    >>> load_verifier("bonft.verifiers.answers:demo_verifier")  # doctest: +SKIP
    """
    obj = load_spec(spec, what="verifier")
    if isinstance(obj, type):
        obj = obj()
    if not callable(obj):
        raise TypeError(f"spec must name a callable verifier, got {type(obj).__name__} for {spec!r}")
    return obj
