"""Several strategies side by side on the same pools: V_k per strategy with bootstrap CIs over prompts.

Every strategy is estimated on the same prompts and the bootstrap uses one seed, so each
replicate resamples the same prompts for every strategy (paired intervals, Efron & Tibshirani
1993). Sampled estimates (weighted vote on large pools) also report their Monte-Carlo standard
error, averaged over prompts.

References: Efron & Tibshirani 1993 (percentile bootstrap); Hoeffding 1948 (U-statistics);
Wang et al. 2023 (majority vote); Chow et al. 2024 (best-of-N).
"""
from __future__ import annotations

import json
import sys
from dataclasses import dataclass, field

import numpy as np

from bonft._core.bootstrap import confidence_label, no_interval_columns
from bonft._core.checks import check_ks
from bonft.estimate.intervals import MIN_BOOT_PROMPTS, bootstrap_ci, reward_bounds
from bonft.strategies.base import _unread_field, get_strategy
from bonft.strategies.estimators import MAX_SUBSETS

__all__ = ["StrategyCurves", "compare_strategies"]


@dataclass
class StrategyCurves:
    """``V_k`` of each strategy: ``mean[name], lo[name], hi[name], mc_se[name]``: (K,) arrays; ``per_prompt[name]``: (P, K)."""

    ks: np.ndarray
    n_prompts: int
    names: list[str]
    mean: dict = field(default_factory=dict)
    lo: dict = field(default_factory=dict)
    hi: dict = field(default_factory=dict)
    mc_se: dict = field(default_factory=dict)
    per_prompt: dict = field(default_factory=dict, repr=False)
    confidence: float = 0.95
    bounds: tuple | None = None  # the rewards' (0, 1) when every reward is in [0, 1] (:func:`reward_bounds`)

    def no_interval(self, name: str) -> np.ndarray:
        """``(K,)`` bool: the k whose per-prompt values of ``name`` are all equal at neither bound, where the table
        prints "no spread" (:func:`bonft._core.bootstrap.no_interval_columns`, the rule of ``bonft estimate``)."""
        return no_interval_columns(self.per_prompt[name], self.bounds)

    @property
    def intervals_valid(self) -> bool:
        return self.n_prompts >= MIN_BOOT_PROMPTS

    def best(self) -> list[str]:
        """The servable strategy with the highest mean at each k (``pass_at_k`` is a ceiling, not servable)."""
        names = [s for s in self.names if get_strategy(s).servable] or self.names
        return [max(names, key=lambda s: self.mean[s][j]) for j in range(len(self.ks))]

    def table(self) -> str:
        """One row per k, one column block per strategy (mean and interval), and the best one."""
        ok = self.intervals_valid
        w = 26
        head = f"{'k':>6}  " + "  ".join(f"{s:^{w}}" for s in self.names) + "  best"
        lines = [f"prompts: {self.n_prompts}   {confidence_label(self.confidence)} intervals over prompts", head]
        for j, (k, b) in enumerate(zip(self.ks, self.best())):
            cells = []
            for s in self.names:
                ci = ("no spread" if self.no_interval(s)[j] else f"[{self.lo[s][j]:.3f}, {self.hi[s][j]:.3f}]") if ok else "[n/a]"
                cells.append(f"{self.mean[s][j]:.4f} {ci}".center(w))
            lines.append(f"{int(k):>6}  " + "  ".join(cells) + f"  {b}")
        sampled = [s for s in self.names if (self.mc_se[s] > 0).any()]
        for s in sampled:
            lines.append(f"{s}: sampled k-subsets where C(n,k) is large; mean Monte-Carlo standard error per "
                         f"prompt up to {self.mc_se[s].max():.4f}")
        if not ok:
            lines.append(f"intervals n/a: {self.n_prompts} prompt(s); a bootstrap over prompts needs at least {MIN_BOOT_PROMPTS}")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        d = {"ks": [int(k) for k in self.ks], "n_prompts": int(self.n_prompts), "confidence": self.confidence,
             "intervals_valid": self.intervals_valid, "best": self.best(), "strategies": {}}
        for s in self.names:
            d["strategies"][s] = {key: [float(x) for x in getattr(self, key)[s]] for key in ("mean", "lo", "hi", "mc_se")}
            d["strategies"][s]["no_interval"] = [bool(x) for x in self.no_interval(s)]
            d["strategies"][s]["per_prompt"] = np.asarray(self.per_prompt[s], dtype=float).tolist()
        json.dumps(d, allow_nan=False)
        return d


def compare_strategies(strategies, *, ks, rewards, scores=None, answers=None, confidence=0.95, n_boot=2000, seed=0,
                       max_subsets=MAX_SUBSETS, conflicts="error") -> StrategyCurves:
    r"""Estimate each strategy on the same pools, with paired bootstrap intervals over prompts.

    Shape: ``rewards, scores, answers (P, n)`` (or lists of per-prompt arrays) -> :class:`StrategyCurves`
    of ``(K,)`` curves per strategy.

    .. math:: \bar V_k = \frac1P\sum_p \hat V_k^{(p)}

    ``strategies``: ids or :class:`bonft.strategies.Strategy` objects; each gets the fields it reads, and
    ``scores`` or ``answers`` that none of them reads is an error. ``ks``: an int or an iterable of
    ints (read once, so a generator works). Values are the unbiased
    per-prompt estimates of :meth:`bonft.strategies.Strategy.estimate` (``max_subsets``, ``seed`` and
    ``conflicts`` go there); intervals are the paired
    percentile bootstrap of :func:`bonft.estimate.bootstrap_ci` over prompts (with ``bounds=(0, 1)`` when every
    reward lies in [0, 1], so a strategy that scores 0, or 1, on every prompt gets the exact interval).

    References: Efron & Tibshirani 1993; Hoeffding 1948.
    """
    ks = [int(k) for k in check_ks(ks, sys.maxsize, name="ks")[0]]  # each k is checked against n by the estimate
    sts = [get_strategy(s) for s in strategies]
    if not sts:
        raise ValueError("strategies must name at least one strategy, got none")
    given = {"max_subsets": max_subsets, "conflicts": conflicts}
    for key, val in given.items():  # an option no strategy here reads cannot take effect
        if not any(key in st.reads for st in sts):
            sts[0].options(**{key: val})  # its message names the strategies that read it
    for key, val in (("scores", scores), ("answers", answers)):  # so can a field none of them reads
        if val is not None and not any(getattr(st, f"uses_{key}") for st in sts):
            raise _unread_field(key, [st.name for st in sts], val)
    # every strategy's value is a mean of rewards: with rewards in [0, 1] a column all at 0 (or 1) gets the exact
    # interval of bootstrap_ci's bounds, not a zero-width one
    bounds = reward_bounds(rewards if isinstance(rewards, np.ndarray) else [np.asarray(x) for x in rewards])
    out = None
    for st in sts:
        opts = {key: val for key, val in {**given, "seed": seed}.items() if key in st.reads}
        v, se = st.estimate(ks=ks, rewards=rewards, scores=scores if st.uses_scores else None,
                            answers=answers if st.uses_answers else None, **opts)
        if out is None:
            out = StrategyCurves(ks=np.asarray(ks), n_prompts=v.shape[0], names=[], confidence=confidence, bounds=bounds)
        m, lo, hi = bootstrap_ci(v, confidence=confidence, n_boot=n_boot, seed=seed, bounds=bounds)
        out.names.append(st.name)
        out.mean[st.name], out.lo[st.name], out.hi[st.name] = m, lo, hi
        out.mc_se[st.name] = se.mean(0)
        out.per_prompt[st.name] = v
    return out
