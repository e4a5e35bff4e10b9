"""One dtype policy at every public math boundary (bonft._core.checks.as_float_array).

Real data of any floating width is accepted and computed in float64 (float16 and bfloat16 included);
complex data is refused with a TypeError naming the argument, never cast with its imaginary part
dropped. Half-precision torch inputs give float32 results, so a value that float16 cannot hold
(|x| > 65504, IEEE 754 binary16) comes back finite. The reference of every equality below is the
same function on float64 copies of the same (already rounded) values: the policy says the width of
the input does not change the arithmetic, and these tests check exactly that.
"""
import re

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st

import bonft.bon as bon
import bonft.estimate as est
import bonft.objectives as obj
import bonft.strategies as strat

P = np.array([0.2, 0.3, 0.5])
S1, R1 = np.array([1.0, 2.0, 3.0]), np.array([1.0, 0.0, 1.0])
S, R = np.array([[1.0, 2.0, 3.0], [0.5, 0.1, 0.2]]), np.array([[1.0, 0.0, 1.0], [0.0, 1.0, 1.0]])
A = np.array([[1, 2, 1], [3, 4, 4]])  # one reward per answer, as the vote estimators require
LP = np.zeros((2, 3), dtype=np.float32)

# (name, call, {argument: its real value}); call(**arrays) runs the public function
CASES = [
    ("softmax_policy", lambda logits: bon.softmax_policy(logits), {"logits": S1}),
    ("best_of_k_distribution", lambda probs, scores: bon.best_of_k_distribution(probs, scores, k=2), {"probs": P, "scores": S1}),
    ("log_best_of_k_distribution", lambda probs, scores: bon.log_best_of_k_distribution(probs, scores, k=2),
     {"probs": P, "scores": S1}),
    ("best_of_k_value", lambda probs, scores, rewards: bon.best_of_k_value(probs, scores, rewards, k=2),
     {"probs": P, "scores": S1, "rewards": R1}),
    ("best_of_k_success", lambda p: bon.best_of_k_success(p, k=2), {"p": np.array([0.25, 0.5])}),
    ("best_of_k_kl", lambda probs, scores: bon.best_of_k_kl(probs, scores, k=2), {"probs": P, "scores": S1}),
    ("best_of_k", lambda scores, rewards: est.best_of_k(scores, rewards, k=2), {"scores": S1, "rewards": R1}),
    ("best_of_k_per_prompt", lambda scores, rewards: est.best_of_k_per_prompt(scores, rewards, ks=[1, 2]),
     {"scores": S, "rewards": R}),
    ("pass_at_k_per_prompt", lambda rewards: est.pass_at_k_per_prompt(rewards, ks=[1, 2]), {"rewards": R}),
    ("bootstrap_ci", lambda values: est.bootstrap_ci(values, n_boot=20), {"values": np.arange(12.0)}),
    ("summarize", lambda scores, rewards: est.summarize(scores, rewards, n_boot=20), {"scores": S, "rewards": R}),
    ("best_of_k_credit", lambda scores, rewards: obj.best_of_k_credit(scores, rewards, k=2), {"scores": S, "rewards": R}),
    ("pool_value", lambda scores, rewards: obj.pool_value(scores, rewards, k=2), {"scores": S, "rewards": R}),
    ("pass_at_k_credit", lambda correct: obj.pass_at_k_credit(correct, k=2), {"correct": R}),
    ("best_of_k_sft_credit", lambda scores, reference_scores: obj.best_of_k_sft_credit(scores, reference_scores, k=2),
     {"scores": S, "reference_scores": np.array([2.0, 0.3])}),
    ("reinforce_credit", lambda rewards: obj.reinforce_credit(rewards), {"rewards": R}),
    ("best_of_k_loss", lambda scores, rewards: obj.best_of_k_loss(torch.from_numpy(LP), scores, rewards, k=2),
     {"scores": S, "rewards": R}),
    ("reinforce_loss", lambda rewards: obj.reinforce_loss(torch.from_numpy(LP), rewards), {"rewards": R}),
    ("majority_vote_value", lambda probs, rewards: strat.majority_vote_value(probs, np.array([1, 2, 1]), rewards, k=2),
     {"probs": P, "rewards": R1}),
    ("weighted_vote_value", lambda probs, scores, rewards: strat.weighted_vote_value(probs, np.array([1, 2, 1]), scores, rewards, k=2),
     {"probs": P, "scores": S1, "rewards": R1}),
    ("majority_vote_per_prompt", lambda rewards: strat.majority_vote_per_prompt(A, rewards, ks=[2]), {"rewards": R}),
    ("majority_vote_credit", lambda rewards: strat.majority_vote_credit(A, rewards, k=2), {"rewards": R}),
    ("weighted_vote_per_prompt", lambda scores, rewards: strat.weighted_vote_per_prompt(A, scores, rewards, ks=[2]),
     {"scores": S, "rewards": R}),
    ("weighted_vote_credit", lambda scores, rewards: strat.weighted_vote_credit(A, scores, rewards, k=2),
     {"scores": S, "rewards": R}),
]
ARGS = [(name, call, args, arg) for name, call, args in CASES for arg in args]


