"""Plots of a :class:`bonft.plan_result.PlanResult` (matplotlib, Agg backend, PNG)."""
from __future__ import annotations

import os

import numpy as np


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


def _log2_k_axis(ax, kmax: int) -> None:
    """k on a log axis with ticks 1, 2, 4, ... labelled as plain numbers (no minor ticks)."""
    from matplotlib.ticker import FixedLocator, NullLocator

    ax.set_xscale("log")
    ticks = [2**i for i in range(int(np.log2(kmax)) + 1)]
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xticklabels([str(t) for t in ticks])


def plot_heatmap(res, path) -> str:
    """V over (temperature rows, k columns on a log axis); circles mark the best temperature per k."""
    plt = _plt()
    path = _out(path)
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
    if res.mode != "exact":
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
    fig.savefig(path)
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


def plot_curves(res, path) -> str:
    """V against k (log axis) at the best temperatures and a few others, CI bands in sampling mode."""
    plt = _plt()
    path = _out(path)
    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    ks = res.ks
    for i in curve_temperatures(res):
        t = res.temperatures[i]
        label = f"T={t:g}"
        if i == res.best_index[-1]:
            label += f" (best at k={ks[-1]})"
        elif i == res.best_index[0]:
            label += " (best at k=1)"
        (line,) = ax.plot(ks, res.value[i], lw=1.6, label=label)
        if res.mode != "exact":
            ax.fill_between(ks, res.lo[i], res.hi[i], color=line.get_color(), alpha=0.18, lw=0)
    env = res.value[res.best_index, np.arange(ks.size)]
    ax.plot(ks, env, "k--", lw=1, label="best T at each k")
    for c in res.budgets:
        ax.plot([c.k], [c.value], "kx", ms=7)
        ax.annotate(f"{c.budget:g} {c.kind}", (c.k, c.value), textcoords="offset points", xytext=(4, -10), fontsize=7)
    _log2_k_axis(ax, int(ks[-1]))
    ax.set_xlabel("k (samples per prompt)")
    ax.set_ylabel("best-of-k value V_k(T)")
    band = "" if res.mode == "exact" else f", bands: {res.confidence:.0%} CI over prompts"
    ax.set_title(f"best-of-k value against k{band}", fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.subplots_adjust(left=0.1, right=0.98, bottom=0.12, top=0.92)
    fig.savefig(path)
    plt.close(fig)
    return path
