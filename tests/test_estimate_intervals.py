"""bonft.estimate.intervals: the percentile bootstrap (coverage against the known mean), default_ks,
and summarize's curves against Chen et al. 2021's pass@k and brute-force k-subset enumeration."""
import itertools
import json
import math
from fractions import Fraction

import numpy as np
import pytest

from bonft.estimate import CurveSummary, bootstrap_ci, default_ks, summarize
from bonft.estimate.intervals import _all_equal_bound
from bonft.viz import plot_best_of_k_curves


def brute_best_of_k(scores, rewards, k) -> Fraction:
    """Average over all k-subsets of the reward the verifier keeps, ties split uniformly (exact rationals)."""
    total, count = Fraction(0), 0
    for sub in itertools.combinations(range(len(scores)), k):
        top = max(scores[i] for i in sub)
        best = [Fraction(rewards[i]) for i in sub if scores[i] == top]
        total += sum(best) / len(best)
        count += 1
    return total / count


def chen_pass_at_k(n, c, k) -> Fraction:
    # Chen et al. 2021, "Evaluating Large Language Models Trained on Code", eq. (1): 1 - C(n-c, k) / C(n, k)
    return 1 - Fraction(math.comb(n - c, k), math.comb(n, k))


@pytest.mark.parametrize(
    "call,exc,match",
    [
        (lambda: bootstrap_ci(np.zeros((3, 2)), confidence=1.0), ValueError, r"confidence must be in \(0, 1\)"),
        (lambda: bootstrap_ci(np.zeros((3, 2)), n_boot=0), ValueError, r"n_boot must be >= 1"),
        (lambda: bootstrap_ci(np.array([1.0, np.nan])), ValueError, r"values must be finite"),
        (lambda: summarize(np.zeros((2, 3)), np.zeros((2, 3)), ks=[4]), ValueError, r"ks must be <= n \(n=3\), got ks=4"),
    ],
)
def test_bad_input_names_the_argument(call, exc, match):
    with pytest.raises(exc, match=match):
        call()


# ----------------------------------------------------------------------------- bootstrap


def test_bootstrap_is_seedable_and_orders_bounds():
    v = np.random.default_rng(0).normal(size=(50, 3))
    a, b = bootstrap_ci(v, seed=7, n_boot=500), bootstrap_ci(v, seed=7, n_boot=500)
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x, y)
    c = bootstrap_ci(v, seed=8, n_boot=500)
    assert not np.array_equal(a[1], c[1])
    mean, lo, hi = a
    np.testing.assert_allclose(mean, v.mean(0), rtol=1e-12)
    assert (lo < mean).all() and (mean < hi).all()
    # percentile interval width ~ 2 * 1.96 * sd / sqrt(P) for a mean (normal approximation, common practice)
    want = 2 * 1.96 * v.std(0, ddof=1) / math.sqrt(50)
    np.testing.assert_allclose(hi - lo, want, rtol=0.2)


def test_bootstrap_covers_true_mean_at_nominal_rate():
    # values ~ N(0.3, 1) per prompt, P = 80: a 90% interval should cover 0.3 in about 90% of repeats
    repeats, hits = 300, 0
    for rep in range(repeats):
        v = np.random.default_rng(1000 + rep).normal(0.3, 1.0, size=80)
        _, lo, hi = bootstrap_ci(v, confidence=0.9, n_boot=400, seed=rep)
        hits += lo <= 0.3 <= hi
    share = hits / repeats
    # binomial sd of the share at 300 repeats is ~0.017; percentile intervals run slightly narrow at P=80
    assert 0.84 <= share <= 0.95, f"coverage {share:.3f} ({hits}/{repeats}) for nominal 0.90"


def test_bootstrap_single_prompt_and_constant_values():
    mean, lo, hi = bootstrap_ci(np.full((1, 2), 0.25))
    np.testing.assert_array_equal(mean, [0.25, 0.25])
    np.testing.assert_array_equal(lo, mean)
    np.testing.assert_array_equal(hi, mean)


