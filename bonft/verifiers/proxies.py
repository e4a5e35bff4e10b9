"""A noisy or biased copy of a true reward, for experiments on over-optimisation.

Real reward models are imperfect proxies: best-of-N against a proxy first
helps, then -- as N grows -- increasingly selects the proxy's errors. This
wrapper builds such a proxy on purpose, with known kinds and sizes of error,
so that estimators, planners and :func:`bonft.testing.check_verifier` can be
tried on a verifier that is known to be gameable.

Caution (reward hacking): a proxy with ``length_bias`` or ``feature_bias`` is
*meant* to be gamed; never train a model you will deploy against it.
"""
from __future__ import annotations

import hashlib
import math
import numbers
import re
import struct
from typing import Any, Sequence

import numpy as np

from bonft._core.checks import check_real
from bonft.verifiers.base import Verdicts, as_verdicts
from bonft.verifiers.scoring import check_batch


def _real(name: str, value: Any, *, lo: float | None = None, hi: float | None = None) -> float:
    return check_real(name, value, min=lo, max=hi)


def _uniforms(seed: int, prompt: str, response: str) -> tuple[float, float, float]:
    """Three uniforms in (0, 1) fixed by (seed, prompt, response): same input, same noise."""
    h = hashlib.blake2b(digest_size=24, person=b"bonft-proxy")
    h.update(struct.pack("<q", seed))
    for s in (prompt, response):
        b = s.encode("utf-8", "surrogatepass")
        h.update(struct.pack("<q", len(b)))  # length-prefixed so ("ab","c") != ("a","bc")
        h.update(b)
    a, b, c = struct.unpack("<QQQ", h.digest())
    return tuple((x + 0.5) / 2.0**64 for x in (a, b, c))  # type: ignore[return-value]


class NoisyProxy:
    """A corrupted copy of ``base``'s reward: scores = corrupted, rewards = the true reward.

    ``prompts, responses: (N,) -> Verdicts(scores (N,), rewards (N,))``.

    With ``r`` the base's true reward (its ``rewards``, or its ``scores`` when it
    reports none), ``L`` the response length in characters and ``m`` the number
    of matches of the feature regex::

        s = (1 - r if flip else r) + score_noise * z + length_bias * L / 100 + weight * m

    where ``flip ~ Bernoulli(flip_rate)`` (meant for rewards in [0, 1]) and
    ``z ~ N(0, 1)`` are drawn from a hash of ``(seed, prompt, response)``, so
    the same input always gets the same score (a deterministic verifier) while
    different responses get independent errors.

    flip_rate:    chance that the proxy reports ``1 - r``.
    score_noise:  standard deviation of additive Gaussian noise.
    length_bias:  score added per 100 characters of response.
    feature_bias: ``(regex, weight)``, score added per regex match, e.g.
                  ``(r"(?i)\\bverified\\b", 0.5)`` rewards a magic word.
    """

    def __init__(self, base: Any, *, flip_rate: float = 0.0, score_noise: float = 0.0, length_bias: float = 0.0,
                 feature_bias: tuple[str, float] | None = None, seed: int = 0) -> None:
        if not callable(base):
            raise TypeError(f"base must be a verifier callable as base(prompts, responses), got {type(base).__name__}")
        self.base = base
        self.flip_rate = _real("flip_rate", flip_rate, lo=0.0, hi=1.0)
        self.score_noise = _real("score_noise", score_noise, lo=0.0)
        self.length_bias = _real("length_bias", length_bias)
        self.feature = None
        if feature_bias is not None:
            if not (isinstance(feature_bias, tuple) and len(feature_bias) == 2):
                raise TypeError(f"feature_bias must be a (regex, weight) tuple, got {type(feature_bias).__name__} {feature_bias!r:.60}")
            pattern, weight = feature_bias
            if not isinstance(pattern, (str, re.Pattern)):
                raise TypeError(f"feature_bias regex must be a str or re.Pattern, got {type(pattern).__name__}")
            try:
                self.feature = (re.compile(pattern), _real("feature_bias weight", weight))
            except re.error as e:
                raise ValueError(f"feature_bias regex must be a valid regular expression, got {pattern!r} ({e})") from None
        if isinstance(seed, bool) or not isinstance(seed, numbers.Integral):
            raise TypeError(f"seed must be an int, got {type(seed).__name__} {seed!r}")
        self.seed = int(seed)

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        n = len(prompts)
        v = as_verdicts(self.base(prompts, responses), n)
        true = (v.scores if v.rewards is None else v.rewards).copy()
        scores = np.empty(n)
        for i, (p, r) in enumerate(zip(prompts, responses)):
            u_flip, u1, u2 = _uniforms(self.seed, p, r)
            s = 1.0 - true[i] if u_flip < self.flip_rate else true[i]
            if self.score_noise:
                s += self.score_noise * math.sqrt(-2.0 * math.log(u1)) * math.cos(2.0 * math.pi * u2)  # Box-Muller
            s += self.length_bias * len(r) / 100.0
            if self.feature is not None:
                s += self.feature[1] * sum(1 for _ in self.feature[0].finditer(r))
            scores[i] = s
        return Verdicts(scores=scores, rewards=true, failed=v.failed.copy(), reasons=list(v.reasons))
