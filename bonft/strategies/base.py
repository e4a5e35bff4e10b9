r"""Inference strategies as objects: each one knows its exact value, its pool estimate and its credit.

A strategy draws ``k`` samples from the policy and returns one response:

* :class:`BestOfK` (``best_of_k``) -- the sample the verifier scores highest (ties uniform among
  the tied samples);
* :class:`MajorityVote` (``majority_vote``) -- the answer held by the most samples (ties uniform
  among the tied answers), served as one of that answer's samples chosen uniformly;
* :class:`WeightedVote` (``weighted_vote``) -- the answer with the largest total verifier score
  (scores are non-negative weights; ties uniform among the tied answers), served the same way;
* :class:`PassAtK` (``pass_at_k``) -- the best true reward among the k: pass@k for 0/1 rewards,
  a ceiling for comparison, not a strategy one can serve.

Each sample carries an *answer key* (the final answer extracted from the response, so that
surface forms of one answer share a key). For any such rule the served value and its gradient are

.. math::
    V_k = E[R(\mathrm{sel}(y_1..y_k))],\qquad
    \nabla V_k = E\Big[R(\mathrm{sel})\sum_{j=1}^k \nabla\log\pi(y_j)\Big]

Every strategy has three methods: :meth:`Strategy.value` (the exact ``V_k`` on a finite outcome
set, differentiable; :mod:`bonft.bon`, :mod:`bonft.strategies.exact`), :meth:`Strategy.estimate`
(the unbiased U-statistic of each pool; :mod:`bonft.estimate.bestofk`,
:mod:`bonft.strategies.estimators`) and :meth:`Strategy.credit` (per-sample credit with a
leave-one-out baseline, unbiased for ``grad V_k``; :mod:`bonft.objectives.credit`,
:mod:`bonft.strategies.estimators`). :func:`strategy_value`, :func:`strategy_per_prompt` and
:func:`strategy_credit` take a strategy or its id.

References: Wang et al. 2023 "Self-Consistency Improves Chain of Thought Reasoning in Language
Models" (majority vote); Li et al. 2023 "Making Language Models Better Reasoners with
Step-Aware Verifier" (verifier-weighted vote); Chow et al. 2024 "Inference-Aware Fine-Tuning for
Best-of-N Sampling in LLMs" (best-of-N objectives and their gradients); Chen et al. 2021 (pass@k).

Caution: a weighted vote or best-of-k policy follows the verifier, and a majority-vote policy
follows whatever answer extraction calls "the same answer". Training for either exploits their
mistakes (reward hacking: answers formatted to be extracted, verifier blind spots); keep a
held-out true reward. If a verifier runs model-written code, run it sandboxed.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bonft.bon import best_of_k_value
from bonft.estimate.bestofk import best_of_k_per_prompt, pass_at_k_per_prompt
from bonft.objectives.credit import best_of_k_credit
from bonft.strategies.estimators import (
    MAX_SUBSETS,
    majority_vote_credit,
    majority_vote_per_prompt,
    weighted_vote_credit,
    weighted_vote_per_prompt,
)
from bonft.strategies.exact import majority_vote_value, weighted_vote_value

__all__ = [
    "Strategy", "BestOfK", "MajorityVote", "WeightedVote", "PassAtK", "STRATEGY_NAMES", "get_strategy",
    "strategy_value", "strategy_per_prompt", "strategy_credit",
]

# spellings that name a strategy but are not its id: refused with the id in the message
_NOT_IDS = {"best-of-k": "best_of_k", "bon": "best_of_k", "majority": "majority_vote", "weighted": "weighted_vote",
            "pass": "pass_at_k", "oracle": "pass_at_k", "pass@k": "pass_at_k"}


_DEFAULTS = {"max_subsets": MAX_SUBSETS, "seed": 0, "conflicts": "error"}  # the options a strategy may read


def _unread_field(key: str, names: list[str], val) -> ValueError:
    """The error for a per-sample field (``scores``, ``answers``) that none of the strategies ``names`` reads."""
    users = [s.name for s in _BY_NAME.values() if getattr(s, f"uses_{key}")]
    return ValueError(f"{key} has no effect on {', '.join(names)} (read by {', '.join(users)}); pass {key}=None, "
                      f"got {_describe(val)}")


def _describe(x) -> str:
    """A field's value for a message: its type and shape, not its contents."""
    shape = getattr(x, "shape", None)
    if shape is not None:
        return f"{type(x).__name__} of shape {tuple(shape)}"
    return f"{type(x).__name__} of length {len(x)}" if hasattr(x, "__len__") else f"{type(x).__name__} {x!r}"


