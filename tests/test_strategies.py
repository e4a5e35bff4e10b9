"""Inference strategies (bonft.strategies) against brute-force enumeration.

References used below:
- the definitions themselves, enumerated: every ordered k-tuple of draws from a small categorical
  policy (exact V_k), every k-subset of a pool (the U-statistic, Hoeffding 1948), and every ordered
  pool of n draws (the expectation of the credit's gradient estimate);
- majority vote with ties split uniformly among the tied answers (Wang et al. 2023,
  self-consistency); verifier-weighted vote by total score (Li et al. 2023);
- torch.autograd for grad V_k w.r.t. the logits.
"""
from __future__ import annotations

import itertools
import math
from collections import Counter

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.objectives import credit as C
from bonft.strategies import (
    MajorityVote,
    WeightedVote,
    get_strategy,
    majority_vote_credit,
    majority_vote_per_prompt,
    majority_vote_value,
    strategy_credit,
    strategy_loss,
    strategy_per_prompt,
    strategy_value,
    weighted_vote_credit,
    weighted_vote_per_prompt,
    weighted_vote_value,
)

# a small policy: 6 outcomes, 3 answers with two surface forms each; ties in scores (0.5, 0.2)
# and in answer counts; rewards differ between two surface forms of answer 0, so the vote calls
# pass conflicts="mean" (one of the winner's samples served uniformly: the mean of their rewards)
ANS = np.array([0, 0, 1, 1, 2, 2])
SC = np.array([0.5, 0.2, 0.7, 0.2, 0.5, 0.9])
RW = np.array([1.0, 0.5, 0.0, 0.0, 1.0, 1.0])
LOGITS = np.array([0.4, -0.6, 0.1, -0.2, -0.3, -0.8])


def _served(rule: str, idx, ans, sc, rw) -> float:
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


def _mean(rule) -> dict:
    """The stated rule for an answer with several rewards, where the strategy reads it (votes only)."""
    return {"conflicts": "mean"} if get_strategy(rule).uses_answers else {}


def _brute_value(rule, probs, k):
    return sum(math.prod(probs[i] for i in t) * _served(rule, t, ANS, SC, RW)
               for t in itertools.product(range(len(probs)), repeat=k))


def _probs():
    z = torch.tensor(LOGITS, dtype=torch.float64)
    return torch.softmax(z, -1).numpy()


# ---------------------------------------------------------------------------- exact V_k


@pytest.mark.parametrize("rule", ["majority_vote", "weighted_vote", "best_of_k", "pass_at_k"])
@pytest.mark.parametrize("k", [1, 2, 3, 5])
def test_exact_value_equals_k_tuple_enumeration(rule, k):
    # reference: the definition, summed over all 6^k ordered k-tuples
    p = _probs()
    got = strategy_value(rule, p, k=k, rewards=RW, scores=SC, answers=ANS, **_mean(rule))
    assert abs(float(got) - _brute_value(rule, p, k)) < 1e-12


def test_majority_value_batched_and_string_answers():
    # reference: per-row enumeration; answer keys may be strings
    p = np.stack([_probs(), np.full(6, 1 / 6)])
    keys = np.array(["7", "7", "x", "x", "y", "y"])
    got = majority_vote_value(p, keys, RW, k=4, conflicts="mean")
    want = [_brute_value("majority_vote", row, 4) for row in p]
    np.testing.assert_allclose(got, want, atol=1e-12)
    assert got.shape == (2,)


def test_majority_value_known_case():
    # by hand: two equally likely answers, k = 2 -> ties half the time, V = E[R] = 0.5 for R = (1, 0)
    assert abs(float(majority_vote_value([0.5, 0.5], [0, 1], [1.0, 0.0], k=2)) - 0.5) < 1e-15
    # three draws, answer 0 (correct) with mass p: wins iff it appears >= 2 times -> p^3 + 3p^2(1-p)
    p = 0.3
    assert abs(float(majority_vote_value([p, 1 - p], [0, 1], [1.0, 0.0], k=3)) - (p**3 + 3 * p**2 * (1 - p))) < 1e-15


# ---------------------------------------------------------------------------- pool estimators


def _pool(seed, n, answers=4):
    rng = np.random.default_rng(seed)
    a = rng.integers(0, answers, n)
    s = rng.choice([0.1, 0.4, 0.4, 0.9], n)  # ties in scores
    r = (a == 0).astype(float) + 0.25 * (s > 0.5)  # rewards vary inside an answer
    return a, s, r


