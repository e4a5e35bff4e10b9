"""Exact values on a policy (bonft.strategies.exact and the by-id strategy_value) against every ordered k-tuple
of draws: majority vote with uniform ties (Wang et al. 2023), weighted vote by total weight with non-negative
weights (Li et al. 2023), best-of-k and pass@k; worked cases by hand; the one-reward-per-answer rule."""
from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
import torch
from strategy_refs import ANS, RW, SC, brute_value, mean_rule, policy_probs, read_fields

from bonft.strategies import majority_vote_value, strategy_value, weighted_vote_value


def _brute_weighted(p, ans, w, rew, k) -> float:
    """E over all ordered k-tuples: the answer with the largest total weight wins, ties uniform."""
    total = 0.0
    for t in itertools.product(range(len(p)), repeat=k):
        tot = {}
        for i in t:
            tot[ans[i]] = tot.get(ans[i], 0.0) + w[i]
        top = max(tot.values())
        win = [a for a in tot if tot[a] == top]
        served = np.mean([np.mean([rew[i] for i in t if ans[i] == a]) for a in win])
        total += math.prod(p[i] for i in t) * served
    return total


@pytest.mark.parametrize("k", [1, 2, 3, 4])
def test_weighted_vote_value_with_zero_and_positive_weights_matches_k_tuples(k):
    p = np.array([0.3, 0.1, 0.25, 0.15, 0.2])
    ans = np.array([0, 0, 1, 2, 2])
    w = np.array([0.0, 0.5, 0.5, 1.0, 0.0])
    rew = np.array([1.0, 1.0, 0.0, 0.5, 0.5])
    got = float(weighted_vote_value(p, ans, w, rew, k=k))
    assert abs(got - _brute_weighted(p, ans, w, rew, k)) < 1e-13


def test_negative_weight_and_conflicting_rewards_are_refused():
    p = np.array([0.5, 0.25, 0.25])
    with pytest.raises(ValueError, match=r"scores must be non-negative weights for weighted_vote .*got -0.1 at index \(1,\)"):
        weighted_vote_value(p, [0, 1, 1], [0.2, -0.1, 0.3], [1.0, 0.0, 0.0], k=2)
    with pytest.raises(ValueError, match=r"rewards must be one value per answer for majority_vote, got answer 'y' with "
                                         r"rewards 0 \(outcome 1\) and 1 \(outcome 2\); pass conflicts='mean'"):
        majority_vote_value(p, ["x", "y", "y"], [1.0, 0.0, 1.0], k=2)
    # the stated rule: answer y's reward is the probability-weighted mean of its outcomes, (0 * .25 + 1 * .25) / .5
    v = majority_vote_value(p, ["x", "y", "y"], [1.0, 0.0, 1.0], k=1, conflicts="mean")
    assert abs(float(v) - (0.5 * 1.0 + 0.5 * 0.5)) < 1e-15
    t = torch.tensor([[1.0, 0.0, 0.0], [1.0, 0.0, 1.0]], dtype=torch.float64)  # second row conflicts
    with pytest.raises(ValueError, match="got answer 'y'"):
        majority_vote_value(p, ["x", "y", "y"], t, k=2)


# ---------------------------------------------------------------------------- against enumeration


@pytest.mark.parametrize("rule", ["majority_vote", "weighted_vote", "best_of_k", "pass_at_k"])
@pytest.mark.parametrize("k", [1, 2, 3, 5])
def test_exact_value_equals_k_tuple_enumeration(rule, k):
    # reference: the definition, summed over all 6^k ordered k-tuples
    p = policy_probs()
    got = strategy_value(rule, p, k=k, rewards=RW, **read_fields(rule, SC, ANS), **mean_rule(rule))
    assert abs(float(got) - brute_value(rule, p, k)) < 1e-12


def test_majority_value_batched_and_string_answers():
    # reference: per-row enumeration; answer keys may be strings
    p = np.stack([policy_probs(), np.full(6, 1 / 6)])
    keys = np.array(["7", "7", "x", "x", "y", "y"])
    got = majority_vote_value(p, keys, RW, k=4, conflicts="mean")
    want = [brute_value("majority_vote", row, 4) for row in p]
    np.testing.assert_allclose(got, want, atol=1e-12)
    assert got.shape == (2,)


def test_majority_value_known_case():
    # by hand: two equally likely answers, k = 2 -> ties half the time, V = E[R] = 0.5 for R = (1, 0)
    assert abs(float(majority_vote_value([0.5, 0.5], [0, 1], [1.0, 0.0], k=2)) - 0.5) < 1e-15
    # three draws, answer 0 (correct) with mass p: wins iff it appears >= 2 times -> p^3 + 3p^2(1-p)
    p = 0.3
    assert abs(float(majority_vote_value([p, 1 - p], [0, 1], [1.0, 0.0], k=3)) - (p**3 + 3 * p**2 * (1 - p))) < 1e-15


