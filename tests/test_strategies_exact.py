"""Exact vote values on a policy (bonft.strategies.exact): the weighted vote's non-negative weights against
every ordered k-tuple of draws, and the one-reward-per-answer rule (Li et al. 2023, weighted vote by total
score; Wang et al. 2023, majority vote)."""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import torch

from bonft.strategies import majority_vote_value, weighted_vote_value


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
