"""bonft.estimate.bestofk against outside references: exact integer formulas, brute-force
enumeration of k-subsets, normal order-statistics tables, scipy integration."""
import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from bonft.estimate import (
    best_of_k,
    best_of_k_per_prompt,
    pass_at_k_per_prompt,
    summarize,
)

# ----------------------------------------------------------------------------- references (independent of bonft)


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


def test_bon_at_k_worked_example_with_ties():
    # hand-enumerated: scores [0.1, .5, .5, .9, .2], rewards [1, 0, 1, 0, 1]
    s, r = [0.1, 0.5, 0.5, 0.9, 0.2], [1, 0, 1, 0, 1]
    got = best_of_k(s, r, k=[1, 2, 3, 4, 5])
    want = [float(brute_best_of_k(s, r, k)) for k in range(1, 6)]  # brute-force enumeration of k-subsets
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-15)
    # k = 2 by hand: 10 pairs; the 4 pairs containing 0.9 give 0; the pair of the two tied .5 gives 1/2;
    # (.1,.5a)=0 (.1,.5b)=1 (.2,.5a)=0 (.2,.5b)=1 (.1,.2)=1 -> (0.5 + 3) / 10 = 0.35
    assert got[1] == pytest.approx(0.35, abs=1e-14)


pools = st.integers(1, 8).flatmap(
    lambda n: st.tuples(
        st.lists(st.integers(0, 3), min_size=n, max_size=n),  # few distinct scores -> many ties
        st.lists(st.integers(-3, 5), min_size=n, max_size=n),
    )
)


@given(pools)
@settings(max_examples=60)
def test_bon_at_k_equals_brute_force_enumeration(pool):
    s, r = pool
    n = len(s)
    got = best_of_k(np.array(s, float), np.array(r, float), k=list(range(1, n + 1)))
    want = [float(brute_best_of_k(s, r, k)) for k in range(1, n + 1)]  # brute force, uniform tie-breaking
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)


@given(st.lists(st.tuples(st.integers(0, 4), st.integers(0, 1)), min_size=1, max_size=9))
@settings(max_examples=40)
def test_oracle_with_binary_rewards_is_chen_pass_at_k(pairs):
    r = np.array([b for _, b in pairs], float)
    n, c = len(r), int(r.sum())
    got = pass_at_k_per_prompt(r[None, :], ks=list(range(1, n + 1)))[0]
    want = [float(chen_pass_at_k(n, c, k)) for k in range(1, n + 1)]  # Chen et al. 2021 eq. (1)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)


# ----------------------------------------------------------------------------- expected maximum of k normals

# E[max of k iid N(0,1)]: Harter (1961), "Expected values of normal order statistics", Biometrika 48,
# table of expected values of the largest order statistic (values quoted from memory to 4 decimals).
HARTER = {2: 0.5642, 3: 0.8463, 5: 1.1630, 10: 1.5388}


def expected_max_normal(k):
    # E[max] = int x * k * phi(x) * Phi(x)^(k-1) dx (order-statistic density), scipy quadrature
    f = lambda x: x * k * stats.norm.pdf(x) * stats.norm.cdf(x) ** (k - 1)
    return integrate.quad(f, -12, 12)[0]


def test_harter_table_agrees_with_scipy_integration():
    for k, v in HARTER.items():
        assert expected_max_normal(k) == pytest.approx(v, abs=6e-5), k


def test_bon_of_normal_draws_matches_expected_maximum():
    rng = np.random.default_rng(123)
    P, n = 4000, 20
    x = rng.standard_normal((P, n))
    ks = sorted(HARTER)
    per = best_of_k_per_prompt(x, x, ks=ks)  # score = reward: best-of-k keeps the max
    mean = per.mean(0)
    se = per.std(0, ddof=1) / math.sqrt(P)
    for j, k in enumerate(ks):
        # within 4 standard errors of Harter (1961) and of the scipy integral
        assert abs(mean[j] - HARTER[k]) < 4 * se[j], f"k={k}: {mean[j]:.4f} vs {HARTER[k]} (se {se[j]:.4f})"
        assert abs(mean[j] - expected_max_normal(k)) < 4 * se[j]
    # k = 1 is the sample mean of the rewards
    np.testing.assert_allclose(best_of_k_per_prompt(x, x, ks=1), x.mean(1), rtol=1e-12, atol=1e-14)