def _brute_pool(rule, a, s, r, k):
    subs = list(itertools.combinations(range(len(r)), k))
    return np.mean([_served(rule, S, a, s, r) for S in subs])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_majority_estimator_equals_all_k_subsets(seed):
    # reference: the U-statistic, every k-subset of a pool of 9 for every k
    a, s, r = _pool(seed, 9)
    got = majority_vote_per_prompt([a], [r], ks=range(1, 10), conflicts="mean")[0]
    want = [_brute_pool("majority_vote", a, s, r, k) for k in range(1, 10)]
    np.testing.assert_allclose(got, want, atol=1e-13)


def test_weighted_estimator_exact_and_sampled():
    # reference: every k-subset; the sampled estimate must sit within 4 standard errors
    a, s, r = _pool(3, 10)
    ks = [1, 3, 6, 10]
    want = [_brute_pool("weighted_vote", a, s, r, k) for k in ks]
    val, se = weighted_vote_per_prompt([a], [s], [r], ks=ks, conflicts="mean")
    np.testing.assert_allclose(val[0], want, atol=1e-13)
    assert (se == 0).all()
    val, se = weighted_vote_per_prompt([a], [s], [r], ks=[3, 6], max_subsets=60, seed=1, conflicts="mean")
    assert (se[0] > 0).all() and (np.abs(val[0] - [want[1], want[2]]) < 4 * se[0]).all()


def test_strategy_at_k_matches_closed_forms():
    # best-of-k and pass delegate to bonft.estimate; checked against k-subset enumeration
    a, s, r = _pool(4, 8)
    for rule in ("best_of_k", "pass_at_k"):
        v, se = strategy_per_prompt(rule, ks=[1, 4, 8], rewards=[r], scores=[s], answers=[a])
        np.testing.assert_allclose(v[0], [_brute_pool(rule, a, s, r, k) for k in (1, 4, 8)], atol=1e-13)


@settings(max_examples=30)
@given(st.lists(st.integers(0, 4), min_size=2, max_size=9), st.integers(0, 2**31 - 1))
def test_majority_estimator_and_credit_property(answers, seed):
    # reference: every k-subset (the U-statistic) for the value, and for the credit its definition
    # w_i = V_k(pool) - V_kb(pool without i), each value by enumeration
    a = np.array(answers)
    n = len(a)
    r = np.random.default_rng(seed).integers(0, 3, n) / 2.0  # ties in rewards too
    got = majority_vote_per_prompt([a], [r], ks=range(1, n + 1), conflicts="mean")[0]
    np.testing.assert_allclose(got, [_brute_pool("majority_vote", a, a, r, k) for k in range(1, n + 1)], atol=1e-12)
    k = 1 + seed % n
    kb = min(k, n - 1)
    want = [_brute_pool("majority_vote", a, a, r, k)
            - _brute_pool("majority_vote", np.delete(a, i), None, np.delete(r, i), kb) for i in range(n)]
    np.testing.assert_allclose(majority_vote_credit([a], [r], k=k, conflicts="mean")[0], want, atol=1e-12)


# ---------------------------------------------------------------------------- credit: expected gradient


def _all_pools(n):
    pools = np.array(list(itertools.product(range(6), repeat=n)))  # (6^n, n)
    return pools


@pytest.mark.parametrize("rule,n", [("majority_vote", 4), ("majority_vote", 5), ("weighted_vote", 4), ("best_of_k", 4), ("pass_at_k", 4)])
def test_credit_expected_gradient_equals_exact_gradient(rule, n):
    # reference: E over every ordered pool of n draws (6^n pools) of sum_i w_i grad log pi(y_i),
    # against autograd of the exact V_k; max error over k = 1..n below 1e-10
    pools = _all_pools(n)
    z = torch.tensor(LOGITS, dtype=torch.float64, requires_grad=True)
    pnp = torch.softmax(z, -1).detach().numpy()
    prob = np.prod(pnp[pools], axis=1)  # (6^n,)
    onehot = np.eye(6)[pools]  # (P, n, 6): grad_z log pi(y) = e_y - pi
    worst = 0.0
    for k in range(1, n + 1):
        w = np.asarray(strategy_credit(rule, SC[pools], RW[pools], k=k, answers=ANS[pools], **_mean(rule)))
        g_est = np.einsum("p,pn,pnv->v", prob, w, onehot - pnp)
        (g_true,) = torch.autograd.grad(strategy_value(rule, torch.softmax(z, -1), k=k, rewards=RW, scores=SC, answers=ANS,
                                                       **_mean(rule)), z)
        worst = max(worst, float(np.abs(g_est - g_true.numpy()).max()))
    print(f"{rule}, n={n}: max |E[credit gradient] - grad V_k| = {worst:.2e}")
    assert worst < 1e-10


