"""Every figure bonft draws (matplotlib, Agg backend, PNG).

* :func:`plot_best_of_k_curves` -- best-of-k and pass@k curves of
  :class:`bonft.estimate.CurveSummary` objects, with their intervals (``bonft estimate --plot-dir``);
* :func:`plot_plan_heatmap`, :func:`plot_plan_curves` -- a :class:`bonft.plan.PlanResult`
  over temperature and k (``bonft plan --plot-dir``);
* :func:`plot_evaluations`, :func:`plot_comparison` -- the trainer's evaluations of one
  run and of several policies (``bonft train``, ``bonft eval --plot-dir``, ``bonft demo``);
* :func:`plot_paired_differences` -- policies on the same prompts and their paired differences (``bonft compare``);
* :func:`plot_verifier_check` -- a verifier check's best-of-k against pass@k;
* :func:`plot_objective_check` -- an objective check's estimated against exact gradient components.

matplotlib is imported inside each function, so importing this module is cheap.
"""
from __future__ import annotations

import numbers
import os
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from bonft._core.checks import as_float_array, check_int, check_items
from bonft._core.jsonl import replacing
from bonft.estimate import CurveSummary

__all__ = ["plot_best_of_k_curves", "plot_verifier_check", "plot_plan_heatmap", "plot_plan_curves", "plot_evaluations",
           "plot_comparison", "plot_paired_differences", "plot_objective_check", "plot_strategy_curves"]


# ------------------------------------------------------------------ argument checks (before any figure is made)


def _check_path(path: Any) -> str:
    """A file path to write the figure to: a str or os.PathLike, not an existing directory."""
    if isinstance(path, bool) or not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a file path (str or os.PathLike), got {type(path).__name__} {path!r}")
    path = os.fspath(path)
    if not isinstance(path, str):
        raise TypeError(f"path must be a file path given as str or os.PathLike of str, got {type(path).__name__} {path!r}")
    if not path:
        raise ValueError("path must be a file path, got an empty string")
    if os.path.isdir(path):
        raise ValueError(f"path must be a file path, got an existing directory: {path}")
    from matplotlib.backend_bases import FigureCanvasBase  # the formats savefig writes (png, pdf, svg, ...)

    kinds = FigureCanvasBase.get_supported_filetypes()
    ext = os.path.splitext(path)[1][1:].lower()
    if ext not in kinds:
        what = f"the extension .{ext}, which matplotlib cannot write" if ext else "no extension (matplotlib would add .png)"
        raise ValueError(f"path must end in a figure format's extension ({', '.join('.' + e for e in sorted(kinds))}), "
                         f"got {path!r} with {what}")
    return path


def _check_object(name: str, obj: Any, what: str, attrs: Sequence[str]) -> None:
    """``obj`` must carry the attributes a figure reads (the layers above viz own the classes)."""
    missing = [a for a in attrs if not hasattr(obj, a)]
    if missing:
        raise TypeError(f"{name} must be {what}, got {type(obj).__name__} (without {', '.join(missing)})")


def _check_ks(name: str, ks: Any) -> list[int]:
    """A non-empty sequence of ints >= 1 (the k axis)."""
    if isinstance(ks, numbers.Integral) and not isinstance(ks, bool):
        raise TypeError(f"{name} must be a sequence of ints, got int {ks!r}; wrap it in a list")
    items = check_items(name, ks, numbers.Integral, "ints")
    return [check_int(f"{name}[{i}]", k, min=1) for i, k in enumerate(items)]


def _check_band(name: str, curve: Any, K: int) -> None:
    """``{"mean", "lo", "hi"}``, each holding one number per k."""
    if not isinstance(curve, Mapping):
        raise TypeError(f"{name} must be a dict with 'mean', 'lo' and 'hi' (one value per k), got {type(curve).__name__}")
    for key in ("mean", "lo", "hi"):
        if key not in curve:
            raise ValueError(f"{name} must have {key!r} (one value per k), got keys {sorted(map(str, curve))}")
        v = as_float_array(f"{name}[{key!r}]", curve[key], ndim=1)
        if len(v) != K:
            raise ValueError(f"{name}[{key!r}] must hold one value per k (len(ks)={K}), got {len(v)}")


