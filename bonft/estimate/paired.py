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
import numbers
from typing import Any, Mapping, Sequence

import numpy as np

from bonft._core.bootstrap import confidence_label
from bonft._core.checks import (
    as_float_array,
    check_bool,
    check_finite,
    check_fraction,
    check_int,
    check_items,
    check_n_boot,
    check_nonempty,
    check_seed,
)
from bonft.estimate.bestofk import best_of_k_per_prompt, pass_at_k_per_prompt
from bonft.estimate.intervals import _check_bounds, bootstrap_ci

# ----------------------------------------------------------------------------- argument checks


def _check_ks(ks: Any) -> list[int]:
    """A non-empty sequence of ints >= 1 (a single int is refused: the curves have one column per k)."""
    if isinstance(ks, numbers.Integral) and not isinstance(ks, bool):
        raise TypeError(f"ks must be a sequence of ints (one curve column per k), got int {ks!r}; wrap it in a list")
    items = check_items("ks", ks, numbers.Integral, "ints")
    return [check_int(f"ks[{i}]", k, min=1) for i, k in enumerate(items)]


def _check_values(name: str, x: Any) -> np.ndarray:
    """Per-prompt (or per-seed) values: a non-empty finite 1-D array."""
    v = as_float_array(name, x, ndim=1)
    check_nonempty(name, v)
    check_finite(name, v)
    return v


def _check_interval_options(n_boot: Any, seed: Any, confidence: Any) -> None:
    check_n_boot(n_boot)
    check_seed(seed)
    check_fraction("confidence", confidence, open_low=True, open_high=True)


def _check_known(baselines: list[str], names: list) -> None:
    """Every baseline is one of the compared policies (an unknown one would give no differences, silently)."""
    for b in baselines:
        if b not in names:
            raise ValueError(f"baselines must be among the policies {[str(n) for n in names]}, got {b!r}")


def _check_baselines(baselines: Any) -> list[str]:
    """A sequence of policy names (a single str is refused: it would be read letter by letter)."""
    if isinstance(baselines, str):
        raise TypeError(f"baselines must be a sequence of policy names, got a single str {baselines!r} "
                        f"(wrap it in a list)")
    try:
        items = list(baselines)
    except TypeError:
        raise TypeError(f"baselines must be a sequence of policy names, got {type(baselines).__name__}") from None
    for i, b in enumerate(items):
        if not isinstance(b, str):
            raise TypeError(f"baselines must be a sequence of policy names (str), got {type(b).__name__} at index {i}")
    return items


def _check_curves(name: str, curves: Any, K: int) -> int:
    """policy -> {"pass": (P, K)[, "proxy": (P, K)]}, every policy on the same P prompts, K columns (one per k).

    Returns P.
    """
    if not isinstance(curves, Mapping):
        raise TypeError(f"{name} must be a dict of policy -> per_prompt_curves(...), got {type(curves).__name__}")
    if not curves:
        raise ValueError(f"{name} must hold at least one policy, got an empty dict")
    first = None
    for policy, c in curves.items():
        where = f"{name}[{policy!r}]"
        if not isinstance(c, Mapping):
            raise TypeError(f"{where} must be a dict with 'pass' (and 'proxy') curves, got {type(c).__name__}")
        if "pass" not in c:
            raise ValueError(f"{where} must have a 'pass' curve (per_prompt_curves' output), got keys {sorted(map(str, c))}")
        for kind in ("pass", "proxy"):
            if kind not in c:
                continue
            v = as_float_array(f"{where}[{kind!r}]", c[kind], ndim=2)
            check_finite(f"{where}[{kind!r}]", v)
            P, cols = v.shape
            if cols != K:
                raise ValueError(f"{where}[{kind!r}] must have one column per k (len(ks)={K}), got shape {v.shape}")
            if P == 0:
                raise ValueError(f"{where}[{kind!r}] must hold at least one prompt, got shape {v.shape}")
            if first is None:
                first = (where, P)
            elif P != first[1]:
                raise ValueError(f"{where}[{kind!r}] must cover as many prompts as {first[0]} (P={first[1]}; paired "
                                 f"policies are evaluated on the same prompts), got P={P}")
    return first[1]