def test_majority_credit_zero_for_equal_rewards_and_single_sample():
    # common practice: a leave-one-out baseline gives no signal when every reward is equal
    a = np.array([[0, 1, 1, 2, 0]])
    np.testing.assert_allclose(majority_vote_credit(a, np.ones((1, 5)), k=3), 0.0, atol=1e-15)
    np.testing.assert_allclose(majority_vote_credit([[3]], [[0.7]], k=1), [[0.7]])


def test_weighted_credit_sampled_is_unbiased_for_exact():
    # the sampled credit averaged over seeds approaches the exact credit (all subsets) of the pool
    a, s, r = _pool(5, 8)
    exact = weighted_vote_credit([a], [s], [r], k=3, conflicts="mean")
    runs = np.stack([weighted_vote_credit([a], [s], [r], k=3, max_subsets=50, seed=q, conflicts="mean") for q in range(200)])
    sd = runs.std(0) / math.sqrt(len(runs))
    assert (np.abs(runs.mean(0) - exact) < 5 * sd + 1e-12).all()


def test_best_of_k_credit_is_the_library_credit():
    a, s, r = _pool(6, 8)
    np.testing.assert_allclose(strategy_credit("best_of_k", [s], [r], k=3), C.best_of_k_credit([s], [r], k=3), atol=0)


def test_torch_in_torch_out():
    a = torch.tensor([[0, 1, 1, 0]])
    r = torch.tensor([[1.0, 0.0, 0.0, 1.0]], dtype=torch.float32)
    w = majority_vote_credit(a, r, k=2)
    assert isinstance(w, torch.Tensor) and w.dtype == torch.float32 and w.shape == (1, 4)


# ---------------------------------------------------------------------------- boundary


def test_bad_inputs_name_the_argument():
    with pytest.raises(ValueError, match="strategy must be one of"):
        get_strategy("vote")
    for old, new in (("majority", "majority_vote"), ("weighted", "weighted_vote"), ("best-of-k", "best_of_k"),
                     ("pass", "pass_at_k"), ("oracle", "pass_at_k")):
        with pytest.raises(ValueError, match=rf"got '{old}' \(the strategy id is '{new}'\)"):
            get_strategy(old)
    with pytest.raises(ValueError, match="answers must be given"):
        strategy_value(MajorityVote(), _probs(), k=2, rewards=RW)
    with pytest.raises(ValueError, match=r"k must be <= n \(n=3\)"):
        majority_vote_credit([[0, 1, 1]], [[1.0, 0, 0]], k=4)
    with pytest.raises(ValueError, match="rewards\\[0\\] must have 3 samples"):
        majority_vote_per_prompt([[0, 1, 1]], [[1.0, 0.0]], ks=[1])
    with pytest.raises(ValueError, match="answers must have shape"):
        majority_vote_value(_probs(), [0, 1], RW, k=2)
    with pytest.raises(ValueError, match="rewards\\[0\\] must be finite"):
        majority_vote_credit([[0, 1]], [[1.0, float("nan")]], k=1)
    assert WeightedVote().uses_scores and not MajorityVote().uses_scores
    # an option the strategy does not read cannot take effect: an error naming who reads it
    with pytest.raises(ValueError, match=r"conflicts has no effect on best_of_k \(read by majority_vote, weighted_vote\), "
                                         r"got conflicts='mean'"):
        strategy_credit("best_of_k", [[0.1, 0.2]], [[1.0, 0.0]], k=1, conflicts="mean")
    with pytest.raises(ValueError, match=r"max_subsets has no effect on majority_vote \(read by weighted_vote estimates\)"):
        strategy_per_prompt("majority_vote", ks=[1], rewards=[[1.0, 0.0]], answers=[[0, 1]], max_subsets=10)
    with pytest.raises(ValueError, match=r"seed has no effect on weighted_vote values"):
        strategy_value("weighted_vote", _probs(), k=2, rewards=RW, scores=SC, answers=ANS, seed=3, conflicts="mean")
    with pytest.raises(TypeError, match=r"tolerance is not an option of a strategy"):
        strategy_credit("majority_vote", None, [[1.0, 0.0]], k=1, answers=[[0, 1]], tolerance=1)
    from bonft.strategies import compare_strategies
    with pytest.raises(ValueError, match=r"max_subsets has no effect on best_of_k"):
        compare_strategies(["best_of_k", "majority_vote"], ks=[1], rewards=[[1.0, 0.0]], scores=[[0.1, 0.2]],
                           answers=[[0, 1]], max_subsets=10)


# ---------------------------------------------------------------------------- loss


