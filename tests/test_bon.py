"""Tests for bonft.bon against references outside the module.

References used below:
- direct enumeration of every k-tuple of draws (the definition of best-of-k
  with uniform tie-breaking among the tied samples);
- Beirami et al. 2024, "Theoretical guarantees on the best-of-n alignment
  policy": KL(pi_bon || pi) <= log k - (k-1)/k, with equality in the limit of
  many distinct equally likely outcomes;
- expected maximum of k standard normals, normal order-statistics tables
  (Harter 1961, "Expected values of normal order statistics"), and
  scipy.integrate.quad of the order-statistic density;
- binomial theorem / exact rational arithmetic (fractions) for 1 - (1-p)^k;
- torch.autograd.gradcheck (finite differences) for gradients.
"""
from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from bonft.bon import (
    best_of_k_distribution,
    best_of_k_kl,
    best_of_k_success,
    best_of_k_value,
    log_best_of_k_distribution,
    softmax_policy,
)

# --------------------------------------------------------------- references


def brute_bon(p, s, k):
    """Best-of-k by enumerating all V^k tuples; ties split uniformly among tied samples."""
    V = len(p)
    out = np.zeros(V)
    for tup in itertools.product(range(V), repeat=k):
        w = math.prod(p[t] for t in tup)
        if w == 0:
            continue
        top = max(s[t] for t in tup)
        winners = [t for t in tup if s[t] == top]  # positions in the tuple, repeats kept
        for t in winners:
            out[t] += w / len(winners)
    return out


def kl_bound(k):
    return math.log(k) - (k - 1) / k


@st.composite
def policy_and_scores(draw, min_v=2, max_v=7, zeros=True):
    V = draw(st.integers(min_v, max_v))
    lo = 0.0 if zeros else 0.01
    w = draw(st.lists(st.floats(lo, 1.0), min_size=V, max_size=V))
    if sum(w) == 0:
        w[0] = 1.0
    p = np.array(w) / sum(w)
    s = np.array(draw(st.lists(st.integers(0, 3), min_size=V, max_size=V)), dtype=float)
    return p, s


# ----------------------------------------------------- exactness: enumeration


@pytest.mark.parametrize("V", [3, 4, 5])
@pytest.mark.parametrize("k", [1, 2, 3, 4])
@pytest.mark.parametrize("ties", ["distinct", "pair", "all", "two_pairs"])
def test_matches_enumeration(V, k, ties):
    # reference: direct enumeration of the definition (all V^k tuples)
    rng = np.random.default_rng(100 * V + 10 * k + len(ties))
    p = rng.dirichlet(np.ones(V))
    s = {
        "distinct": rng.permutation(V).astype(float),
        "pair": np.array([2.0, 0.5, 2.0] + [1.0 + i for i in range(V - 3)]),
        "all": np.full(V, 0.3),
        "two_pairs": np.array([1.0, 1.0, 0.0, 0.0, 5.0])[:V],
    }[ties]
    np.testing.assert_allclose(best_of_k_distribution(p, s, k=k), brute_bon(p, s, k), rtol=1e-12, atol=1e-15)


def test_matches_enumeration_with_zero_probs_and_batch():
    # reference: direct enumeration, row by row; shared (V,) scores broadcast over the batch
    p = np.array([[0.0, 0.3, 0.0, 0.7], [0.25, 0.25, 0.25, 0.25], [0.0, 0.0, 1.0, 0.0]])
    s = np.array([3.0, 1.0, 1.0, 0.0])
    got = best_of_k_distribution(p, s, k=3)
    assert got.shape == (3, 4)
    for row in range(3):
        np.testing.assert_allclose(got[row], brute_bon(p[row], s, 3), rtol=1e-12, atol=1e-15)


def test_worked_example_by_hand():
    # pi = (0.2, 0.3, 0.5), scores (1, 0, 1), k = 2: top group mass 0.7, so
    # P(top group wins) = 1 - 0.3^2 = 0.91, split 2:5; bottom wins w.p. 0.3^2 (hand computation)
    got = best_of_k_distribution(np.array([0.2, 0.3, 0.5]), np.array([1.0, 0.0, 1.0]), k=2)
    np.testing.assert_allclose(got, [0.91 * 2 / 7, 0.09, 0.91 * 5 / 7], rtol=1e-14)


