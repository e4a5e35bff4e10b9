"""Choose a sampling temperature and N: a temperature x k sweep and a budget planner.

Temperature and N interact. A low temperature spends samples on duplicates, a
high one on noise, and the temperature that serves best-of-k best moves with k.
The planner measures this instead of assuming it. For every temperature T in a
grid and every k <= n it gives the best-of-k value

    V_k(T) = E[ reward of the sample with the highest verifier score among k draws at T ]

(from sample pools: the unbiased U-statistic of :func:`bonft.estimate.best_of_k_per_prompt`,
averaged over prompts, with a bootstrap CI over prompts; from a finite outcome
set: the closed form of :func:`bonft.bon.best_of_k_value`), then for each k the best
temperature and the temperatures not significantly worse, the best (T, k) pair
for a budget of samples or of generated tokens per prompt, the gain of one more
sample and of doubling N, and a fit of how the best temperature moves with k.

References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
Sampling in LLMs" (best-of-N value and its dependence on temperature and N);
Chen et al. 2021 (unbiased pass@k, the binary-reward special case).

Caution: best-of-N picks whatever the verifier scores highly. A temperature
that "wins" with a gameable verifier may win by finding its loopholes
(reward hacking); plan on the true reward where you have it, and look at the
verifier's gap (``bonft estimate`` shows pass@k beside best-of-k).

Entry points: :func:`plan_samples` (a samples file read with
:func:`bonft.io.read_samples`), :func:`plan_pools` (arrays per
temperature), :func:`plan_exact` (a finite outcome set) and
:func:`bonft.plan.from_model.plan_model` (draw from a model through
:mod:`bonft.generation.sampling`, cached on disk).
"""
from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from bonft._core.bootstrap import no_interval_columns
from bonft._core.checks import (
    MAX_POOL,
    MIN_BOOT,
    as_float_array,
    check_bound,
    check_finite,
    check_fraction,
    check_int,
    check_n_boot,
    check_positive,
    check_probs,
    check_real,
    check_seed,
)
from bonft.estimate import MIN_BOOT_PROMPTS, best_of_k_per_prompt, bootstrap_ci, reward_bounds
from bonft.io import group_pools, same_temperature, temperature_label, temperatures_of
from bonft.plan.decisions import MAX_BOOT_CELLS, bootstrap_means, finish, fit_best_temperature
from bonft.plan.result import BudgetChoice, DoublingStep, PlanResult, TemperatureFit

__all__ = [
    "Pools",
    "PlanResult",
    "BudgetChoice",
    "DoublingStep",
    "TemperatureFit",
    "plan_pools",
    "plan_samples",
    "plan_exact",
    "fit_best_temperature",
]


@dataclass
class Pools:
    """Sample pools drawn at one temperature.

    scores:      (P, n) array, or a list of P 1-D arrays (ragged pools), verifier scores.
    rewards:     same layout as ``scores``, true rewards.
    prompt_keys:  (P,) prompt keys, or None: row i is prompt i, the same prompts in the
                 same order at every temperature.
    mean_tokens: mean generated tokens per response at this temperature (for token
                 budgets), or None when unknown.
    """

    scores: Any
    rewards: Any
    prompt_keys: Any = None
    mean_tokens: float | None = None


# --------------------------------------------------------------------------- validation


def _check_temperatures(temperatures: Any) -> np.ndarray:
    if isinstance(temperatures, (str, bytes)) or isinstance(temperatures, numbers.Number):
        raise TypeError(f"temperatures must be a sequence of numbers, got {type(temperatures).__name__} {temperatures!r}")
    temps = [check_positive("temperature", t) for t in list(temperatures)]
    if not temps:
        raise ValueError("temperatures must hold at least one temperature, got an empty grid")
    if len(set(temps)) != len(temps):
        raise ValueError(f"temperatures must be distinct, got {temps}")
    return np.asarray(temps, dtype=np.float64)


