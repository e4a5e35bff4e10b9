"""Unbiased best-of-k and pass@k from pools of scored samples, with confidence intervals.

* :mod:`bonft.estimate.bestofk` -- best-of-k U-statistics over a pool's k-subsets
  (:func:`best_of_k`, :func:`best_of_k_per_prompt`, :func:`pass_at_k_per_prompt`);
* :mod:`bonft.estimate.passk` -- pass@k from (n, c) counts (:func:`pass_at_k`);
* :mod:`bonft.estimate.intervals` -- bootstrap intervals over prompts and the curve summary
  (:func:`bootstrap_ci`, :func:`reward_bounds`, :func:`default_ks`, :class:`CurveSummary`, :func:`summarize`);
* :mod:`bonft.estimate.paired` -- policies compared on the same prompts: per-prompt curves, paired
  bootstrap differences over prompts and Student-t differences over training seeds, and their tables
  (:func:`per_prompt_curves`, :func:`paired_comparison`, :func:`seed_comparison`).

Hyper-parameters (``k``, ``ks``, ...) are keyword-only.
"""
from bonft.estimate.bestofk import best_of_k, best_of_k_per_prompt, pass_at_k_per_prompt
from bonft.estimate.intervals import MIN_BOOT_PROMPTS, CurveSummary, bootstrap_ci, default_ks, reward_bounds, summarize
from bonft.estimate.paired import (
    paired_bootstrap,
    paired_comparison,
    paired_table,
    per_prompt_curves,
    seed_comparison,
    t_interval,
)
from bonft.estimate.passk import pass_at_k

__all__ = [
    "best_of_k",
    "best_of_k_per_prompt",
    "pass_at_k_per_prompt",
    "pass_at_k",
    "bootstrap_ci",
    "reward_bounds",
    "default_ks",
    "CurveSummary",
    "summarize",
    "MIN_BOOT_PROMPTS",
    "per_prompt_curves",
    "paired_bootstrap",
    "paired_comparison",
    "paired_table",
    "seed_comparison",
    "t_interval",
]