# ---------------------------------------------------------------- KL bound


@pytest.mark.parametrize("k", [2, 4, 16])
def test_kl_approaches_bound_for_many_distinct_outcomes(k):
    # Beirami et al. 2024: KL -> log k - (k-1)/k as the number of distinct equally likely outcomes grows
    V = 20000
    p = np.full(V, 1.0 / V)
    s = np.arange(V, dtype=float)
    kl = best_of_k_kl(p, s, k=k)
    assert kl <= kl_bound(k)
    assert kl == pytest.approx(kl_bound(k), abs=2e-3)
    # fewer outcomes -> further from the bound
    assert best_of_k_kl(np.full(10, 0.1), np.arange(10.0), k=k) < kl


@settings(max_examples=80)
@given(policy_and_scores(), st.integers(1, 40))
def test_kl_never_exceeds_bound(ps, k):
    # Beirami et al. 2024, Theorem 1: KL(pi_bon || pi) <= log k - (k-1)/k
    p, s = ps
    kl = best_of_k_kl(p, s, k=k)
    assert -1e-12 <= kl <= kl_bound(k) + 1e-12


def test_kl_matches_direct_sum():
    # KL definition sum_v pi_bon log(pi_bon / pi), with pi_bon from enumeration
    p = np.array([0.1, 0.4, 0.2, 0.3])
    s = np.array([0.0, 2.0, 2.0, 1.0])
    q = brute_bon(p, s, 3)
    assert best_of_k_kl(p, s, k=3) == pytest.approx(float(np.sum(q * np.log(q / p))), rel=1e-12)


# ------------------------------------------------- normal order statistics


@pytest.mark.parametrize("k,table", [(2, 0.5642), (3, 0.8463), (5, 1.1630), (10, 1.5388)])
def test_value_approaches_expected_normal_maximum(k, table):
    # Harter 1961 normal order-statistics tables (4 decimals, values from memory,
    # confirmed by scipy.integrate.quad of x k phi(x) Phi(x)^(k-1) below).
    quad = integrate.quad(lambda x: x * k * stats.norm.pdf(x) * stats.norm.cdf(x) ** (k - 1), -np.inf, np.inf)[0]
    assert quad == pytest.approx(table, abs=5e-5)
    # V equally likely outcomes at the normal quantiles Phi^-1((i - 1/2) / V);
    # the grid error at V = 20000 is below 4e-5 for k <= 10.
    V = 20000
    z = stats.norm.ppf((np.arange(V) + 0.5) / V)
    got = best_of_k_value(np.full(V, 1.0 / V), z, z, k=k)
    assert got == pytest.approx(table, abs=1e-4)
    assert got < quad  # the midpoint grid trims the tails, so it sits below


@pytest.mark.parametrize("k", [2, 5, 10])
def test_value_equals_order_statistic_integral_on_grid(k):
    # Grid: V = 40 equally likely outcomes z_i = Phi^-1((i - 1/2) / V), i = 1..V.
    # Its quantile function is the step Q(u) = z_ceil(uV); the max of k draws has
    # E = int_0^1 Q(u) k u^(k-1) du (order-statistic density of the max of k
    # uniforms, David & Nagaraja, "Order Statistics"), integrated by scipy quad.
    V = 40
    z = stats.norm.ppf((np.arange(V) + 0.5) / V)

    def Q(u):
        return z[min(int(math.ceil(u * V)) - 1, V - 1)] if u > 0 else z[0]

    edges = np.arange(1, V) / V
    ref = integrate.quad(lambda u: Q(u) * k * u ** (k - 1), 0.0, 1.0, points=edges, limit=400)[0]
    assert best_of_k_value(np.full(V, 1.0 / V), z, z, k=k) == pytest.approx(ref, rel=1e-10)


# ---------------------------------------------------------- binary rewards


