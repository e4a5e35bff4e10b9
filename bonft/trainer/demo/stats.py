"""Statistics of the demo and the study: per-prompt curves from saved pools, paired intervals.

Every policy of one seed is evaluated on the same held-out prompts with the same
sampling seeds, so two policies are compared *paired*: per prompt first, then
averaged. Two kinds of interval:

* over prompts, within one seed: the percentile bootstrap of the mean per-prompt
  difference (Efron & Tibshirani 1993, ch. 13), resampling prompts;
* over seeds: the Student-t interval of the mean per-seed difference
  (each seed has its own warm start, data split and RL runs), ``S - 1`` degrees of freedom.

``pools``: ``{"rewards": (P, n) 0/1, "proxy": (P, n) verifier scores}`` of one policy.
Per-prompt pass@k is the unbiased estimator of Chen et al. 2021; per-prompt
best-of-k under the proxy is the U-statistic over all k-subsets with ties shared
(:func:`bonft.estimate.best_of_k_per_prompt`; Chow et al. 2024).
"""
from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np

from bonft.estimate.paired import paired_comparison, paired_table, seed_comparison
from bonft.plan.sweep import Pools, plan_pools

LABELS = {
    "warm_start": "warm start (before RL)",
    "reinforce": "leave-one-out REINFORCE",
    "best_of_k": "best-of-k (proxy verifier)",
    "pass_at_k": "pass@k unbiased",
    "pass_at_k_plugin": "pass@k plug-in",
    "pass_at_k_positive": "pass@k positive-only",
    "best_of_k_sft": "best-of-k SFT",
    "pass_at_k_anneal": "pass@k, k annealed 16 -> 1",
    "placebo": "placebo (pass@k, outcomes shuffled)",
}


def seed_table(curves: Mapping[str, Mapping[str, np.ndarray]], ks: Sequence[int], *,
               baselines: Sequence[str] = ("warm_start", "reinforce"), n_boot: int = 2000, seed: int = 0,
               confidence: float = 0.95, caption: str = "") -> str:
    """One seed: each policy's mean [bootstrap CI over prompts], then its paired difference from each baseline
    (:func:`bonft.estimate.paired.paired_comparison` in the demo's names).

    curves: policy -> :func:`~bonft.estimate.paired.per_prompt_curves`. A ``*`` marks a difference whose
    interval excludes 0. caption: a line under every table's title (e.g. which verifier trains and which evaluates).
    """
    baselines = [b for b in baselines if b in curves]  # a stage the run left out (e.g. no REINFORCE) is no baseline
    comp = paired_comparison(curves, ks=ks, baselines=baselines, n_boot=n_boot, seed=seed, confidence=confidence)
    return paired_table(comp, n_prompts=len(next(iter(curves.values()))["pass"]), labels=LABELS, confidence=confidence,
                        caption=caption)


def study_table(per_seed: Mapping[int, Mapping[str, Mapping[str, np.ndarray]]], ks: Sequence[int], *,
                baselines: Sequence[str] = ("warm_start", "reinforce"), confidence: float = 0.95, caption: str = "") -> str:
    """Over seeds: per-seed means, their mean [t-interval], and paired per-seed differences [t-interval]
    (:func:`bonft.estimate.paired.seed_comparison` in the demo's names).

    per_seed: seed -> policy -> :func:`~bonft.estimate.paired.per_prompt_curves` (the same policies for every seed).
    caption: a line under every table's title (e.g. which verifier trains and which evaluates).
    """
    present = next(iter(per_seed.values()), {})
    baselines = [b for b in baselines if b in present]  # a stage the study left out is no baseline
    comp = seed_comparison(per_seed, ks=ks, baselines=baselines, confidence=confidence)
    return paired_table(comp, labels=LABELS, confidence=confidence, caption=caption)


def best_temperatures(pools_by_temperature: Mapping[float, np.ndarray], ks: Sequence[int], *, n_boot: int = 500,
                      seed: int = 0) -> dict[int, float]:
    """rewards at each temperature {T: (P, n)}, the same prompts in the same order -> {k: the planner's best T for pass@k}."""
    pools = {float(t): Pools(scores=np.asarray(r, float), rewards=np.asarray(r, float)) for t, r in pools_by_temperature.items()}
    res = plan_pools(pools, max_k=max(ks), n_boot=n_boot, seed=seed)
    return {int(k): float(res.best_temperature[int(k) - 1]) for k in ks}