def _check_boot_table(n_boot: int, n_temps: int, max_k: int) -> None:
    """The bootstrap table (n_boot, T, K) is held in memory at once: at most MAX_BOOT_CELLS entries."""
    cells = n_boot * n_temps * max_k
    if cells > MAX_BOOT_CELLS:
        raise ValueError(
            f"n_boot x temperatures x max_k must be <= {MAX_BOOT_CELLS:,} (the bootstrap table of every resample, "
            f"temperature and k is held in memory at once, 1 GiB of float64), got {n_boot:,} x {n_temps} x {max_k} "
            f"= {cells:,}; lower n_boot or max_k")


def _check_max_k(max_k: Any) -> int:
    return check_bound("max_k", max_k, max=MAX_POOL, why="one value per k is computed, tabulated and bootstrapped")


def _check_budgets(name: str, budgets: Any, *, integer: bool) -> list:
    if budgets is None:
        return []
    items = list(budgets) if isinstance(budgets, (list, tuple, np.ndarray)) else [budgets]
    out = [check_int(name, b, min=1) for b in items] if integer else [check_positive(name, b) for b in items]
    repeated = sorted({b for b in out if out.count(b) > 1})
    if repeated:
        raise ValueError(f"{name} must not repeat a budget (each is one choice of the plan), got {out} "
                         f"({repeated[0]:g} more than once)")
    return out


PLAN_OPTIONS = ("max_k", "budget_samples", "budget_tokens", "confidence", "n_boot", "seed", "min_gain")


def check_plan_options(*, max_k: Any = None, budget_samples: Any = None, budget_tokens: Any = None,
                       confidence: Any = 0.95, n_boot: Any = 2000, seed: Any = 0, min_gain: Any = 0.0) -> None:
    """The planner's options on their own, before any data is read or sampled (:func:`plan_pools` checks them again)."""
    check_fraction("confidence", confidence, open_low=True, open_high=True)
    check_n_boot(n_boot, min=MIN_BOOT)
    check_seed(seed)
    check_real("min_gain", min_gain)
    if max_k is not None:
        _check_max_k(max_k)
    _check_budgets("budget_samples", budget_samples, integer=True)
    _check_budgets("budget_tokens", budget_tokens, integer=False)


def _pool_sizes(scores: Any) -> np.ndarray:
    if isinstance(scores, np.ndarray) and scores.ndim == 2:
        return np.full(scores.shape[0], scores.shape[1], dtype=np.int64)
    return np.asarray([np.asarray(s).reshape(-1).shape[0] for s in scores], dtype=np.int64)


def _as_pool_layout(name: str, x: Any) -> Any:
    """A 2-D float array stays an array; a ragged list becomes a list of 1-D float arrays."""
    if isinstance(x, np.ndarray) or not isinstance(x, (list, tuple)):
        arr = as_float_array(name, x, ndim=2)
        check_finite(name, arr)
        return arr
    rows = [as_float_array(f"{name}[{i}]", r, ndim=1) for i, r in enumerate(x)]
    for i, r in enumerate(rows):
        check_finite(f"{name}[{i}]", r)
    return rows


def _check_mean_tokens(temps: np.ndarray, items: list, wanted: bool) -> np.ndarray | None:
    """Mean response length per temperature: at every temperature (each finite, > 0) or at none."""
    have = [f"{t:g}" for t, p in zip(temps, items) if p.mean_tokens is not None]
    missing = [f"{t:g}" for t, p in zip(temps, items) if p.mean_tokens is None]
    if wanted and missing:
        raise ValueError(f"budget_tokens needs the mean response length at every temperature, missing at {missing} (n_tokens)")
    if have and missing:
        raise ValueError(f"mean_tokens must be given at every temperature or at none, got it at {have} but not at {missing}")
    if not have:
        return None
    return np.asarray([check_positive(f"mean_tokens (temperature {t:g})", p.mean_tokens) for t, p in zip(temps, items)])


def _check_lengths(lengths: Any, P: int, V: int) -> np.ndarray:
    """Tokens per outcome: finite, > 0, broadcast against (P, V)."""
    lens = as_float_array("lengths", lengths)
    check_finite("lengths", lens)
    if (lens <= 0).any():
        raise ValueError(f"lengths must be > 0 tokens, got min {float(lens.min())}")
    try:
        return np.broadcast_to(lens, (P, V))
    except ValueError:
        raise ValueError(f"lengths must broadcast against ({P}, {V}) outcomes (tokens per outcome), got shape "
                         f"{tuple(lens.shape)}") from None


