"""PNG plots of the trainer's evaluations (matplotlib, Agg backend)."""
from __future__ import annotations

from pathlib import Path
from typing import Sequence


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
    """One run: pass@k (left) and best-of-k per verifier (right) versus k, one line per evaluation step."""
    plt, fig, (ax1, ax2) = _axes(2)
    for ev in evals:
        _band(ax1, ev["ks"], ev["pass_at_k"], f"step {ev['step']}")
        for name, c in ev["best_of_k"].items():
            _band(ax2, ev["ks"], c, f"step {ev['step']} ({name})")
    ax1.set_ylabel("pass@k (true reward)")
    ax2.set_ylabel("best-of-k, verifier-selected")
    return _finish(plt, fig, (ax1, ax2), path, title)


def _finish(plt, fig, axes, path, title) -> Path:
    """Shared styling of the k axes (log2, [0, 1]), then save and close."""
    for ax in axes:
        ax.set_xscale("log", base=2)
        ax.set_xlabel("k")
        ax.set_ylim(0, 1)
        ax.grid(alpha=0.3)
        if ax.lines:
            ax.legend(fontsize=8)
    fig.suptitle(title)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


def plot_comparison(results: dict[str, dict], path: str | Path, *, title: str = "") -> Path:
    """Several policies (name -> one evaluation dict): pass@k and best-of-k under the proxy, with CIs."""
    plt, fig, (ax1, ax2) = _axes(2)
    for name, ev in results.items():
        _band(ax1, ev["ks"], ev["pass_at_k"], name)
        if "proxy" in ev["best_of_k"]:
            _band(ax2, ev["ks"], ev["best_of_k"]["proxy"], name)
    ax1.set_ylabel("pass@k (true reward)")
    ax2.set_ylabel("best-of-k, proxy picks (true reward)")
    return _finish(plt, fig, (ax1, ax2), path, title)
