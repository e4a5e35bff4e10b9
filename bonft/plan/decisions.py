"""Decisions drawn from a (temperature, k) value grid: best temperature, budgets, doubling, the T*(k) fit.

Shared by the sampling and exact modes of :mod:`bonft.plan.sweep`; inputs are trusted (validated there),
except those of the public :func:`fit_best_temperature`.
"""
from __future__ import annotations

import math
import sys
from typing import Any

import numpy as np

from bonft._core.bootstrap import resample_counts
from bonft._core.checks import as_float_array, check_finite, check_ks
from bonft.plan.result import BudgetChoice, DoublingStep, PlanResult, TemperatureFit

BLOCK_CELLS = 4_000_000  # entries of one block of resampling counts (as bonft.estimate.bootstrap_ci)
MAX_BOOT_CELLS = 2**27  # entries of the (n_boot, temperatures, k) bootstrap table: 1 GiB of float64
# a doubling gain whose lower bound is within ROUNDING x (the grid's spread of V) + ULPS float64 ulps of its largest
# |V| of min_gain is rounding, not a gain: the values are computed from each pool's minimum reward up
# (bonft._core.ustat), so their error scales with the rewards' spread, plus a few ulps of their size (rewards of
# 1e6 + {0, 1e-7}: a real gain of 2.5e-8 is above it, a V_2 - V_1 of one ulp at 0.6 is not)
ROUNDING = 1e-12
ULPS = 8
# the fewest resamples expected in the tail a percentile test reads (a share alpha/2 of n_boot, alpha Bonferroni-
# adjusted): with fewer, whether a gap is "significant" turns on a handful of resamples (none at all below 1/n_boot),
# the test turns liberal and the confidence stops taking effect (a seeded check: 6 temperatures x 32 k at
# n_boot=20 left a truly best cell out of a budget's list in 58% of runs). 10 is common practice, no single source
MIN_TAIL = 10


def n_boot_needed(alpha: float, n_boot: int) -> int | None:
    """The n_boot that puts MIN_TAIL resamples in a two-sided test's tail share alpha/2, or None when n_boot does."""
    need = math.ceil(2 * MIN_TAIL / alpha - 1e-9)
    return need if n_boot < need else None