def _check_tempered(base: np.ndarray, temps: np.ndarray, *, logits: bool) -> None:
    """Each row's largest logits / temperature (log(probs) / temperature) must stay finite in float64."""
    top = base.max(axis=-1) if logits else np.log(base.max(axis=-1))  # probs: the largest is > 0 (rows sum to 1)
    what, one = ("logits", "logit") if logits else ("log(probs)", "log(prob)")
    for t in temps:
        with np.errstate(over="ignore"):
            bad = ~np.isfinite(top / t)
        if bad.any():
            raise ValueError(f"temperatures must keep {what} / temperature finite in float64 (|value| <= 1.8e308), got "
                             f"temperature {float(t)!r} with a row's largest {one} {float(top[bad][0]):g}: raise the "
                             f"temperature")


# --------------------------------------------------------------------------- sample pools


def plan_pools(
    pools: Mapping[float, Pools],
    *,
    max_k: int | None = None,
    budget_samples: int | Sequence[int] | None = None,
    budget_tokens: float | Sequence[float] | None = None,
    confidence: float = 0.95,
    n_boot: int = 2000,
    seed: int = 0,
    min_gain: float = 0.0,
) -> PlanResult:
    """Sweep best-of-k value over (temperature, k) from sample pools, with bootstrap CIs.

    pools: {temperature: Pools}; at temperature t, scores/rewards (P_t, n_t) -> value (T, K), K = max_k.

    V_k(T) = mean over prompts of the unbiased best-of-k U-statistic (all k-subsets
    of each pool, ties shared; :func:`bonft.estimate.best_of_k_per_prompt`).
    CIs: percentile bootstrap over prompts. When every temperature holds the same
    prompts the resampling is paired (one draw of prompts for all temperatures), so
    differences between temperatures are tested on the same prompts; otherwise each
    temperature is resampled on its own.

    max_k:          largest k (default: the smallest pool over all temperatures and prompts).
    budget_samples: samples per prompt; picks the best (T, k) with k <= budget (a repeated budget is an error).
    budget_tokens:  generated tokens per prompt (a repeated budget is an error); picks the best (T, k) with
                    k * mean_tokens(T) <= budget (needs ``Pools.mean_tokens``, which is given at
                    every temperature or at none).
    min_gain:       doubling N "stops paying" at the first k where the gain
                    V_2k - V_k is not significantly above ``min_gain``.

    Reference: Chow et al. 2024 (best-of-N value), Chen et al. 2021 (unbiased estimators).
    """
    if not isinstance(pools, Mapping):
        raise TypeError(f"pools must be a mapping {{temperature: Pools}}, got {type(pools).__name__}")
    temps = _check_temperatures(list(pools.keys()))
    items = list(pools.values())
    for t, p in zip(temps, items):
        if not isinstance(p, Pools):
            raise TypeError(f"pools[{t:g}] must be a Pools, got {type(p).__name__}")
    confidence = check_fraction("confidence", confidence, open_low=True, open_high=True)
    n_boot = check_n_boot(n_boot, min=MIN_BOOT)
    seed = check_seed(seed)
    min_gain = check_real("min_gain", min_gain)
    if max_k is not None:
        _check_boot_table(n_boot, len(temps), _check_max_k(max_k))
    b_samples = _check_budgets("budget_samples", budget_samples, integer=True)
    b_tokens = _check_budgets("budget_tokens", budget_tokens, integer=False)

    scores_l, rewards_l, keys_l, n_min, short = [], [], [], [], []  # short: (smallest pool's key, median size)
    for t, p in zip(temps, items):
        s = _as_pool_layout(f"scores (temperature {t:g})", p.scores)
        r = _as_pool_layout(f"rewards (temperature {t:g})", p.rewards)
        ns, nr = _pool_sizes(s), _pool_sizes(r)
        if ns.shape != nr.shape or (ns != nr).any():
            raise ValueError(f"rewards must have the same pool sizes as scores at temperature {t:g}")
        if ns.size == 0:
            raise ValueError(f"pools at temperature {t:g} must hold at least one prompt, got none")
        if ns.min() < 1:
            raise ValueError(f"every pool must hold at least one sample, got an empty pool at temperature {t:g}")
        keys = np.arange(ns.size) if p.prompt_keys is None else np.asarray(p.prompt_keys).astype(str)
        if keys.ndim != 1:
            raise ValueError(f"prompt_keys must be a 1-D sequence of {ns.size} keys at temperature {t:g}, got shape "
                             f"{keys.shape}")
        if keys.shape[0] != ns.size:
            raise ValueError(f"prompt_keys must have {ns.size} entries at temperature {t:g}, got {keys.shape[0]}")
        if np.unique(keys).size != keys.size:
            raise ValueError(f"prompt_keys must be distinct at temperature {t:g}")
        scores_l.append(s), rewards_l.append(r), keys_l.append(keys), n_min.append(int(ns.min()))
        short.append((str(keys[int(np.argmin(ns))]), int(np.median(ns))))
    n_min = np.asarray(n_min, dtype=np.int64)
    k_cap = int(n_min.min())
    i_small = int(np.argmin(n_min))
    where = f"prompt {short[i_small][0]!r} at temperature {temps[i_small]:g}"  # the pool that caps k
    capped = []
    if max_k is None:
        max_k = k_cap
        if k_cap < short[i_small][1]:  # one short pool caps k for every prompt: say which
            capped = [f"k stops at {k_cap}, the smallest pool ({where}); the median pool there holds "
                      f"{short[i_small][1]} samples: leave that prompt out to measure larger k"]
    max_k = _check_max_k(max_k)
    if max_k > k_cap:
        raise ValueError(f"max_k must be <= the smallest pool at every temperature (n={k_cap}: {where}), got max_k={max_k}")
    mean_tokens = _check_mean_tokens(temps, items, bool(b_tokens))
    _check_boot_table(n_boot, len(temps), max_k)

    ks = np.arange(1, max_k + 1)
    per_prompt = []  # T arrays of (P_t, K)
    for t, s, r in zip(temps, scores_l, rewards_l):
        per_prompt.append(np.asarray(best_of_k_per_prompt(s, r, ks=ks), dtype=np.float64))

    # paired when all temperatures hold the same prompt set: align rows by key
    paired = all(k.shape == keys_l[0].shape and set(k.tolist()) == set(keys_l[0].tolist()) for k in keys_l)
    if paired:
        order = [np.argsort(k, kind="stable") for k in keys_l]
        per_prompt = [v[o] for v, o in zip(per_prompt, order)]
    boot = bootstrap_means(per_prompt, paired=paired, n_boot=n_boot, seed=seed)  # (B, T, K)
    value = np.stack([_mean(v, axis=0) for v in per_prompt])  # (T, K)
    alpha = 1.0 - confidence
    lo, hi = np.quantile(boot, [alpha / 2, 1 - alpha / 2], axis=0)  # (T, K) each
    bounds = reward_bounds([x for r in rewards_l for x in (r if isinstance(r, list) else [r])])
    if bounds is not None:
        # with rewards in [0, 1], a column where every prompt scores 0 (or 1) has a zero-width percentile interval:
        # bootstrap_ci's exact interval for such a column (Clopper & Pearson 1934) instead; the decisions use `boot`
        for t, v in enumerate(per_prompt):
            cols = np.flatnonzero((v == v[:1]).all(axis=0) & np.isin(v[0], bounds))
            if cols.size:
                _, lo[t, cols], hi[t, cols] = bootstrap_ci(v[:, cols], confidence=confidence, n_boot=10, seed=seed,
                                                          bounds=bounds)
    # any other column where every prompt has the same value has no interval (as in bonft estimate)
    no_interval = np.stack([no_interval_columns(v, bounds) for v in per_prompt])
    testable = min(v.shape[0] for v in per_prompt) >= MIN_BOOT_PROMPTS
    if not testable:  # too few prompts for a bootstrap over prompts: no interval (PlanResult.intervals_valid false)
        lo, hi = np.full_like(value, np.nan), np.full_like(value, np.nan)
    return finish(
        mode="samples",
        temps=temps,
        ks=ks,
        value=value,
        lo=lo,
        hi=hi,
        boot=boot if testable else None,  # too few prompts: no tests
        confidence=confidence,
        n_boot=n_boot,
        paired=paired,
        n_prompts=np.asarray([v.shape[0] for v in per_prompt]),
        smallest_pool=n_min,
        mean_tokens=mean_tokens,
        b_samples=b_samples,
        b_tokens=b_tokens,
        min_gain=min_gain,
        notes=capped + ([] if paired else ["prompt sets differ between temperatures: each temperature resampled on its own "
                                           "(unpaired)"]),
        no_interval=no_interval,
    )