# ----------------------------------------------------------------------------- large n through log-gamma


def test_large_pool_matches_expected_max_of_k_subset_of_ranks():
    # E[max of a uniform k-subset of {1..n}] = k (n + 1) / (k + 1): the classical sampling-without-replacement
    # maximum (e.g. Goodman 1952 on serial-number estimation; "German tank problem")
    n, k = 100_000, 10_000
    ranks = np.random.default_rng(0).permutation(n).astype(float) + 1
    got = best_of_k(ranks, ranks, k=[1, 100, k, n])
    want = [(kk * (n + 1)) / (kk + 1) for kk in (1, 100, k, n)]
    assert np.isfinite(got).all()
    np.testing.assert_allclose(got, want, rtol=1e-9)


def test_large_pool_binary_matches_chen_stable_product():
    n, k = 100_000, 10_000
    r = np.zeros(n)
    r[[5, 77, 90_000]] = 1.0
    got = best_of_k(r, r, k=k)  # oracle: reward as score
    # Chen et al. 2021, Fig. 3 stable product
    assert got == pytest.approx(1 - np.prod(1 - k / np.arange(n - 2, n + 1)), rel=1e-9)


def test_large_pool_matches_exact_integer_sum():
    # direct sum with exact integers: the sample at ascending score rank j is kept in C(j-1, k-1) of the
    # C(n, k) subsets (a k-subset's maximum is at rank j iff the other k-1 come from the j-1 below it)
    n, k = 100_000, 10_000
    ranks = np.random.default_rng(2).permutation(n) + 1  # scores = ranks, in shuffled order
    value = {10_000: 1, 50_000: 2, 99_000: 3, 99_999: 4}  # reward of the sample at each rank
    r = np.zeros(n)
    for j, v in value.items():
        r[ranks == j] = v
    exact = sum(v * math.comb(j - 1, k - 1) for j, v in value.items()) / math.comb(n, k)
    got = best_of_k(ranks.astype(float), r, k=k)
    assert math.isfinite(got) and exact > 0.09
    assert got == pytest.approx(exact, rel=1e-9)


# ----------------------------------------------------------------------------- properties

grids = st.integers(1, 4).flatmap(
    lambda P: st.integers(1, 10).flatmap(
        lambda n: st.tuples(
            st.lists(st.lists(st.integers(-5, 5), min_size=n, max_size=n), min_size=P, max_size=P),
            st.lists(st.lists(st.integers(-4, 6), min_size=n, max_size=n), min_size=P, max_size=P),
            st.randoms(use_true_random=False),
        )
    )
)


