"""bonft.viz draws the numbers it is given: the lines of a figure against brute-force references.

Each figure is captured when the plotting function closes it, and its line data are compared with
values computed here from their definitions (every k-subset of a pool; pass@k by Chen et al. 2021).
"""
import itertools
from math import comb
from types import SimpleNamespace

import numpy as np
import pytest

from bonft import viz
from bonft.estimate import summarize


@pytest.fixture()
def closed_figures(monkeypatch):
    """The figures the plotting functions close, in order."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    seen, close = [], plt.close

    def keep(fig=None):
        seen.append(fig)
        close(fig)

    monkeypatch.setattr(plt, "close", keep)
    return seen


def _brute_best_of_k(s, r, k):
    """Mean over every k-subset of the reward kept by the highest score (ties: mean of the tied rewards)."""
    vals = []
    for sub in itertools.combinations(range(len(s)), k):
        top = max(s[i] for i in sub)
        vals.append(np.mean([r[i] for i in sub if s[i] == top]))
    return float(np.mean(vals))


def test_estimator_curves_draw_best_of_k_and_pass_at_k(tmp_path, closed_figures):
    rng = np.random.default_rng(0)
    P, n, ks = 12, 6, [1, 2, 4]
    rewards = (rng.random((P, n)) < 0.4).astype(float)
    scores = rng.integers(0, 3, (P, n)).astype(float)  # ties in scores
    summary = summarize(scores, rewards, ks=ks, n_boot=50, seed=0)
    path = viz.plot_best_of_k_curves({"T=1": summary}, tmp_path / "curves.png")
    assert (tmp_path / "curves.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert path == str(tmp_path / "curves.png")
    (fig,) = closed_figures
    pass_line, best_line = fig.axes[0].lines
    c = rewards.sum(1).astype(int)
    want_pass = [np.mean([1 - comb(n - ci, k) / comb(n, k) for ci in c]) for k in ks]  # Chen et al. 2021
    want_best = [np.mean([_brute_best_of_k(scores[p], rewards[p], k) for p in range(P)]) for k in ks]
    np.testing.assert_array_equal(pass_line.get_xdata(), ks)
    np.testing.assert_allclose(pass_line.get_ydata(), want_pass, atol=1e-12)
    np.testing.assert_allclose(best_line.get_ydata(), want_best, atol=1e-12)
    assert pass_line.get_linestyle() == "--" and best_line.get_linestyle() == "-"
    assert pass_line.get_label().startswith("T=1: pass@k") and best_line.get_label().startswith("T=1: best-of-k")


def test_plan_curves_pick_the_best_temperatures_then_spread_over_the_grid():
    # 8 temperatures, best at k=1 is index 2, best at the largest k is index 5; the spread is
    # round(linspace(0, 7, 5)) = round([0, 1.75, 3.5, 5.25, 7]) = [0, 2, 4, 5, 7] (numpy rounds half to even)
    res = SimpleNamespace(best_index=np.array([2, 3, 5]), temperatures=np.linspace(0.4, 1.8, 8))
    assert viz.curve_temperatures(res) == [5, 2, 0, 4, 7]
    assert viz.curve_temperatures(res, n_other=1) == [5, 2, 0]
    one = SimpleNamespace(best_index=np.array([0, 0]), temperatures=np.array([1.0]))
    assert viz.curve_temperatures(one) == [0]


def test_bad_curves_name_the_argument(tmp_path):
    with pytest.raises(TypeError, match="curves must be a non-empty dict of label -> CurveSummary, got list"):
        viz.plot_best_of_k_curves([], tmp_path / "x.png")
    with pytest.raises(TypeError, match=r"curves\['a'\] must be a CurveSummary, got dict"):
        viz.plot_best_of_k_curves({"a": {}}, tmp_path / "x.png")