def _check_evaluation(name: str, ev: Any, keys: Sequence[str]) -> None:
    """One evaluation dict (``EvalReport.to_dict()``, a ``kind: eval`` line of metrics.jsonl)."""
    if not isinstance(ev, Mapping):
        raise TypeError(f"{name} must be an evaluation dict, got {type(ev).__name__}")
    missing = [k for k in keys if k not in ev]
    if missing:
        raise ValueError(f"{name} must have the fields {', '.join(map(repr, keys))} (an evaluation's dict), "
                         f"missing {', '.join(map(repr, missing))}")
    K = len(_check_ks(f"{name}['ks']", ev["ks"]))
    _check_band(f"{name}['pass_at_k']", ev["pass_at_k"], K)
    if not isinstance(ev["best_of_k"], Mapping):
        raise TypeError(f"{name}['best_of_k'] must be a dict of verifier -> curve, got {type(ev['best_of_k']).__name__}")
    for verifier, c in ev["best_of_k"].items():
        _check_band(f"{name}['best_of_k'][{verifier!r}]", c, K)


def _check_comparison(comparison: Any, ks: Any) -> list[int]:
    """:func:`bonft.estimate.paired.paired_comparison`'s dict, with one pass@k column per k."""
    if not isinstance(comparison, Mapping):
        raise TypeError(f"comparison must be paired_comparison's dict, got {type(comparison).__name__}")
    missing = [k for k in ("columns", "means", "differences") if k not in comparison]
    if missing:
        raise ValueError(f"comparison must have 'columns', 'means' and 'differences' (paired_comparison's dict), "
                         f"missing {', '.join(map(repr, missing))}")
    ks = _check_ks("ks", ks)
    cols = comparison["columns"]
    if isinstance(cols, str) or not isinstance(cols, Sequence) or not all(
            isinstance(c, Sequence) and not isinstance(c, str) and len(c) == 3 for c in cols):
        raise TypeError("comparison['columns'] must be a list of (label, kind, column) triples")
    n_pass = sum(1 for _, kind, _ in cols if kind == "pass")
    if n_pass != len(ks):
        raise ValueError(f"ks must give one k per pass@k column of comparison ({n_pass}), got {len(ks)} ks")
    means = comparison["means"]
    if not isinstance(means, Mapping) or not means:
        raise ValueError("comparison['means'] must be a non-empty dict of policy -> cells")

    def cells_ok(where: str, cells: Any) -> None:
        if (isinstance(cells, str) or not isinstance(cells, Sequence) or len(cells) != len(cols)
                or not all(isinstance(c, Sequence) and len(c) == 3 for c in cells)):
            raise ValueError(f"{where} must hold one (mean, lo, hi) per column ({len(cols)})")

    for name, cells in means.items():
        cells_ok(f"comparison['means'][{name!r}]", cells)
    diffs = comparison["differences"]
    if not isinstance(diffs, Mapping):
        raise TypeError(f"comparison['differences'] must be a dict of baseline -> policy -> cells, got {type(diffs).__name__}")
    for base, rows in diffs.items():
        if not isinstance(rows, Mapping):
            raise TypeError(f"comparison['differences'][{base!r}] must be a dict of policy -> cells, got {type(rows).__name__}")
        for name, cells in rows.items():
            if name not in means:
                raise ValueError(f"comparison['differences'][{base!r}] names policy {name!r}, which is not among "
                                 f"comparison['means'] {list(means)}")
            cells_ok(f"comparison['differences'][{base!r}][{name!r}]", cells)
    return ks


_PLAN = "a PlanResult (bonft.plan's result)"
_PLAN_ATTRS = ("temperatures", "ks", "value", "best_index", "mode")


# ------------------------------------------------------------------ estimator curves