@given(grids)
@settings(max_examples=40)
def test_invariant_to_permuting_samples_and_monotone_score_transform(case):
    s, r, rnd = case
    S, R = np.array(s, float), np.array(r, float)
    P, n = S.shape
    ks = list(range(1, n + 1))
    base = best_of_k_per_prompt(S, R, ks=ks)
    perm = np.array([rnd.sample(range(n), n) for _ in range(P)])
    np.testing.assert_allclose(best_of_k_per_prompt(np.take_along_axis(S, perm, 1), np.take_along_axis(R, perm, 1), ks=ks),
                               base, rtol=1e-10, atol=1e-12)
    # strictly increasing transforms keep the verifier's order (and its ties)
    np.testing.assert_allclose(best_of_k_per_prompt(np.exp(S / 3.0) * 7 - 2, R, ks=ks), base, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(best_of_k_per_prompt(S ** 3 + S, R, ks=ks), base, rtol=1e-10, atol=1e-12)
    # k = 1: the verifier plays no part, the value is the mean reward
    np.testing.assert_allclose(base[:, 0], R.mean(1), rtol=1e-12, atol=1e-12)
    # with reward = score the value is the expected max, nondecreasing in k, ending at the pool max
    orc = pass_at_k_per_prompt(R, ks=ks)
    assert (np.diff(orc, axis=1) >= -1e-12).all()
    np.testing.assert_allclose(orc[:, -1], R.max(1), rtol=1e-12, atol=1e-12)
    # the value always lies in the range of the pool's rewards
    assert (base >= R.min(1, keepdims=True) - 1e-12).all() and (base <= R.max(1, keepdims=True) + 1e-12).all()


@given(st.lists(st.integers(2, 9), min_size=1, max_size=6), st.integers(0, 10_000))
@settings(max_examples=30)
def test_ragged_equals_per_prompt(sizes, seed):
    rng = np.random.default_rng(seed)
    ss = [np.round(rng.normal(size=m), 1) for m in sizes]  # rounding makes ties
    rr = [rng.integers(0, 3, size=m).astype(float) for m in sizes]
    ks = [1, 2] if min(sizes) >= 2 else [1]
    got = best_of_k_per_prompt(ss, rr, ks=ks)
    want = np.stack([[float(brute_best_of_k(list(s), list(r), k)) for k in ks] for s, r in zip(ss, rr)])
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(got, np.stack([best_of_k(s, r, k=ks) for s, r in zip(ss, rr)]), rtol=1e-12)


def test_list_of_pools_mixes_with_a_2d_array():
    S = np.array([[0.1, 0.4, 0.4], [0.9, 0.2, 0.5]])
    R = np.array([[1.0, 0.0, 1.0], [0.0, 1.0, 1.0]])
    want = [[float(brute_best_of_k(list(s), list(r), k)) for k in (1, 2)] for s, r in zip(S, R)]  # brute force
    np.testing.assert_allclose(best_of_k_per_prompt(list(S), R, ks=[1, 2]), want, rtol=1e-12)
    np.testing.assert_allclose(best_of_k_per_prompt(S, [list(r) for r in R], ks=[1, 2]), want, rtol=1e-12)
    with pytest.raises(TypeError, match=r"rewards must be a list of 1-D arrays or a 2-D array"):
        best_of_k_per_prompt(list(S), R[0], ks=1)


@given(st.lists(st.tuples(st.integers(0, 5), st.integers(-3, 3), st.integers(0, 2)), min_size=1, max_size=8),
       st.sampled_from([1.0, -1.0, 1e300, -1e-300, 0.0]))
@settings(max_examples=60)
def test_near_ties_signed_zeros_and_extremes_match_brute_force(items, base):
    # scores a few ulps apart (the fast sort keys drop low bits, so these must take the exact path),
    # both signed zeros (equal as numbers, hence tied) and huge magnitudes of both signs
    s = []
    for step, sign, kind in items:
        x = base
        for _ in range(step):
            x = np.nextafter(x, np.inf)
        s.append([x, -0.0 if sign < 0 else 0.0, float(np.sign(sign)) * 1e308][kind])
    n = len(s)
    r = [float((7 * i) % 5) for i in range(n)]
    got = best_of_k(np.array(s), np.array(r), k=list(range(1, n + 1)))
    want = [float(brute_best_of_k(s, r, k)) for k in range(1, n + 1)]  # brute force with Python float comparisons
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)