@pytest.mark.parametrize("k", [1, 2, 7, 50])
def test_binary_known_reward_equals_success_formula(k):
    # verifier knows the reward: best-of-k succeeds iff any draw succeeds, 1 - (1-p)^k
    # (Chen et al. 2021 pass@k of a problem with success chance p); exact via fractions
    p = np.array([0.15, 0.05, 0.5, 0.3])
    r = np.array([1.0, 0.0, 0.0, 1.0])
    p1 = 0.45
    exact = 1 - (1 - Fraction(p1)) ** k
    assert best_of_k_value(p, r, r, k=k) == pytest.approx(float(exact), rel=1e-12)
    assert best_of_k_success(p1, k=k) == pytest.approx(float(exact), rel=1e-14)


def test_success_stable_at_tiny_p_and_large_k():
    # binomial theorem: 1 - (1-p)^k = kp - C(k,2) p^2 + ...; at p = 1e-30 the first term is exact to 1e-26
    assert best_of_k_success(1e-30, k=10_000) == pytest.approx(1e-26, rel=1e-12)
    assert best_of_k_success(0.0, k=5) == 0.0
    assert best_of_k_success(1.0, k=5) == 1.0
    # array / tensor kinds and a gradient at p = 1 (d/dp = k (1-p)^(k-1) = 0 there)
    a = best_of_k_success(np.array([0.0, 0.5, 1.0]), k=3)
    assert isinstance(a, np.ndarray)
    np.testing.assert_allclose(a, [0.0, 0.875, 1.0], rtol=1e-15)
    t = torch.tensor([0.5, 1.0], dtype=torch.float64, requires_grad=True)
    best_of_k_success(t, k=3).sum().backward()
    np.testing.assert_allclose(t.grad.numpy(), [3 * 0.25, 0.0], rtol=1e-14)  # power rule


# ---------------------------------------------------------------- properties


@given(policy_and_scores(), st.integers(1, 12), st.randoms(use_true_random=False))
def test_invariant_to_permuting_outcomes(ps, k, rnd):
    # common practice: outcome labels carry no meaning
    p, s = ps
    perm = np.array(rnd.sample(range(len(p)), len(p)))
    np.testing.assert_allclose(best_of_k_distribution(p[perm], s[perm], k=k), best_of_k_distribution(p, s, k=k)[perm], rtol=1e-10, atol=1e-15)


@given(policy_and_scores(), st.integers(1, 12))
def test_invariant_to_increasing_transform_of_scores(ps, k):
    # best-of-k uses only the order of the scores (ties included)
    p, s = ps
    t = s**3 + 5 * s - 2.0  # strictly increasing, exact on small integers
    np.testing.assert_allclose(best_of_k_distribution(p, t, k=k), best_of_k_distribution(p, s, k=k), rtol=1e-13, atol=1e-16)
    np.testing.assert_allclose(best_of_k_distribution(p, np.exp(s), k=k), best_of_k_distribution(p, s, k=k), rtol=1e-13, atol=1e-16)


@settings(max_examples=30)
@given(policy_and_scores())
def test_value_nondecreasing_in_k_when_reward_is_score(ps):
    # more draws can only raise the kept maximum (common practice)
    p, s = ps
    vals = [best_of_k_value(p, s, s, k=k) for k in range(1, 12)]
    assert all(b >= a - 1e-12 for a, b in zip(vals, vals[1:]))
    assert vals[-1] <= s[p > 0].max() + 1e-12


@given(policy_and_scores(), st.lists(st.floats(-5, 5), min_size=7, max_size=7))
def test_k1_is_mean_reward_and_rows_sum_to_one(ps, rew):
    p, s = ps
    r = np.array(rew[: len(p)])
    assert best_of_k_value(p, s, r, k=1) == pytest.approx(float(p @ r), abs=1e-12)  # best-of-1 = the policy
    for k in (1, 2, 9, 300):
        q = best_of_k_distribution(p, s, k=k)
        assert q.sum() == pytest.approx(1.0, abs=1e-12)
        assert (q[p == 0] == 0).all()  # never selects an outcome the policy cannot draw


@given(policy_and_scores(zeros=False), st.integers(1, 30))
def test_log_distribution_is_log_of_distribution(ps, k):
    p, s = ps
    np.testing.assert_allclose(np.exp(log_best_of_k_distribution(p, s, k=k)), best_of_k_distribution(p, s, k=k), rtol=1e-10, atol=1e-300)