def plot_best_of_k_curves(curves: dict, path, *, title: str | None = None) -> str:
    """One PNG with the best-of-k and pass@k curves of each labelled :class:`CurveSummary`.

    curves: {label: CurveSummary} (e.g. one per temperature); a label prefixes the legend entries.
    """
    if not isinstance(curves, dict) or not curves:
        raise TypeError(f"curves must be a non-empty dict of label -> CurveSummary, got {type(curves).__name__}")
    for label, c in curves.items():
        if not isinstance(c, CurveSummary):
            raise TypeError(f"curves[{label!r}] must be a CurveSummary, got {type(c).__name__}")
    path = _check_path(path)
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    for j, (label, c) in enumerate(curves.items()):
        ks = np.asarray(c.ks)
        pre = f"{label}: " if label else ""
        color = f"C{j}"
        for mean, lo, hi, what, style in (
            (c.pass_at_k_mean, c.pass_at_k_lo, c.pass_at_k_hi, "pass@k (best true reward among k)", "--"),
            (c.best_of_k_mean, c.best_of_k_lo, c.best_of_k_hi, "best-of-k (verifier picks)", "-"),
        ):
            ax.plot(ks, mean, style, marker="o", color=color, label=pre + what)
            ax.fill_between(ks, lo, hi, color=color, alpha=0.15)
    if max(len(c.ks) for c in curves.values()) > 1:
        ax.set_xscale("log", base=2)
        ticks = sorted({int(k) for c in curves.values() for k in c.ks})
        ax.set_xticks(ticks, [str(k) for k in ticks])
        ax.minorticks_off()
    first = next(iter(curves.values()))
    ax.set_xlabel("k (samples drawn)")
    ax.set_ylabel("expected reward")
    ax.set_title(title or f"{first.n_prompts} prompts, {100 * first.confidence:g}% bootstrap CI")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    _save_figure(fig, _out(path), dpi=100)
    plt.close(fig)
    return path


# ------------------------------------------------------------------ the trainer's evaluations


def _axes(n: int):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, n, figsize=(5 * n, 4), squeeze=False)
    return plt, fig, axes[0]


def _band(ax, ks, curve: dict, label: str, **kw) -> None:
    ax.plot(ks, curve["mean"], marker="o", label=label, **kw)
    ax.fill_between(ks, curve["lo"], curve["hi"], alpha=0.15, color=ax.lines[-1].get_color())


def plot_evaluations(evals: Sequence[dict], path: str | Path, *, title: str = "") -> Path:
    """One run: pass@k (left) and best-of-k per verifier (right) versus k, one line per evaluation step.

    evals: a non-empty list of evaluation dicts (``ks``, ``step``, ``pass_at_k``, ``best_of_k``); path: a file path.
    """
    if isinstance(evals, Mapping):
        raise TypeError("evals must be a list of evaluation dicts, got a single dict (wrap it in a list)")
    for i, ev in enumerate(check_items("evals", evals, object, "evaluation dicts")):
        _check_evaluation(f"evals[{i}]", ev, ("ks", "step", "pass_at_k", "best_of_k"))
    path = _check_path(path)
    plt, fig, (ax1, ax2) = _axes(2)
    for ev in evals:
        _band(ax1, ev["ks"], ev["pass_at_k"], f"step {ev['step']}")
        for name, c in ev["best_of_k"].items():
            _band(ax2, ev["ks"], c, f"step {ev['step']} ({name})")
    ax1.set_ylabel("pass@k (true reward)")
    ax2.set_ylabel("best-of-k, verifier-selected")
    return _finish(plt, fig, (ax1, ax2), path, title)


def _finish(plt, fig, axes, path, title, *, unit=None, ticks=None) -> Path:
    """Shared styling of the k axes (log2; ``unit``, default all: the axes whose y runs over [0, 1]; ``ticks``:
    the k values to mark), then save and close."""
    for ax in axes:
        ax.set_xscale("log", base=2)
        if ticks is not None:
            ax.set_xticks(list(ticks), [str(k) for k in ticks])
            ax.minorticks_off()
        ax.set_xlabel("k")
        if unit is None or ax in unit:
            ax.set_ylim(0, 1)
        ax.grid(alpha=0.3)
        if ax.get_legend_handles_labels()[1]:  # a lone zero line has no label: no empty legend
            ax.legend(fontsize=8)
    fig.suptitle(title)
    fig.tight_layout()
    _save_figure(fig, _out(path), dpi=110)
    plt.close(fig)
    return Path(path)


