"""The vote estimators (bonft.strategies.estimators) against brute force over every k-subset of a pool (the
U-statistic's definition, Hoeffding 1948; majority vote with uniform ties, Wang et al. 2023; weighted vote by
total score, Li et al. 2023): values, leave-one-out credit, the sampled weighted-vote estimate, one reward per
answer unless a stated rule resolves it, and weighted-vote scores as non-negative weights.
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from strategy_refs import brute_pool, random_pool

from bonft.strategies import (
    majority_vote_credit,
    majority_vote_per_prompt,
    strategy_credit,
    weighted_vote_credit,
    weighted_vote_per_prompt,
)


def _weighted_served(idx, ans, w, rew) -> float:
    """Reward served by a weighted vote on the samples idx, from the rule as documented: the answer with
    the largest total weight wins (ties uniform among the tied answers); one of its samples is served."""
    tot = {}
    for i in idx:
        tot[ans[i]] = tot.get(ans[i], 0.0) + w[i]
    top = max(tot.values())
    win = [a for a in tot if tot[a] == top]
    return float(np.mean([np.mean([rew[i] for i in idx if ans[i] == a]) for a in win]))


def _brute(ans, w, rew, k) -> float:
    return float(np.mean([_weighted_served(S, ans, w, rew) for S in itertools.combinations(range(len(rew)), k)]))


@pytest.mark.parametrize("seed", range(6))
def test_weighted_vote_with_non_negative_weights_matches_every_k_subset(seed):
    # weights include exact zeros (an answer present with total 0 still ties when all totals are 0)
    # and repeats (ties between answers); one reward per answer
    rng = np.random.default_rng(seed)
    n = 9
    ans = rng.integers(0, 4, n)
    w = rng.choice([0.0, 0.0, 0.25, 0.5, 1.0, 2.0], n)
    rew = np.array([1.0, 0.0, 0.5, 0.0])[ans]
    got, se = weighted_vote_per_prompt([ans], [w], [rew], ks=list(range(1, n + 1)))
    want = [_brute(ans, w, rew, k) for k in range(1, n + 1)]
    np.testing.assert_allclose(got[0], want, atol=1e-13)
    assert (se == 0).all()


def test_weighted_vote_all_zero_weights_is_a_uniform_tie():
    # by hand: every total is 0, so every answer among the k ties: k = 2 of answers (a, a, b) with
    # rewards (1, 1, 0): {0,1} serves a (1), {0,2} and {1,2} tie a/b (0.5 each) -> V_2 = 2/3
    v, _ = weighted_vote_per_prompt([["a", "a", "b"]], [[0.0, 0.0, 0.0]], [[1.0, 1.0, 0.0]], ks=[2])
    assert abs(v[0, 0] - 2 / 3) < 1e-15


def test_negative_weights_are_refused_naming_the_argument():
    with pytest.raises(ValueError, match=r"scores\[1\] must be non-negative weights for weighted_vote "
                                         r"\(exponentiate log-probabilities first\), got -0.5 at sample 2"):
        weighted_vote_per_prompt([[0, 1, 1], [0, 0, 1]], [[1.0, 1.0, 1.0], [0.2, 0.1, -0.5]],
                                 [[1.0, 0.0, 0.0], [1.0, 1.0, 0.0]], ks=[2])
    with pytest.raises(ValueError, match=r"scores\[0\] must be non-negative"):
        weighted_vote_credit([[0, 1, 1]], [[-1.0, 1.0, 1.0]], [[1.0, 0.0, 0.0]], k=2)


def test_one_answer_with_two_rewards_is_refused_naming_prompt_and_answer():
    ans = [["7", "7", "3"], ["12", "x", "12", "12"]]
    rew = [[1.0, 1.0, 0.0], [1.0, 0.0, 1.0, 0.0]]  # prompt 1: answer '12' rewarded 1 and 0
    msg = (r"rewards\[1\] must be one value per answer for majority_vote, got answer '12' with rewards 1 \(sample 0\) "
           r"and 0 \(sample 3\); pass conflicts='mean' to serve the mean reward of the answer's samples")
    with pytest.raises(ValueError, match=msg):
        majority_vote_per_prompt(ans, rew, ks=[1])
    square = ([["a", "a", "b"]], [[1.0, 0.0, 1.0]])
    with pytest.raises(ValueError, match=r"rewards\[0\] must be one value per answer for majority_vote, got answer 'a'"):
        majority_vote_credit(*square, k=2)
    with pytest.raises(ValueError, match=r"rewards\[0\] must be one value per answer for weighted_vote, got answer 'a'"):
        weighted_vote_per_prompt(square[0], [[1.0, 1.0, 1.0]], square[1], ks=[2])
    with pytest.raises(ValueError, match=r"rewards\[0\] must be one value per answer for weighted_vote"):
        strategy_credit("weighted_vote", [[1.0, 1.0, 1.0]], square[1], answers=square[0], k=2)
    with pytest.raises(ValueError, match=r"conflicts must be one of"):
        majority_vote_per_prompt(*square, ks=[1], conflicts="first")


def test_conflicts_mean_serves_the_mean_of_the_winners_samples():
    # by hand, pool (a, a, b) with rewards (1, 0, 1), k = 2: {0,1} a wins, mean(1, 0) = 0.5; {0,2} and
    # {1,2} tie a/b, so (1 + 1)/2 = 1 and (0 + 1)/2 = 0.5 -> V_2 = 2/3; k = 1: the mean reward 2/3
    v = majority_vote_per_prompt([["a", "a", "b"]], [[1.0, 0.0, 1.0]], ks=[1, 2], conflicts="mean")
    np.testing.assert_allclose(v[0], [2 / 3, 2 / 3], atol=1e-15)
    w, _ = weighted_vote_per_prompt([["a", "a", "b"]], [[1.0, 1.0, 1.0]], [[1.0, 0.0, 1.0]], ks=[2], conflicts="mean")
    # weights 1 each: {0,1} a (total 2) wins -> 0.5; {0,2}, {1,2}: totals 1 and 1 tie -> 1 and 0.5
    assert abs(w[0, 0] - 2 / 3) < 1e-15


# ---------------------------------------------------------------------------- against enumeration


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_majority_estimator_equals_all_k_subsets(seed):
    # reference: the U-statistic, every k-subset of a pool of 9 for every k
    a, s, r = random_pool(seed, 9)
    got = majority_vote_per_prompt([a], [r], ks=range(1, 10), conflicts="mean")[0]
    want = [brute_pool("majority_vote", a, s, r, k) for k in range(1, 10)]
    np.testing.assert_allclose(got, want, atol=1e-13)


def test_weighted_estimator_exact_and_sampled():
    # reference: every k-subset; the sampled estimate must sit within 4 standard errors
    a, s, r = random_pool(3, 10)
    ks = [1, 3, 6, 10]
    want = [brute_pool("weighted_vote", a, s, r, k) for k in ks]
    val, se = weighted_vote_per_prompt([a], [s], [r], ks=ks, conflicts="mean")
    np.testing.assert_allclose(val[0], want, atol=1e-13)
    assert (se == 0).all()
    val, se = weighted_vote_per_prompt([a], [s], [r], ks=[3, 6], max_subsets=60, seed=1, conflicts="mean")
    assert (se[0] > 0).all() and (np.abs(val[0] - [want[1], want[2]]) < 4 * se[0]).all()


@settings(max_examples=30)
@given(st.lists(st.integers(0, 4), min_size=2, max_size=9), st.integers(0, 2**31 - 1))
def test_majority_estimator_and_credit_property(answers, seed):
    # reference: every k-subset (the U-statistic) for the value, and for the credit its definition
    # w_i = V_k(pool) - V_kb(pool without i), each value by enumeration
    a = np.array(answers)
    n = len(a)
    r = np.random.default_rng(seed).integers(0, 3, n) / 2.0  # ties in rewards too
    got = majority_vote_per_prompt([a], [r], ks=range(1, n + 1), conflicts="mean")[0]
    np.testing.assert_allclose(got, [brute_pool("majority_vote", a, a, r, k) for k in range(1, n + 1)], atol=1e-12)
    k = 1 + seed % n
    kb = min(k, n - 1)
    want = [brute_pool("majority_vote", a, a, r, k)
            - brute_pool("majority_vote", np.delete(a, i), None, np.delete(r, i), kb) for i in range(n)]
    np.testing.assert_allclose(majority_vote_credit([a], [r], k=k, conflicts="mean")[0], want, atol=1e-12)


def test_majority_credit_zero_for_equal_rewards_and_single_sample():
    # common practice: a leave-one-out baseline gives no signal when every reward is equal
    a = np.array([[0, 1, 1, 2, 0]])
    np.testing.assert_allclose(majority_vote_credit(a, np.ones((1, 5)), k=3), 0.0, atol=1e-15)
    np.testing.assert_allclose(majority_vote_credit([[3]], [[0.7]], k=1), [[0.7]])


def test_weighted_credit_sampled_is_unbiased_for_exact():
    # the sampled credit averaged over seeds approaches the exact credit (all subsets) of the pool
    a, s, r = random_pool(5, 8)
    exact = weighted_vote_credit([a], [s], [r], k=3, conflicts="mean")
    runs = np.stack([weighted_vote_credit([a], [s], [r], k=3, max_subsets=50, seed=q, conflicts="mean") for q in range(200)])
    sd = runs.std(0) / math.sqrt(len(runs))
    assert (np.abs(runs.mean(0) - exact) < 5 * sd + 1e-12).all()


def test_torch_in_torch_out():
    a = torch.tensor([[0, 1, 1, 0]])
    r = torch.tensor([[1.0, 0.0, 0.0, 1.0]], dtype=torch.float32)
    w = majority_vote_credit(a, r, k=2)
    assert isinstance(w, torch.Tensor) and w.dtype == torch.float32 and w.shape == (1, 4)


# ---------------------------------------------------------------------------- missing and NaN answer keys

class _Alone:
    """A key equal only to itself: a missing answer voting alone, as the samples file's null does."""