def test_near_ties_in_a_large_pool_match_argsort_reference():
    # 300 pools of 600 samples whose scores differ by 0..40 ulps: most fall inside one fast-sort key bucket
    rng = np.random.default_rng(9)
    P, n = 300, 600
    S = 1.0 + rng.integers(0, 40, size=(P, n)) * np.spacing(1.0)
    R = rng.normal(size=(P, n))
    ks = [1, 3, 50, 600]
    got = best_of_k_per_prompt(S, R, ks=ks)
    # reference: stable argsort + tie-group means + exact integer weights C(i, k-1) / C(n, k)
    for p in range(0, P, 37):
        o = np.argsort(S[p], kind="stable")
        s, r = S[p][o], R[p][o]
        vals, inv = np.unique(s, return_inverse=True)
        r = (np.bincount(inv, weights=r) / np.bincount(inv))[inv]
        for j, k in enumerate(ks):
            want = sum(Fraction(math.comb(i, k - 1)) * Fraction(float(r[i])) for i in range(n)) / math.comb(n, k)
            assert got[p, j] == pytest.approx(float(want), rel=1e-9, abs=1e-12)


def test_torch_input_and_scalar_k_shapes():
    rng = np.random.default_rng(5)
    S, R = rng.normal(size=(3, 6)), rng.normal(size=(3, 6))
    a = best_of_k_per_prompt(S, R, ks=[1, 3])
    b = best_of_k_per_prompt(torch.from_numpy(S), torch.from_numpy(R), ks=torch.tensor([1, 3]))
    np.testing.assert_allclose(a, b, rtol=0, atol=0)
    assert a.shape == (3, 2)
    assert best_of_k_per_prompt(S, R, ks=3).shape == (3,)
    assert isinstance(best_of_k(S[0], R[0], k=3), float)
    assert best_of_k(S[0], R[0], k=[3]).shape == (1,)


# ----------------------------------------------------------------------------- bad input


@pytest.mark.parametrize(
    "call,exc,match",
    [
        (lambda: best_of_k([1.0, np.nan], [0, 1], k=1), ValueError, r"scores must be finite, got nan at index \(1,\)"),
        (lambda: best_of_k([1.0, 2.0], [0, np.inf], k=1), ValueError, r"rewards must be finite, got inf"),
        (lambda: best_of_k([1.0, 2.0], [0, 1], k=0), ValueError, r"k must be >= 1, got k=0"),
        (lambda: best_of_k(np.zeros(8), np.zeros(8), k=16), ValueError, r"k must be <= n \(n=8\), got k=16"),
        (lambda: best_of_k([1.0, 2.0], [0, 1, 1], k=1), ValueError, r"rewards must have the same shape as scores"),
        (lambda: best_of_k([], [], k=1), ValueError, r"scores must not be empty"),
        (lambda: best_of_k([1.0], [1.0], k=1.0), TypeError, r"k must be an int or a sequence of ints, got float"),
        (lambda: best_of_k("abc", [1.0], k=1), TypeError, r"scores must be an array of numbers"),
        (lambda: best_of_k(np.zeros((2, 2)), np.zeros((2, 2)), k=1), ValueError, r"scores must have 1 dimension"),
        (lambda: best_of_k_per_prompt(np.zeros((2, 4)), np.zeros((2, 4)), ks=[1, 5]), ValueError,
         r"ks must be <= n \(n=4\), got ks=5"),
        (lambda: best_of_k_per_prompt([np.zeros(3), np.zeros(2)], [np.zeros(3), np.zeros(3)], ks=1), ValueError,
         r"rewards\[1\] must have the same shape as scores\[1\]"),
        (lambda: best_of_k_per_prompt([np.zeros(3), np.zeros(2)], [np.zeros(3)], ks=1), ValueError,
         r"rewards must hold one pool per prompt like scores \(2\), got 1"),
        (lambda: best_of_k_per_prompt([np.zeros(3), np.zeros(2)], [np.zeros(3), np.zeros(2)], ks=3), ValueError,
         r"ks must be <= the smallest pool \(n=2, scores\[1\]; the largest holds 3\), got ks=3"),
        (lambda: best_of_k_per_prompt([np.zeros(3), np.array([])], [np.zeros(3), np.array([])], ks=1), ValueError,
         r"scores\[1\] must not be empty"),
        (lambda: best_of_k_per_prompt(np.zeros((0, 3)), np.zeros((0, 3)), ks=1), ValueError,
         r"scores must hold at least one prompt's pool, got no prompts"),
        (lambda: best_of_k_per_prompt([], [], ks=[1]), ValueError, r"scores must hold at least one prompt's pool, got no prompts"),
        (lambda: best_of_k_per_prompt(np.zeros(0), np.zeros(0), ks=[1]), ValueError, r"got no prompts"),
        (lambda: best_of_k_per_prompt(np.zeros((2, 3)), np.zeros((2, 3)), ks=[]), ValueError, r"ks must not be empty"),
        # integers beyond 2**53 round as float64 (2**53 + 1 -> 2**53) and would tie: refused, not mis-ranked
        (lambda: best_of_k(np.array([2**53, 2**53 + 1, 0]), [1, 0, 0], k=2), ValueError,
         r"scores must be integers of magnitude <= 2\*\*53 .*got 9007199254740993"),
        (lambda: best_of_k([2**53, 2**53 + 1, 0], [1, 0, 0], k=2), ValueError, r"got 9007199254740993"),
        (lambda: best_of_k(torch.tensor([2**53, 2**53 + 1, 0]), [1, 0, 0], k=2), ValueError, r"got 9007199254740993"),
        (lambda: best_of_k([2**70, 0], [1, 0], k=1), ValueError, r"got 1180591620717411303424"),
        (lambda: best_of_k_per_prompt(np.array([[-(2**53) - 1, 0]]), np.zeros((1, 2)), ks=1), ValueError,
         r"scores must be integers of magnitude <= 2\*\*53 .*got -9007199254740993"),
        (lambda: best_of_k_per_prompt([np.array([3, 2**60])], [np.zeros(2)], ks=1), ValueError,
         r"scores\[0\] must be integers of magnitude <= 2\*\*53"),
    ],
)
def test_bad_input_names_the_argument(call, exc, match):
    with pytest.raises(exc, match=match):
        call()


