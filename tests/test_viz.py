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


def _band(K):
    return {"mean": [0.5] * K, "lo": [0.4] * K, "hi": [0.6] * K}


def _eval(K=2):
    return {"ks": [1, 2][:K], "step": 3, "pass_at_k": _band(K), "best_of_k": {"proxy": _band(K)}}


_PAIRED = {"columns": [("pass@1", "pass", 0), ("pass@2", "pass", 1)], "means": {"A": [(0.1, 0.0, 0.2)] * 2},
           "differences": {"A": {}}}


@pytest.mark.parametrize("call, err, match", [
    (lambda p: viz.plot_plan_heatmap(None, p), TypeError, r"res must be a PlanResult .*got NoneType"),
    (lambda p: viz.plot_plan_curves(5, p), TypeError, r"res must be a PlanResult .*got int"),
    (lambda p: viz.plot_verifier_check(None, p), TypeError, r"report must be a VerifierReport .*got NoneType"),
    (lambda p: viz.plot_objective_check(None, p), TypeError, r"report must be an ObjectiveReport .*got NoneType"),
    (lambda p: viz.plot_strategy_curves({"x": 1}, p), TypeError, r"curves\['x'\] must be a StrategyCurves .*got int"),
    (lambda p: viz.plot_strategy_curves({}, p), ValueError, r"curves must hold at least one label, got an empty dict"),
    (lambda p: viz.plot_evaluations([{"ks": [1, 2]}], p), ValueError,
     r"evals\[0\] must have the fields .*missing 'step', 'pass_at_k', 'best_of_k'"),
    (lambda p: viz.plot_evaluations([], p), ValueError, r"evals must not be empty"),
    (lambda p: viz.plot_evaluations(_eval(), p), TypeError, r"evals must be a list of evaluation dicts, got a single dict"),
    (lambda p: viz.plot_evaluations([{**_eval(), "ks": [1, 2, 4]}], p), ValueError,
     r"evals\[0\]\['pass_at_k'\]\['mean'\] must hold one value per k \(len\(ks\)=3\), got 2"),
    (lambda p: viz.plot_evaluations([{**_eval(), "ks": [0, 2]}], p), ValueError, r"evals\[0\]\['ks'\]\[0\] must be >= 1"),
    (lambda p: viz.plot_comparison({"a": {}}, p), ValueError, r"results\['a'\] must have the fields 'ks', 'pass_at_k'"),
    (lambda p: viz.plot_comparison({}, p), ValueError, r"results must hold at least one policy, got an empty dict"),
    (lambda p: viz.plot_comparison({"a": {**_eval(), "best_of_k": {"proxy": {"mean": [1, 1]}}}}, p), ValueError,
     r"results\['a'\]\['best_of_k'\]\['proxy'\] must have 'lo'"),
    (lambda p: viz.plot_paired_differences({}, p, ks=[1]), ValueError,
     r"comparison must have 'columns', 'means' and 'differences'"),
    (lambda p: viz.plot_paired_differences(_PAIRED, p, ks=[1]), ValueError,
     r"ks must give one k per pass@k column of comparison \(2\), got 1 ks"),
    (lambda p: viz.plot_paired_differences({**_PAIRED, "differences": {"A": {"B": [(0, 0, 0)] * 2}}}, p, ks=[1, 2]),
     ValueError, r"comparison\['differences'\]\['A'\] names policy 'B', which is not among"),
])
def test_bad_figure_data_is_refused_before_a_figure_is_made(tmp_path, closed_figures, call, err, match):
    with pytest.raises(err, match=match):
        call(tmp_path / "x.png")
    assert closed_figures == [] and list(tmp_path.iterdir()) == []


def test_a_good_evaluation_is_still_drawn(tmp_path, closed_figures):
    out = viz.plot_evaluations([_eval()], tmp_path / "e.png")
    assert out == tmp_path / "e.png" and out.read_bytes()[:4] == b"\x89PNG"
    (fig,) = closed_figures
    np.testing.assert_array_equal(fig.axes[0].lines[0].get_ydata(), [0.5, 0.5])


FIGURES = ["best_of_k", "evaluations", "comparison", "paired", "verifier", "strategy"]


def _drawer(plot: str):
    """path -> the figure ``plot`` drawn there from small valid data."""
    rng = np.random.default_rng(0)
    summary = summarize(rng.random((6, 2)), (rng.random((6, 2)) < 0.5).astype(float), ks=[1, 2], n_boot=10)
    return {"best_of_k": lambda p: viz.plot_best_of_k_curves({"a": summary}, p),
            "evaluations": lambda p: viz.plot_evaluations([_eval()], p),
            "comparison": lambda p: viz.plot_comparison({"a": _eval()}, p),
            "paired": lambda p: viz.plot_paired_differences(_PAIRED, p, ks=[1, 2]),
            "verifier": lambda p: viz.plot_verifier_check(_verifier_report(), p),
            "strategy": lambda p: viz.plot_strategy_curves({"T=1": _strategy_curves()}, p)}[plot]