@pytest.mark.parametrize("answers", [["a", None, "a", None, "b"], np.array(["a", None, "a", None, "b"], dtype=object),
                                     [None, None, "a", "b", "a"], [None, None, None, None, None]])
def test_a_missing_answer_votes_alone(answers):
    # reference: every k-subset, with each None replaced by a key of its own (Counter counts each once)
    n = len(answers)
    alone = [_Alone() if v is None else v for v in answers]
    r = np.array([1.0, 0.0, 1.0, 0.0, 0.5])[:n] if answers[0] is not None else np.array([0.0, 1.0, 0.5, 0.0, 0.5])
    s = np.array([0.5, 0.9, 0.2, 0.4, 0.7])
    ks = list(range(1, n + 1))
    want_mv = [brute_pool("majority_vote", alone, s, r, k) for k in ks]
    want_wv = [brute_pool("weighted_vote", alone, s, r, k) for k in ks]
    np.testing.assert_allclose(majority_vote_per_prompt([answers], [r], ks=ks)[0], want_mv, atol=1e-13)
    np.testing.assert_allclose(weighted_vote_per_prompt([answers], [s], [r], ks=ks)[0][0], want_wv, atol=1e-13)
    for k in (1, 2, 3):  # the credit's definition: V_k(pool) - V_kb(pool without i), each by enumeration
        kb = min(k, n - 1)
        want = [want_mv[k - 1] - brute_pool("majority_vote", alone[:i] + alone[i + 1:], None, np.delete(r, i), kb)
                for i in range(n)]
        np.testing.assert_allclose(majority_vote_credit([answers], [r], k=k)[0], want, atol=1e-12)
        want = [want_wv[k - 1] - brute_pool("weighted_vote", alone[:i] + alone[i + 1:], np.delete(s, i), np.delete(r, i), kb)
                for i in range(n)]
        np.testing.assert_allclose(weighted_vote_credit([answers], [s], [r], k=k)[0], want, atol=1e-12)