def plot_comparison(results: dict[str, dict], path: str | Path, *, title: str = "") -> Path:
    """Several policies (name -> one evaluation dict): pass@k and best-of-k under the proxy, with CIs.

    results: a non-empty dict of name -> evaluation dict (``ks``, ``pass_at_k``, ``best_of_k``); path: a file path.
    """
    if not isinstance(results, Mapping):
        raise TypeError(f"results must be a dict of policy name -> evaluation dict, got {type(results).__name__}")
    if not results:
        raise ValueError("results must hold at least one policy, got an empty dict")
    for name, ev in results.items():
        _check_evaluation(f"results[{name!r}]", ev, ("ks", "pass_at_k", "best_of_k"))
    path = _check_path(path)
    plt, fig, (ax1, ax2) = _axes(2)
    for name, ev in results.items():
        _band(ax1, ev["ks"], ev["pass_at_k"], name)
        if "proxy" in ev["best_of_k"]:
            _band(ax2, ev["ks"], ev["best_of_k"]["proxy"], name)
    ax1.set_ylabel("pass@k (true reward)")
    ax2.set_ylabel("best-of-k, proxy picks (true reward)")
    return _finish(plt, fig, (ax1, ax2), path, title)


def plot_paired_differences(comparison: dict, path: str | Path, *, ks: Sequence[int], title: str = "") -> Path:
    """Policies on the same prompts (:func:`bonft.estimate.paired.paired_comparison`): each one's pass@k (left)
    and its paired difference from the baseline (right, with a zero line), with their intervals, against k.

    ks: the k of each pass@k column of ``comparison``; path: a file path."""
    ks = _check_comparison(comparison, ks)
    path = _check_path(path)
    plt, fig, (ax1, ax2) = _axes(2)
    cols = [j for j, (_, kind, _) in enumerate(comparison["columns"]) if kind == "pass"]

    def curve(cells) -> dict:
        return {key: [cells[j][i] for j in cols] for i, key in enumerate(("mean", "lo", "hi"))}

    colour = {}
    for name, cells in comparison["means"].items():
        _band(ax1, ks, curve(cells), name)
        colour[name] = ax1.lines[-1].get_color()
    for base, rows in comparison["differences"].items():
        for name, cells in rows.items():
            _band(ax2, ks, curve(cells), f"{name} - {base}", color=colour[name])
    ax2.axhline(0.0, color="black", linewidth=0.8)
    ax1.set_ylabel("pass@k")
    ax2.set_ylabel("paired difference in pass@k")
    return _finish(plt, fig, (ax1, ax2), path, title, unit=(ax1,), ticks=ks)


# ------------------------------------------------------------------ the planner


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _out(path) -> str:
    path = os.fspath(path)
    d = os.path.dirname(path)
    if d:
        os.makedirs(d, exist_ok=True)
    return path


def _save_figure(fig, path, **kw) -> None:
    """``fig.savefig`` to a temporary file beside ``path``, then renamed onto it: a full disk or a kill
    leaves the previous figure (or none), never a cut one. A failed write is an ``OSError`` naming ``path``."""
    path = os.fspath(path)
    fmt = os.path.splitext(path)[1][1:].lower() or "png"
    try:
        with replacing(path, binary=True) as fh:
            fig.savefig(fh, format=fmt, **kw)
    except BaseException as e:
        import matplotlib.pyplot as plt

        plt.close(fig)
        if not isinstance(e, OSError) or not e.strerror or e.filename == path:
            raise
        raise type(e)(e.errno, f"the figure cannot be written: {e.strerror}", path) from None