def test_integer_scores_up_to_2_53_are_ranked_exactly():
    # brute-force enumeration of the C(3, 2) = 3 pairs: {2**53, 2**53 - 1} and {2**53, 0} keep the reward-1 sample,
    # {2**53 - 1, 0} keeps a reward-0 one: best-of-2 = 2/3
    assert best_of_k(np.array([2**53, 2**53 - 1, 0]), [1, 0, 0], k=2) == pytest.approx(2 / 3, rel=1e-15)
    assert best_of_k([-(2**53), 3, 0], [1, 0, 0], k=2) == 0.0  # the lowest score is never kept


# ----------------------------------------------------------------------------- values stay inside the pool's range


def test_a_pool_of_ones_gives_exactly_one_for_every_n_and_k():
    # a mean of rewards that are all 1 is 1 (no rounding can be allowed to show): one row and several rows,
    # which take different matrix-product paths; the auditor's worst case was n = 29, k = 1 -> 1.0000000000000002
    for n in range(1, 257):
        ks = list(range(1, n + 1))
        for rows in (1, 3):
            got = pass_at_k_per_prompt(np.ones((rows, n)), ks=ks)
            assert (got == 1.0).all(), (n, rows, got[got != 1.0][:3])


def test_the_auditors_constant_column_gets_the_exact_interval():
    # 10 prompts x 12 samples, every reward 1, scores j/12: summarize raised "values must lie within bounds [0, 1],
    # got 1.0000000000000007". Every value is 1; the exact interval for 10 values all at 1 is
    # [0.025^(1/10), 1] = [0.6915, 1] (Clopper & Pearson 1934, 0 failures in 10 at 95%)
    s = summarize(np.tile(np.arange(12.0) / 12, (10, 1)), np.ones((10, 12)), ks=[7])
    assert (s.per_prompt_best_of_k == 1.0).all() and (s.per_prompt_pass_at_k == 1.0).all()
    assert s.best_of_k_mean[0] == 1.0 and s.best_of_k_hi[0] == 1.0
    assert s.best_of_k_lo[0] == pytest.approx(0.025 ** (1 / 10), rel=1e-12)
    assert not s.no_interval("best_of_k").any() and "no spread" not in s.table()