@dataclass(frozen=True)
class Strategy:
    """An inference-time selection rule over ``k`` samples (see the module docstring).

    ``name`` is the strategy id (code, ``--strategy``, config, JSON); ``uses_answers`` /
    ``uses_scores`` say which per-sample fields the rule reads (one it does not read is a ``ValueError``);
    ``servable`` is False for a ceiling that needs the true reward (pass@k); ``reads`` names the options its estimate and
    credit take (``max_subsets``, ``seed``: sampled k-subsets; ``conflicts``: one answer with
    several rewards). An option the strategy does not read is an error unless it has its default
    value. Subclasses implement ``_value``, ``_estimate`` and ``_credit``.
    """

    name: str = ""
    uses_answers: bool = False
    uses_scores: bool = True
    servable: bool = True
    reads: tuple = ()

    def options(self, *, exact: bool = False, **given) -> dict:
        """The options this strategy reads, defaults filled in; an unknown option or a non-default one it
        does not read is an error (``exact``: for :meth:`value`, which never samples k-subsets)."""
        reads = tuple(o for o in self.reads if not (exact and o in ("max_subsets", "seed")))
        for key, val in given.items():
            if key not in _DEFAULTS:
                raise TypeError(f"{key} is not an option of a strategy (options: {', '.join(_DEFAULTS)}), got {key}={val!r}")
            if key not in reads and val != _DEFAULTS[key]:
                users = [s.name for s in _BY_NAME.values() if key in s.reads]
                raise ValueError(f"{key} has no effect on {self.name}{' values' if exact else ''} (read by "
                                 f"{', '.join(users)}{' estimates' if key != 'conflicts' else ''}), got {key}={val!r}")
        return {key: given.get(key, _DEFAULTS[key]) for key in reads}

    def _need(self, scores, answers) -> None:
        """Each per-sample field the rule reads must be given; one it does not read cannot take effect."""
        for key, val, used in (("scores", scores, self.uses_scores), ("answers", answers, self.uses_answers)):
            if used and val is None:
                raise ValueError(f"{key} must be given for strategy {self.name!r}, got None")
            if not used and val is not None:
                raise _unread_field(key, [self.name], val)

    def value(self, probs, *, k, rewards, scores=None, answers=None, **options):
        """Exact ``V_k`` on a finite outcome set: ``probs (..., V) -> (...)``, differentiable."""
        self._need(scores, answers)
        return self._value(probs, k=k, rewards=rewards, scores=scores, answers=answers,
                           **self.options(exact=True, **options))

    def estimate(self, *, ks, rewards, scores=None, answers=None, **options):
        """Unbiased ``V_k`` of each pool and its Monte-Carlo standard error: ``(P, n) -> ((P, K), (P, K))``."""
        self._need(scores, answers)
        return self._estimate(ks=ks, rewards=rewards, scores=scores, answers=answers, **self.options(**options))

    def credit(self, scores, rewards, *, k, answers=None, **options):
        """Per-sample credit ``(B, n) -> (B, n)``, unbiased for ``grad V_k``, leave-one-out baseline."""
        self._need(scores, answers)
        return self._credit(scores, rewards, k=k, answers=answers, **self.options(**options))