def test_weighted_vote_known_cases():
    # by hand: two outcomes, one answer each, scores 0.9 > 0.4, k = 2: answer 0 wins unless both
    # draws are outcome 1, so V_2 = 1 - (1 - p)^2 for R = (1, 0)
    p = 0.3
    assert abs(float(weighted_vote_value([p, 1 - p], [0, 1], [0.9, 0.4], [1.0, 0.0], k=2)) - (1 - (1 - p) ** 2)) < 1e-15
    # two samples of answer 1 (0.5 + 0.5) outvote one of answer 0 (0.9); one of each loses to 0.9:
    # V_2 = P(both draws from answer 1) = 0.5^2
    v = weighted_vote_value([0.5, 0.25, 0.25], ["x", "y", "y"], [0.9, 0.5, 0.5], [0.0, 1.0, 1.0], k=2)
    assert abs(float(v) - 0.25) < 1e-15


# ---------------------------------------------------------------------------- k beyond 20 (k! above 2^63)


def _majority_by_counts(q, rew, k) -> float:
    """Majority vote as an exact rational sum over count vectors c ~ Mult(k, q) (one outcome per answer),
    ties split uniformly: sum_c k!/prod c_a! prod q_a^c_a mean_{a in argmax c} R_a."""
    q, rew = [Fraction(x) for x in q], [Fraction(x) for x in rew]
    A, total = len(q), Fraction(0)
    for bars in itertools.combinations(range(k + A - 1), A - 1):
        edges = (-1, *bars, k + A - 1)
        c = [edges[i + 1] - edges[i] - 1 for i in range(A)]
        win = [a for a in range(A) if c[a] == max(c)]
        prob = Fraction(math.factorial(k), math.prod(math.factorial(x) for x in c)) * math.prod(
            qa**ca for qa, ca in zip(q, c))
        total += prob * sum(rew[a] for a in win) / len(win)
    return float(total)


def test_majority_value_at_k_21_equals_every_ordered_draw():
    # reference: all 2^21 ordered draws of two answers (bit j set: draw j is answer 0), each with probability
    # q^c (1-q)^(21-c); answer 0 wins with c > 10.5 (k odd: no ties); R = (1, 0.25)
    k, q = 21, 0.6
    draws = np.arange(2**k, dtype=np.int64)
    c = sum((draws >> j) & 1 for j in range(k))  # draws of answer 0
    prob = q**c * (1 - q) ** (k - c)
    want = float((prob * np.where(c > k - c, 1.0, 0.25)).sum())
    got = float(majority_vote_value([q, 1 - q], [0, 1], [1.0, 0.25], k=k))
    assert abs(got - want) < 1e-13


@pytest.mark.parametrize("q, k", [((0.5, 0.3, 0.2), 21), ((0.5, 0.3, 0.2), 64), ((0.6, 0.4), 150),
                                  ((0.5, 0.5), 150)])
def test_majority_value_up_to_k_150_equals_the_multinomial_sum(q, k):
    # reference: _majority_by_counts, an exact rational sum (Fraction); k = 150 is the documented largest k
    rew = [1.0, 0.0, 0.5][: len(q)]
    got = majority_vote_value(list(q), list(range(len(q))), rew, k=k)
    assert abs(float(got) - _majority_by_counts(q, rew, k)) < 1e-12
    assert abs(float(strategy_value("majority_vote", list(q), k=k, rewards=rew, answers=list(range(len(q)))))
               - float(got)) < 1e-15


@pytest.mark.parametrize("answers, message", [
    (["a", None, "b"], r"answers\[1\] must be an answer key, got None: on a finite outcome set every outcome needs one"),
    (["a", float("nan"), "b"], r"answers\[1\] must be an answer key, got NaN \(NaNs would count as one answer\)"),
    (np.array([0.0, 1.0, np.nan]), r"answers\[2\] must be an answer key, got NaN"),
])
def test_a_missing_or_nan_outcome_key_is_refused(answers, message):
    p, r = np.array([0.2, 0.3, 0.5]), np.array([1.0, 0.0, 0.0])
    with pytest.raises(ValueError, match=message):
        majority_vote_value(p, answers, r, k=2)
    with pytest.raises(ValueError, match=message):
        weighted_vote_value(p, answers, np.ones(3), r, k=2)


@pytest.mark.parametrize("scale", [1e-12, 1e-200, 1e200])
def test_weighted_vote_value_does_not_depend_on_the_scale_of_the_weights(scale):
    # the rule compares total weights, so scores times any positive constant serve the same answers (the definition;
    # _brute_weighted enumerates it at scale 1). Totals below ~1e-12 all tied under an absolute tolerance:
    # 0.7455 became 0.5013 at 1e-12
    p, ans, w, rew = [0.2, 0.3, 0.1, 0.4], [0, 1, 1, 2], [0.9, 0.5, 0.45, 0.2], [1.0, 0.0, 0.0, 0.5]
    want = _brute_weighted(p, ans, w, rew, 3)
    assert float(weighted_vote_value(p, ans, w, rew, k=3)) == pytest.approx(want, abs=1e-14)
    assert float(weighted_vote_value(p, ans, [scale * x for x in w], rew, k=3)) == pytest.approx(want, abs=1e-14)