def _log2_k_axis(ax, kmax: int) -> None:
    """k on a log axis with ticks 1, 2, 4, ... labelled as plain numbers (no minor ticks)."""
    from matplotlib.ticker import FixedLocator, NullLocator

    ax.set_xscale("log")
    ticks = [2**i for i in range(int(np.log2(kmax)) + 1)]
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xticklabels([str(t) for t in ticks])


def plot_plan_heatmap(res, path) -> str:
    """V over (temperature rows, k columns on a log axis); circles mark the best temperature per k.

    res: a :class:`bonft.plan.PlanResult`; path: a file path (missing folders are made)."""
    _check_object("res", res, _PLAN, (*_PLAN_ATTRS, "best_temperature", "near_best"))
    path = _out(_check_path(path))
    plt = _plt()
    T, ks = res.temperatures, res.ks
    # cell edges: k on a log axis (edges at k -/+ 0.5), temperatures at midpoints between grid values
    k_edges = np.concatenate([[0.5], ks + 0.5])
    order = np.argsort(T)
    t_sorted = T[order]
    mids = (t_sorted[1:] + t_sorted[:-1]) / 2 if T.size > 1 else np.array([])
    lo_edge = t_sorted[0] - (mids[0] - t_sorted[0] if mids.size else 0.1)
    hi_edge = t_sorted[-1] + (t_sorted[-1] - mids[-1] if mids.size else 0.1)
    t_edges = np.concatenate([[lo_edge], mids, [hi_edge]])
    fig, ax = plt.subplots(figsize=(8, 4.2), dpi=110)
    mesh = ax.pcolormesh(k_edges, t_edges, res.value[order], cmap="viridis", shading="flat")
    fig.colorbar(mesh, ax=ax, label="best-of-k value V_k(T)")
    ax.plot(ks, res.best_temperature, "o", ms=3 if ks.size > 40 else 5, mfc="white", mec="black", label="best T at k")
    if getattr(res, "intervals_valid", res.mode != "exact"):  # no test without intervals (exact, < 10 prompts)
        near_t = [(k, t) for i, t in enumerate(T) for j, k in enumerate(ks) if res.near_best[i, j] and i != res.best_index[j]]
        if near_t:
            nk, nt = zip(*near_t)
            ax.plot(nk, nt, ".", ms=2, color="white", alpha=0.6, label="not significantly worse")
    _log2_k_axis(ax, int(ks[-1]))
    ax.set_xlim(k_edges[0], k_edges[-1])
    ax.set_yticks(t_sorted)
    ax.set_xlabel("k (samples per prompt)")
    ax.set_ylabel("temperature T")
    ax.set_title(f"best-of-k value over (temperature, k), {res.mode} mode")
    ax.legend(loc="upper left", fontsize=8, framealpha=0.8)
    fig.subplots_adjust(left=0.09, right=0.98, bottom=0.12, top=0.92)  # fixed margins: tight_layout costs seconds
    _save_figure(fig, path)
    plt.close(fig)
    return path


def curve_temperatures(res, n_other: int = 3) -> list[int]:
    """Indices of temperatures to draw: the best at the largest and smallest k, then spread over the grid."""
    picks = [int(res.best_index[-1]), int(res.best_index[0])]
    for t in np.linspace(0, res.temperatures.size - 1, n_other + 2).round().astype(int):
        if len(set(picks)) >= 2 + n_other:
            break
        picks.append(int(t))
    return list(dict.fromkeys(picks))