def plan_samples(
    table: Any,
    *,
    temperatures: Sequence[float] | None = None,
    max_k: int | None = None,
    budget_samples: int | Sequence[int] | None = None,
    budget_tokens: float | Sequence[float] | None = None,
    confidence: float = 0.95,
    n_boot: int = 2000,
    seed: int = 0,
    min_gain: float = 0.0,
) -> PlanResult:
    """Plan from a :class:`bonft.io.SampleTable` with a temperature column.

    table: rows (prompt_id, score, reward, temperature[, n_tokens]) -> see :func:`plan_pools`.
    temperatures: a subset of the temperatures in the table (default: all of them); two that select the same
        pool (equal as float32, as 0.5 and 0.50000001) are an error.
    Mean response length per temperature comes from the ``n_tokens`` column when present.
    """
    check_n_boot(n_boot, min=MIN_BOOT), check_seed(seed)  # the knobs before any work (plan_pools checks them all again)
    if max_k is not None:
        _check_max_k(max_k)
    if getattr(table, "temperatures", None) is None:
        raise ValueError("table must have a temperature column (temperature_field) to plan over temperatures, got none")
    present = [float(t) for t in temperatures_of(table)]
    if temperatures is None:
        temperatures = present
    temps = _check_temperatures(temperatures)
    pools, taken = {}, {}  # taken: the file's temperature -> the one asked for that selected it
    for t in temps:
        match = [p for p in present if same_temperature(p, t)]
        if not match:
            raise ValueError(f"temperatures must be in the samples file (present: "
                             f"{', '.join(temperature_label(p) for p in present)}), got {temperature_label(t)}")
        if match[0] in taken:
            raise ValueError(f"temperatures must select distinct pools, got {taken[match[0]]!r} and {float(t)!r}, both "
                             f"the file's {temperature_label(match[0])} (equal as float32)")
        taken[match[0]] = float(t)
        keys, s_pools, r_pools = group_pools(table, temperature=match[0])
        mean_tokens = None
        if getattr(table, "n_tokens", None) is not None:
            at_t = same_temperature(table.temperatures, match[0])
            toks = np.asarray(table.n_tokens, dtype=np.float64)[at_t]
            if toks.size and np.isfinite(toks).all() and toks.mean() > 0:
                mean_tokens = float(toks.mean())
        sizes = {len(x) for x in s_pools}
        if len(sizes) == 1:  # equal pools: one (P, n) array takes the estimator's fast 2-D path
            s_pools, r_pools = np.stack(s_pools), np.stack(r_pools)
        else:
            s_pools, r_pools = list(s_pools), list(r_pools)
        pools[float(t)] = Pools(s_pools, r_pools, prompt_keys=np.asarray(keys), mean_tokens=mean_tokens)
    if budget_tokens is None and any(p.mean_tokens is None for p in pools.values()):
        for p in pools.values():  # a length known at some temperatures only is not shown (no budget reads it)
            p.mean_tokens = None
    return plan_pools(
        pools,
        max_k=max_k,
        budget_samples=budget_samples,
        budget_tokens=budget_tokens,
        confidence=confidence,
        n_boot=n_boot,
        seed=seed,
        min_gain=min_gain,
    )