def bootstrap_means(per_prompt: list[np.ndarray], *, paired: bool, n_boot: int, seed: int) -> np.ndarray:
    """Bootstrap means over prompts: T arrays (P_t, K) -> (n_boot, T, K).

    Resampling as a count matrix W (n_boot, P), W[b, i] = times prompt i is drawn in
    resample b, so one matmul W @ X / P gives every resample's mean of every column. W is
    drawn in blocks of at most ``BLOCK_CELLS`` entries (one block when n_boot x P fits), so
    its memory does not grow with n_boot; the (n_boot, T, K) result does (bounded by the caller).
    """
    rng = np.random.default_rng(seed)
    T, K = len(per_prompt), per_prompt[0].shape[1]
    if max(float(np.abs(v).max()) for v in per_prompt) > 2.0**1000:  # near float64's edge the sums would overflow
        out = bootstrap_means([v * 2.0**-64 for v in per_prompt], paired=paired, n_boot=n_boot, seed=seed)
        out *= 2.0**64  # powers of two: exact
        return out

    def means(X: np.ndarray, out: np.ndarray) -> None:
        """out (B, C) = resampled column means of X (P, C), block by block."""
        P = X.shape[0]
        step = max(1, min(n_boot, BLOCK_CELLS // P))
        for b0 in range(0, n_boot, step):
            b = min(step, n_boot - b0)
            out[b0 : b0 + b] = resample_counts(rng, P, b) @ X / P  # (b, P) times each prompt is drawn

    out = np.empty((n_boot, T, K))
    if paired:
        P = per_prompt[0].shape[0]
        means(np.stack(per_prompt, axis=1).reshape(P, T * K), out.reshape(n_boot, T * K))  # (P, T, K) -> (P, T*K)
        return out
    for t, v in enumerate(per_prompt):
        block = np.empty((n_boot, K))
        means(v, block)
        out[:, t, :] = block
    return out


def not_worse(diff: np.ndarray, alpha: float) -> np.ndarray:
    """Percentile-bootstrap test of a gap: diff (B, ...) resampled "best minus this" -> (...) bool.

    True (not significantly worse) unless fewer than a share alpha/2 of the resampled gaps
    are <= 0, i.e. unless the two-sided (1 - alpha) percentile interval of the gap lies above 0.
    A count instead of a quantile: same decision, no sort.
    """
    return (diff <= 0.0).mean(axis=0) >= alpha / 2


def isotonic(y: np.ndarray) -> np.ndarray:
    """Least-squares non-decreasing fit of y (K,) -> (K,) by pool-adjacent-violators (equal weights)."""
    blocks: list[list[float]] = []  # [sum, count] of each pooled block, left to right
    for v in np.asarray(y, dtype=np.float64):
        blocks.append([float(v), 1.0])
        while len(blocks) > 1 and blocks[-2][0] / blocks[-2][1] > blocks[-1][0] / blocks[-1][1]:
            s, c = blocks.pop()
            blocks[-1][0] += s
            blocks[-1][1] += c
    return np.concatenate([np.full(int(c), s / c) for s, c in blocks])


def finish(*, mode, temps, ks, value, lo, hi, boot, confidence, n_boot, paired, n_prompts, smallest_pool, mean_tokens,
            b_samples, b_tokens, min_gain, notes, no_interval=None) -> PlanResult:
    T, K = value.shape
    best_index = np.argmax(value, axis=0)  # (K,) first maximum, i.e. the lowest such temperature
    cols = np.arange(K)
    marks_need = None
    if boot is None:
        near = value >= value[best_index, cols][None, :] - 1e-12  # exact (or too few prompts to test): only ties
    else:
        # the best temperature is picked from the same data as the gaps: each of the T - 1 comparisons at a k is made
        # at level alpha / (T - 1) (Bonferroni; Dunn 1961), so the truly best temperature is marked worse with
        # probability <= alpha whichever temperature the data picked
        alpha = (1.0 - confidence) / max(T - 1, 1)
        diff = boot[:, best_index, cols][:, None, :] - boot  # (B, T, K): best minus each temperature, paired draws
        near = not_worse(diff, alpha)
        marks_need = n_boot_needed(alpha, n_boot) if T > 1 else None
        if marks_need is not None:
            notes = list(notes) + [
                f"the ~ marks test each of {T - 1} comparison{'s' if T > 2 else ''} in a tail of {alpha / 2:.2g} of the resamples "
                f"({alpha / 2 * n_boot:.2g} expected of {n_boot}, fewer than {MIN_TAIL}): they do not deliver the stated "
                f"{confidence:g} confidence (too few temperatures marked ~); n_boot >= {marks_need:,} does"
                + _table_bound(marks_need, T, K)]

    def cell_gap(t1, k1, t0, k0):  # V(t1, k1) - V(t0, k0) with its CI
        g = float(value[t1, k1 - 1] - value[t0, k0 - 1])
        if boot is None:  # exact: the gain is exact; too few prompts: no interval
            return (g, g, g) if mode == "exact" else (g, float("nan"), float("nan"))
        d = boot[:, t1, k1 - 1] - boot[:, t0, k0 - 1]
        q = np.quantile(d, [(1 - confidence) / 2, 1 - (1 - confidence) / 2])
        return g, float(q[0]), float(q[1])

    budgets = []
    for b in b_samples:
        mask = np.broadcast_to(ks[None, :] <= b, (T, K))
        note = None if b <= ks[-1] else f"budget exceeds the largest measured k ({ks[-1]}): choice limited to k <= {ks[-1]}"
        budgets.append(_choose(value, lo, hi, boot, confidence, mask, ks, temps, np.broadcast_to(ks * 1.0, (T, K)),
                               kind="samples", budget=b, note=note))
    for b in b_tokens:
        cost = mean_tokens[:, None] * ks[None, :]  # (T, K) tokens per prompt
        mask = cost <= b
        if not mask.any():
            raise ValueError(
                f"budget_tokens must afford one sample at some temperature (shortest mean length "
                f"{mean_tokens.min():.1f} tokens), got budget_tokens={b:g}"
            )
        note = None if (mask[:, -1] == False).all() else "budget affords the largest measured k at some temperature: larger N not measured"  # noqa: E712
        budgets.append(_choose(value, lo, hi, boot, confidence, mask, ks, temps, cost, kind="tokens", budget=b, note=note))

    doubling = []
    rounding = (ROUNDING * float(np.ptp(value)) + ULPS * np.finfo(float).eps * float(np.abs(value).max()))
    k = 1
    while 2 * k <= K:
        t0, t1 = int(best_index[k - 1]), int(best_index[2 * k - 1])
        g, glo, ghi = cell_gap(t1, 2 * k, t0, k)
        pays = (glo if boot is not None else g) > min_gain + rounding
        doubling.append(DoublingStep(k=k, temperature_k=float(temps[t0]), temperature_2k=float(temps[t1]), gain=g, lo=glo,
                                     hi=ghi, pays=bool(pays)))
        k *= 2
    # doubling stops paying after the last step that pays: from there on no step is (significantly) above min_gain
    paying = [i for i, d in enumerate(doubling) if d.pays]
    after = paying[-1] + 1 if paying else 0
    stops = doubling[after].k if after < len(doubling) else None

    for c in budgets:
        if c.n_boot_needed is not None:
            notes = list(notes) + [
                f"budget {c.budget:g} {c.kind}: its 'not significantly worse' list tests {c.n_compared} comparisons "
                f"in a tail of {(1 - confidence) / c.n_compared / 2:.2g} of the resamples "
                f"({(1 - confidence) / c.n_compared / 2 * n_boot:.2g} expected of {n_boot}, fewer than {MIN_TAIL}): it does not "
                f"deliver the stated {confidence:g} confidence (the list is too short and may leave out a truly best "
                f"cell); n_boot >= {c.n_boot_needed:,} does" + _table_bound(c.n_boot_needed, T, K)]

    return PlanResult(
        mode=mode,
        temperatures=temps,
        ks=ks,
        value=value,
        lo=lo,
        hi=hi,
        confidence=confidence,
        n_boot=n_boot,
        paired=paired,
        n_prompts=np.asarray(n_prompts),
        smallest_pool=smallest_pool,
        mean_tokens=mean_tokens,
        best_index=best_index,
        best_temperature=temps[best_index],
        near_best=near,
        gain_one=value[:, 1:] - value[:, :-1],  # (T, K-1): V_{k+1} - V_k for k = 1..K-1
        gain_double=value[:, 2 * np.arange(1, K // 2 + 1) - 1] - value[:, : K // 2],  # (T, K//2): V_2k - V_k, k = 1..K//2
        doubling=doubling,
        doubling_stops_at=stops,
        min_gain=min_gain,
        budgets=budgets,
        fit=fit_best_temperature(ks, temps[best_index]),
        notes=list(notes),
        no_interval=no_interval,
        n_boot_needed=marks_need,
    )


def _table_bound(need: int, T: int, K: int) -> str:
    """The caveat when that n_boot would exceed the bootstrap table's bound (MAX_BOOT_CELLS)."""
    if need * T * K <= MAX_BOOT_CELLS:
        return ""
    return (f" (but n_boot x {T} temperatures x {K} k must be <= {MAX_BOOT_CELLS:,}: lower --max-k or use fewer "
            f"temperatures)")


def _choose(value, lo, hi, boot, confidence, mask, ks, temps, cost, *, kind, budget, note) -> BudgetChoice:
    """Best cell under a budget mask (T, K); ties go to the cheaper cell, then to the lower temperature."""
    v = np.where(mask, value, -np.inf)
    top = v.max()
    cand = np.argwhere(v >= top - 1e-12)  # (m, 2) rows (t, j)
    t, j = min(cand.tolist(), key=lambda tj: (cost[tj[0], tj[1]], tj[1], tj[0]))
    alts, need, m = [], None, 0
    if boot is not None:
        cells = np.argwhere(mask)  # (m, 2) affordable (t, j)
        diff = boot[:, t, j][:, None] - boot[:, cells[:, 0], cells[:, 1]]  # (B, m) chosen minus each affordable cell
        # the choice is picked from the same data: m - 1 comparisons, each at level alpha / (m - 1) (Bonferroni;
        # Dunn 1961), so the truly best affordable cell is among the choice and its alternatives with probability
        # >= confidence
        m = max(len(cells) - 1, 1)
        ok = not_worse(diff, (1 - confidence) / m)
        need = n_boot_needed((1 - confidence) / m, diff.shape[0]) if len(cells) > 1 else None
        near = [(a, b) for (a, b), keep in zip(cells.tolist(), ok) if keep and (a, b) != (t, j)]
        near.sort(key=lambda ab: -value[ab[0], ab[1]])  # closest to the choice first
        alts = [(float(temps[a]), int(ks[b])) for a, b in near]
    return BudgetChoice(
        kind=kind,
        budget=budget,
        temperature=float(temps[t]),
        k=int(ks[j]),
        value=float(value[t, j]),
        lo=float(lo[t, j]),
        hi=float(hi[t, j]),
        cost=float(cost[t, j]),
        alternatives=alts,
        note=note,
        n_boot_needed=need,
        n_compared=m,
    )


def _check_fit_points(ks: Any, best_temperature: Any) -> tuple[np.ndarray, np.ndarray]:
    """ks (K,) ints >= 1, strictly increasing; best_temperature (K,) finite and > 0."""
    k_arr, scalar = check_ks(ks, sys.maxsize, name="ks")  # a float k (1.5) is refused, not truncated
    if scalar:
        raise TypeError(f"ks must be a sequence of ints, got int {ks!r}")
    if (np.diff(k_arr) <= 0).any():
        raise ValueError(f"ks must be strictly increasing, got {k_arr.tolist()}")
    tb = as_float_array("best_temperature", best_temperature, ndim=1)
    if tb.shape != k_arr.shape:
        raise ValueError(f"best_temperature must hold one temperature per k ({k_arr.size}), got {tb.size}")
    check_finite("best_temperature", tb)
    if (tb <= 0).any():
        i = int(np.flatnonzero(tb <= 0)[0])
        raise ValueError(f"best_temperature must be > 0, got {tb[i]:g} at index {i}")
    return k_arr, tb


def fit_best_temperature(ks: Any, best_temperature: Any) -> TemperatureFit:
    """Fit how the best temperature T*(k) moves with log k: a fit of this data, not a law.

    ks: (K,), best_temperature: (K,) -> TemperatureFit. Points: k = 1, 2, 4, ... (and the
    largest k), evenly spaced in log k so the many large k do not dominate.
    Line: T* ~ a + b log k by least squares, with R^2 = 1 - SS_res / SS_tot and the RMS residual.
    Monotone: isotonic regression of T* on log k (pool-adjacent-violators, :func:`isotonic`),
    increasing or decreasing, whichever leaves the smaller residual.
    ``ks`` must be ints >= 1 in increasing order, one best temperature (finite, > 0) each.
    """
    ks, tb = _check_fit_points(ks, best_temperature)
    pick = sorted(set([int(k) for k in ks if (k & (k - 1)) == 0] + [int(ks[-1])]))
    idx = np.searchsorted(ks, pick)
    x, y = np.log(ks[idx].astype(np.float64)), tb[idx]
    ss_tot = float(((y - y.mean()) ** 2).sum())
    if x.size >= 2 and ss_tot > 1e-24:
        slope, intercept = np.polyfit(x, y, 1)
    else:  # one point, or T* constant over k: the flat line is exact
        slope, intercept = 0.0, float(y[0])
    resid = y - (intercept + slope * x)
    ss_res = float((resid**2).sum())
    r2 = None if ss_tot <= 1e-24 else 1.0 - ss_res / ss_tot
    inc, dec = isotonic(y), -isotonic(-y)
    sse_inc, sse_dec = float(((y - inc) ** 2).sum()), float(((y - dec) ** 2).sum())
    direction = "constant" if ss_tot <= 1e-24 else ("increasing" if sse_inc <= sse_dec else "decreasing")
    iso = inc if sse_inc <= sse_dec else dec
    return TemperatureFit(
        ks=ks[idx],
        best_temperature=y,
        slope=float(slope),
        intercept=float(intercept),
        r2=r2,
        rmse=float(np.sqrt(ss_res / y.size)),
        monotone=iso,
        monotone_direction=direction,
        monotone_rmse=float(np.sqrt(min(sse_inc, sse_dec) / y.size)),
    )