@pytest.mark.parametrize("P,conf,want", [
    # Clopper & Pearson 1934, 0 successes of P: upper limit 1 - (alpha/2)^(1/P), written out by hand
    (20, 0.95, 1 - 0.025 ** (1 / 20)),  # 0.16843
    (1, 0.95, 0.975),
    (100, 0.90, 1 - 0.05 ** (1 / 100)),
])
def test_all_at_a_bound_gives_the_clopper_pearson_interval(P, conf, want):
    assert _all_equal_bound(P, conf) == pytest.approx(want, rel=1e-12)
    mean, lo, hi = bootstrap_ci(np.zeros((P, 2)), confidence=conf, bounds=(0, 1))
    np.testing.assert_array_equal(lo, [0, 0])
    np.testing.assert_allclose(hi, want, rtol=1e-12)
    mean, lo, hi = bootstrap_ci(np.full(P, 3.0), confidence=conf, bounds=(-1, 3))  # all at hi: the mirror image
    assert (mean, hi) == (3.0, 3.0) and lo == pytest.approx(3.0 - 4 * want, rel=1e-12)


def test_all_at_a_bound_matches_the_rule_of_three():
    # "rule of three" (Hanley & Lippman-Hand 1983): 3/P approximates the one-sided 95% limit for 0 of P;
    # the one-sided 95% limit is the two-sided 90% one
    for P in (50, 200, 1000):
        assert _all_equal_bound(P, 0.90) == pytest.approx(3 / P, rel=0.08)


def test_all_at_a_bound_covers_a_population_at_the_limit():
    # Coverage simulation (fixed seed). The exact interval [0, w] of an all-zero column misses the mean mu only
    # when mu > w, and P draws are then all 0 with chance (1 - mu)^P < (1 - w)^P = 0.025 for Bernoulli(mu) (the
    # worst case of the Markov step) and less for any other population on [0, 1] with that mean.
    P, conf, repeats = 20, 0.95, 20000
    w = _all_equal_bound(P, conf)
    _, lo, hi = bootstrap_ci(np.zeros(P), confidence=conf, bounds=(0, 1))
    assert (lo, hi) == (0.0, pytest.approx(w, rel=1e-12))
    rng = np.random.default_rng(11)
    for mu in (w * 0.999, w * 1.001, 0.3):
        bern = rng.random((repeats, P)) < mu  # Bernoulli(mu)
        zinf = (rng.random((repeats, P)) < 2 * mu) * rng.random((repeats, P))  # 0 or Uniform(0, 1): mean mu
        for draws in (bern, zinf):
            all_zero = (draws == 0).all(axis=1).mean()
            missed = all_zero if mu > hi else 0.0  # the all-zero draws are the only ones given this interval
            assert missed <= 0.025 + 4 * math.sqrt(0.025 * 0.975 / repeats), (mu, missed)
    # just outside the limit the Bernoulli population misses at the nominal 2.5%: the bound is tight, not loose
    share = ((rng.random((repeats, P)) < w * 1.001) == 0).all(axis=1).mean()
    assert abs(share - 0.025) <= 4 * math.sqrt(0.025 * 0.975 / repeats), share


def test_bootstrap_bounds_are_checked():
    with pytest.raises(ValueError, match=r"values must lie within bounds \[0, 1\], got 1.5"):
        bootstrap_ci(np.array([0.0, 1.5]), bounds=(0, 1))
    with pytest.raises(ValueError, match=r"bounds must be \(lo, hi\) with lo < hi"):
        bootstrap_ci(np.zeros(3), bounds=(1, 0))
    with pytest.raises(TypeError, match=r"bounds must be None or a pair"):
        bootstrap_ci(np.zeros(3), bounds=1)


def test_bounds_leave_columns_with_spread_unchanged():
    v = np.random.default_rng(5).random((30, 3))
    for x, y in zip(bootstrap_ci(v, n_boot=300, seed=2), bootstrap_ci(v, n_boot=300, seed=2, bounds=(0, 1))):
        np.testing.assert_array_equal(x, y)


