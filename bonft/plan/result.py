"""Result objects of :mod:`bonft.plan.sweep`: the sweep, budget choices, doubling steps, the T*(k) fit."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from bonft._core.bootstrap import confidence_label
from bonft.estimate import MIN_BOOT_PROMPTS

FIT_CAVEAT = "a fit of this data, not a law"


@dataclass
class BudgetChoice:
    """The best (temperature, k) under one budget per prompt.

    kind: "samples" (k <= budget) or "tokens" (k * mean_tokens(T) <= budget).
    value, lo, hi: V_k(T) of the choice and its CI (lo = hi = value in exact mode; NaN with fewer than 10 prompts,
        where there is no interval: ``PlanResult.intervals_valid``).
    cost: samples (kind "samples") or expected generated tokens per prompt (kind "tokens").
    alternatives: other (temperature, k) cells within the budget not significantly worse, best first.
    n_boot_needed: None when n_boot leaves at least ``bonft.plan.decisions.MIN_TAIL`` resamples in the tail each of
        the ``n_compared`` comparisons is tested in; else the n_boot that would, and the list does not deliver the
        stated confidence (too short; the plan's notes say so).
    """

    kind: str
    budget: float
    temperature: float
    k: int
    value: float
    lo: float
    hi: float
    cost: float
    alternatives: list = field(default_factory=list)
    note: str | None = None
    n_boot_needed: int | None = None
    n_compared: int = 0


@dataclass
class DoublingStep:
    """Gain of doubling N at the best temperatures: V_2k(T*(2k)) - V_k(T*(k)) with its CI.

    pays: the gain is significantly above ``min_gain`` (its CI's lower bound is; exact mode or too few prompts for
    an interval: the gain itself is). lo = hi = gain in exact mode; NaN with fewer than 10 prompts (no interval).
    """

    k: int
    temperature_k: float
    temperature_2k: float
    gain: float
    lo: float
    hi: float
    pays: bool = True


@dataclass
class TemperatureFit:
    """How the best temperature moves with k over the grid: a fit of this data, not a law.

    ks, best_temperature: the fitted points (K_fit,). Line T* ~ intercept + slope * log k,
    r2 (None when T* is constant, where R^2 is undefined), rmse = RMS residual of the line.
    monotone: isotonic fit at the points, in ``monotone_direction``, with ``monotone_rmse``.
    """

    ks: np.ndarray
    best_temperature: np.ndarray
    slope: float
    intercept: float
    r2: float | None
    rmse: float
    monotone: np.ndarray
    monotone_direction: str
    monotone_rmse: float
    caveat: str = FIT_CAVEAT


@dataclass
class PlanResult:
    """A temperature x k sweep of best-of-k value and the decisions drawn from it.

    temperatures: (T,), ks: (K,) = 1..K.
    value, lo, hi: (T, K) V_k(T) and its CI over prompts (lo = hi = value when mode == "exact"; NaN, no interval,
        where ``intervals_valid`` is false in sampling mode: fewer than 10 prompts at some temperature; the budgets'
        and doubling steps' lo/hi too, and JSON writes null).
    best_index, best_temperature: (K,) argmax over temperatures per k (ties: lowest temperature).
    near_best: (T, K) bool, True where the temperature is not significantly worse than the best
        at that k (paired bootstrap of the gap when ``paired``, each of the T - 1 gaps at level (1 - confidence) /
        (T - 1), Bonferroni; exact mode and fewer than 10 prompts: ties only).
    gain_one: (T, K-1) V_{k+1} - V_k for k = 1..K-1. gain_double: (T, K//2) V_2k - V_k for k = 1..K//2.
    doubling: DoublingStep for k = 1, 2, 4, ... at the best temperatures; doubling_stops_at: the
        k after the last step whose gain is significantly above ``min_gain``, so that no step from there on is
        (None: the last step still pays; 1: none does). Earlier steps may not pay either (``DoublingStep.pays``).
    n_prompts: (T,) prompts at each temperature; smallest_pool: (T,) the smallest pool (samples of one
        prompt) at each temperature, None in exact mode.
    mean_tokens: (T,) mean generated tokens per response, or None.
    no_interval: (T, K) bool, True where every prompt has the same value at a value that is neither bound of
        the rewards' range (:func:`bonft._core.bootstrap.no_interval_columns`, the rule of ``bonft estimate``):
        lo = hi = value there is no interval, and the table prints "no spread"; None in exact mode.
    n_boot_needed: None when n_boot leaves at least ``bonft.plan.decisions.MIN_TAIL`` resamples in the tail each
        ``near_best`` comparison is tested in (and in exact mode); else the n_boot that would, and the marks do not
        deliver the stated confidence (the notes say so). Each budget says the same of its list
        (``BudgetChoice.n_boot_needed``).
    """

    mode: str
    temperatures: np.ndarray
    ks: np.ndarray
    value: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    confidence: float | None
    n_boot: int
    paired: bool
    n_prompts: np.ndarray
    smallest_pool: np.ndarray | None
    mean_tokens: np.ndarray | None
    best_index: np.ndarray
    best_temperature: np.ndarray
    near_best: np.ndarray
    gain_one: np.ndarray
    gain_double: np.ndarray
    doubling: list
    doubling_stops_at: int | None
    min_gain: float
    budgets: list
    fit: TemperatureFit
    notes: list = field(default_factory=list)
    no_interval: np.ndarray | None = None
    n_boot_needed: int | None = None

    # ------------------------------------------------------------------ views
    @property
    def intervals_valid(self) -> bool:
        """True when lo/hi are confidence intervals: sampling mode with at least MIN_BOOT_PROMPTS prompts at every
        temperature (fewer: no interval, no significance test, as in ``bonft estimate``). False in exact mode."""
        return self.mode != "exact" and int(np.min(self.n_prompts)) >= MIN_BOOT_PROMPTS

    def value_at(self, temperature: float, k: int) -> float:
        """V_k(T) at one grid cell."""
        t = int(np.argmin(np.abs(self.temperatures - float(temperature))))
        if not np.isclose(self.temperatures[t], float(temperature), rtol=0, atol=1e-9):
            raise ValueError(f"temperature must be one of {[f'{x:g}' for x in self.temperatures]}, got {temperature}")
        if not 1 <= int(k) <= int(self.ks[-1]):
            raise ValueError(f"k must be <= n (n={int(self.ks[-1])}), got k={k}")
        return float(self.value[t, int(k) - 1])

    def table_ks(self) -> list[int]:
        """The k shown in the table: 1, 2, 4, ... and the largest k."""
        K = int(self.ks[-1])
        out, k = [], 1
        while k <= K:
            out.append(k)
            k *= 2
        return out if out[-1] == K else out + [K]

    def table(self) -> str:
        exact = self.mode == "exact"
        few = not exact and int(np.min(self.n_prompts)) < MIN_BOOT_PROMPTS  # too few prompts for an interval
        T = self.temperatures
        head = f"best-of-k value V_k(T), {self.mode} mode, {int(self.n_prompts.max())} prompts"
        if not exact:
            head += f", {'paired' if self.paired else 'unpaired'} bootstrap {confidence_label(self.confidence)} CI ({self.n_boot} resamples)"
        legend = "  * best temperature at k"
        if not (exact or few):
            legend += "   ~ not significantly worse" + (f" (Bonferroni over {T.size - 1} comparisons)" if T.size > 2 else "")
        lines = [head, legend]
        cols = "".join(f"{'T=' + format(t, 'g'):>10}" for t in T)
        lines.append(f"{'k':>5} {cols}   {'best T':>6}  {'V at best' + ('' if exact else ' [CI]')}")
        for k in self.table_ks():
            j = k - 1
            b = int(self.best_index[j])
            cells = ""
            for t in range(T.size):
                mark = "*" if t == b else ("~" if self.near_best[t, j] and not few else " ")
                cells += f"{self.value[t, j]:>9.4f}{mark}"
            ci = "" if exact else (" [n/a]" if few else self._ci(b, j))
            lines.append(f"{k:>5} {cells}   {T[b]:>6g}  {self.value[b, j]:.4f}{ci}")
        if few:
            lines.append(f"intervals n/a: {int(np.min(self.n_prompts))} prompt(s) at some temperature; a bootstrap over "
                         f"prompts needs at least {MIN_BOOT_PROMPTS} (the choices above are not significance-tested)")
        if not (exact or few) and T.size > 1:
            lines.append("V at best is the largest of several estimates: biased upward, its interval covers less than "
                         "its nominal level (docs/planning.md)")
        flat = self._no_spread_note() if not (exact or few) else None
        if flat:
            lines.append(flat)
        if self.mean_tokens is not None:
            lines.append("mean tokens per response: " + ", ".join(f"T={t:g}: {m:.1f}" for t, m in zip(T, self.mean_tokens)))
        for c in self.budgets:
            unit = "samples" if c.kind == "samples" else "tokens"
            cost = "" if c.kind == "samples" else f", ~{c.cost:.0f} tokens"
            ci = "" if exact else (" [n/a]" if few else self._ci(int(np.flatnonzero(T == c.temperature)[0]), c.k - 1))
            lines.append(f"budget {c.budget:g} {unit}/prompt: T={c.temperature:g}, k={c.k}{cost} -> V={c.value:.4f}{ci}")
            if c.alternatives:
                alts = ", ".join(f"(T={t:g}, k={k})" for t, k in c.alternatives[:6])
                more = f" and {len(c.alternatives) - 6} more" if len(c.alternatives) > 6 else ""
                lines.append(f"    not significantly worse: {alts}{more}")
            if c.note:
                lines.append(f"    note: {c.note}")
        if self.doubling:
            lines.append("doubling N at the best temperature: " + ", ".join(f"{d.k}->{2 * d.k}: {d.gain:+.4f}" for d in self.doubling))
            sig = "" if exact or few else " significantly"
            k = self.doubling_stops_at
            if k is None:
                last = 2 * self.doubling[-1].k  # the largest k a doubling step tested (16 with max_k 24)
                lines.append(f"    doubling kept paying (gain{sig} > {self.min_gain:g}) up to k={last}")
            else:
                tail = [d for d in self.doubling if d.k >= k]
                gains = ", ".join(f"{d.k}->{2 * d.k} gains {d.gain:+.4f}" for d in tail)
                lines.append(f"    doubling stops paying from k={k}: {gains}, "
                             + (f"not{sig} above" if len(tail) == 1 else f"none{sig} above") + f" {self.min_gain:g}")
            early = [d for d in self.doubling if not d.pays and (k is None or d.k < k)]
            if early:
                lines.append("    (earlier, " + ", ".join(f"{d.k}->{2 * d.k} ({d.gain:+.4f})" for d in early)
                             + f" {'was' if len(early) == 1 else 'were'} not{sig} above {self.min_gain:g}; later steps were)")
        f = self.fit
        r2 = "undefined (constant)" if f.r2 is None else f"{f.r2:.3f}"
        lines.append(
            f"best temperature vs log k ({f.caveat}): T* ~ {f.intercept:.3f} {'-' if f.slope < 0 else '+'} {abs(f.slope):.3f} log k, "
            f"R^2 {r2}, RMS residual {f.rmse:.3f}; monotone fit {f.monotone_direction}, RMS {f.monotone_rmse:.3f}"
        )
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def _ci(self, t: int, j: int) -> str:
        """The interval of cell (t, j) as the table prints it: ``[lo, hi]``, or ``no spread`` (no interval)."""
        if self.no_interval is not None and self.no_interval[t, j]:
            return " no spread"
        return f" [{self.lo[t, j]:.4f}, {self.hi[t, j]:.4f}]"

    def _no_spread_note(self) -> str | None:
        """The table's line naming the temperatures and shown k with no interval, or None."""
        if self.no_interval is None:
            return None
        shown = np.asarray(self.table_ks()) - 1
        cells = [f"T={t:g} k={','.join(str(j + 1) for j in shown if self.no_interval[i, j])}"
                 for i, t in enumerate(self.temperatures) if self.no_interval[i, shown].any()]
        if not cells:
            return None
        return (f"no spread ({'; '.join(cells)}): every prompt has the same value, so every bootstrap replicate does "
                f"too, and it is at no known bound of the rewards: no interval (see docs/estimate.md)")

    def to_dict(self) -> dict:
        """JSON-able dict (lists, floats, None); CIs are null in exact mode and, with ``intervals_valid`` false, with
        fewer than 10 prompts (there the budgets' and doubling steps' lo/hi are null too)."""
        exact = self.mode == "exact"
        valid = self.intervals_valid
        few = not (exact or valid)

        def no_ci(d: dict) -> dict:
            return dict(d, lo=None, hi=None) if few else d

        def arr(x):
            return None if x is None else np.asarray(x).tolist()

        f = self.fit
        return {
            "mode": self.mode,
            "temperatures": arr(self.temperatures),
            "ks": arr(self.ks),
            "value": arr(self.value),
            "lo": arr(self.lo) if valid else None,
            "hi": arr(self.hi) if valid else None,
            "intervals_valid": valid,
            "n_boot_needed": self.n_boot_needed,
            "confidence": self.confidence,
            "n_boot": self.n_boot,
            "paired": self.paired,
            "n_prompts": arr(self.n_prompts),
            "smallest_pool": arr(self.smallest_pool),
            "mean_tokens": arr(self.mean_tokens),
            "best_temperature": arr(self.best_temperature),
            "near_best": arr(self.near_best),
            "gain_one": arr(self.gain_one),
            "gain_double": arr(self.gain_double),
            "doubling": [no_ci(d.__dict__) for d in self.doubling],
            "doubling_stops_at": self.doubling_stops_at,
            "min_gain": self.min_gain,
            "budgets": [no_ci(dict(c.__dict__, alternatives=[list(a) for a in c.alternatives])) for c in self.budgets],
            "best_temperature_fit": {
                "caveat": f.caveat,
                "ks": arr(f.ks),
                "best_temperature": arr(f.best_temperature),
                "line": {"intercept": f.intercept, "slope_per_log_k": f.slope, "r2": f.r2, "rmse": f.rmse},
                "monotone": {"direction": f.monotone_direction, "values": arr(f.monotone), "rmse": f.monotone_rmse},
            },
            "notes": list(self.notes),
            "no_interval": arr(self.no_interval),
        }

    def plot_heatmap(self, path) -> str:
        """PNG of V over (temperature, k), best temperature per k marked; returns the path."""
        from bonft.viz import plot_plan_heatmap  # matplotlib loads only when a figure is drawn

        return plot_plan_heatmap(self, path)

    def plot_curves(self, path) -> str:
        """PNG of V against k at the best and a few other temperatures, with CI bands; returns the path."""
        from bonft.viz import plot_plan_curves  # matplotlib loads only when a figure is drawn

        return plot_plan_curves(self, path)
