"""The RL objectives of the trainer: a registry of name -> credit function + options.

Every objective is the same policy-gradient loss with a different per-sample
credit ``w`` (:mod:`bonft.objectives.credit`); for prompt ``b`` with samples ``y_b1..y_bn``

.. math:: \\ell_b = -\\sum_i w_{bi} \\log\\pi(y_{bi})\\ \\ [+\\ \\text{anchor KL}]\\ \\ [-\\ \\log\\pi(y^*_b)\\ \\text{for best\\_of\\_k\\_sft}]

so the trainer only needs, per objective, how to turn a scored pool into credit
(:class:`Objective`). ``OBJECTIVES`` is the registry the config key
``objective`` names; :func:`register_objective` adds one of your own.

The placebo control (:func:`shuffle_pools`, config key ``placebo``) permutes the
outcomes of each pool before the credit is computed: the credit keeps its sizes
(the same multiset per pool) but is assigned to samples at random, so for credit
that sums to zero in each pool (every leave-one-out objective here) the expected
update given the samples is exactly zero. Any drift a placebo run shows is what
noise alone does to the policy.

References: Kool et al. 2019 (leave-one-out REINFORCE); Chen et al. 2021 (unbiased
pass@k); Chow et al. 2024 (best-of-N-aware RL and SFT); Walder & Karkhanis 2025
(pass@k policy gradients).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
import torch

from bonft._core.specs import load_spec
from bonft.objectives import credit as C
from bonft.objectives import losses as L
from bonft.strategies import get_strategy, strategy_credit, strategy_per_prompt


@dataclass
class Pools:
    """The scored samples of ``b`` prompts, as float64 numpy arrays on the host.

    scores, rewards: (b, n); correct: (b, n) 0/1 (reward >= the correctness threshold);
    reference_scores: (b,) verifier score of each prompt's reference response (best_of_k_sft only);
    answers: (b, n) answer keys extracted from the responses (vote objectives only).

    Credit functions (:mod:`bonft.objectives.credit`) compute in float64 numpy on the host and
    return numpy for numpy input; the trainer moves the ``(b, n)`` credit to the training device once.
    """

    scores: np.ndarray
    rewards: np.ndarray
    correct: np.ndarray
    reference_scores: np.ndarray | None = None
    answers: np.ndarray | None = None


@dataclass(frozen=True)
class Objective:
    """One entry of the registry: ``credit(pools, k) -> (b, n)``, ``value(pools, k) -> (b,)`` or None.

    Both get host :class:`Pools` and return float64 arrays (numpy, or anything ``torch.as_tensor`` takes).

    ``value`` is the pool's own estimate of the targeted quantity (logged as
    ``pool/value``); ``reference``: the loss adds ``-log pi(reference)`` per prompt;
    ``answers``: the pools must carry answer keys (:attr:`Pools.answers`, extracted by the task).
    ``reads_k``, ``reads_correct``: the credit reads ``k`` / :attr:`Pools.correct` (so the config keys
    ``k``, ``k_final``, ``k_schedule`` / ``correct_threshold`` take effect); a config that sets a key its
    objective does not read is refused. An objective of your own is assumed to read both.
    """

    credit: Callable[[Pools, int], torch.Tensor]
    value: Callable[[Pools, int], torch.Tensor] | None
    summary: str
    reference: bool = False
    answers: bool = False
    reads_k: bool = True
    reads_correct: bool = True


def _pass_at_k(estimator: str, positive_only: bool) -> Callable:
    return lambda p, k: C.pass_at_k_credit(
        p.correct, k=k, estimator=estimator, positive_only=positive_only)


def _pass_value(p: Pools, k: int) -> np.ndarray:
    # selecting by correctness, best-of-k is correct iff one of the k is: the U-statistic is unbiased pass@k
    return C.pool_value(p.correct, p.correct, k=k)


def _vote(name: str) -> tuple[Callable, Callable]:
    """Credit and pool value of a vote strategy (:mod:`bonft.strategies.estimators`), float64 numpy arrays."""

    reads_scores = get_strategy(name).uses_scores  # a majority vote reads no scores: handing it some is an error

    def credit(p: Pools, k: int) -> np.ndarray:
        return strategy_credit(name, p.scores if reads_scores else None, p.rewards, k=k, answers=p.answers)

    def value(p: Pools, k: int) -> np.ndarray:
        v, _ = strategy_per_prompt(name, ks=[k], rewards=p.rewards, scores=p.scores if reads_scores else None,
                                   answers=p.answers)
        return v[:, 0]

    return credit, value


OBJECTIVES: dict[str, Objective] = {
    "reinforce": Objective(
        credit=lambda p, k: C.reinforce_credit(p.rewards, baseline="loo"), value=lambda p, k: p.rewards.mean(-1),
        reads_k=False, reads_correct=False,
        summary="mean reward (pass@1), leave-one-out REINFORCE (Kool et al. 2019): the baseline"),
    "best_of_k": Objective(
        credit=lambda p, k: C.best_of_k_credit(p.scores, p.rewards, k=k, baseline="loo"),
        value=lambda p, k: C.pool_value(p.scores, p.rewards, k=k), reads_correct=False,
        summary="best-of-k with the training verifier selecting (Chow et al. 2024, BoN-RL)"),
    "pass_at_k": Objective(
        credit=_pass_at_k("unbiased", False), value=_pass_value,
        summary="pass@k, unbiased U-statistic credit (Chen et al. 2021; Walder & Karkhanis 2025)"),
    "pass_at_k_plugin": Objective(
        credit=_pass_at_k("plugin", False), value=_pass_value, summary="pass@k, plug-in credit 1-(1-p_hat)^k"),
    "pass_at_k_positive": Objective(
        credit=_pass_at_k("unbiased", True), value=_pass_value, summary="pass@k, credit on correct samples only"),
    "best_of_k_sft": Objective(
        credit=lambda p, k: C.best_of_k_sft_credit(p.scores, p.reference_scores, k=k),
        value=None, reference=True, reads_correct=False,
        summary="best-of-k-aware supervised fine-tuning on reference answers (Chow et al. 2024, BoN-SFT)"),
    "majority_vote": Objective(
        *_vote("majority_vote"), answers=True, reads_correct=False,
        summary="majority vote over k answers, exact U-statistic credit by a count DP (Wang et al. 2023 self-consistency)"),
    "weighted_vote": Objective(
        *_vote("weighted_vote"), answers=True, reads_correct=False,
        summary="verifier-weighted vote over k answers (Li et al. 2023), U-statistic credit (sampled k-subsets when C(n,k) is large)"),
}


def register_objective(name: str, objective: Objective) -> None:
    """Add an objective under ``name``: then ``objective = "name"`` selects it in a :class:`TrainConfig` built in
    the same process (:func:`bonft.trainer.train`). A recipe run by the ``bonft`` command names it by its place
    instead, ``objective = "my_objectives:mine"`` (:func:`resolve_objective`)."""
    if not isinstance(name, str) or not name:
        raise TypeError(f"name must be a non-empty str, got {type(name).__name__} {name!r}")
    if not isinstance(objective, Objective):
        raise TypeError(f"objective must be a bonft.trainer.objectives.Objective, got {type(objective).__name__}")
    if name in OBJECTIVES:
        raise ValueError(f"name must not be taken already, got {name!r} (registered: {sorted(OBJECTIVES)})")
    OBJECTIVES[name] = objective


def is_objective_spec(name: str) -> bool:
    """Does ``name`` look like ``"module:name"`` or ``"path/to/file.py:name"`` (an objective of your own)?"""
    where, sep, attr = name.rpartition(":")
    return bool(sep and where and attr)


def resolve_objective(name: str) -> Objective:
    """The objective ``name`` selects: a key of :data:`OBJECTIVES`, or ``"module:name"`` /
    ``"path/to/file.py:name"`` naming an :class:`Objective` of your own (imported once, with the working
    directory or the file's folder first on the import path, then registered under ``name``).

    Caution: naming your own objective imports and runs its module's code with your rights.
    """
    if name in OBJECTIVES:
        return OBJECTIVES[name]
    if not is_objective_spec(name):
        raise ValueError(f"objective must be one of {tuple(OBJECTIVES)} or 'module:name' naming an Objective of "
                         f"your own, got {name!r}")
    obj = load_spec(name, what="objective")
    if not isinstance(obj, Objective):
        raise TypeError(f"objective {name!r} must name a bonft.trainer.objectives.Objective (credit, value, summary), "
                        f"got {type(obj).__name__}")
    OBJECTIVES[name] = obj
    return obj


def shuffle_pools(seeds: Sequence[int], *arrays: np.ndarray) -> tuple[np.ndarray, ...]:
    """The placebo: permute the samples' outcomes within each pool, one permutation per pool.

    seeds: b ints (one generator per pool); arrays: each (b, n) -> the same arrays with row
    ``j`` permuted by ``default_rng(seeds[j]).permutation(n)`` (the same permutation for
    every array, so a sample's score and reward stay paired). Pools are shuffled
    independently; each sample's outcome is replaced by a uniformly random one of its pool.
    """
    out = [np.array(a, copy=True) for a in arrays]
    n = out[0].shape[1]
    for j, s in enumerate(seeds):
        perm = np.random.default_rng(int(s)).permutation(n)
        for a in out:
            a[j] = a[j][perm]
    return tuple(out)


def policy_loss(logprobs: torch.Tensor, credit: torch.Tensor, *, mask: torch.Tensor | None, token_reduction: str,
                anchor_logprobs: torch.Tensor | None = None, anchor_weight: float = 0.0,
                reference_logprobs: torch.Tensor | None = None, reference_mask: torch.Tensor | None = None,
                sampling_logp: torch.Tensor | None = None, clip_ratio: float | None = None,
                ratio_level: str | None = None) -> tuple[torch.Tensor, dict]:
    """Sum over prompts of ``-sum_i w_bi log pi(y_bi)`` (+ anchor KL) (``- log pi(y*_b)`` with a reference response).

    logprobs, mask, anchor_logprobs, sampling_logp: (b, n, T); credit: (b, n); reference_logprobs,
    reference_mask: (b, T) -> loss (), info (name -> number; ``kl`` when an anchor is given).
    With ``sampling_logp`` (a reused batch) each credit is weighted by the importance ratio
    (:func:`bonft.objectives.losses.policy_gradient_loss`), info adds ``ratio_ess`` (and ``clip_frac``).
    """
    reuse = {} if sampling_logp is None else dict(sampling_logprobs=sampling_logp, clip_ratio=clip_ratio,
                                                     ratio_level=ratio_level)
    loss, info = L.policy_gradient_loss(logprobs, credit, mask=mask, token_reduction=token_reduction, reduction="sum",
                                        anchor_logprobs=anchor_logprobs, anchor_weight=anchor_weight, return_info=True,
                                        **reuse)
    info = {key: float(v) for key, v in info.items()}
    if reference_logprobs is not None:
        nll = L.nll_loss(reference_logprobs, mask=reference_mask, token_reduction=token_reduction, reduction="sum")
        loss = loss + nll
        info["reference_logprob"] = -float(nll.detach()) / reference_logprobs.shape[0]
    return loss, info