def test_summary_of_all_zero_rewards_has_an_exact_interval():
    P = 20
    summ = summarize(np.random.default_rng(0).random((P, 4)), np.zeros((P, 4)), n_boot=200)
    assert summ.bounds == (0.0, 1.0)
    np.testing.assert_allclose(summ.pass_at_k_hi, 1 - 0.025 ** (1 / P), rtol=1e-12)  # Clopper & Pearson 1934
    assert "[0.0000, 0.1684]" in summ.table() and "no spread" not in summ.table()
    assert "zero_spread_note" not in summ.to_dict()


def test_summary_flags_zero_spread_where_the_range_is_unknown():
    P = 20
    summ = summarize(np.zeros((P, 4)), np.full((P, 4), 2.0), n_boot=200)  # rewards beyond [0, 1]
    assert summ.bounds is None
    text = summ.table()
    assert "no spread" in text and "[2.0000, 2.0000]" not in text
    assert "no interval for best-of-k k=1" in text and "the value range is unknown" in text
    d = summ.to_dict()
    assert d["bounds"] is None and d["pass_at_k_no_interval"] == [True, True, True]
    assert "not confidence intervals" in d["zero_spread_note"]
    # in [0, 1] but not at a bound: still no interval, and said so
    text = summarize(np.zeros((P, 4)), np.full((P, 4), 0.5), n_boot=200).table()
    assert "no spread" in text and "at neither bound 0 or 1" in text


# ----------------------------------------------------------------------------- summary


def test_default_ks():
    assert default_ks(1) == [1]
    assert default_ks(8) == [1, 2, 4, 8]
    assert default_ks(12) == [1, 2, 4, 8, 12]
    with pytest.raises(ValueError, match=r"smallest_pool must be >= 1"):
        default_ks(0)


