r"""Exact strategy values on a finite outcome set, differentiable in the policy.

A policy ``pi`` over ``V`` outcomes; each outcome has an answer key, a verifier score and a true
reward. For any selection rule over ``k`` i.i.d. draws the served value is

.. math:: V_k = E_{y_1..y_k \sim \pi}\,[R(\mathrm{sel}(y_1..y_k))]

Here: :func:`majority_vote_value` (a dynamic programme over answer counts,
:mod:`bonft.strategies.counting`) and :func:`weighted_vote_value` (a sum over count vectors).
Best-of-k and pass@k have closed forms in :mod:`bonft.bon`.

One reward per answer. A vote serves an answer, so each answer must carry one reward:
outcomes of one answer with different rewards (surface forms judged differently) are refused
with ``conflicts="error"`` (the default). With ``conflicts="mean"`` the rule is stated: one of
the winning answer's drawn samples is served uniformly at random, so the answer's reward is
the mean of its samples' rewards, ``Rbar_a = sum_{v in a} pi(v) R_v / pi(a)`` on a policy.

Scores of a weighted vote are non-negative weights (a verifier's probability that the sample
is right, say; exponentiate log-probabilities first): the served answer has the largest total
weight among the k samples, ties uniform among the tied answers. A negative score is refused.

References: Wang et al. 2023 "Self-Consistency Improves Chain of Thought Reasoning in Language
Models" (majority vote); Li et al. 2023 "Making Language Models Better Reasoners with
Step-Aware Verifier" (verifier-weighted vote); Chow et al. 2024 (inference-aware objectives).
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import torch

from bonft._core.checks import check_choice, check_int, is_tensor
from bonft._core.outcomes import check_outcome_values, check_policy_probs, returned_like
from bonft.strategies.counting import policy_majority_value, weighted_vote_weights

__all__ = ["majority_vote_value", "weighted_vote_value", "CONFLICT_RULES"]

_MAX_K_EXACT = 150  # k! and q^m/m! stay inside float64
_MAX_MULTISETS = 200_000  # weighted vote: count vectors enumerated
CONFLICT_RULES = ("error", "mean")  # one answer, several rewards: refuse, or serve the mean of its samples


def _answers_1d(answers, V: int) -> tuple[np.ndarray, np.ndarray]:
    """Outcome answer labels (V,) of any comparable kind -> (distinct keys (A,), int codes (V,)); None and NaN
    are refused (a ``ValueError`` naming the outcome)."""
    a = answers.detach().cpu().numpy() if is_tensor(answers) else np.asarray(answers)
    if a.shape != (V,):
        raise ValueError(f"answers must have shape (V,) = ({V},) with one answer key per outcome, got shape {a.shape}")
    raw = a if isinstance(answers, np.ndarray) or is_tensor(answers) else np.asarray(answers, dtype=object)
    for i, v in enumerate(raw):  # Python values: numpy turns ["a", nan] into the strings ["a", "nan"]
        if v is None:
            raise ValueError(f"answers[{i}] must be an answer key, got None: on a finite outcome set every outcome needs "
                             f"one (None votes alone only among the samples of a pool); give outcome {i} a key of its "
                             f"own, which its repeated draws then share")
        if isinstance(v, (float, complex, np.floating, np.complexfloating)) and v != v:
            raise ValueError(f"answers[{i}] must be an answer key, got NaN (NaNs would count as one answer); give "
                             f"outcome {i} a key of its own")
    try:
        keys, codes = np.unique(a, return_inverse=True)
    except TypeError:
        raise TypeError(f"answers must hold comparable keys (ints or strings), got dtype {a.dtype}") from None
    return keys, codes.reshape(-1)


def _check_k_exact(k) -> int:
    k = check_int("k", k, min=1)
    if k > _MAX_K_EXACT:
        raise ValueError(f"k must be <= {_MAX_K_EXACT} for the exact vote value (float64 factorials), got k={k}")
    return k


def _plain(x):
    """A numpy scalar as the Python value it holds (``'y'``, not ``np.str_('y')``) for messages."""
    return x.item() if isinstance(x, np.generic) else x


def _one_reward_per_answer(R: torch.Tensor, keys: np.ndarray, codes: np.ndarray, conflicts, strategy: str) -> None:
    """Refuse outcomes of one answer with different rewards unless ``conflicts="mean"``."""
    if check_choice("conflicts", conflicts, CONFLICT_RULES) == "mean":
        return
    r = R.detach().reshape(-1, R.shape[-1]).cpu().numpy()  # (L, V)
    for a in range(len(keys)):
        idx = np.flatnonzero(codes == a)
        vals = r[:, idx]
        bad = np.flatnonzero((vals != vals[:, :1]).any(0))
        if len(bad):
            i, j = int(idx[0]), int(idx[bad[0]])
            row = int(np.flatnonzero(vals[:, bad[0]] != vals[:, 0])[0])
            raise ValueError(
                f"rewards must be one value per answer for {strategy}, got answer {_plain(keys[a])!r} with rewards "
                f"{r[row, i]:g} (outcome {i}) and {r[row, j]:g} (outcome {j}); pass conflicts='mean' to serve the mean "
                f"reward of the answer's samples")


def _check_weights(s: torch.Tensor) -> None:
    """Weighted-vote scores are non-negative weights."""
    sd = s.detach()
    if bool((sd < 0).any()):
        bad = tuple(int(i) for i in torch.nonzero(sd < 0)[0])
        raise ValueError(f"scores must be non-negative weights for weighted_vote (exponentiate log-probabilities "
                         f"first), got {float(sd[bad]):g} at index {bad}")


def majority_vote_value(probs, answers, rewards, *, k, conflicts="error"):
    r"""Exact majority-vote value on a finite outcome set, differentiable.

    Shape: ``probs (..., V), answers (V,), rewards (..., V) or (V,) -> (...)``.

    .. math::
        V_k = \sum_a P_k(a\ \text{wins})\,\bar R_a,\qquad
        P_k(a\ \text{wins}) = E\Big[\frac{1\{c_a = \max_b c_b\}}{\#\{b: c_b=\max\}}\Big],\
        c \sim \mathrm{Mult}(k, q),\ q_a = \sum_{v\in a}\pi(v)

    by a dynamic programme over answer counts (:mod:`bonft.strategies.counting`), ``O(A k^3)`` per row for
    ``A`` answers, never enumerating k-tuples. numpy in -> numpy out; torch in -> torch out,
    differentiable w.r.t. ``probs`` (and ``rewards``). ``k <= 150``. ``answers``: one key per outcome (ints,
    strings); None or NaN is a ``ValueError`` (on a policy every outcome needs a key). ``conflicts``: ``"error"``
    (an answer whose outcomes carry different rewards is refused) or ``"mean"`` (``Rbar_a`` is the
    probability-weighted mean reward of its outcomes; module docstring).

    References: Wang et al. 2023, "Self-Consistency Improves Chain of Thought Reasoning in
    Language Models"; Chow et al. 2024 (inference-aware objectives); Abramowitz & Stegun 1964,
    25.4.29 (Gauss-Legendre quadrature, exact for the tie integral).
    """
    p, as_np = check_policy_probs(probs)
    V = p.shape[-1]
    keys, codes = _answers_1d(answers, V)
    R = check_outcome_values("rewards", rewards, p)
    _one_reward_per_answer(R, keys, codes, conflicts, "majority_vote")
    k = _check_k_exact(k)
    shape = torch.broadcast_shapes(p.shape, R.shape)
    pe, Re = p.expand(shape).reshape(-1, V), R.expand(shape).reshape(-1, V)
    onehot = torch.zeros(V, int(codes.max()) + 1, dtype=torch.float64, device=p.device)
    onehot[torch.arange(V), torch.as_tensor(codes)] = 1.0
    q, qr = pe @ onehot, (pe * Re) @ onehot  # (L, A) answer masses and reward masses
    out = policy_majority_value(q, qr, k).reshape(shape[:-1])
    return returned_like(out, as_np)


def _compositions(k: int, V: int) -> np.ndarray:
    """Every count vector (N, V) of non-negative ints summing to k (stars and bars)."""
    rows = []
    for bars in itertools.combinations(range(k + V - 1), V - 1):
        edges = (-1,) + bars + (k + V - 1,)
        rows.append([edges[i + 1] - edges[i] - 1 for i in range(V)])
    return np.array(rows, dtype=np.int64)


def weighted_vote_value(probs, answers, scores, rewards, *, k, conflicts="error"):
    r"""Exact verifier-weighted vote value on a finite outcome set, differentiable in ``probs``.

    Shape: ``probs (..., V), answers (V,), scores, rewards (..., V) or (V,) -> (...)``.

    .. math::
        V_k = \sum_{c:\ |c|=k} \frac{k!}{\prod_v c_v!}\prod_v \pi(v)^{c_v}\,
              \mathrm{mean}_{a\in W(c)} \frac{\sum_{v\in a} c_v R_v}{\sum_{v\in a} c_v},\quad
        W(c) = \arg\max_a \sum_{v\in a} c_v s_v

    ``scores`` are non-negative weights (a negative one is a ``ValueError``). The served answer
    depends on weight sums, not only on counts, so this sums over the ``C(k+V-1, V-1)`` count
    vectors of the outcomes (not the ``V^k`` ordered tuples); refused above 200,000 of them.
    Totals equal to 1e-12 relative tie. ``answers`` and ``conflicts`` as in :func:`majority_vote_value`.

    References: Li et al. 2023, "Making Language Models Better Reasoners with Step-Aware
    Verifier" (verifier-weighted voting); Wang et al. 2023 (majority vote).
    """
    p, as_np = check_policy_probs(probs)
    V = p.shape[-1]
    keys, codes = _answers_1d(answers, V)
    s = check_outcome_values("scores", scores, p)
    _check_weights(s)
    R = check_outcome_values("rewards", rewards, p, s)
    _one_reward_per_answer(R, keys, codes, conflicts, "weighted_vote")
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
    return returned_like(torch.stack(out).reshape(shape[:-1]), as_np)
