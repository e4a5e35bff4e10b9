"""Paired comparison of policies evaluated on the same prompts: per-prompt curves, intervals, tables.

When every policy is evaluated on the same held-out prompts, two policies are compared *paired*:
per prompt first, then averaged, so the prompts' own difficulty cancels and the interval is that of
the mean per-prompt difference (percentile bootstrap over prompts; Efron & Tibshirani 1993, ch. 13).
The interval covers the evaluation's noise (which prompts, which samples), not the training run's:
another training seed can move a difference more (the demo's study reports intervals over seeds).

``pools``: ``{"rewards": (P, n), "proxy": (P, n) scores of the verifier that picks}`` of one policy
(``proxy`` optional). Per-prompt pass@k is the unbiased estimator of Chen et al. 2021, per-prompt
best-of-k under the picking verifier the U-statistic over all k-subsets with ties shared (Chow et
al. 2024), both from :mod:`bonft.estimate.bestofk`.
"""
from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np

from bonft.estimate.bestofk import best_of_k_per_prompt, pass_at_k_per_prompt


def per_prompt_curves(pools, *, ks):
    r"""Per-prompt pass@k and best-of-k under the picking verifier, at each k.

    Shape: ``pools["rewards"] (P, n)`` [, ``pools["proxy"] (P, n)``] ``-> {"pass": (P, K), "proxy": (P, K)}``
    (ragged pools: lists of 1-D arrays; each k must fit the smallest pool).

    .. math:: \mathrm{pass}_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk} r_{p,(i)},\qquad
              \mathrm{proxy}_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk} \bar r_{p,(i)}

    (sorted by reward, resp. by the picker's score with tied rewards averaged).

    References: Chen et al. 2021 (pass@k); Chow et al. 2024 (best-of-k).
    """
    rewards = pools["rewards"]
    rewards = rewards if isinstance(rewards, list) else np.asarray(rewards, dtype=float)
    out = {"pass": np.asarray(pass_at_k_per_prompt(rewards, ks=list(ks)), dtype=float)}
    if "proxy" in pools:
        proxy = pools["proxy"]
        proxy = proxy if isinstance(proxy, list) else np.asarray(proxy, dtype=float)
        out["proxy"] = np.asarray(best_of_k_per_prompt(proxy, rewards, ks=list(ks)), dtype=float)
    return out


def paired_bootstrap(a, b, *, n_boot: int = 2000, seed: int = 0, confidence: float = 0.95) -> tuple[float, float, float]:
    r"""Mean per-prompt difference and its percentile bootstrap interval over prompts.

    Shape: ``a (P,), b (P,)`` (the same prompts, in the same order) ``-> (mean, lo, hi)``.

    .. math:: \bar d = \frac1P\sum_p (a_p - b_p),\qquad [\lo, \hi] = \text{quantiles } \tfrac{1-c}{2},
              \tfrac{1+c}{2} \text{ of } \bar d^{*} \text{ over } n_{boot} \text{ resamples of the prompts}

    References: Efron & Tibshirani 1993, "An Introduction to the Bootstrap", ch. 13 (percentile interval).
    """
    d = np.asarray(a, dtype=float) - np.asarray(b, dtype=float)
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(d), size=(n_boot, len(d)))
    boot = d[idx].mean(1)
    alpha = (1 - confidence) / 2
    return float(d.mean()), float(np.quantile(boot, alpha)), float(np.quantile(boot, 1 - alpha))


def bootstrap_mean(a, *, n_boot: int = 2000, seed: int = 0, confidence: float = 0.95) -> tuple[float, float, float]:
    r"""Mean over prompts and its percentile bootstrap interval (:func:`paired_bootstrap` against 0).

    Shape: ``a (P,) -> (mean, lo, hi)``.

    .. math:: \bar a = \frac1P\sum_p a_p

    References: Efron & Tibshirani 1993, ch. 13.
    """
    return paired_bootstrap(a, np.zeros_like(np.asarray(a, dtype=float)), n_boot=n_boot, seed=seed, confidence=confidence)


