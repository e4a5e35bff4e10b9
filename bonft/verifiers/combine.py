"""Combinators: weighted sums, minima and a cache over verifiers.

True rewards of a combination: ``rewards`` are taken from the first component
that reports rewards (put the exact checker first), or are None when no
component does. A sample is failed when any component failed on it.
"""
from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Any, Sequence

import numpy as np

from bonft._core.checks import check_int, check_real
from bonft.verifiers.base import Verdicts, as_verdicts
from bonft.verifiers.scoring import check_batch


def _check_verifier(name: str, v: Any) -> Any:
    if not callable(v):
        raise TypeError(f"{name} must be a verifier callable as v(prompts, responses), got {type(v).__name__}")
    return v


def _merge(parts: list[Verdicts], scores: np.ndarray) -> Verdicts:
    rewards = next((p.rewards.copy() for p in parts if p.rewards is not None), None)
    failed = np.zeros(len(scores), dtype=bool)
    reasons: list[str | None] = [None] * len(scores)
    for j, p in enumerate(parts):
        for i in np.flatnonzero(p.failed):
            failed[i] = True
            msg = f"component {j}: {p.reasons[i] or 'failed'}"
            reasons[i] = msg if reasons[i] is None else f"{reasons[i]}; {msg}"
    return Verdicts(scores=scores, rewards=rewards, failed=failed, reasons=reasons)


class WeightedSum:
    """``score = sum_j w_j * score_j``; ``[(verifier, weight), ...]``, ``(N,) -> Verdicts (N,)``."""

    def __init__(self, parts: Sequence[tuple[Any, float]]) -> None:
        if isinstance(parts, (str, bytes)) or not isinstance(parts, Sequence):
            raise TypeError(f"parts must be a list of (verifier, weight) pairs, got {type(parts).__name__}")
        if not parts:
            raise ValueError("parts must not be empty")
        self.parts = []
        for j, item in enumerate(parts):
            if not (isinstance(item, tuple) and len(item) == 2):
                raise TypeError(f"parts[{j}] must be a (verifier, weight) pair, got {type(item).__name__} {item!r:.60}")
            v, w = item
            self.parts.append((_check_verifier(f"parts[{j}] verifier", v), check_real(f"parts[{j}] weight", w)))

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        outs = [as_verdicts(v(prompts, responses), len(prompts)) for v, _ in self.parts]
        scores = sum(w * o.scores for (_, w), o in zip(self.parts, outs))
        return _merge(outs, np.asarray(scores, dtype=np.float64))


class MinOf:
    """``score = min_j score_j`` (every verifier must approve); ``(N,) -> Verdicts (N,)``."""

    def __init__(self, verifiers: Sequence[Any]) -> None:
        if isinstance(verifiers, (str, bytes)) or not isinstance(verifiers, Sequence):
            raise TypeError(f"verifiers must be a list of verifiers, got {type(verifiers).__name__}")
        if not verifiers:
            raise ValueError("verifiers must not be empty")
        self.verifiers = [_check_verifier(f"verifiers[{j}]", v) for j, v in enumerate(verifiers)]

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        outs = [as_verdicts(v(prompts, responses), len(prompts)) for v in self.verifiers]
        return _merge(outs, np.min(np.stack([o.scores for o in outs]), axis=0))


class Cached:
    """Remember verdicts by ``(prompt, response)``; only misses reach ``verifier``.

    ``(N,) -> Verdicts (N,)``. Least recently used entries beyond ``maxsize``
    are dropped. Failed samples are not cached, so they are retried next time.
    Caching hides non-determinism: test the bare verifier with
    :func:`bonft.testing.check_verifier`, not the cached one. ``hits`` and
    ``misses`` count samples. Thread-safe.
    """

    def __init__(self, verifier: Any, *, maxsize: int = 100_000) -> None:
        self.verifier = _check_verifier("verifier", verifier)
        self.maxsize = check_int("maxsize", maxsize, min=1)
        self._store: OrderedDict[tuple[str, str], tuple[float, float | None]] = OrderedDict()
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def __len__(self) -> int:
        return len(self._store)

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        n = len(prompts)
        keys = list(zip(prompts, responses))
        found: dict[int, tuple[float, float | None]] = {}
        with self._lock:
            for i, key in enumerate(keys):
                if key in self._store:
                    self._store.move_to_end(key)
                    found[i] = self._store[key]
        miss = [i for i in range(n) if i not in found]
        scores, rewards = np.zeros(n), np.zeros(n)
        has_rewards = any(r is not None for _, r in found.values())
        failed = np.zeros(n, dtype=bool)
        reasons: list[str | None] = [None] * n
        if miss:
            v = as_verdicts(self.verifier([prompts[i] for i in miss], [responses[i] for i in miss]), len(miss))
            has_rewards = has_rewards or v.rewards is not None
            with self._lock:
                for j, i in enumerate(miss):
                    entry = (float(v.scores[j]), None if v.rewards is None else float(v.rewards[j]))
                    found[i] = entry
                    failed[i], reasons[i] = bool(v.failed[j]), v.reasons[j]
                    if not failed[i]:
                        self._store[keys[i]] = entry
                        self._store.move_to_end(keys[i])
                while len(self._store) > self.maxsize:
                    self._store.popitem(last=False)
        with self._lock:
            self.hits += n - len(miss)
            self.misses += len(miss)
        for i, (s, r) in found.items():
            scores[i] = s
            rewards[i] = s if r is None else r
        return Verdicts(scores=scores, rewards=rewards if has_rewards else None, failed=failed, reasons=reasons)