# ----------------------------------------------------------------- gradients


def _logits(B=2, V=5, seed=0):
    g = torch.Generator().manual_seed(seed)
    return torch.randn(B, V, generator=g, dtype=torch.float64, requires_grad=True)


SCORES = torch.tensor([0.0, 1.0, 1.0, 2.0, 0.0], dtype=torch.float64)  # with ties
REWARDS = torch.tensor([0.2, -1.0, 3.0, 0.5, 1.0], dtype=torch.float64)


@pytest.mark.parametrize("k", [1, 3, 40])
def test_gradcheck_value_kl_log_through_logits(k):
    # reference: finite differences (torch.autograd.gradcheck)
    z = _logits()
    f = lambda x: best_of_k_value(softmax_policy(x, temperature=0.7), SCORES, REWARDS, k=k)
    assert torch.autograd.gradcheck(f, (z,))
    assert torch.autograd.gradcheck(lambda x: best_of_k_kl(softmax_policy(x), SCORES, k=k), (z,))
    assert torch.autograd.gradcheck(lambda x: log_best_of_k_distribution(softmax_policy(x), SCORES, k=k), (z,))
    assert torch.autograd.gradcheck(lambda x: best_of_k_distribution(softmax_policy(x), SCORES, k=k), (z,))


def test_gradient_wrt_rewards_is_bon_distribution():
    # V_k is linear in the rewards: dV_k / dR = pi_bon
    p = softmax_policy(_logits(1, 5).detach())[0]
    r = REWARDS.clone().requires_grad_(True)
    best_of_k_value(p, SCORES, r, k=3).backward()
    torch.testing.assert_close(r.grad, best_of_k_distribution(p, SCORES, k=3), rtol=1e-14, atol=0)


def test_gradient_at_zero_probability_outcome():
    # pi = (0.5, q, 0.5), distinct scores, q = 0: pi_bon(1) = (0.5 + q)^k - 0.5^k,
    # so d pi_bon(1) / dq = k 0.5^(k-1) (power rule)
    k = 4
    p = torch.tensor([0.5, 0.0, 0.5], dtype=torch.float64, requires_grad=True)
    q = best_of_k_distribution(p, torch.tensor([0.0, 1.0, 2.0]), k=k)
    assert float(q[1].detach()) == 0.0
    q[1].backward()
    assert float(p.grad[1]) == pytest.approx(k * 0.5 ** (k - 1), rel=1e-14)
    assert torch.isfinite(p.grad).all()


def test_best_of_one_jacobian_is_identity_even_at_zeros():
    # k = 1 keeps the single draw, so pi_bon = pi and d pi_bon / d pi = I (definition)
    p = torch.tensor([0.0, 0.5, 0.5], dtype=torch.float64)
    jac = torch.autograd.functional.jacobian(lambda x: best_of_k_distribution(x, torch.tensor([0.0, 1.0, 2.0]), k=1), p)
    torch.testing.assert_close(jac, torch.eye(3, dtype=torch.float64), rtol=0, atol=0)


def test_large_k_and_tiny_probs_are_finite_and_exact():
    # pi = (1 - 2e-30, 1e-30, 1e-30), scores (0, 1, 2), k = 10^4; binomial theorem to first order:
    # pi_bon(2) = 1 - (1 - 1e-30)^k ~ k 1e-30, pi_bon(1) ~ k 1e-30, pi_bon(0) ~ 1 - 2k 1e-30
    k = 10_000
    logits = torch.tensor([math.log1p(-2e-30), math.log(1e-30), math.log(1e-30)], dtype=torch.float64, requires_grad=True)
    s = torch.tensor([0.0, 1.0, 2.0])
    p = softmax_policy(logits)
    lq = log_best_of_k_distribution(p, s, k=k)
    np.testing.assert_allclose(lq.detach().numpy()[1:], [math.log(1e-26)] * 2, rtol=1e-12)
    assert float(lq[0].detach()) == pytest.approx(-2e-26, rel=1e-9)
    loss = lq.sum() + best_of_k_value(p, s, s, k=k) + best_of_k_kl(p, s, k=k) + best_of_k_distribution(p, s, k=k).sum()
    loss.backward()
    assert torch.isfinite(logits.grad).all()
    # d log pi_bon(2) / d logit_2 at tiny mass ~ 1 (pi_bon ~ k pi_2 while pi_2 is tiny)
    g = torch.autograd.grad(log_best_of_k_distribution(softmax_policy(logits), s, k=k)[2], logits)[0]
    assert float(g[2]) == pytest.approx(1.0, abs=1e-12)