def test_the_auditors_pool_with_missing_answers():
    # by hand for k = 2 of (a, -, a, -, b), rewards (1, 0, 1, 0, 0): of the 10 pairs only {0, 2} has a
    # majority (a, served 1); the other 9 tie two answers, served the mean of their rewards: 0.5 for the 6
    # pairs holding one a, 0 for the 3 others -> (1 + 6 * 0.5) / 10 = 0.4
    v = majority_vote_per_prompt([["a", None, "a", None, "b"]], [[1.0, 0.0, 1.0, 0.0, 0.0]], ks=[2])
    assert abs(v[0, 0] - 0.4) < 1e-15


@pytest.mark.parametrize("answers", [[1.0, float("nan"), float("nan"), 2.0], np.array([1.0, np.nan, np.nan, 2.0]),
                                     ["a", float("nan"), float("nan"), "b"], torch.tensor([1.0, float("nan"), 2.0, 1.0])])
def test_a_nan_answer_key_is_refused(answers):
    r = [[1.0, 0.0, 0.0, 1.0]]
    msg = r"answers\[0\] must not hold NaN as an answer key \(NaNs would count as one answer\), got NaN at sample 1; " \
          r"pass None for a missing answer"
    for call in (lambda: majority_vote_per_prompt([answers], r, ks=[2]), lambda: majority_vote_credit([answers], r, k=2),
                 lambda: weighted_vote_per_prompt([answers], [[1.0] * 4], r, ks=[2]),
                 lambda: weighted_vote_credit([answers], [[1.0] * 4], r, k=2)):
        with pytest.raises(ValueError, match=msg):
            call()