def per_prompt_curves(pools, *, ks):
    r"""Per-prompt pass@k and best-of-k under the picking verifier, at each k.

    Shape: ``pools["rewards"] (P, n)`` [, ``pools["proxy"] (P, n)``] ``-> {"pass": (P, K), "proxy": (P, K)}``
    (ragged pools: lists of 1-D arrays; each k must fit the smallest pool).

    .. math:: \mathrm{pass}_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk} r_{p,(i)},\qquad
              \mathrm{proxy}_{pk} = \sum_i \frac{\binom{i-1}{k-1}}{\binom nk} \bar r_{p,(i)}

    (sorted by reward, resp. by the picker's score with tied rewards averaged).

    ``pools`` must have ``"rewards"``; ``ks`` is a sequence of ints (``[4]``, not ``4``).

    References: Chen et al. 2021 (pass@k); Chow et al. 2024 (best-of-k).
    """
    if not isinstance(pools, Mapping):
        raise TypeError(f"pools must be a dict with 'rewards' (and 'proxy'), got {type(pools).__name__}")
    if "rewards" not in pools:
        raise ValueError(f"pools must have 'rewards' (the true rewards, (P, n)), got keys {sorted(map(str, pools))}")
    ks = _check_ks(ks)
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

    ``a`` and ``b``: finite, non-empty, the same length; ``n_boot`` in [1, 1,000,000]; ``seed`` an int >= 0;
    ``confidence`` in (0, 1).

    References: Efron & Tibshirani 1993, "An Introduction to the Bootstrap", ch. 13 (percentile interval).
    """
    a, b = _check_values("a", a), _check_values("b", b)
    if len(b) != len(a):
        raise ValueError(f"b must hold as many prompts as a (P={len(a)}; paired values, the same prompts in the same "
                         f"order), got {len(b)}")
    _check_interval_options(n_boot, seed, confidence)
    # near float64's edge a difference or a sum of P values overflows: work at 2^-64 scale (exact for powers of two)
    scale = 2.0**64 if max(float(np.abs(a).max()), float(np.abs(b).max())) > 2.0**960 else 1.0
    d = a / scale - b / scale
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(d), size=(n_boot, len(d)))
    boot = d[idx].mean(1)
    alpha = (1 - confidence) / 2
    return (float(d.mean() * scale), float(np.quantile(boot, alpha) * scale),
            float(np.quantile(boot, 1 - alpha) * scale))


def bootstrap_mean(a, *, n_boot: int = 2000, seed: int = 0, confidence: float = 0.95) -> tuple[float, float, float]:
    r"""Mean over prompts and its percentile bootstrap interval (:func:`paired_bootstrap` against 0).

    Shape: ``a (P,) -> (mean, lo, hi)``.

    .. math:: \bar a = \frac1P\sum_p a_p

    References: Efron & Tibshirani 1993, ch. 13.
    """
    a = _check_values("a", a)
    return paired_bootstrap(a, np.zeros_like(a), n_boot=n_boot, seed=seed, confidence=confidence)


def paired_comparison(curves, *, ks, baselines: Sequence[str], n_boot: int = 2000, seed: int = 0,
                      confidence: float = 0.95, intervals: bool = True, bounds=None) -> dict:
    r"""Every policy's mean with its interval, and its paired difference from each baseline.

    Shape: ``curves``: policy -> :func:`per_prompt_curves` (every policy on the same P prompts) ``->``
    ``{"columns": [(label, kind, j)], "means": {policy: [(m, lo, hi)]}, "differences": {baseline: {policy:
    [(d, lo, hi)]}}}``, one triple per column: pass@k at each k, then best-of-(largest k) under the picker
    when every policy has a ``proxy`` curve. ``intervals=False``: lo and hi are NaN (too few prompts to
    resample).

    .. math:: \bar d_{\text{policy}} = \frac1P\sum_p \big(v_p^{\text{policy}} - v_p^{\text{baseline}}\big)

    ``ks``: the k of each curve column (as many as the curves have columns); ``baselines``: a sequence of
    policy names.

    A cell whose per-prompt values (or differences) are all equal has no bootstrap interval (every replicate
    is the same): its lo and hi are NaN and ``"no_spread"`` lists it, except a mean at a bound of
    ``bounds=(lo, hi)`` (the range every per-prompt value lies in, ``(0, 1)`` for rewards in [0, 1]), which
    gets the exact interval of :func:`bonft.estimate.bootstrap_ci` (Clopper & Pearson 1934).

    References: Efron & Tibshirani 1993, ch. 13 (the paired percentile bootstrap).
    """
    ks = _check_ks(ks)
    _check_curves("curves", curves, len(ks))
    baselines = _check_baselines(baselines)
    _check_interval_options(n_boot, seed, confidence)
    check_bool("intervals", intervals)
    bounds = _check_bounds(bounds)
    names = list(curves)
    _check_known(baselines, names)
    cols = [(f"pass@{k}", "pass", j) for j, k in enumerate(ks)]
    if all("proxy" in c for c in curves.values()):
        cols.append((f"best-of-{ks[-1]}", "proxy", len(ks) - 1))
    boot = dict(n_boot=n_boot, seed=seed, confidence=confidence)

    no_spread: list[str] = []

    def cell(where: str, a, b=None):
        if not intervals:
            return float(np.mean(a - (0 if b is None else b))), math.nan, math.nan
        d = a if b is None else a - b
        if not (d == d[0]).all():
            return paired_bootstrap(a, np.zeros_like(a) if b is None else b, **boot)
        if b is None and bounds is not None and d[0] in bounds:
            return bootstrap_ci(d, confidence=confidence, n_boot=1, seed=seed, bounds=bounds)
        no_spread.append(where)
        return float(d[0]), math.nan, math.nan

    means = {n: [cell(f"{n} {label}", curves[n][kind][:, j]) for label, kind, j in cols] for n in names}
    diffs = {base: {n: [cell(f"{n} - {base} {label}", curves[n][kind][:, j], curves[base][kind][:, j])
                        for label, kind, j in cols]
                    for n in names if n != base} for base in baselines if base in curves}
    return {"columns": cols, "means": means, "differences": diffs, "no_spread": no_spread}


def t_interval(values, *, confidence: float = 0.95) -> tuple[float, float, float]:
    r"""Mean over training seeds and its Student-t interval (``S - 1`` degrees of freedom; NaN bounds when S = 1).

    Shape: ``values (S,) -> (mean, lo, hi)``.

    .. math:: \bar v \pm t_{(1+c)/2,\,S-1}\, \frac{s_v}{\sqrt S}

    ``values``: finite, non-empty; ``confidence`` in (0, 1).

    References: Student 1908, "The probable error of a mean".
    """
    v = _check_values("values", values)
    confidence = check_fraction("confidence", confidence, open_low=True, open_high=True)
    from scipy import stats  # 0.7 s to import: only where a t-interval is taken, not on every import of bonft.estimate

    if len(v) < 2:
        return float(v.mean()), float("nan"), float("nan")
    half = stats.t.ppf(0.5 + confidence / 2, len(v) - 1) * v.std(ddof=1) / math.sqrt(len(v))
    return float(v.mean()), float(v.mean() - half), float(v.mean() + half)


def seed_comparison(per_seed, *, ks, baselines: Sequence[str], confidence: float = 0.95) -> dict:
    r"""Over training seeds: each policy's per-seed mean, their mean [t-interval], and paired per-seed differences.

    Shape: ``per_seed``: seed -> policy -> :func:`per_prompt_curves` (the same policies on every seed; each
    seed's policies on the same prompts) ``->`` :func:`paired_comparison`'s dict over seeds, plus ``"seeds"``
    and ``"per_seed"``: policy -> one list of column means per seed.

    .. math:: \bar d = \frac1S\sum_s \big(\bar v_s^{\text{policy}} - \bar v_s^{\text{baseline}}\big),
              \text{ with its Student-t interval over the } S \text{ seeds}

    Each seed has its own training runs (and, in the demo, its own warm start and data split), so the
    interval covers the training's noise as well as the evaluation's.

    ``per_seed`` must not be empty and every seed must hold the same policies.

    References: Student 1908 (the t-interval); the paired design as in :func:`paired_comparison`.
    """
    ks = _check_ks(ks)
    if not isinstance(per_seed, Mapping):
        raise TypeError(f"per_seed must be a dict of seed -> policy -> per_prompt_curves(...), got {type(per_seed).__name__}")
    if not per_seed:
        raise ValueError("per_seed must hold at least one seed, got an empty dict")
    seeds = list(per_seed)
    for s in seeds:
        _check_curves(f"per_seed[{s!r}]", per_seed[s], len(ks))
        if set(per_seed[s]) != set(per_seed[seeds[0]]):
            raise ValueError(f"per_seed[{s!r}] must hold the same policies as per_seed[{seeds[0]!r}] "
                             f"{sorted(map(str, per_seed[seeds[0]]))}, got {sorted(map(str, per_seed[s]))}")
    baselines = _check_baselines(baselines)
    check_fraction("confidence", confidence, open_low=True, open_high=True)
    names = list(per_seed[seeds[0]])
    _check_known(baselines, names)
    cols = [(f"pass@{k}", "pass", j) for j, k in enumerate(ks)]
    if all("proxy" in c for s in seeds for c in per_seed[s].values()):
        cols.append((f"best-of-{ks[-1]}", "proxy", len(ks) - 1))
    mean = {(s, n, kind, j): float(per_seed[s][n][kind][:, j].mean()) for s in seeds for n in names for _, kind, j in cols}
    means = {n: [t_interval([mean[s, n, kind, j] for s in seeds], confidence=confidence) for _, kind, j in cols]
             for n in names}
    diffs = {base: {n: [t_interval([mean[s, n, kind, j] - mean[s, base, kind, j] for s in seeds], confidence=confidence)
                        for _, kind, j in cols] for n in names if n != base} for base in baselines if base in names}
    per = {n: [[mean[s, n, kind, j] for _, kind, j in cols] for s in seeds] for n in names}
    return {"columns": cols, "means": means, "differences": diffs, "seeds": seeds, "per_seed": per}


def format_interval(m: float, lo: float, hi: float, *, signed: bool = False) -> str:
    """``0.164 [0.140, 0.189]`` (``signed``: ``+0.020 [-0.005, +0.047]``, `` *`` when the interval excludes 0); the
    mean alone when there is no interval (NaN bounds)."""
    f = "{:+.3f}" if signed else "{:.3f}"
    if math.isnan(lo):
        return f.format(m)
    mark = " *" if signed and (lo > 0 or hi < 0) else ""
    return f"{f.format(m)} [{f.format(lo)}, {f.format(hi)}]{mark}"


def paired_table(comparison, *, n_prompts: int = 0, labels: Mapping[str, str] | None = None, picker: str = "proxy",
                 confidence: float = 0.95, caption: str = "") -> str:
    """Markdown of :func:`paired_comparison` (over the ``n_prompts`` prompts) or of :func:`seed_comparison` (over
    seeds, then a table of every seed's pass@1 / pass@K / best-of-K): the means, then one table of paired
    differences per baseline.

    labels: policy -> the name a row shows (default: the policy's own); picker: the verifier named in the
    best-of-k column; caption: a line under every table's title (e.g. which verifier trains, which evaluates).
    """
    labels = labels or {}
    cols = comparison["columns"]
    heads = [f"{picker} {label}" if kind == "proxy" else label for label, kind, _ in cols]
    seeds = comparison.get("seeds")
    pct = confidence_label(confidence)[:-1]

    def head(title: str, columns=heads) -> list[str]:
        return [title, *([caption] if caption else []), "", "| policy | " + " | ".join(columns) + " |",
                "|---" * (len(columns) + 1) + "|"]

    if seeds is None:
        lines = head(f"Mean over {n_prompts} held-out prompts [{pct}% bootstrap CI over prompts]")
    else:
        lines = head(f"Mean over {len(seeds)} seeds (seeds {', '.join(map(str, seeds))}) [{pct}% Student-t interval over seeds]")
    for name, cells in comparison["means"].items():
        lines.append(f"| {labels.get(name, name)} | " + " | ".join(format_interval(*c) for c in cells) + " |")
    for base, rows in comparison["differences"].items():
        how = "(same prompts; * = interval excludes 0)" if seeds is None else ", per seed then over seeds (* = interval excludes 0)"
        lines += [""] + head(f"Paired difference from {labels.get(base, base)}{' ' if seeds is None else ''}{how}")
        for name, cells in rows.items():
            lines.append(f"| {labels.get(name, name)} | " + " | ".join(format_interval(*c, signed=True) for c in cells) + " |")
    if comparison.get("no_spread"):
        lines += ["", "no interval for " + ", ".join(comparison["no_spread"]) + ": every prompt has the same value (or "
                  "difference), so every bootstrap replicate does too (see docs/estimate.md)"]
    if seeds is not None:  # every seed's pass@1 / pass@K (/ best-of-K): the spread the interval summarises
        last = [0, len([c for c in cols if c[1] == "pass"]) - 1] + ([len(cols) - 1] if cols[-1][1] == "proxy" else [])
        what = " / ".join(heads[j] for j in last)
        lines += ["", f"Per seed ({what})", *([caption] if caption else []), "",
                  "| policy | " + " | ".join(f"seed {s}" for s in seeds) + " |", "|---" * (len(seeds) + 1) + "|"]
        for name, per in comparison["per_seed"].items():
            lines.append(f"| {labels.get(name, name)} | " + " | ".join(" / ".join(f"{row[j]:.3f}" for j in last) for row in per)
                         + " |")
    return "\n".join(lines)