def _complex(x: np.ndarray, kind: str, imag: float):
    z = x + 1j * imag
    if kind == "numpy":
        return z
    if kind == "torch":
        return torch.from_numpy(z)
    return z.tolist()  # a nested list of Python complex numbers


@pytest.mark.parametrize("name,call,args,arg", ARGS, ids=[f"{a[0]}-{a[3]}" for a in ARGS])
@given(kind=st.sampled_from(["numpy", "torch", "list"]), imag=st.sampled_from([0.0, 1e-12, 1.0]))
def test_complex_input_is_refused_naming_the_argument(name, call, args, arg, kind, imag):
    call(**args)  # the real data runs
    bad = dict(args, **{arg: _complex(args[arg], kind, imag)})
    with pytest.raises(TypeError) as err:
        call(**bad)
    assert re.match(rf"{arg}(\[\d+\])? must ", str(err.value)), str(err.value)  # a pool of a ragged list: scores[0]
    assert "complex" in str(err.value)


def test_pass_at_k_counts_refuse_complex_and_floats():
    with pytest.raises(TypeError, match=r"^n must hold ints, got dtype complex128"):
        est.pass_at_k(np.array([4 + 0j]), np.array([1]), k=2)
    with pytest.raises(TypeError, match=r"^c must hold ints, got dtype float64"):
        est.pass_at_k(np.array([4]), np.array([1.0]), k=2)


# float16 holds |x| <= 65504 (IEEE 754 binary16); rewards near that bound make credit differences beyond it
half = st.floats(min_value=-6e4, max_value=6e4, allow_nan=False, width=16)
pools = st.lists(st.lists(half, min_size=3, max_size=3), min_size=1, max_size=3)
CREDITS = [
    ("best_of_k_credit", lambda s, r: obj.best_of_k_credit(s, r, k=2)),
    ("best_of_k_credit k=n", lambda s, r: obj.best_of_k_credit(s, r, k=3)),
    ("pool_value", lambda s, r: obj.pool_value(s, r, k=2)),
    ("reinforce_credit", lambda s, r: obj.reinforce_credit(r)),
    ("majority_vote_credit", lambda s, r: strat.majority_vote_credit(torch.arange(r.numel()).reshape(r.shape), r, k=2)),
    ("weighted_vote_credit", lambda s, r: strat.weighted_vote_credit(torch.arange(r.numel()).reshape(r.shape), s, r, k=2)),
]


@pytest.mark.parametrize("name,credit", CREDITS, ids=[c[0] for c in CREDITS])
@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
@given(rewards=pools)
def test_half_precision_rewards_give_finite_credit_equal_to_float64(name, credit, dtype, rewards):
    r = torch.tensor(rewards, dtype=dtype)
    s = torch.tensor([[1.0, 2.0, 3.0]] * len(rewards), dtype=dtype)
    got = credit(s, r)
    want = credit(s.double(), r.double())  # the same rounded values in float64
    assert got.dtype == torch.float32
    assert bool(torch.isfinite(got).all())
    torch.testing.assert_close(got.double(), want, rtol=1e-6, atol=1e-6 * float(want.abs().max()) + 1e-12)


def test_float16_rewards_of_6e4_give_the_credit_worked_by_hand():
    """Rewards +-6e4 in float16, k = 2 of 3: the credit of the third sample is 8e4 > 65504, inf in float16.

    Worked by hand from the best-of-k credit of Chow et al. 2024 with the leave-one-out baseline: the pairs
    {1,2}, {1,3}, {2,3} keep samples 2, 3, 3 (highest score), rewards -6e4, 6e4, 6e4; sample 3's subsets
    average 6e4, its baseline (best-of-2 of the other two) is -6e4, and its credit is (2/3) * (6e4 + 6e4) = 8e4.
    """
    got = obj.best_of_k_credit(torch.tensor([[1.0, 2, 3]]), torch.tensor([[6e4, -6e4, 6e4]], dtype=torch.float16), k=2)
    assert got.dtype == torch.float32
    assert got.tolist() == [[-40000.0, -40000.0, 80000.0]]