@given(st.integers(1, 40), st.integers(0, 2**31 - 1), st.sampled_from([0.1, 1 / 3, -7.25, 1e-300, 3e300]))
@settings(max_examples=60)
def test_every_value_lies_in_the_pools_reward_range_and_a_constant_pool_is_exact(n, seed, c):
    # best-of-k and pass@k are means of the pool's rewards (U-statistic weights sum to 1, hockey-stick identity):
    # each lies in [min r, max r]; a pool whose rewards all equal c gives c exactly
    rng = np.random.default_rng(seed)
    ks = list(range(1, n + 1))
    scores = rng.integers(0, 4, (3, n)).astype(float)  # ties included
    r = c * rng.choice([0.5, 1.0, 1.0, 2.0], (3, n))
    for got in (best_of_k_per_prompt(scores, r, ks=ks), pass_at_k_per_prompt(r, ks=ks)):
        assert (got >= r.min(1)[:, None]).all() and (got <= r.max(1)[:, None]).all()
    flat = np.full((3, n), c)
    assert (best_of_k_per_prompt(scores, flat, ks=ks) == c).all()
    assert (pass_at_k_per_prompt(flat, ks=ks) == c).all()


@pytest.mark.parametrize("rewards, scores, want", [
    # every reward the largest float64: each value is that reward (the sum of weights times it overflowed to inf)
    (np.full(6, np.finfo(float).max), np.arange(6.0), [np.finfo(float).max] * 3),
    (np.full(6, -np.finfo(float).max), np.arange(6.0), [-np.finfo(float).max] * 3),
    # all scores tied: the served reward is the pool's mean, (3 * 1e308 - 3 * 1e308) / 6 = 0 (was NaN: the sum overflowed)
    (np.array([1e308, -1e308] * 3), np.zeros(6), [0.0] * 3),
])
def test_rewards_at_the_edge_of_float64_give_finite_exact_values(rewards, scores, want):
    got = best_of_k(scores, rewards, k=[1, 2, 6])
    np.testing.assert_array_equal(got, want)


def test_rewards_of_both_signs_near_the_edge_match_brute_force():
    # brute-force enumeration of k-subsets in exact rationals; the estimate was inf or NaN
    s = [0.3, 0.1, 0.9, 0.5, 0.7]
    r = [1e308, -1.5e308, 1.7e308, -1e308, 5.0]
    got = best_of_k(s, r, k=[1, 2, 3, 4, 5])
    want = [float(brute_best_of_k(s, r, k)) for k in range(1, 6)]
    np.testing.assert_allclose(got, want, rtol=1e-13)


def test_k_above_the_smallest_of_ragged_pools_names_that_pool():
    # one short pool caps k for every prompt: the error says which one
    s = [np.arange(5.0), np.zeros(1), np.arange(9.0)]
    with pytest.raises(ValueError, match=r"ks must be <= the smallest pool \(n=1, scores\[1\]; the largest holds 9\), "
                                         r"got ks=8"):
        best_of_k_per_prompt(s, s, ks=[1, 8])
    with pytest.raises(ValueError, match=r"ks must be <= the smallest pool \(n=1, scores\[1\]"):
        summarize(s, s, ks=[2])
    with pytest.raises(ValueError, match=r"ks must be <= n \(n=3\), got ks=4"):  # equal pools: n is every pool's size
        best_of_k_per_prompt(np.zeros((2, 3)), np.zeros((2, 3)), ks=4)