def test_summarize_binary_rewards_table_dict_and_plot(tmp_path):
    rng = np.random.default_rng(3)
    P, n = 40, 12
    r = (rng.random((P, n)) < rng.random((P, 1))).astype(float)
    s = r + rng.normal(0, 0.7, (P, n))  # an imperfect verifier
    summ = summarize(s, r, n_boot=300, seed=1)
    assert isinstance(summ, CurveSummary)
    assert list(summ.ks) == [1, 2, 4, 8, 12] and summ.n_prompts == P and summ.smallest_pool == n
    c = r.sum(1).astype(int)
    want = np.stack([[float(chen_pass_at_k(n, ci, k)) for k in summ.ks] for ci in c])  # Chen et al. 2021
    np.testing.assert_allclose(summ.per_prompt_pass_at_k, want, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(summ.pass_at_k_mean, want.mean(0), rtol=1e-10)
    assert (summ.pass_at_k_mean >= summ.best_of_k_mean - 1e-12).all()  # a verifier cannot beat pass@k
    assert summ.best_of_k_mean[0] == pytest.approx(r.mean(), abs=1e-12)
    d = summ.to_dict()
    back = json.loads(json.dumps(d))
    assert back["ks"] == [1, 2, 4, 8, 12] and len(back["per_prompt_best_of_k"]) == P
    assert back["pass_at_k_mean"] == pytest.approx(list(want.mean(0)), rel=1e-10)
    text = summ.table()
    assert f"prompts: {P}" in text and f"{summ.best_of_k_mean[-1]:.4f}" in text and "95% CI" in text
    out = plot_best_of_k_curves({"": summ}, tmp_path / "c.png")
    assert open(out, "rb").read(8) == b"\x89PNG\r\n\x1a\n"
    plot_best_of_k_curves({"T=0.6": summ, "T=1": summ}, tmp_path / "two.png")
    assert (tmp_path / "two.png").stat().st_size > 1000
    with pytest.raises(TypeError, match=r"curves\['x'\] must be a CurveSummary"):
        plot_best_of_k_curves({"x": 1}, tmp_path / "bad.png")


def test_summarize_ragged_pools():
    rng = np.random.default_rng(4)
    ss = [rng.normal(size=m) for m in (5, 9, 5, 7)]
    rr = [rng.integers(0, 2, size=m).astype(float) for m in (5, 9, 5, 7)]
    summ = summarize(ss, rr, n_boot=100)
    assert list(summ.ks) == [1, 2, 4, 5] and summ.smallest_pool == 5
    want = np.stack([[float(brute_best_of_k(list(s), list(r), k)) for k in (1, 2, 4, 5)] for s, r in zip(ss, rr)])
    np.testing.assert_allclose(summ.per_prompt_best_of_k, want, rtol=1e-10, atol=1e-12)


def test_reward_bounds_are_known_only_for_rewards_in_the_unit_interval():
    from bonft.estimate import reward_bounds

    assert reward_bounds(np.array([[0.0, 1.0], [0.5, 1.0]])) == (0.0, 1.0)
    assert reward_bounds([np.array([0.0]), np.array([1.0, 0.25, 0.0])]) == (0.0, 1.0)  # ragged pools
    assert reward_bounds(np.array([[0.0, 1.5]])) is None and reward_bounds([np.array([-0.1])]) is None


def test_values_near_the_edge_of_float64_give_finite_intervals():
    # the percentile bootstrap commutes with a positive scale (same seed, same resamples: every replicate mean scales),
    # so values of +-1.7e308 give 1e300 times the interval of the values / 1e300; their sums overflowed to inf
    rng = np.random.default_rng(0)
    v = rng.choice([1.7e308, -1.7e308, 0.0, 1e308], (12, 3))
    m, lo, hi = bootstrap_ci(v, n_boot=500, seed=2)
    m1, lo1, hi1 = bootstrap_ci(v / 1e300, n_boot=500, seed=2)
    for got, want in ((m, m1), (lo, lo1), (hi, hi1)):
        assert np.isfinite(got).all()
        np.testing.assert_allclose(got, want * 1e300, rtol=1e-12)
    s = summarize(rng.random((12, 5)), np.full((12, 5), 1.7e308), ks=[1, 2])
    assert (s.per_prompt_best_of_k == 1.7e308).all() and (s.per_prompt_pass_at_k == 1.7e308).all()
    np.testing.assert_allclose([s.best_of_k_mean, s.pass_at_k_hi], 1.7e308, rtol=1e-15)  # a mean of 12 equal values


def test_a_confidence_level_is_printed_as_given_never_rounded_to_100():
    # 0.9999999 was labelled "100% CI", a level no interval has
    from bonft._core.bootstrap import confidence_label

    assert [confidence_label(c) for c in (0.95, 0.9999999, 0.975, 0.07)] == ["95%", "99.99999%", "97.5%", "7%"]
    s = summarize(np.zeros((10, 3)), np.tile([0.0, 1.0, 0.5], (10, 1)), ks=[1], confidence=0.9999999, n_boot=50)
    assert "99.99999% CI" in s.table() and "100%" not in s.table()


def test_one_value_from_pools_of_different_sizes_has_no_spread_despite_rounding():
    # rewards alternating 0.2 / 0.9 in pools of 6, 10, 14, 22 and 30 samples: every pool's mean reward is 0.55, which
    # the estimators give as 0.55, 0.5499999999999999 or 0.5499999999999998 (checked below):
    # a column of one value up to rounding has no spread, for pass@1 as for best-of-1 (one table printed both ways)
    from bonft._core.bootstrap import no_interval_columns
    from bonft.estimate import pass_at_k_per_prompt, summarize

    sizes = [6, 10, 14, 22, 30] * 4
    rewards = [np.resize([0.2, 0.9], n) for n in sizes]
    scores = [np.arange(n, dtype=float) for n in sizes]
    v = pass_at_k_per_prompt(rewards, ks=[1])[:, 0]
    assert np.abs(v - 0.55).max() <= 4e-16
    assert len(set(v.tolist())) > 1  # rounding differs between pool sizes
    assert no_interval_columns(v, (0.0, 1.0)).tolist() == [True]
    s = summarize(scores, rewards, ks=[1])
    assert s.no_interval("pass_at_k").tolist() == [True] and s.no_interval("best_of_k").tolist() == [True]
    assert no_interval_columns(np.array([0.55, 0.5500001]), None).tolist() == [False]  # a real difference stays one