def test_underflowing_selection_stays_exact_in_log_space():
    # pi = (1/2, 1/2), scores (0, 1): the low outcome wins only if all k draws are it, 2^-k
    k = 10_000
    lq = log_best_of_k_distribution(np.array([0.5, 0.5]), np.array([0.0, 1.0]), k=k)
    assert lq[0] == pytest.approx(-k * math.log(2), rel=1e-14)
    assert lq[1] == 0.0
    assert best_of_k_distribution(np.array([0.5, 0.5]), np.array([0.0, 1.0]), k=k)[0] == 0.0  # underflow, no NaN
    z = torch.zeros(2, dtype=torch.float64, requires_grad=True)
    v = best_of_k_value(softmax_policy(z), torch.tensor([0.0, 1.0]), torch.tensor([0.0, 1.0]), k=k)
    v.backward()
    assert torch.isfinite(z.grad).all()


# ------------------------------------------------------ kinds and dtypes


def test_numpy_and_torch_agree_and_kinds_follow_probs():
    p = np.array([[0.1, 0.2, 0.7], [0.5, 0.25, 0.25]])
    s = np.array([1.0, 2.0, 0.0])
    r = np.array([1.0, -1.0, 0.5])
    a = best_of_k_value(p, s, r, k=3)
    b = best_of_k_value(torch.tensor(p, dtype=torch.float32), torch.tensor(s), r, k=3)
    assert isinstance(a, np.ndarray) and a.shape == (2,)
    assert isinstance(b, torch.Tensor) and b.dtype == torch.float64
    np.testing.assert_allclose(b.numpy(), a, rtol=1e-6)  # float32 input rounding only
    assert isinstance(best_of_k_kl(p[0], s, k=2), np.floating)
    assert isinstance(softmax_policy([0.0, 1.0]), np.ndarray)
    np.testing.assert_allclose(softmax_policy(np.array([0.0, math.log(3.0)]), temperature=1.0), [0.25, 0.75])
    # temperature divides the logits (softmax definition)
    np.testing.assert_allclose(softmax_policy(np.array([0.0, 2 * math.log(3.0)]), temperature=2.0), [0.25, 0.75])
    np.testing.assert_allclose(softmax_policy(np.array([0.0, -np.inf])), [1.0, 0.0])
    # a logit whose quotient underflows to -inf beside a finite largest one has probability exp(-1e309) = 0
    np.testing.assert_array_equal(softmax_policy(np.array([-1e308, 0.0]), temperature=0.1), [0.0, 1.0])


# --------------------------------------------------------------- bad input


P3 = np.array([0.2, 0.3, 0.5])
S3 = np.array([0.0, 1.0, 2.0])


