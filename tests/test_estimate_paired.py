"""bonft.estimate.paired: bad arguments are refused with the argument's name (the numbers themselves are
checked against scipy, a t table and brute-force enumeration in test_train_demo.py)."""
import math

import numpy as np
import pytest

from bonft.estimate.paired import (
    bootstrap_mean,
    paired_bootstrap,
    paired_comparison,
    paired_table,
    per_prompt_curves,
    seed_comparison,
    t_interval,
)

NAN = float("nan")


def curves(P: int, K: int = 2, proxy: bool = True) -> dict:
    rng = np.random.default_rng(P)
    c = {"pass": rng.random((P, K))}
    if proxy:
        c["proxy"] = rng.random((P, K))
    return c


@pytest.mark.parametrize("a, b, kw, err, match", [
    ([1, 2, 3.0], [1.0], {}, ValueError, r"b must hold as many prompts as a \(P=3.*got 1"),
    ([1, NAN], [1, 2], {}, ValueError, r"a must be finite, got nan"),
    ([1, 2], [1, float("inf")], {}, ValueError, r"b must be finite, got inf"),
    ([], [], {}, ValueError, r"a must not be empty"),
    ([[1, 2]], [[1, 2]], {}, ValueError, r"a must have 1 dimension"),
    ("ab", [1, 2], {}, TypeError, r"a must be an array of numbers"),
    ([1, 2.0], [1, 3.0], {"n_boot": 0}, ValueError, r"n_boot must be >= 1, got n_boot=0"),
    ([1, 2.0], [1, 3.0], {"seed": 1.5}, TypeError, r"seed must be an int, got float 1.5"),
    ([1, 2.0], [1, 3.0], {"seed": -1}, ValueError, r"seed must be >= 0"),
    ([1, 2.0], [1, 3.0], {"confidence": 1}, ValueError, r"confidence must be in \(0, 1\), got confidence=1"),
    ([1, 2.0], [1, 3.0], {"confidence": 0}, ValueError, r"confidence must be in \(0, 1\)"),
])
def test_paired_bootstrap_refuses_bad_arguments(a, b, kw, err, match):
    with pytest.raises(err, match=match):
        paired_bootstrap(a, b, **kw)


def test_bootstrap_mean_refuses_non_finite_values():
    with pytest.raises(ValueError, match=r"a must be finite, got nan at index \(0,\)"):
        bootstrap_mean([NAN, 1.0])


def test_paired_bootstrap_of_a_constant_difference_is_that_constant():
    # every resample of a constant difference has that mean: a zero-width interval (exact by construction)
    assert paired_bootstrap([0.5, 0.75, 1.0], [0.25, 0.5, 0.75], n_boot=50) == (0.25, 0.25, 0.25)
    assert bootstrap_mean([2.0, 2.0], n_boot=10) == (2.0, 2.0, 2.0)


@pytest.mark.parametrize("t, kw, err, match", [
    ({"A": curves(5), "B": curves(1)}, {}, ValueError,
     r"curves\['B'\]\['pass'\] must cover as many prompts as curves\['A'\] \(P=5.*got P=1"),
    ({"A": curves(5), "B": curves(5)}, {"ks": [1, 2, 4]}, ValueError,
     r"curves\['A'\]\['pass'\] must have one column per k \(len\(ks\)=3\), got shape \(5, 2\)"),
    ({"A": curves(5)}, {"ks": [1]}, ValueError, r"must have one column per k \(len\(ks\)=1\)"),
    ({"A": curves(5)}, {"ks": 2}, TypeError, r"ks must be a sequence of ints .*got int 2"),
    ({"A": curves(5)}, {"ks": [1, 2.0]}, TypeError, r"ks must be a sequence of ints, got float at index 1"),
    ({"A": curves(5)}, {"ks": [0, 2]}, ValueError, r"ks\[0\] must be >= 1"),
    ({"A": curves(5)}, {"baselines": "A"}, TypeError, r"baselines must be a sequence of policy names, got a single str"),
    ({}, {}, ValueError, r"curves must hold at least one policy"),
    ([curves(5)], {}, TypeError, r"curves must be a dict of policy"),
    ({"A": {"proxy": np.zeros((5, 2))}}, {}, ValueError, r"curves\['A'\] must have a 'pass' curve"),
    ({"A": {"pass": np.full((5, 2), NAN)}}, {}, ValueError, r"curves\['A'\]\['pass'\] must be finite"),
    ({"A": curves(5)}, {"confidence": 2}, ValueError, r"confidence must be in \(0, 1\), got confidence=2"),
    ({"A": curves(5)}, {"n_boot": 0}, ValueError, r"n_boot must be >= 1"),
    ({"A": curves(5)}, {"intervals": 1}, TypeError, r"intervals must be a bool, got int 1"),
    ({"A": curves(5), "B": curves(5)}, {"baselines": ["Z"]}, ValueError, r"baselines must be among the policies \['A', 'B'\], got 'Z'"),
])
def test_paired_comparison_refuses_bad_arguments(t, kw, err, match):
    args = {"ks": [1, 2], "baselines": ["A"], "n_boot": 10, **kw}
    with pytest.raises(err, match=match):
        paired_comparison(t, **args)


