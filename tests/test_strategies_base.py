"""Strategies by id (bonft.strategies.base): values, estimates and credit dispatched on the classes, checked
against brute force over every k-subset and every ordered pool of draws (Hoeffding 1948; Wang et al. 2023;
Li et al. 2023; torch.autograd for grad V_k); ids, options and bad input."""
from __future__ import annotations

import numpy as np
import pytest
import torch
from strategy_refs import (
    ANS,
    LOGITS,
    RW,
    SC,
    all_pools,
    brute_pool,
    mean_rule,
    policy_probs,
    random_pool,
    read_fields,
)

from bonft.objectives import credit as C
from bonft.strategies import (
    MajorityVote,
    WeightedVote,
    compare_strategies,
    get_strategy,
    majority_vote_credit,
    majority_vote_per_prompt,
    majority_vote_value,
    strategy_credit,
    strategy_loss,
    strategy_per_prompt,
    strategy_value,
)


def test_strategy_per_prompt_matches_closed_forms():
    # best-of-k and pass delegate to bonft.estimate; checked against k-subset enumeration
    a, s, r = random_pool(4, 8)
    for rule in ("best_of_k", "pass_at_k"):
        v, se = strategy_per_prompt(rule, ks=[1, 4, 8], rewards=[r], **read_fields(rule, [s], [a]))
        np.testing.assert_allclose(v[0], [brute_pool(rule, a, s, r, k) for k in (1, 4, 8)], atol=1e-13)


@pytest.mark.parametrize("rule,n", [("majority_vote", 4), ("majority_vote", 5), ("weighted_vote", 4), ("best_of_k", 4), ("pass_at_k", 4)])
def test_credit_expected_gradient_equals_exact_gradient(rule, n):
    # reference: E over every ordered pool of n draws (6^n pools) of sum_i w_i grad log pi(y_i),
    # against autograd of the exact V_k; max error over k = 1..n below 1e-10
    pools = all_pools(n)
    z = torch.tensor(LOGITS, dtype=torch.float64, requires_grad=True)
    pnp = torch.softmax(z, -1).detach().numpy()
    prob = np.prod(pnp[pools], axis=1)  # (6^n,)
    onehot = np.eye(6)[pools]  # (P, n, 6): grad_z log pi(y) = e_y - pi
    worst = 0.0
    for k in range(1, n + 1):
        f = read_fields(rule, SC[pools], ANS[pools])
        w = np.asarray(strategy_credit(rule, f["scores"], RW[pools], k=k, answers=f["answers"], **mean_rule(rule)))
        g_est = np.einsum("p,pn,pnv->v", prob, w, onehot - pnp)
        (g_true,) = torch.autograd.grad(strategy_value(rule, torch.softmax(z, -1), k=k, rewards=RW,
                                                       **read_fields(rule, SC, ANS), **mean_rule(rule)), z)
        worst = max(worst, float(np.abs(g_est - g_true.numpy()).max()))
    print(f"{rule}, n={n}: max |E[credit gradient] - grad V_k| = {worst:.2e}")
    assert worst < 1e-10


def test_best_of_k_credit_is_the_library_credit():
    a, s, r = random_pool(6, 8)
    np.testing.assert_allclose(strategy_credit("best_of_k", [s], [r], k=3), C.best_of_k_credit([s], [r], k=3), atol=0)


def test_bad_inputs_name_the_argument():
    with pytest.raises(ValueError, match="strategy must be one of"):
        get_strategy("vote")
    for old, new in (("majority", "majority_vote"), ("weighted", "weighted_vote"), ("best-of-k", "best_of_k"),
                     ("pass", "pass_at_k"), ("oracle", "pass_at_k")):
        with pytest.raises(ValueError, match=rf"got '{old}' \(the strategy id is '{new}'\)"):
            get_strategy(old)
    with pytest.raises(ValueError, match="answers must be given"):
        strategy_value(MajorityVote(), policy_probs(), k=2, rewards=RW)
    with pytest.raises(ValueError, match=r"k must be <= n \(n=3\)"):
        majority_vote_credit([[0, 1, 1]], [[1.0, 0, 0]], k=4)
    with pytest.raises(ValueError, match="rewards\\[0\\] must have 3 samples"):
        majority_vote_per_prompt([[0, 1, 1]], [[1.0, 0.0]], ks=[1])
    with pytest.raises(ValueError, match="answers must have shape"):
        majority_vote_value(policy_probs(), [0, 1], RW, k=2)
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
        strategy_value("weighted_vote", policy_probs(), k=2, rewards=RW, scores=SC, answers=ANS, seed=3, conflicts="mean")
    with pytest.raises(TypeError, match=r"tolerance is not an option of a strategy"):
        strategy_credit("majority_vote", None, [[1.0, 0.0]], k=1, answers=[[0, 1]], tolerance=1)
    from bonft.strategies import compare_strategies
    with pytest.raises(ValueError, match=r"max_subsets has no effect on best_of_k"):
        compare_strategies(["best_of_k", "majority_vote"], ks=[1], rewards=[[1.0, 0.0]], scores=[[0.1, 0.2]],
                           answers=[[0, 1]], max_subsets=10)


_A, _S, _R = np.array([[0, 1, 1]]), np.array([[0.2, 0.5, 0.1]]), np.array([[1.0, 0.0, 0.0]])
_LP = torch.zeros(1, 3, dtype=torch.float64)