@pytest.mark.parametrize(
    "call,exc,match",
    [
        (lambda: best_of_k_distribution(np.array([0.5, 0.7, -0.2]), S3, k=2), ValueError, "probs must be non-negative"),
        (lambda: best_of_k_distribution(np.array([0.2, 0.3, 0.4]), S3, k=2), ValueError, "probs must sum to 1"),
        (lambda: best_of_k_distribution(np.array([0.2, np.nan, 0.5]), S3, k=2), ValueError, "probs must be finite"),
        (lambda: best_of_k_distribution(np.array(1.0), np.array(1.0), k=2), ValueError, "probs must have at least 1 dimension"),
        (lambda: best_of_k_distribution(np.zeros((2, 0)), np.zeros(0), k=2), ValueError, "probs must not be empty"),
        (lambda: best_of_k_distribution("abc", S3, k=2), TypeError, "probs must be an array of numbers"),
        (lambda: best_of_k_distribution(P3, np.array([0.0, np.inf, 1.0]), k=2), ValueError, "scores must be finite"),
        (lambda: best_of_k_distribution(P3, np.arange(4.0), k=2), ValueError, r"scores must have shape \(\.\.\., V\) with V=3"),
        (lambda: best_of_k_distribution(np.full((2, 3), 1 / 3), np.zeros((4, 3)), k=2), ValueError, "scores must broadcast"),
        (lambda: best_of_k_value(P3, S3, np.array([0.0, np.nan, 1.0]), k=2), ValueError, "rewards must be finite"),
        (lambda: best_of_k_value(P3, S3, np.arange(2.0), k=2), ValueError, "rewards must have shape"),
        (lambda: best_of_k_value(P3, np.zeros((2, 3)), np.zeros((4, 3)), k=2), ValueError, "rewards must broadcast"),
        (lambda: best_of_k_value(P3, S3, S3, k=0), ValueError, "k must be >= 1, got k=0"),
        (lambda: best_of_k_kl(P3, S3, k=2.0), TypeError, "k must be an int, got float"),
        (lambda: log_best_of_k_distribution(P3, S3, k=True), TypeError, "k must be an int"),
        (lambda: best_of_k_success(1.5, k=2), ValueError, r"p must be in \[0, 1\]"),
        (lambda: best_of_k_success(np.array([0.5, np.nan]), k=2), ValueError, "p must be finite"),
        (lambda: best_of_k_success(0.5, k=-3), ValueError, "k must be >= 1"),
        (lambda: softmax_policy(np.zeros(3), temperature=0.0), ValueError, "temperature must be a finite number > 0"),
        (lambda: softmax_policy(np.zeros(3), temperature="hot"), TypeError, "temperature must be a real number"),
        (lambda: softmax_policy(np.array([0.0, np.nan]), temperature=1.0), ValueError, "logits must be finite or -inf"),
        (lambda: softmax_policy(np.array([[0.0, 1.0], [-np.inf, -np.inf]])), ValueError, "at least one finite entry"),
        (lambda: softmax_policy([1.0, 2.0], temperature=1e-320), ValueError,
         r"temperature must keep logits / temperature finite in float64 .*got temperature=1e-320 with a row's largest "
         r"logit 2"),
        (lambda: softmax_policy([1e308, -1e308], temperature=0.1), ValueError,
         r"got temperature=0.1 with a row's largest logit 1e\+308"),
        (lambda: softmax_policy([[0.0, 0.0], [-3.0, -1.0]], temperature=1e-310), ValueError,
         r"got temperature=1e-310 with a row's largest logit 1: raise the temperature"),
    ],
)
def test_bad_input(call, exc, match):
    with pytest.raises(exc, match=match):
        call()


@given(policy_and_scores(), st.integers(1, 12), st.sampled_from([0.1, 1.0, -3.7, 1e-300, np.finfo(float).max]))
@settings(max_examples=60)
def test_value_lies_in_the_reward_range_and_equal_rewards_are_exact(ps, k, c):
    # V_k is a mean of the rewards under pi_bon (a distribution): equal rewards c give c exactly (the weights sum to 1
    # only up to rounding: 1.0000000000000002 * c before, and inf for the largest float64)
    p, s = ps
    assert best_of_k_value(p, s, np.full(len(p), c), k=k) == c
    r = c * np.linspace(0.5, 1.0, len(p))
    v = best_of_k_value(p, s, r, k=k)
    assert r.min() <= v <= r.max()


def test_rewards_near_the_edge_of_float64_match_enumeration():
    # every k-tuple enumerated in exact rationals (brute_bon's definition); the value was inf or NaN
    p, s = np.array([0.1, 0.2, 0.3, 0.4]), np.array([1.0, 0.0, 1.0, 2.0])
    r = np.array([1e308, -1.5e308, 1.7e308, -1e308])
    for k in (1, 2, 3):
        want = Fraction(0)
        for tup in itertools.product(range(4), repeat=k):
            top = max(s[t] for t in tup)
            win = [t for t in tup if s[t] == top]
            want += math.prod(Fraction(p[t]) for t in tup) * sum(Fraction(r[t]) for t in win) / len(win)
        assert best_of_k_value(p, s, r, k=k) == pytest.approx(float(want), rel=1e-12)