@pytest.mark.parametrize("values, kw, match", [
    ([1, 2, 3.0], {"confidence": 2}, r"confidence must be in \(0, 1\), got confidence=2"),
    ([], {}, r"values must not be empty"),
    ([1, NAN], {}, r"values must be finite, got nan at index \(1,\)"),
])
def test_t_interval_refuses_bad_arguments(values, kw, match):
    with pytest.raises(ValueError, match=match):
        t_interval(values, **kw)


@pytest.mark.parametrize("per_seed, err, match", [
    ({}, ValueError, r"per_seed must hold at least one seed"),
    ({0: {"A": curves(5), "B": curves(5)}, 1: {"A": curves(5)}}, ValueError,
     r"per_seed\[1\] must hold the same policies as per_seed\[0\] \['A', 'B'\], got \['A'\]"),
    ({0: {"A": curves(5)}, 1: {"A": curves(5), "B": curves(5)}}, ValueError,
     r"per_seed\[1\] must hold the same policies as per_seed\[0\] \['A'\], got \['A', 'B'\]"),
    ({0: {"A": curves(5), "B": curves(3)}}, ValueError, r"per_seed\[0\]\['B'\]\['pass'\] must cover as many prompts"),
    ([{"A": curves(5)}], TypeError, r"per_seed must be a dict of seed"),
])
def test_seed_comparison_refuses_bad_arguments(per_seed, err, match):
    with pytest.raises(err, match=match):
        seed_comparison(per_seed, ks=[1, 2], baselines=["A"])


def test_seed_comparison_refuses_an_unknown_baseline():
    with pytest.raises(ValueError, match=r"baselines must be among the policies \['A'\], got 'Z'"):
        seed_comparison({0: {"A": curves(5)}, 1: {"A": curves(5)}}, ks=[1, 2], baselines=["Z"])


def test_seed_comparison_takes_seeds_with_different_prompt_counts():
    # each seed has its own split: prompt counts may differ between seeds, not within one
    out = seed_comparison({0: {"A": curves(5)}, 1: {"A": curves(3)}}, ks=[1, 2], baselines=["A"])
    assert out["seeds"] == [0, 1]
    assert out["per_seed"]["A"][1][0] == pytest.approx(curves(3)["pass"][:, 0].mean(), abs=1e-15)


@pytest.mark.parametrize("pools, ks, err, match", [
    ({"proxy": np.zeros((2, 4))}, [1], ValueError, r"pools must have 'rewards'.*got keys \['proxy'\]"),
    ({"rewards": np.zeros((2, 4))}, 2, TypeError, r"ks must be a sequence of ints .*got int 2; wrap it in a list"),
    ({"rewards": np.zeros((2, 4))}, "12", TypeError, r"ks must be a sequence of ints, got a single str"),
    (np.zeros((2, 4)), [1], TypeError, r"pools must be a dict with 'rewards'"),
    ({"rewards": np.zeros((2, 4))}, [8], ValueError, r"ks must be <= n \(n=4\), got ks=8"),
])
def test_per_prompt_curves_refuses_bad_arguments(pools, ks, err, match):
    with pytest.raises(err, match=match):
        per_prompt_curves(pools, ks=ks)


def test_paired_comparison_gives_no_zero_width_interval():
    # two policies that solve nothing on 20 prompts: each mean is at the bound 0 of rewards in [0, 1] and gets the
    # exact interval [0, 1 - 0.025^(1/20)] (Clopper & Pearson 1934, 0 of 20); their difference has no spread
    P = 20
    curves = {"a": {"pass": np.zeros((P, 2))}, "b": {"pass": np.zeros((P, 2))}}
    comp = paired_comparison(curves, ks=[1, 4], baselines=["a"], n_boot=200, bounds=(0, 1))
    m, lo, hi = comp["means"]["b"][0]
    assert (m, lo) == (0.0, 0.0) and hi == pytest.approx(1 - 0.025 ** (1 / P), rel=1e-12)
    d, lo, hi = comp["differences"]["a"]["b"][1]
    assert d == 0.0 and math.isnan(lo) and math.isnan(hi)
    assert comp["no_spread"] == ["b - a pass@1", "b - a pass@4"]
    text = paired_table(comp, n_prompts=P)
    assert "0.000 [0.000, 0.168]" in text and "no interval for b - a pass@1, b - a pass@4" in text
    # without a known range the means have no interval either, and are listed
    comp = paired_comparison(curves, ks=[1, 4], baselines=["a"], n_boot=200)
    assert math.isnan(comp["means"]["a"][0][1]) and "a pass@1" in comp["no_spread"]


def test_paired_bootstrap_near_the_edge_of_float64_is_finite_and_exact():
    # values of 1.7e308: a difference of opposite signs or a sum of 12 of them overflowed to inf/NaN (with only
    # numpy's warning); at 2^-64 scale the mean is exact, and equals the same computation on values 2^-64 as large
    from bonft.estimate.paired import paired_bootstrap

    rng = np.random.default_rng(0)
    a, b = rng.uniform(0.5, 0.9, 12), rng.uniform(-0.9, -0.5, 12)
    small = paired_bootstrap(a, b, n_boot=200, seed=1)
    big = paired_bootstrap(a * 2.0**1023, b * 2.0**1023, n_boot=200, seed=1)
    assert all(np.isfinite(big)) and big == tuple(x * 2.0**1023 for x in small)
