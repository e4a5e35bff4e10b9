"""Reference values for the strategy tests, straight from the definitions (no bonft code): a small
categorical policy with surface forms, ties in scores and counts; the reward a rule serves on a set of
draws; its expectation over every ordered k-tuple or every k-subset of a pool.

Majority vote with ties split uniformly among the tied answers (Wang et al. 2023, self-consistency);
verifier-weighted vote by total score (Li et al. 2023); U-statistics over k-subsets (Hoeffding 1948).
"""
from __future__ import annotations

import itertools
import math
from collections import Counter

import numpy as np
import torch

from bonft.strategies import get_strategy

# a small policy: 6 outcomes, 3 answers with two surface forms each; ties in scores (0.5, 0.2)
# and in answer counts; rewards differ between two surface forms of answer 0, so the vote calls
# pass conflicts="mean" (one of the winner's samples served uniformly: the mean of their rewards)
ANS = np.array([0, 0, 1, 1, 2, 2])
SC = np.array([0.5, 0.2, 0.7, 0.2, 0.5, 0.9])
RW = np.array([1.0, 0.5, 0.0, 0.0, 1.0, 1.0])
LOGITS = np.array([0.4, -0.6, 0.1, -0.2, -0.3, -0.8])


def served(rule: str, idx, ans, sc, rw) -> float:
    """Expected served reward of one draw (indices into ans/sc/rw), straight from the definition."""
    idx = list(idx)
    if rule == "best_of_k":
        top = max(sc[i] for i in idx)
        return float(np.mean([rw[i] for i in idx if sc[i] == top]))
    if rule == "pass_at_k":
        return float(max(rw[i] for i in idx))
    if rule == "majority_vote":
        key = Counter(ans[i] for i in idx)
    else:
        key = Counter()
        for i in idx:
            key[ans[i]] += sc[i]
    top = max(key.values())
    win = [a for a in key if abs(key[a] - top) <= 1e-12]
    return float(np.mean([np.mean([rw[i] for i in idx if ans[i] == a]) for a in win]))


def mean_rule(rule) -> dict:
    """The stated rule for an answer with several rewards, where the strategy reads it (votes only)."""
    return {"conflicts": "mean"} if get_strategy(rule).uses_answers else {}


def read_fields(rule, scores, answers) -> dict:
    """scores and answers as the rule takes them: None for a field it does not read (giving one is an error)."""
    st = get_strategy(rule)
    return {"scores": scores if st.uses_scores else None, "answers": answers if st.uses_answers else None}


def brute_value(rule, probs, k):
    return sum(math.prod(probs[i] for i in t) * served(rule, t, ANS, SC, RW)
               for t in itertools.product(range(len(probs)), repeat=k))


def policy_probs():
    z = torch.tensor(LOGITS, dtype=torch.float64)
    return torch.softmax(z, -1).numpy()


def random_pool(seed, n, answers=4):
    rng = np.random.default_rng(seed)
    a = rng.integers(0, answers, n)
    s = rng.choice([0.1, 0.4, 0.4, 0.9], n)  # ties in scores
    r = (a == 0).astype(float) + 0.25 * (s > 0.5)  # rewards vary inside an answer
    return a, s, r


def brute_pool(rule, a, s, r, k):
    subs = list(itertools.combinations(range(len(r)), k))
    return np.mean([served(rule, S, a, s, r) for S in subs])


def all_pools(n):
    pools = np.array(list(itertools.product(range(6), repeat=n)))  # (6^n, n)
    return pools