@pytest.mark.parametrize("path, err, match", [
    (None, TypeError, r"path must be a file path \(str or os.PathLike\), got NoneType None"),
    (3, TypeError, r"path must be a file path \(str or os.PathLike\), got int 3"),
    ("", ValueError, r"path must be a file path, got an empty string"),
    ("DIR", ValueError, r"path must be a file path, got an existing directory: .*figs"),
    # savefig adds .png to a bare name (matplotlib's savefig.format), so the returned path would name no file
    ("curves", ValueError, r"path must end in a figure format's extension \(.*\.png.*\), got 'curves' with no extension"),
    ("curves.txt", ValueError, r"got 'curves.txt' with the extension .txt, which matplotlib cannot write"),
])
@pytest.mark.parametrize("plot", FIGURES)
def test_the_path_must_be_a_file_path(tmp_path, monkeypatch, closed_figures, plot, path, err, match):
    folder = tmp_path / "figs"
    folder.mkdir()
    monkeypatch.chdir(tmp_path)  # None or a folder used to give None.png / figs.png in the working directory
    draw = _drawer(plot)
    with pytest.raises(err, match=match):
        draw(str(folder) if path == "DIR" else path)
    assert closed_figures == [] and sorted(p.name for p in tmp_path.iterdir()) == ["figs"]
    assert list(folder.iterdir()) == []


@pytest.mark.parametrize("plot", FIGURES)
def test_every_figure_makes_its_missing_folders(tmp_path, plot):
    draw = _drawer(plot)
    out = tmp_path / "a" / "b" / "fig.png"
    draw(out)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


@pytest.mark.parametrize("plot", FIGURES)
def test_a_figure_that_cannot_be_written_whole_leaves_the_previous_one(tmp_path, monkeypatch, plot):
    # a full disk part-way through the PNG: the figure goes to a temporary file first, so the previous figure
    # stays as it was (not a cut PNG), no temporary file is left, and the error names the figure's path
    import errno

    from matplotlib.figure import Figure

    draw, out = _drawer(plot), tmp_path / "fig.png"
    draw(out)
    good = out.read_bytes()
    real = Figure.savefig

    def half_then_full(self, fname, *a, **kw):
        if hasattr(fname, "write"):
            fname.write(good[: len(good) // 2])
        else:
            with open(fname, "wb") as fh:
                fh.write(good[: len(good) // 2])
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(Figure, "savefig", half_then_full)
    with pytest.raises(OSError, match=r"No space left on device") as err:
        draw(out)
    monkeypatch.setattr(Figure, "savefig", real)
    assert err.value.filename == str(out)
    assert out.read_bytes() == good and sorted(p.name for p in tmp_path.iterdir()) == ["fig.png"]


def _verifier_report():
    from bonft.testing import check_verifier
    from bonft.verifiers import ExactMatch

    pools = [{"prompt": "2+2?", "responses": ["answer: 4", "answer: 5", "4", "x"], "rewards": [1, 0, 1, 0]}]
    return check_verifier(ExactMatch({"2+2?": "4"}), pools, repeats=2)


def _strategy_curves():
    from bonft.strategies import compare_strategies

    rng = np.random.default_rng(0)
    return compare_strategies(["best_of_k"], ks=[1, 2], rewards=rng.random((5, 4)), scores=rng.random((5, 4)), n_boot=10)


def test_plan_curves_draw_no_bands_and_heatmap_no_marks_without_intervals(closed_figures, tmp_path):
    # fewer than 10 prompts: no interval (the rule of bonft estimate, docs/estimate.md), so no "95% CI" bands and no
    # "not significantly worse" dots; 12 prompts draw both (a band is a PolyCollection from fill_between)
    from matplotlib.collections import PolyCollection

    from bonft.plan import Pools, plan_pools

    rng = np.random.default_rng(0)

    def plan(P):
        s = rng.integers(0, 2, size=(P, 4)).astype(float)
        return plan_pools({0.5: Pools(s, s.copy()), 1.0: Pools(s.copy(), s.copy())}, n_boot=50)

    for P, drawn in ((3, False), (12, True)):
        res = plan(P)
        viz.plot_plan_curves(res, tmp_path / f"c{P}.png")
        viz.plot_plan_heatmap(res, tmp_path / f"h{P}.png")
        curves, heat = closed_figures[-2].axes[0], closed_figures[-1].axes[0]
        assert any(isinstance(c, PolyCollection) for c in curves.collections) == drawn
        assert ("CI over prompts" in curves.get_title()) == drawn
        assert any(ln.get_label() == "not significantly worse" for ln in heat.lines) == drawn