def test_keys_that_cannot_be_compared_name_the_missing_answer_spelling():
    with pytest.raises(TypeError, match=r"answers\[0\] must hold comparable keys \(ints or strings, or None for a "
                                        r"missing answer, which votes alone\), got dtype object"):
        majority_vote_per_prompt([np.array(["a", 1, "a"], dtype=object)], [[1.0, 0.0, 1.0]], ks=[2])


def test_vote_values_lie_in_the_pools_reward_range_and_a_constant_pool_is_exact():
    # a vote serves one of the pool's rewards, so its value is a mean of them: a pool of equal rewards c gives c
    # exactly (rounding of the subset counts could show as 0.30000000000000004 for c = 0.3)
    rng = np.random.default_rng(5)
    ans = [rng.integers(0, 4, 12) for _ in range(3)]
    for c in (0.3, 1.0, -2.5):
        flat = [np.full(12, c)] * 3
        assert (majority_vote_per_prompt(ans, flat, ks=list(range(1, 13))) == c).all()
        val, _ = weighted_vote_per_prompt(ans, [rng.random(12) for _ in range(3)], flat, ks=[1, 2, 5, 12])
        assert (val == c).all()


def test_vote_values_scale_with_the_rewards_up_to_the_edge_of_float64():
    # linearity of expectation: V(a r + b) = a V(r) + b. With n = 200 the subset counts reach C(200, 100) ~ 9e58, so
    # rewards of 1e260 overflowed to inf in the count programme; the weighted vote's subset mean overflowed at 1e308
    rng = np.random.default_rng(2)
    ans = rng.integers(0, 5, 200)
    r = np.array([0.9, 0.1, 0.5, 0.0, 1.0])[ans]
    ks = [1, 10, 100, 200]
    base = majority_vote_per_prompt([ans], [r], ks=ks)
    np.testing.assert_allclose(majority_vote_per_prompt([ans], [1e260 * r], ks=ks), 1e260 * base, rtol=1e-12)
    np.testing.assert_allclose(majority_vote_per_prompt([ans], [1e308 * (2 * r - 1)], ks=ks),
                               1e308 * (2 * base - 1), rtol=1e-12, atol=1e293)
    w = rng.random(8)
    a8, r8 = ans[:8], r[:8]
    v, _ = weighted_vote_per_prompt([a8], [w], [r8], ks=[1, 3, 8])
    big, _ = weighted_vote_per_prompt([a8], [w], [1.7e308 * r8], ks=[1, 3, 8])
    assert np.isfinite(big).all()
    np.testing.assert_allclose(big, 1.7e308 * v, rtol=1e-12)


@pytest.mark.parametrize("scale", [1e-12, 1e-200, 1e200])
def test_weighted_vote_estimate_does_not_depend_on_the_scale_of_the_weights(scale):
    # every k-subset enumerated by _brute at scale 1: the vote compares total weights, so a positive rescale serves
    # the same answers; totals below ~1e-12 all tied under an absolute tolerance (0.4667 became 0.5 at 1e-12)
    rng = np.random.default_rng(4)
    ans, w = rng.integers(0, 3, 8), rng.random(8)
    rew = np.array([1.0, 0.0, 0.25])[ans]
    ks = [1, 2, 3, 5, 8]
    want = [_brute(ans, w, rew, k) for k in ks]
    got, _ = weighted_vote_per_prompt([ans], [scale * w], [rew], ks=ks)
    np.testing.assert_allclose(got[0], want, rtol=1e-12)


def test_k_above_the_smallest_pool_names_that_pool():
    with pytest.raises(ValueError, match=r"ks must be <= the smallest pool \(n=1, answers\[1\]; the largest holds 3\)"):
        majority_vote_per_prompt([[1, 2, 3], [1]], [[0.0, 0.0, 0.0], [1.0]], ks=3)
    with pytest.raises(ValueError, match=r"ks must be <= the smallest pool \(n=2, answers\[0\]"):
        weighted_vote_per_prompt([[1, 2], [1, 1, 2]], [[1.0, 1.0], [1.0, 1.0, 1.0]], [[0.0, 1.0], [0.0, 0.0, 1.0]], ks=3)