def test_strategy_loss_gradient_is_minus_credit():
    # d loss / d logprobs = -w / B, the policy-gradient identity (Williams 1992), with the credit
    # w_i = V_k(pool) - V_k(pool without i) (leave-one-out, k <= n - 1) and the pool value V_k, each by
    # k-subset enumeration
    a = np.array([[0, 1, 1, 2], [3, 3, 1, 1]])
    r = np.array([[1.0, 0.0, 0.0, 1.0], [0.0, 0.0, 1.0, 1.0]])
    lp = torch.zeros(2, 4, dtype=torch.float64, requires_grad=True)
    loss, info = strategy_loss(lp, None, r, strategy="majority_vote", k=3, answers=a, return_info=True)
    loss.backward()
    credit = [[_brute_pool("majority_vote", a[b], None, r[b], 3)
               - _brute_pool("majority_vote", np.delete(a[b], i), None, np.delete(r[b], i), 3) for i in range(4)]
              for b in range(2)]
    np.testing.assert_allclose(lp.grad.numpy(), -np.array(credit) / 2, atol=1e-15)
    value = np.mean([_brute_pool("majority_vote", a[b], None, r[b], 3) for b in range(2)])
    np.testing.assert_allclose(float(info["pool_value"]), value, atol=1e-15)
    assert isinstance(strategy_loss(lp.detach(), None, r, strategy="majority_vote", k=3, answers=a), torch.Tensor)


# ---------------------------------------------------------------------------- trainer registry


def test_trainer_registers_vote_objectives():
    # the registry's majority-vote credit and pool value are the library's, on host pools
    from bonft.trainer.objectives import OBJECTIVES, Pools

    a = np.array([["3", "3", "4", "5"], ["1", "2", "2", "2"]], dtype=object)
    r = np.array([[1.0, 1.0, 0.0, 0.0], [1.0, 0.0, 0.0, 0.0]])
    p = Pools(scores=r.copy(), rewards=r, correct=r, answers=a)
    obj = OBJECTIVES["majority_vote"]
    assert obj.answers and not OBJECTIVES["best_of_k"].answers
    w = np.asarray(obj.credit(p, 3))
    np.testing.assert_allclose(w, majority_vote_credit(a, r, k=3), atol=0)
    np.testing.assert_allclose(np.asarray(obj.value(p, 3)), [_brute_pool("majority_vote", a[b], r[b], r[b], 3)
                                                             for b in range(2)], atol=1e-13)


def test_weighted_vote_known_cases():
    # by hand: two outcomes, one answer each, scores 0.9 > 0.4, k = 2: answer 0 wins unless both
    # draws are outcome 1, so V_2 = 1 - (1 - p)^2 for R = (1, 0)
    p = 0.3
    assert abs(float(weighted_vote_value([p, 1 - p], [0, 1], [0.9, 0.4], [1.0, 0.0], k=2)) - (1 - (1 - p) ** 2)) < 1e-15
    # two samples of answer 1 (0.5 + 0.5) outvote one of answer 0 (0.9); one of each loses to 0.9:
    # V_2 = P(both draws from answer 1) = 0.5^2
    v = weighted_vote_value([0.5, 0.25, 0.25], ["x", "y", "y"], [0.9, 0.5, 0.5], [0.0, 1.0, 1.0], k=2)
    assert abs(float(v) - 0.25) < 1e-15


def test_training_with_majority_credit_raises_majority_value():
    # a categorical policy whose plurality answer is wrong (correct mass 0.14 over two surface
    # forms): Adam on strategy_loss with sampled pools must drive the exact majority@8 from 0.07
    # to near 1 (the policy-gradient identity in use, Williams 1992; exact value by majority_vote_value)
    ans = np.array([0, 0, 1, 1, 2, 2, 3, 3])
    R = np.array([1.0, 1.0, 0, 0, 0, 0, 0, 0])
    z = torch.tensor([0.0, -0.5, 0.9, 0.5, 0.7, 0.2, 0.3, 0.0], dtype=torch.float64, requires_grad=True)
    before = float(majority_vote_value(torch.softmax(z, -1).detach(), ans, R, k=8))
    opt = torch.optim.Adam([z], lr=0.02)
    rng = np.random.default_rng(0)
    for _ in range(150):
        p = torch.softmax(z, -1)
        y = rng.choice(8, size=(8, 16), p=p.detach().numpy())  # 8 prompts' pools of 16 samples
        loss = strategy_loss(torch.log(p)[y], None, R[y], strategy="majority_vote", k=8, answers=ans[y])
        opt.zero_grad()
        loss.backward()
        opt.step()
    after = float(majority_vote_value(torch.softmax(z, -1).detach(), ans, R, k=8))
    assert before < 0.1 and after > 0.9