@pytest.mark.parametrize("call, message", [
    (lambda: strategy_per_prompt("pass_at_k", ks=[1], rewards=_R, scores=_S),
     r"scores has no effect on pass_at_k \(read by best_of_k, weighted_vote\); pass scores=None, got ndarray of shape "
     r"\(1, 3\)"),
    (lambda: strategy_per_prompt("best_of_k", ks=[1], rewards=_R, scores=_S, answers=_A),
     r"answers has no effect on best_of_k \(read by majority_vote, weighted_vote\); pass answers=None"),
    (lambda: strategy_value("best_of_k", policy_probs(), k=2, rewards=RW, scores=SC, answers=ANS),
     r"answers has no effect on best_of_k"),
    (lambda: strategy_value("pass_at_k", policy_probs(), k=2, rewards=RW, scores=list(SC)),
     r"scores has no effect on pass_at_k .*got list of length 6"),
    (lambda: strategy_credit("pass_at_k", _S, _R, k=2), r"scores has no effect on pass_at_k"),
    (lambda: strategy_loss(_LP, _S, _R, strategy="best_of_k", k=2, answers=_A), r"answers has no effect on best_of_k"),
    (lambda: strategy_loss(_LP, None, _R, strategy="pass_at_k", k=2, answers=_A), r"answers has no effect on pass_at_k"),
    (lambda: compare_strategies(["best_of_k", "pass_at_k"], ks=[1], rewards=_R, scores=_S, answers=_A),
     r"answers has no effect on best_of_k, pass_at_k \(read by majority_vote, weighted_vote\)"),
    (lambda: compare_strategies(["majority_vote", "pass_at_k"], ks=[1], rewards=_R, scores=_S, answers=_A),
     r"scores has no effect on majority_vote, pass_at_k \(read by best_of_k, weighted_vote\)"),
])
def test_a_field_the_strategy_does_not_read_is_refused(call, message):
    with pytest.raises(ValueError, match=message):
        call()


def test_compare_strategies_hands_each_strategy_the_fields_it_reads():
    # reference: brute_pool over every k-subset (definition); scores and answers given once for all four
    a, s, r = random_pool(3, 6)
    got = compare_strategies(["best_of_k", "majority_vote", "weighted_vote", "pass_at_k"], ks=[2, 4], rewards=[r],
                             scores=[s], answers=[a], conflicts="mean", n_boot=20)
    for rule in got.names:
        np.testing.assert_allclose(got.mean[rule], [brute_pool(rule, a, s, r, k) for k in (2, 4)], atol=1e-13)


def test_compare_strategies_takes_an_int_or_any_iterable_of_ks():
    # reference: brute_pool, best-of-k over every k-subset of each pool (definition)
    pools = [random_pool(seed, 8) for seed in (4, 5)]
    s, r = np.stack([p[1] for p in pools]), np.stack([p[2] for p in pools])
    want = {k: np.mean([brute_pool("best_of_k", a, sp, rp, k) for a, sp, rp in pools]) for k in (1, 3, 8)}
    got = compare_strategies(["best_of_k"], ks=(k for k in [1, 8]), rewards=r, scores=s, n_boot=20)  # read once
    assert list(got.ks) == [1, 8] and got.per_prompt["best_of_k"].shape == (2, 2)
    np.testing.assert_allclose(got.mean["best_of_k"], [want[1], want[8]], atol=1e-13)
    got = compare_strategies(["best_of_k"], ks=3, rewards=r, scores=s, n_boot=20)
    assert list(got.ks) == [3]
    np.testing.assert_allclose(got.mean["best_of_k"], [want[3]], atol=1e-13)
    with pytest.raises(TypeError, match="ks must be an int or a sequence of ints, got float"):
        compare_strategies(["best_of_k"], ks=3.0, rewards=r, scores=s)
    with pytest.raises(ValueError, match="ks must not be empty"):
        compare_strategies(["best_of_k"], ks=iter([]), rewards=r, scores=s)


def test_a_strategy_that_never_wins_gets_an_exact_interval_not_a_zero_width_one():
    # 20 prompts, every reward 0: each strategy's value is 0 on every prompt. Clopper & Pearson 1934, 0 successes
    # in P trials, two-sided 95%: [0, 1 - 0.025^(1/P)] = [0, 0.16843] for P = 20 (valid for any law on [0, 1])
    rng = np.random.default_rng(0)
    r, s = np.zeros((20, 6)), rng.random((20, 6))
    a = rng.integers(0, 3, (20, 6)).astype(str)
    got = compare_strategies(["best_of_k", "majority_vote"], ks=[1, 4], rewards=r, scores=s, answers=a, n_boot=50)
    for name in ("best_of_k", "majority_vote"):
        np.testing.assert_array_equal(got.lo[name], [0.0, 0.0])
        np.testing.assert_allclose(got.hi[name], [1 - 0.025 ** (1 / 20)] * 2, rtol=1e-12)
        assert abs(got.hi[name][0] - 0.16843) < 1e-5
    got = compare_strategies(["best_of_k"], ks=[1], rewards=r - 1, scores=s, n_boot=50)  # range unknown: as before
    assert got.lo["best_of_k"][0] == got.hi["best_of_k"][0] == -1.0


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
    np.testing.assert_allclose(np.asarray(obj.value(p, 3)), [brute_pool("majority_vote", a[b], r[b], r[b], 3)
                                                             for b in range(2)], atol=1e-13)