# --------------------------------------------------------------------------- exact mode


def _mean(v: np.ndarray, axis=None):
    """The mean of per-prompt values; near float64's edge at 2^-64 scale (exact), where their sum would overflow."""
    if float(np.abs(v).max()) > 2.0**1000:
        return np.mean(v * 2.0**-64, axis=axis) * 2.0**64
    return np.mean(v, axis=axis)


def plan_exact(
    *,
    scores: Any,
    rewards: Any,
    temperatures: Sequence[float],
    logits: Any = None,
    probs: Any = None,
    max_k: int = 64,
    lengths: Any = None,
    budget_samples: int | Sequence[int] | None = None,
    budget_tokens: float | Sequence[float] | None = None,
    min_gain: float = 0.0,
) -> PlanResult:
    """Closed-form sweep on a finite outcome set: V_k(T) for the policy softmax(logits / T).

    logits or probs: (V,) or (P, V) over outcomes (P prompts averaged with equal weight);
    probs p are tempered as p^(1/T) / sum p^(1/T) (= softmax(log p / T)); a temperature at which a row's
    largest logit (log p) / T leaves float64 is an error.
    scores, rewards: broadcast against (P, V). lengths: tokens per outcome, for token budgets.
    -> value (T, K), K = max_k, no CIs (exact).

    V_k(T) = sum_v pi_bon,T(v) r_v, pi_bon from :func:`bonft.bon.best_of_k_value` (ties broken
    uniformly among the tied top samples). Reference: Chow et al. 2024.
    """
    from bonft.bon import best_of_k_value, softmax_policy  # bonft.bon loads torch: only exact mode needs it

    temps = _check_temperatures(temperatures)
    if (logits is None) == (probs is None):
        raise ValueError("plan_exact needs exactly one of logits or probs, got " + ("both" if logits is not None else "neither"))
    max_k = _check_max_k(max_k)
    b_samples = _check_budgets("budget_samples", budget_samples, integer=True)
    b_tokens = _check_budgets("budget_tokens", budget_tokens, integer=False)
    if logits is not None:
        base = as_float_array("logits", logits, ndim=(1, 2))
        check_finite("logits", base)
    else:
        base = as_float_array("probs", probs, ndim=(1, 2))
        check_probs("probs", base)
    base = base.reshape(-1, base.shape[-1])  # (V,) -> (1, V); (P, V) stays
    P, V = base.shape
    s = as_float_array("scores", scores)
    r = as_float_array("rewards", rewards)
    check_finite("scores", s), check_finite("rewards", r)
    for name, x in (("scores", s), ("rewards", r)):
        try:
            np.broadcast_to(x, (P, V))
        except ValueError:
            raise ValueError(f"{name} must broadcast against ({P}, {V}) outcomes, got shape {tuple(x.shape)}") from None
    s_b, r_b = np.broadcast_to(s, (P, V)).copy(), np.broadcast_to(r, (P, V)).copy()
    _check_tempered(base, temps, logits=logits is not None)
    lens = None if lengths is None else _check_lengths(lengths, P, V)
    if b_tokens and lens is None:
        raise ValueError("budget_tokens needs lengths (tokens per outcome) in exact mode, got lengths=None")

    ks = np.arange(1, max_k + 1)
    value = np.empty((temps.size, ks.size))
    mean_tokens = None if lens is None else np.empty(temps.size)
    for i, t in enumerate(temps):
        if logits is not None:
            p_t = np.asarray(softmax_policy(base, temperature=float(t)), dtype=np.float64)
        else:
            with np.errstate(divide="ignore"):
                z = np.log(base) / t  # zero-probability outcomes stay at -inf
            z = z - z.max(axis=-1, keepdims=True)
            p_t = np.exp(z) / np.exp(z).sum(axis=-1, keepdims=True)
        for j, k in enumerate(ks):
            value[i, j] = float(_mean(np.asarray(best_of_k_value(p_t, s_b, r_b, k=int(k)))))
        if lens is not None:
            mean_tokens[i] = float(np.mean((p_t * lens).sum(-1)))
    return finish(
        mode="exact",
        temps=temps,
        ks=ks,
        value=value,
        lo=value.copy(),
        hi=value.copy(),
        boot=None,
        confidence=None,
        n_boot=0,
        paired=True,
        n_prompts=np.full(temps.size, P),
        smallest_pool=None,
        mean_tokens=mean_tokens,
        b_samples=b_samples,
        b_tokens=b_tokens,
        min_gain=check_real("min_gain", min_gain),
        notes=[],
    )