def paired_comparison(curves, *, ks, baselines: Sequence[str], n_boot: int = 2000, seed: int = 0,
                      confidence: float = 0.95, intervals: bool = True) -> dict:
    r"""Every policy's mean with its interval, and its paired difference from each baseline.

    Shape: ``curves``: policy -> :func:`per_prompt_curves` (every policy on the same P prompts) ``->``
    ``{"columns": [(label, kind, j)], "means": {policy: [(m, lo, hi)]}, "differences": {baseline: {policy:
    [(d, lo, hi)]}}}``, one triple per column: pass@k at each k, then best-of-(largest k) under the picker
    when every policy has a ``proxy`` curve. ``intervals=False``: lo and hi are NaN (too few prompts to
    resample).

    .. math:: \bar d_{\text{policy}} = \frac1P\sum_p \big(v_p^{\text{policy}} - v_p^{\text{baseline}}\big)

    References: Efron & Tibshirani 1993, ch. 13 (the paired percentile bootstrap).
    """
    names = list(curves)
    cols = [(f"pass@{k}", "pass", j) for j, k in enumerate(ks)]
    if all("proxy" in c for c in curves.values()):
        cols.append((f"best-of-{ks[-1]}", "proxy", len(ks) - 1))
    boot = dict(n_boot=n_boot, seed=seed, confidence=confidence)

    def cell(a, b=None):
        if intervals:
            return paired_bootstrap(a, np.zeros_like(a) if b is None else b, **boot)
        return float(np.mean(a - (0 if b is None else b))), math.nan, math.nan

    means = {n: [cell(curves[n][kind][:, j]) for _, kind, j in cols] for n in names}
    diffs = {base: {n: [cell(curves[n][kind][:, j], curves[base][kind][:, j]) for _, kind, j in cols]
                    for n in names if n != base} for base in baselines if base in curves}
    return {"columns": cols, "means": means, "differences": diffs}


def format_interval(m: float, lo: float, hi: float, *, signed: bool = False) -> str:
    """``0.164 [0.140, 0.189]`` (``signed``: ``+0.020 [-0.005, +0.047]``, `` *`` when the interval excludes 0); the
    mean alone when there is no interval (NaN bounds)."""
    f = "{:+.3f}" if signed else "{:.3f}"
    if math.isnan(lo):
        return f.format(m)
    mark = " *" if signed and (lo > 0 or hi < 0) else ""
    return f"{f.format(m)} [{f.format(lo)}, {f.format(hi)}]{mark}"


def paired_table(comparison, *, n_prompts: int, labels: Mapping[str, str] | None = None, picker: str = "proxy",
                 confidence: float = 0.95, caption: str = "", interval_name: str = "bootstrap CI over prompts") -> str:
    """Markdown of :func:`paired_comparison`: the means, then one table of paired differences per baseline.

    labels: policy -> the name a row shows (default: the policy's own); picker: the verifier named in the
    best-of-k column; caption: a line under every table's title (e.g. which verifier trains, which evaluates).
    """
    labels = labels or {}
    cols = comparison["columns"]
    heads = [f"{picker} {label}" if kind == "proxy" else label for label, kind, _ in cols]

    def head(title: str) -> list[str]:
        return [title, *([caption] if caption else []), "", "| policy | " + " | ".join(heads) + " |",
                "|---" * (len(heads) + 1) + "|"]

    lines = head(f"Mean over {n_prompts} held-out prompts [{round(100 * confidence)}% {interval_name}]")
    for name, cells in comparison["means"].items():
        lines.append(f"| {labels.get(name, name)} | " + " | ".join(format_interval(*c) for c in cells) + " |")
    for base, rows in comparison["differences"].items():
        lines += [""] + head(f"Paired difference from {labels.get(base, base)} (same prompts; * = interval excludes 0)")
        for name, cells in rows.items():
            lines.append(f"| {labels.get(name, name)} | " + " | ".join(format_interval(*c, signed=True) for c in cells) + " |")
    return "\n".join(lines)
