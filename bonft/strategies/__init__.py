r"""Inference strategies as objects: best-of-k, majority vote, verifier-weighted vote, pass@k.

A strategy draws ``k`` samples from the policy and returns one response:

* :class:`BestOfK` -- the sample the verifier scores highest (ties uniform among the tied samples);
* :class:`MajorityVote` -- the answer held by the most samples (ties uniform among the tied
  answers), served as one of that answer's samples chosen uniformly;
* :class:`WeightedVote` -- the answer with the largest total verifier score (ties uniform among the
  tied answers), served the same way;
* :class:`PassAtK` -- the oracle: the best true reward among the k.

Each sample carries an *answer key* (the final answer extracted from the response, so that
surface forms of one answer share a key). For any such rule the served value and its gradient are

.. math::
    V_k = E[R(\mathrm{sel}(y_1..y_k))],\qquad
    \nabla V_k = E\Big[R(\mathrm{sel})\sum_{j=1}^k \nabla\log\pi(y_j)\Big]

This module gives the exact ``V_k`` on a finite outcome set (differentiable in the policy's
probabilities, hence its logits); :mod:`bonft.strategies.estimators` gives unbiased estimates and
per-sample credit from pools of samples.

When several samples of the served answer differ in reward (surface forms judged differently),
the value is their mean: one of them is served uniformly at random. For majority vote this is
``sum_a P_k(a wins) * Rbar_a`` with ``Rbar_a = sum_{v in a} pi(v) R_v / pi(a)``.

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

import itertools
import math
from dataclasses import dataclass

import numpy as np
import torch

from bonft import bon as _bon
from bonft._core.checks import check_choice, check_int, is_tensor
from bonft.strategies.counting import policy_majority_value, weighted_vote_weights
from bonft.strategies.estimators import MAX_SUBSETS

__all__ = [
    "Strategy", "BestOfK", "MajorityVote", "WeightedVote", "PassAtK", "STRATEGY_NAMES", "get_strategy",
    "vote_value", "weighted_vote_value", "strategy_value", "strategy_loss",
]

_MAX_K_EXACT = 150  # k! and q^m/m! stay inside float64
_MAX_MULTISETS = 200_000  # weighted vote: count vectors enumerated


# ---------------------------------------------------------------------------- checks


def _policy(probs):
    """probs (..., V) -> (float64 tensor (L, V), leading shape, as_numpy)."""
    p, as_np = _bon.check_policy_probs(probs)
    return p, as_np


def _answers_1d(answers, V: int) -> np.ndarray:
    """Outcome answer labels (V,) of any hashable kind -> int codes (V,)."""
    a = answers.detach().cpu().numpy() if is_tensor(answers) else np.asarray(answers)
    if a.shape != (V,):
        raise ValueError(f"answers must have shape (V,) = ({V},) with one answer key per outcome, got shape {a.shape}")
    try:
        _, codes = np.unique(a, return_inverse=True)
    except TypeError:
        raise TypeError(f"answers must hold comparable keys (ints or strings), got dtype {a.dtype}") from None
    return codes.reshape(-1)


def _check_k_exact(k) -> int:
    k = check_int("k", k, min=1)
    if k > _MAX_K_EXACT:
        raise ValueError(f"k must be <= {_MAX_K_EXACT} for the exact vote value (float64 factorials), got k={k}")
    return k


# ---------------------------------------------------------------------------- exact values


def vote_value(probs, answers, rewards, *, k):
    r"""Exact majority-vote value on a finite outcome set, differentiable.

    Shape: ``probs (..., V), answers (V,), rewards (..., V) or (V,) -> (...)``.

    .. math::
        V_k = \sum_a P_k(a\ \text{wins})\,\bar R_a,\qquad
        P_k(a\ \text{wins}) = E\Big[\frac{1\{c_a = \max_b c_b\}}{\#\{b: c_b=\max\}}\Big],\
        c \sim \mathrm{Mult}(k, q),\ q_a = \sum_{v\in a}\pi(v)

    by a dynamic programme over answer counts (:mod:`bonft.strategies.counting`), ``O(A k^3)`` per row for
    ``A`` answers, never enumerating k-tuples. numpy in -> numpy out; torch in -> torch out,
    differentiable w.r.t. ``probs`` (and ``rewards``). ``k <= 150``.

    References: Wang et al. 2023, "Self-Consistency Improves Chain of Thought Reasoning in
    Language Models"; Chow et al. 2024 (inference-aware objectives); Abramowitz & Stegun 1964,
    25.4.29 (Gauss-Legendre quadrature, exact for the tie integral).
    """
    p, as_np = _policy(probs)
    V = p.shape[-1]
    codes = _answers_1d(answers, V)
    R = _bon.check_outcome_values("rewards", rewards, p)
    k = _check_k_exact(k)
    shape = torch.broadcast_shapes(p.shape, R.shape)
    pe, Re = p.expand(shape).reshape(-1, V), R.expand(shape).reshape(-1, V)
    onehot = torch.zeros(V, int(codes.max()) + 1, dtype=torch.float64, device=p.device)
    onehot[torch.arange(V), torch.as_tensor(codes)] = 1.0
    q, qr = pe @ onehot, (pe * Re) @ onehot  # (L, A) answer masses and reward masses
    out = policy_majority_value(q, qr, k).reshape(shape[:-1])
    return _bon.returned_like(out, as_np)


def _compositions(k: int, V: int) -> np.ndarray:
    """Every count vector (N, V) of non-negative ints summing to k (stars and bars)."""
    rows = []
    for bars in itertools.combinations(range(k + V - 1), V - 1):
        edges = (-1,) + bars + (k + V - 1,)
        rows.append([edges[i + 1] - edges[i] - 1 for i in range(V)])
    return np.array(rows, dtype=np.int64)


def weighted_vote_value(probs, answers, scores, rewards, *, k):
    r"""Exact verifier-weighted vote value on a finite outcome set, differentiable in ``probs``.

    Shape: ``probs (..., V), answers (V,), scores, rewards (..., V) or (V,) -> (...)``.

    .. math::
        V_k = \sum_{c:\ |c|=k} \frac{k!}{\prod_v c_v!}\prod_v \pi(v)^{c_v}\,
              \mathrm{mean}_{a\in W(c)} \frac{\sum_{v\in a} c_v R_v}{\sum_{v\in a} c_v},\quad
        W(c) = \arg\max_a \sum_{v\in a} c_v s_v

    The served answer depends on score sums, not only on counts, so this sums over the
    ``C(k+V-1, V-1)`` count vectors of the outcomes (not the ``V^k`` ordered tuples); refused
    above 200,000 of them. Totals equal to 1e-12 relative tie.

    References: Li et al. 2023, "Making Language Models Better Reasoners with Step-Aware
    Verifier" (verifier-weighted voting); Wang et al. 2023 (majority vote).
    """
    p, as_np = _policy(probs)
    V = p.shape[-1]
    codes = _answers_1d(answers, V)
    s = _bon.check_outcome_values("scores", scores, p)
    R = _bon.check_outcome_values("rewards", rewards, p, s)
    k = check_int("k", k, min=1)
    N = math.comb(k + V - 1, V - 1)
    if N > _MAX_MULTISETS:
        raise ValueError(f"k must keep C(k+V-1, V-1) <= {_MAX_MULTISETS} count vectors (V={V}), got k={k} ({N})")
    shape = torch.broadcast_shapes(p.shape, s.shape, R.shape)
    pe = p.expand(shape).reshape(-1, V)
    se = s.detach().expand(shape).reshape(-1, V).cpu().numpy()
    Re = R.expand(shape).reshape(-1, V)
    cnt = _compositions(k, V)  # (N, V)
    cnt_t = torch.as_tensor(cnt, dtype=torch.float64, device=p.device)
    logmult = math.lgamma(k + 1) - torch.lgamma(cnt_t + 1).sum(1)  # (N,)
    out = []
    for row in range(pe.shape[0]):
        pr = pe[row]
        # prod_v pi_v^c_v without 0^0 gradients: only positive counts enter
        safe = torch.where(cnt_t > 0, pr.expand_as(cnt_t), torch.ones_like(cnt_t))
        prob = torch.exp(logmult) * torch.where(cnt_t > 0, safe ** cnt_t, torch.ones_like(cnt_t)).prod(1)
        wts = torch.as_tensor(weighted_vote_weights(cnt, codes, se[row]), device=p.device)  # (N, V)
        g = wts @ Re[row]  # (N,) served reward of each count vector
        out.append((prob * g).sum())
    return _bon.returned_like(torch.stack(out).reshape(shape[:-1]), as_np)


# ---------------------------------------------------------------------------- objects


@dataclass(frozen=True)
class Strategy:
    """An inference-time selection rule over ``k`` samples (see the module docstring).

    ``name`` is the command-line spelling (``--strategy``); ``uses_answers`` / ``uses_scores``
    say which per-sample fields the rule reads.
    """

    name: str = ""
    uses_answers: bool = False
    uses_scores: bool = True

    def value(self, probs, *, k, rewards, scores=None, answers=None):
        """Exact ``V_k`` on a finite outcome set: ``probs (..., V) -> (...)`` (see :func:`strategy_value`)."""
        return strategy_value(self, probs, k=k, rewards=rewards, scores=scores, answers=answers)

    def estimate(self, *, ks, rewards, scores=None, answers=None, **options):
        """Unbiased ``V_k`` of each pool: ``(P, n) -> (P, K)`` (see :func:`bonft.strategies.estimators.strategy_at_k`)."""
        from bonft.strategies.estimators import strategy_at_k

        return strategy_at_k(self, ks=ks, rewards=rewards, scores=scores, answers=answers, **options)

    def credit(self, scores, rewards, *, k, answers=None, **options):
        """Per-sample credit ``(B, n)`` with leave-one-out baseline (see :func:`bonft.strategies.estimators.strategy_credit`)."""
        from bonft.strategies.estimators import strategy_credit

        return strategy_credit(self, scores, rewards, k=k, answers=answers, **options)


@dataclass(frozen=True)
class BestOfK(Strategy):
    """The verifier keeps the highest-scoring of k samples (ties uniform among samples)."""

    name: str = "best-of-k"


@dataclass(frozen=True)
class MajorityVote(Strategy):
    """The most frequent answer among k samples (ties uniform among answers); scores unused."""

    name: str = "majority"
    uses_answers: bool = True
    uses_scores: bool = False


@dataclass(frozen=True)
class WeightedVote(Strategy):
    """The answer with the largest total verifier score among k samples (ties uniform among answers)."""

    name: str = "weighted"
    uses_answers: bool = True


@dataclass(frozen=True)
class PassAtK(Strategy):
    """The oracle: the best true reward among k samples (pass@k for 0/1 rewards); scores unused."""

    name: str = "pass"
    uses_scores: bool = False


_BY_NAME = {s.name: s for s in (BestOfK(), MajorityVote(), WeightedVote(), PassAtK())}
STRATEGY_NAMES = tuple(_BY_NAME)


def get_strategy(strategy) -> Strategy:
    """A :class:`Strategy` from itself or its name (``best-of-k``, ``majority``, ``weighted``, ``pass``)."""
    if isinstance(strategy, Strategy):
        return strategy
    return _BY_NAME[check_choice("strategy", strategy, STRATEGY_NAMES)]


def strategy_value(strategy, probs, *, k, rewards, scores=None, answers=None):
    r"""Exact ``V_k`` of any strategy on a finite outcome set.

    Shape: ``probs (..., V)``, ``scores, rewards (..., V) or (V,)``, ``answers (V,) -> (...)``.

    .. math:: V_k = E_{y_1..y_k \sim \pi}\,[R(\mathrm{sel}(y_1..y_k))]

    best-of-k: :func:`bonft.bon.best_of_k_value`; pass: best-of-k with ``scores = rewards``;
    majority: :func:`vote_value`; weighted: :func:`weighted_vote_value`.

    References: Chow et al. 2024; Wang et al. 2023; Li et al. 2023; Chen et al. 2021.
    """
    st = get_strategy(strategy)
    if st.uses_scores and scores is None:
        raise ValueError(f"scores must be given for strategy {st.name!r}, got None")
    if st.uses_answers and answers is None:
        raise ValueError(f"answers must be given for strategy {st.name!r}, got None")
    if st.name == "best-of-k":
        return _bon.best_of_k_value(probs, scores, rewards, k=k)
    if st.name == "pass":
        return _bon.best_of_k_value(probs, rewards, rewards, k=k)
    if st.name == "majority":
        return vote_value(probs, answers, rewards, k=k)
    return weighted_vote_value(probs, answers, scores, rewards, k=k)


# ---------------------------------------------------------------------------- loss


def strategy_loss(logprobs, scores, rewards, *, strategy, k, answers=None, mask=None, return_info=False,
                  max_subsets=MAX_SUBSETS, seed=0, **options):
    r"""Policy-gradient loss for a strategy's value: credit from :func:`bonft.strategies.estimators.strategy_credit`.

    Shape: ``logprobs (B, n)`` sequence log-probs or ``(B, n, T)`` token log-probs [+ ``mask``],
    ``scores, rewards, answers (B, n) -> loss ()``; ``(loss, info)`` with ``return_info=True``.

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\,\log\pi(y_{bi}),\qquad
              E[-\nabla\ell] = \nabla\,\mathrm{mean}_b V_k

    The credit ``w`` is plain data; the loss itself is :func:`bonft.objectives.losses.policy_gradient_loss`
    (``mask`` and ``options`` such as the anchor KL term go there). info adds ``pool_value``,
    the mean over prompts of the unbiased pool estimate of ``V_k`` (detached).

    References: Chow et al. 2024; Kool et al. 2019; Wang et al. 2023.

    Caution: see the module docstring on reward hacking.
    """
    from bonft.objectives import losses as _losses
    from bonft.strategies.estimators import strategy_at_k, strategy_credit

    if not isinstance(logprobs, torch.Tensor):
        raise TypeError(f"logprobs must be a torch tensor (B, n) or (B, n, T), got {type(logprobs).__name__}")
    st = get_strategy(strategy)
    w = strategy_credit(st, scores, rewards, k=k, answers=answers, max_subsets=max_subsets, seed=seed)
    w = torch.as_tensor(np.asarray(w.detach().cpu() if isinstance(w, torch.Tensor) else w),
                        dtype=logprobs.dtype, device=logprobs.device)
    if w.shape != logprobs.shape[:2]:
        raise ValueError(f"logprobs must have (B, n) = {tuple(w.shape)} leading axes like rewards, got {tuple(logprobs.shape)}")
    out = _losses.policy_gradient_loss(logprobs, w, mask=mask, return_info=return_info, **options)
    if not return_info:
        return out
    loss, info = out
    v, _ = strategy_at_k(st, ks=[k], rewards=rewards, scores=scores, answers=answers, max_subsets=max_subsets, seed=seed)
    info = dict(info)
    info["pool_value"] = torch.tensor(float(np.mean(v)), dtype=torch.float64)
    return loss, info