def plot_plan_curves(res, path) -> str:
    """V against k (log axis) at the best temperatures and a few others, CI bands in sampling mode (not with fewer
    than 10 prompts, where there is no interval).

    res: a :class:`bonft.plan.PlanResult`; path: a file path (missing folders are made)."""
    _check_object("res", res, _PLAN, (*_PLAN_ATTRS, "lo", "hi", "budgets", "confidence"))
    path = _out(_check_path(path))
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    ks = res.ks
    bands = getattr(res, "intervals_valid", res.mode != "exact")  # exact mode, or < 10 prompts: no interval to draw
    for i in curve_temperatures(res):
        t = res.temperatures[i]
        label = f"T={t:g}"
        if i == res.best_index[-1]:
            label += f" (best at k={ks[-1]})"
        elif i == res.best_index[0]:
            label += " (best at k=1)"
        (line,) = ax.plot(ks, res.value[i], lw=1.6, label=label)
        if bands:
            ax.fill_between(ks, res.lo[i], res.hi[i], color=line.get_color(), alpha=0.18, lw=0)
    env = res.value[res.best_index, np.arange(ks.size)]
    ax.plot(ks, env, "k--", lw=1, label="best T at each k")
    for c in res.budgets:
        ax.plot([c.k], [c.value], "kx", ms=7)
        ax.annotate(f"{c.budget:g} {c.kind}", (c.k, c.value), textcoords="offset points", xytext=(4, -10), fontsize=7)
    _log2_k_axis(ax, int(ks[-1]))
    ax.set_xlabel("k (samples per prompt)")
    ax.set_ylabel("best-of-k value V_k(T)")
    band = f", bands: {res.confidence:.0%} CI over prompts" if bands else ""
    ax.set_title(f"best-of-k value against k{band}", fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.subplots_adjust(left=0.1, right=0.98, bottom=0.12, top=0.92)
    _save_figure(fig, path)
    plt.close(fig)
    return path


# ------------------------------------------------------------------ verifier checks
def plot_verifier_check(report, path) -> str:
    """A :class:`bonft.verifiers.VerifierReport`: plot best-of-k (verifier's pick) against pass@k as k grows, to ``path`` (PNG); returns ``path``.

    path: a file path (str or os.PathLike, not a directory)."""
    _check_object("report", report, "a VerifierReport (bonft.testing.check_verifier's result)",
                  ("ks", "pass_at_k", "best_of_k", "ok", "problems"))
    path = _check_path(path)
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 4))
    if report.ks:
        ax.plot(report.ks, report.pass_at_k, "o--", label="pass@k (best true reward among k)")
        ax.plot(report.ks, report.best_of_k, "o-", label="verifier's pick (true reward)")
        ax.set_xscale("log", base=2)
        ax.set_xlabel("k (samples per prompt)")
        ax.set_ylabel("mean true reward")
        ax.legend(loc="best", fontsize=8)
    else:
        ax.text(0.5, 0.5, "no true rewards: no curves", ha="center", va="center")
    status = "OK" if report.ok else "; ".join(p.split(":")[0] for p in report.problems)
    ax.set_title(f"verifier check: {status}", fontsize=9)
    fig.tight_layout()
    _save_figure(fig, _out(path), dpi=100)
    plt.close(fig)
    return str(path)