def _exact(v) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form per-prompt values -> ((P, K) values, zero standard errors)."""
    v = np.asarray(v).reshape(len(v), -1)
    return v, np.zeros_like(v)


@dataclass(frozen=True)
class BestOfK(Strategy):
    """The verifier keeps the highest-scoring of k samples (ties uniform among samples)."""

    name: str = "best_of_k"

    def _value(self, probs, *, k, rewards, scores, answers):
        return best_of_k_value(probs, scores, rewards, k=k)

    def _estimate(self, *, ks, rewards, scores, answers):
        return _exact(best_of_k_per_prompt(scores, rewards, ks=ks))

    def _credit(self, scores, rewards, *, k, answers):
        return best_of_k_credit(scores, rewards, k=k)


@dataclass(frozen=True)
class PassAtK(Strategy):
    """The best true reward among k samples (pass@k for 0/1 rewards): best-of-k with ``scores = rewards``."""

    name: str = "pass_at_k"
    uses_scores: bool = False
    servable: bool = False

    def _value(self, probs, *, k, rewards, scores, answers):
        return best_of_k_value(probs, rewards, rewards, k=k)

    def _estimate(self, *, ks, rewards, scores, answers):
        return _exact(pass_at_k_per_prompt(rewards, ks=ks))

    def _credit(self, scores, rewards, *, k, answers):
        return best_of_k_credit(rewards, rewards, k=k)


@dataclass(frozen=True)
class MajorityVote(Strategy):
    """The most frequent answer among k samples (ties uniform among answers); scores unused."""

    name: str = "majority_vote"
    uses_answers: bool = True
    uses_scores: bool = False
    reads: tuple = ("conflicts",)

    def _value(self, probs, *, k, rewards, scores, answers, conflicts):
        return majority_vote_value(probs, answers, rewards, k=k, conflicts=conflicts)

    def _estimate(self, *, ks, rewards, scores, answers, conflicts):
        return _exact(majority_vote_per_prompt(answers, rewards, ks=ks, conflicts=conflicts))

    def _credit(self, scores, rewards, *, k, answers, conflicts):
        return majority_vote_credit(answers, rewards, k=k, conflicts=conflicts)


@dataclass(frozen=True)
class WeightedVote(Strategy):
    """The answer with the largest total verifier score (non-negative weights) among k samples."""

    name: str = "weighted_vote"
    uses_answers: bool = True
    reads: tuple = ("max_subsets", "seed", "conflicts")

    def _value(self, probs, *, k, rewards, scores, answers, conflicts):
        return weighted_vote_value(probs, answers, scores, rewards, k=k, conflicts=conflicts)

    def _estimate(self, *, ks, rewards, scores, answers, max_subsets, seed, conflicts):
        return weighted_vote_per_prompt(answers, scores, rewards, ks=ks, max_subsets=max_subsets, seed=seed,
                                        conflicts=conflicts)

    def _credit(self, scores, rewards, *, k, answers, max_subsets, seed, conflicts):
        return weighted_vote_credit(answers, scores, rewards, k=k, max_subsets=max_subsets, seed=seed,
                                    conflicts=conflicts)


_BY_NAME = {s.name: s for s in (BestOfK(), MajorityVote(), WeightedVote(), PassAtK())}
STRATEGY_NAMES = tuple(_BY_NAME)


def get_strategy(strategy) -> Strategy:
    """A :class:`Strategy` from itself or its id (``best_of_k``, ``majority_vote``, ``weighted_vote``, ``pass_at_k``)."""
    if isinstance(strategy, Strategy):
        return strategy
    if isinstance(strategy, str) and strategy in _BY_NAME:
        return _BY_NAME[strategy]
    hint = f" (the strategy id is {_NOT_IDS[strategy]!r})" if isinstance(strategy, str) and strategy in _NOT_IDS else ""
    raise ValueError(f"strategy must be one of {', '.join(STRATEGY_NAMES)}, got {strategy!r}{hint}")


def strategy_value(strategy, probs, *, k, rewards, scores=None, answers=None, **options):
    r"""Exact ``V_k`` of any strategy on a finite outcome set.

    Shape: ``probs (..., V)``, ``scores, rewards (..., V) or (V,)``, ``answers (V,) -> (...)``.

    .. math:: V_k = E_{y_1..y_k \sim \pi}\,[R(\mathrm{sel}(y_1..y_k))]

    :meth:`Strategy.value` of :func:`get_strategy` ``(strategy)``: best_of_k:
    :func:`bonft.bon.best_of_k_value`; pass_at_k: the same with ``scores = rewards``;
    majority_vote: :func:`bonft.strategies.exact.majority_vote_value`; weighted_vote:
    :func:`bonft.strategies.exact.weighted_vote_value`. ``scores`` / ``answers`` the strategy does not read
    are a ``ValueError`` (:attr:`Strategy.uses_scores`, :attr:`Strategy.uses_answers`).

    References: Chow et al. 2024; Wang et al. 2023; Li et al. 2023; Chen et al. 2021.
    """
    return get_strategy(strategy).value(probs, k=k, rewards=rewards, scores=scores, answers=answers, **options)


def strategy_per_prompt(strategy, *, ks, rewards, scores=None, answers=None, **options):
    r"""Unbiased ``V_k`` of any strategy for every pool, with the Monte-Carlo standard error.

    Shape: ``rewards, scores, answers (P, n) -> (values (P, K), stderr (P, K))``.

    .. math:: \hat V_k = \binom nk^{-1}\sum_{|S|=k} f(S)

    :meth:`Strategy.estimate`: best_of_k: :func:`bonft.estimate.best_of_k_per_prompt`; pass_at_k:
    :func:`bonft.estimate.pass_at_k_per_prompt` (Chen et al. 2021 for 0/1 rewards); majority_vote /
    weighted_vote: :mod:`bonft.strategies.estimators`. stderr is 0 wherever the estimate is exact.
    ``options``: ``max_subsets``, ``seed``, ``conflicts`` where the strategy reads them (:meth:`Strategy.options`);
    ``scores`` / ``answers`` likewise (pass_at_k reads neither, best_of_k no answers).

    References: Hoeffding 1948; Chen et al. 2021; Chow et al. 2024; Wang et al. 2023.
    """
    return get_strategy(strategy).estimate(ks=ks, rewards=rewards, scores=scores, answers=answers, **options)


def strategy_credit(strategy, scores, rewards, *, k, answers=None, **options):
    r"""Per-sample credit of any strategy, unbiased for ``grad V_k``, with a leave-one-out baseline.

    Shape: ``scores, rewards, answers (B, n) -> credit (B, n)``.

    .. math:: w_i = \hat V_k(\text{pool}) - \hat V_{\min(k,n-1)}(\text{pool}\setminus i)

    :meth:`Strategy.credit`: best_of_k: :func:`bonft.objectives.credit.best_of_k_credit`; pass_at_k:
    the same with ``scores = rewards``; majority_vote / weighted_vote: :mod:`bonft.strategies.estimators`.
    ``scores`` / ``answers`` the strategy does not read are a ``ValueError`` (pass ``None``).

    References: Kool et al. 2019; Chow et al. 2024; Hoeffding 1948.
    """
    return get_strategy(strategy).credit(scores, rewards, k=k, answers=answers, **options)