ESTIMATES = [
    ("best_of_k_per_prompt", lambda s, r: torch.as_tensor(est.best_of_k_per_prompt(s, r, ks=[1, 2, 3]))),
    ("pass_at_k_per_prompt", lambda s, r: torch.as_tensor(est.pass_at_k_per_prompt(r, ks=[1, 2, 3]))),
    ("summarize", lambda s, r: torch.as_tensor(est.summarize(s, r, ks=[1, 3], n_boot=20).best_of_k_mean)),
    ("bootstrap_ci", lambda s, r: torch.as_tensor(np.stack(est.bootstrap_ci(r, n_boot=20)))),
]


@pytest.mark.parametrize("name,f", ESTIMATES, ids=[e[0] for e in ESTIMATES])
@given(scores=st.lists(st.lists(half, min_size=3, max_size=3), min_size=1, max_size=4),
       rewards=st.lists(st.lists(st.sampled_from([0.0, 0.5, 1.0]), min_size=3, max_size=3), min_size=4, max_size=4))
def test_bfloat16_in_estimate_equals_float64(name, f, scores, rewards):
    s = torch.tensor((scores * 4)[:4], dtype=torch.bfloat16)
    r = torch.tensor(rewards, dtype=torch.bfloat16)
    torch.testing.assert_close(f(s, r).double(), f(s.double(), r.double()), rtol=0, atol=0)



@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
@given(rewards=pools, logp=st.lists(st.floats(min_value=-20.0, max_value=0.0, width=16), min_size=3, max_size=3))
def test_half_precision_logprobs_give_a_finite_loss_equal_to_float64(dtype, rewards, logp):
    """Credit (|w| up to 8e4 here) times log-probs passes 65504 in float16: the loss is taken in float32."""
    r = torch.tensor(rewards, dtype=torch.float64)
    s = torch.tensor([[1.0, 2.0, 3.0]] * len(rewards), dtype=torch.float64)
    lp = torch.tensor([logp] * len(rewards), dtype=dtype, requires_grad=True)
    for loss_fn in (lambda x: obj.best_of_k_loss(x, s, r, k=2), lambda x: obj.reinforce_loss(x, r)):
        got, want = loss_fn(lp), loss_fn(lp.detach().double())
        assert got.dtype == torch.float32 and bool(torch.isfinite(got))
        scale = float(r.abs().max()) * float(lp.detach().double().abs().sum()) + 1e-12  # bounds the summed terms
        torch.testing.assert_close(got.double(), want, rtol=0, atol=1e-6 * scale)  # float32 rounding: eps 1.2e-7
        got.backward()  # autograd reaches the caller's half-precision tensor
        assert lp.grad is not None and lp.grad.dtype == dtype
        lp.grad = None


def test_credit_given_to_a_loss_refuses_complex_naming_it():
    with pytest.raises(TypeError, match=r"^credit must hold real numbers, got complex numbers"):
        obj.policy_gradient_loss(torch.zeros(1, 3), np.array([[1j, 0.0, 0.0]]))


@pytest.mark.parametrize("kind", ["torch float16", "torch bfloat16", "numpy float16"])
@given(raw=st.lists(st.floats(min_value=0.01, max_value=1.0), min_size=2, max_size=6))
def test_half_precision_probabilities_are_read_at_their_own_precision(kind, raw):
    """A policy rounded to float16 / bfloat16 sums to 1 within that type's eps, not 1e-6: it is accepted and
    renormalised in float64. Reference: best-of-2 with distinct scores picks outcome i (scores ascending) with
    probability F(i)^2 - F(i-1)^2, F the CDF in score order (the maximum of two iid draws; order statistics)."""
    q = np.asarray(raw) / np.sum(raw)
    if kind == "numpy float16":
        p = q.astype(np.float16)
        exact = p.astype(np.float64)
    else:
        p = torch.tensor(q, dtype=torch.float16 if kind == "torch float16" else torch.bfloat16)
        exact = p.double().numpy()
    exact = exact / exact.sum()
    scores = np.arange(len(raw), dtype=np.float64)
    F = np.cumsum(exact)
    want = F**2 - np.concatenate([[0.0], F[:-1]]) ** 2
    got = bon.best_of_k_distribution(p, scores, k=2)
    got = got.double().numpy() if isinstance(got, torch.Tensor) else np.asarray(got)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-15)
    assert abs(got.sum() - 1.0) < 1e-12