# ------------------------------------------------------------------ objective checks
def plot_objective_check(report, path) -> str:
    """A :class:`bonft.testing.ObjectiveReport`: mean estimated against exact gradient components, each
    divided by the norm of its exact gradient (every categorical policy's logits; the transformer's
    directional derivatives, over their norm, with their Monte Carlo intervals), on the diagonal when the credit is
    unbiased; to ``path`` (PNG, a file path; missing folders are made); returns ``path``."""
    _check_object("report", report, "an ObjectiveReport (bonft.testing.check_objective's result)",
                  ("cases", "transformer", "ok", "problems", "max_rel_error", "target", "k", "n"))
    path = _out(_check_path(path))
    plt = _plt()
    fig, ax = plt.subplots(figsize=(5.6, 5.0))
    pts = []
    for j, c in enumerate(report.cases):
        scale = max(float(np.linalg.norm(c["exact"])), 1e-12)
        ex, est = np.asarray(c["exact"]) / scale, np.asarray(c["estimate"]) / scale
        ax.plot(ex, est, "o", ms=5, alpha=0.8, label=f"policy {j + 1}: logits" if j < 6 else None)
        pts += [*ex, *est]
    tr = report.transformer
    if tr:
        rows = tr["directions"]
        scale = max(float(np.linalg.norm([r["finite_diff"] for r in rows])), 1e-12)  # norm over the directions
        ex = np.array([r["finite_diff"] for r in rows]) / scale
        mc = np.array([r["mc_mean"] for r in rows]) / scale
        err = np.array([[r["mc_mean"] - r["mc_lo"] for r in rows], [r["mc_hi"] - r["mc_mean"] for r in rows]]) / scale
        ax.errorbar(ex, mc, yerr=err, fmt="s", color="black", ms=5, capsize=3,
                    label="transformer: Monte Carlo mean, 99.9% interval")
        if rows[0]["expected"] is not None:
            ax.plot(ex, np.array([r["expected"] for r in rows]) / scale, "x", color="red", ms=8,
                    label="transformer: exact mean")
        pts += [*ex, *(mc - err[0]), *(mc + err[1])]
    lim = max(abs(v) for v in pts) * 1.08 if pts else 1.0
    ax.plot([-lim, lim], [-lim, lim], "k--", lw=0.8, label="unbiased (estimate = exact)")
    ax.set_xlim(-lim, lim)
    ax.set_ylim(-lim, lim)
    ax.set_xlabel("exact gradient component / |exact gradient|\n(transformer: finite differences along a direction)")
    ax.set_ylabel("mean of the credit's gradient estimate / |exact gradient|")
    status = "OK" if report.ok else f"{len(report.problems)} problem(s), relative bias {report.max_rel_error:.3g}"
    ax.set_title(f"objective check, {report.target}, k={report.k}, n={report.n}: {status}", fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper left")
    fig.subplots_adjust(left=0.14, right=0.97, bottom=0.14, top=0.93)
    _save_figure(fig, path, dpi=100)
    plt.close(fig)
    return path


# ------------------------------------------------------------------ strategies side by side


def plot_strategy_curves(curves: dict, path, *, title: str | None = None) -> str:
    """V_k against k for each strategy of each labelled :class:`bonft.strategies.curves.StrategyCurves`.

    One panel per label (a temperature, a policy), one line per strategy with its bootstrap band
    (``bonft estimate --strategy ... --plot-dir``, ``bonft plan --strategy ... --plot-dir``).

    curves: a non-empty dict of label -> StrategyCurves; path: a file path (missing folders are made).
    """
    if not isinstance(curves, Mapping):
        raise TypeError(f"curves must be a dict of label -> StrategyCurves, got {type(curves).__name__}")
    if not curves:
        raise ValueError("curves must hold at least one label, got an empty dict")
    for lab, c in curves.items():
        _check_object(f"curves[{lab!r}]", c, "a StrategyCurves (bonft.strategies.compare_strategies' result)",
                      ("ks", "names", "mean", "lo", "hi", "intervals_valid"))
    path = _check_path(path)
    plt = _plt()
    labels = list(curves)
    fig, axes = plt.subplots(1, len(labels), figsize=(4.6 * len(labels), 3.8), squeeze=False, sharey=True)
    colors = {"best_of_k": "tab:blue", "majority_vote": "tab:orange", "weighted_vote": "tab:green", "pass_at_k": "0.4"}
    for ax, lab in zip(axes[0], labels):
        c = curves[lab]
        ks = np.asarray(c.ks, dtype=float)
        for s in c.names:
            style = "--" if s == "pass_at_k" else "-"
            ax.plot(ks, c.mean[s], style, marker="o", ms=3, color=colors.get(s), label=s)
            if c.intervals_valid:
                ax.fill_between(ks, c.lo[s], c.hi[s], color=colors.get(s), alpha=0.15, lw=0)
        if ks.max() > 1:
            _log2_k_axis(ax, int(ks.max()))
        ax.set_xlabel("k (samples per prompt)")
        ax.set_title(lab or "")
        ax.grid(alpha=0.3)
    axes[0][0].set_ylabel("V_k: mean reward served")
    axes[0][-1].legend(fontsize=8, loc="lower right")
    if title:
        fig.suptitle(title)
    fig.tight_layout()
    path = _out(path)
    _save_figure(fig, path, dpi=100)
    plt.close(fig)
    return str(path)
