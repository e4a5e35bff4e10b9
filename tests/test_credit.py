"""Credit is checked against exact gradients by enumerating every pool of samples.

Reference for the exact objective: V_k(theta) of a categorical policy is a
finite sum over k-tuples of outcomes (definition of best-of-k with uniform
tie-breaking, Chow et al. 2024), differentiated by torch autograd; it is
cross-checked against bonft.bon.best_of_k_value. Expectations over pools are exact:
sum over all V^n sample tuples weighted by their probability
(itertools.product), and grad log softmax(theta)_y = onehot(y) - softmax(theta)
(standard softmax identity).
"""
import itertools
import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.bon import best_of_k_value, log_best_of_k_distribution, softmax_policy
from bonft.estimate import best_of_k
from bonft.objectives.credit import (
    best_of_k_credit,
    best_of_k_sft_credit,
    pass_at_k_credit,
    pool_value,
    reinforce_credit,
)

TOL = 1e-10


# ---------------------------------------------------------------- references

def all_tuples(V, n):
    """(V^n, n) every ordered n-tuple of outcomes."""
    return np.array(list(itertools.product(range(V), repeat=n)), dtype=np.int64)


def kept_reward(Y, s, R):
    """Reward of the sample best-of-k keeps, averaged over tie-breaks: Y (M, k) -> (M,)."""
    st_, rt = s[Y], R[Y]
    top = st_ == st_.max(-1, keepdims=True)
    return (rt * top).sum(-1) / top.sum(-1)


def brute_value(theta, s, R, k):
    """V_k(theta) by enumerating k-tuples (differentiable in theta)."""
    Y = all_tuples(len(s), k)
    p = torch.softmax(theta, -1)
    P = p[torch.from_numpy(Y)].prod(-1)
    return (P * torch.from_numpy(kept_reward(Y, s, R))).sum()


def exact_grad(f, theta):
    th = torch.tensor(theta, dtype=torch.float64, requires_grad=True)
    f(th).backward()
    return th.grad.numpy()


def expected_estimate(theta, Y, w):
    """E[sum_i w_i grad log pi(y_i)] over all pools Y (M, n) with credit w (M, n)."""
    p = np.exp(theta - theta.max())
    p /= p.sum()
    P = p[Y].prod(-1)  # probability of each ordered pool
    score = np.eye(len(p))[Y] - p  # (M, n, V) grad log softmax
    return np.einsum("m,mi,miv->v", P, w, score)


def subset_credit(s, R, k, loo):
    """The credit formula written out over k-subsets (definition, no cleverness)."""
    n = len(s)
    out = np.zeros(n)
    for i in range(n):
        subs = [S for S in itertools.combinations(range(n), k) if i in S]
        out[i] = sum(kept_reward(np.array([S]), s, R)[0] for S in subs) / math.comb(n, k)
        if loo and n > 1:
            others = [j for j in range(n) if j != i]
            kb = min(k, n - 1)
            b = np.mean([kept_reward(np.array([S]), s, R)[0] for S in itertools.combinations(others, kb)])
            out[i] -= math.comb(n - 1, k - 1) / math.comb(n, k) * b
    return out


@st.composite
def settings_vnk(draw, max_pools=1024, n_min=1):
    V = draw(st.integers(3, 5))
    n_max = max(m for m in range(1, 6) if V ** m <= max_pools)
    n = draw(st.integers(n_min, n_max))
    k = draw(st.integers(1, n))
    seed = draw(st.integers(0, 2**31 - 1))
    return V, n, k, seed


def problem(V, seed, binary=False):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=V)
    s = rng.integers(0, 3, size=V).astype(float)  # few levels -> ties between outcomes
    R = rng.integers(0, 2, size=V).astype(float) if binary else rng.normal(size=V)
    return theta, s, R


# ---------------------------------------------------------------- best_of_k_credit

@settings(max_examples=40)
@given(st.integers(1, 7), st.data())
def test_best_of_k_credit_equals_subset_definition(n, data):
    # Reference: the k-subset sum of the brief, written out by enumeration.
    k = data.draw(st.integers(1, n))
    seed = data.draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    R = rng.normal(size=n)
    # tied scores (the grouped path) and distinct scores (the path without ties)
    for s in (rng.integers(0, 3, size=n).astype(float), rng.permutation(n).astype(float)):
        for baseline in ("loo", "none") if n > 1 else ("none",):  # n = 1: nothing to leave out
            w = best_of_k_credit(s[None], R[None], k=k, baseline=baseline)[0]
            np.testing.assert_allclose(w, subset_credit(s, R, k, baseline == "loo"), atol=1e-13)
        # pool U-statistic against the sorted-rank formula (Chow et al. 2024) in bonft.estimate
        assert abs(pool_value(s[None], R[None], k=k)[0] - best_of_k(s, R, k=k)) < 1e-13


@settings(max_examples=40)
@given(settings_vnk())
def test_best_of_k_credit_is_exactly_unbiased(cfg):
    V, n, k, seed = cfg
    theta, s, R = problem(V, seed)
    Y = all_tuples(V, n)
    g_brute = exact_grad(lambda th: brute_value(th, s, R, k), theta)
    g_bon = exact_grad(lambda th: best_of_k_value(softmax_policy(th), torch.tensor(s), torch.tensor(R), k=k), theta)
    np.testing.assert_allclose(g_bon, g_brute, atol=1e-12)  # two independent exact gradients agree
    for baseline in ("loo", "none") if n > 1 else ("none",):
        w = best_of_k_credit(s[Y], R[Y], k=k, baseline=baseline)
        est = expected_estimate(theta, Y, w)
        assert np.abs(est - g_brute).max() < TOL, (V, n, k, baseline, est, g_brute)


def test_grad_vk_gradcheck():
    # torch.autograd.gradcheck: analytic vs finite-difference Jacobian (float64).
    theta, s, R = problem(4, 3)
    th = torch.tensor(theta, requires_grad=True)
    for k in (1, 2, 5):
        assert torch.autograd.gradcheck(
            lambda t: best_of_k_value(softmax_policy(t), torch.tensor(s), torch.tensor(R), k=k), (th,))
        assert torch.autograd.gradcheck(lambda t: brute_value(t, s, R, k), (th,))


def test_worked_example_by_hand():
    # Hand computation: scores (1, 2, 2), rewards (0, 1, 0), k = 2, n = 3.
    # Pairs: {0,1} -> 1, {0,2} -> 0, {1,2} -> tie -> 1/2. C(3,2) = 3.
    # No-baseline credit: w0 = (1+0)/3, w1 = (1+1/2)/3, w2 = (0+1/2)/3.
    s, R = np.array([[1.0, 2, 2]]), np.array([[0.0, 1, 0]])
    np.testing.assert_allclose(best_of_k_credit(s, R, k=2, baseline="none")[0], [1 / 3, 1 / 2, 1 / 6], atol=1e-15)
    # loo: b_i = best-of-2 of the other two: b0 = 1/2, b1 = 0, b2 = 1; factor C(2,1)/C(3,2) = 2/3.
    np.testing.assert_allclose(best_of_k_credit(s, R, k=2)[0], [1 / 3 - 1 / 3, 1 / 2, 1 / 6 - 2 / 3], atol=1e-15)
    assert abs(pool_value(s, R, k=2)[0] - 0.5) < 1e-15  # (1 + 0 + 1/2)/3


def test_reinforce_is_best_of_k_credit_at_k1():
    # Kool et al. 2019 leave-one-out REINFORCE: w_i = (R_i - mean of others)/n.
    rng = np.random.default_rng(1)
    s, R = rng.normal(size=(6, 5)), rng.normal(size=(6, 5))
    want = (R - (R.sum(1, keepdims=True) - R) / 4) / 5
    np.testing.assert_allclose(reinforce_credit(R), want, atol=1e-14)
    np.testing.assert_allclose(best_of_k_credit(s, R, k=1), want, atol=1e-14)
    np.testing.assert_allclose(reinforce_credit(R, baseline="none"), R / 5, atol=1e-15)
    np.testing.assert_allclose(best_of_k_credit(s, R, k=1, baseline="none"), R / 5, atol=1e-15)


def test_single_sample_refuses_leave_one_out():
    # n = 1: nobody to leave out; the leave-one-out credits refuse, naming n and the ways out
    msg = r"n must be >= 2 for the leave-one-out baseline of {} \(n=1: .*\); draw n >= 2 samples per prompt or use baseline='none'"
    with pytest.raises(ValueError, match=msg.format("best_of_k_credit")):
        best_of_k_credit([[0.3]], [[0.7]], k=1)
    with pytest.raises(ValueError, match=msg.format("reinforce_credit")):
        reinforce_credit([[0.7], [0.2]])
    with pytest.raises(ValueError, match=r"n must be >= 2 for pass_at_k_credit \(n=1: .* identically 0\)"):
        pass_at_k_credit([[1.0]], k=1, estimator="plugin")
    # baseline="none": credit = reward (plain REINFORCE, Williams 1992: unbiased without a baseline)
    assert best_of_k_credit([[0.3]], [[0.7]], k=1, baseline="none")[0, 0] == pytest.approx(0.7, abs=1e-15)
    assert reinforce_credit([[0.7]], baseline="none")[0, 0] == pytest.approx(0.7, abs=1e-15)


# ---------------------------------------------------------------- pass_at_k_credit

def pass_at_k_exact(theta, correct_outcomes, k):
    # pass@k = 1 - (1 - p)^k for a single-try success chance p (Chen et al. 2021).
    p = torch.softmax(theta, -1)[torch.from_numpy(correct_outcomes)].sum()
    return 1 - (1 - p) ** k


@settings(max_examples=40)
@given(settings_vnk(n_min=2))
def test_pass_at_k_credit_unbiased_and_positive_only_estimand(cfg):
    V, n, k, seed = cfg
    theta, _, R = problem(V, seed, binary=True)
    Y = all_tuples(V, n)
    good = np.flatnonzero(R == 1)
    g = exact_grad(lambda th: pass_at_k_exact(th, good, k), theta)
    c = R[Y]
    est = expected_estimate(theta, Y, pass_at_k_credit(c, k=k))
    assert np.abs(est - g).max() < TOL, (V, n, k, est, g)
    np.testing.assert_allclose(pass_at_k_credit(c, k=k), best_of_k_credit(c, c, k=k), atol=1e-13)
    # positive_only (derived in bonft.objectives.credit.pass_at_k_credit): k < n estimates
    # grad[(k/(k+1)) pass@(k+1)] = (1-p) grad pass@k; k = n estimates grad pass@k.
    if k < n:
        target = exact_grad(lambda th: k / (k + 1) * pass_at_k_exact(th, good, k + 1), theta)
    else:
        target = g
    est_pos = expected_estimate(theta, Y, pass_at_k_credit(c, k=k, positive_only=True))
    assert np.abs(est_pos - target).max() < TOL, (V, n, k, est_pos, target)
    assert (pass_at_k_credit(c, k=k, positive_only=True)[c == 0] == 0).all()


def plugin_bias(theta, good, V, n, k):
    Y = all_tuples(V, n)
    c = np.isin(Y, good).astype(float)
    g = exact_grad(lambda th: pass_at_k_exact(th, good, k), theta)
    return np.abs(expected_estimate(theta, Y, pass_at_k_credit(c, k=k, estimator="plugin")) - g).max()


def test_plugin_bias_shrinks_with_n():
    # Plug-in k(1-p_hat)^(k-1)(R - p_hat)/n is biased but consistent (delta method).
    theta, good = np.array([0.3, -0.2, 0.5]), np.array([0])
    biases = [plugin_bias(theta, good, 3, n, 2) for n in (2, 3, 4, 5, 6, 7)]
    assert biases[0] > 1e-3, biases  # really biased at small n
    assert all(b1 < b0 for b0, b1 in zip(biases, biases[1:])), f"plugin bias by n=2..7: {biases}"
    assert biases[-1] < 0.4 * biases[0], f"plugin bias by n=2..7: {biases}"


def test_pass_at_k_credit_closed_counts_example():
    # Hand computation, n = 4, c = 1 correct (sample 0), k = 2:
    # correct: C(3,1)/C(4,2) = 1/2; incorrect: (C(3,1) - C(2,1))/C(4,2) = 1/6.
    # loo baseline (k/n) * pass@2 of the others: for sample 0 others have c=0 -> 0;
    # for an incorrect sample others have 1 correct of 3: 1 - C(2,2)/C(3,2) = 2/3 -> (1/2)(2/3) = 1/3.
    w = pass_at_k_credit([[1, 0, 0, 0]], k=2)[0]
    np.testing.assert_allclose(w, [1 / 2, 1 / 6 - 1 / 3, 1 / 6 - 1 / 3, 1 / 6 - 1 / 3], atol=1e-15)
    # plugin: p_hat = 1/4, (k/n)(1-p)^(k-1)(R - p) = (1/2)(3/4)(R - 1/4)
    np.testing.assert_allclose(pass_at_k_credit([[1, 0, 0, 0]], k=2, estimator="plugin")[0],
                               [0.375 * 0.75, -0.375 * 0.25, -0.375 * 0.25, -0.375 * 0.25], atol=1e-15)


# ---------------------------------------------------------------- best_of_k_sft_credit

def sft_bias(theta, s, y_star, k, n):
    V = len(theta)
    Y = all_tuples(V, n)
    exact = exact_grad(lambda th: log_best_of_k_distribution(softmax_policy(th), torch.tensor(s), k=k)[y_star], theta)
    p = np.exp(theta) / np.exp(theta).sum()
    w = best_of_k_sft_credit(s[Y], np.full(len(Y), s[y_star]), k=k)
    est = (np.eye(V)[y_star] - p) + expected_estimate(theta, Y, w)  # exact reference term + sample term
    return np.abs(est - exact).max()


def test_sft_bias_shrinks_with_n():
    # Exact target: grad log pi_bon(y*) (Chow et al. 2024 BoN-SFT), via bonft.bon autograd.
    theta = np.array([0.4, -0.1, 0.2, -0.5])
    s = np.array([0.0, 1.0, 1.0, 2.0])  # reference y*=1 ties with outcome 2
    biases = [sft_bias(theta, s, 1, 3, n) for n in (3, 4, 5, 6)]
    assert all(b1 < b0 for b0, b1 in zip(biases, biases[1:])), f"sft bias by n=3..6: {biases}"
    assert biases[-1] < 0.7 * biases[0], f"sft bias by n=3..6: {biases}"


def test_best_of_k_sft_credit_continuous_case_formula():
    # No ties at s* and smoothing=0: h = log k + (k-1) log F (Chow et al. 2024, continuous
    # scores), so dh/dF = (k-1)/F and w_i = (1/n)(k-1)/F_hat * (u_i - mean_{-i} u).
    s = np.array([[0.1, 0.5, 0.9, 1.3, 0.2]])
    u = (s[0] <= 0.7).astype(float)  # reference score 0.7, F_hat = 3/5
    k, n, F = 4, 5, 3 / 5
    want = (k - 1) / F * (u - (u.sum() - u) / (n - 1)) / n
    np.testing.assert_allclose(best_of_k_sft_credit(s, [0.7], k=k, smoothing=0.0)[0], want, atol=1e-14)
    w = best_of_k_sft_credit(s, [0.7], k=k)
    assert (w[0, s[0] > 0.7] < 0).all() and (w[0, s[0] < 0.7] > 0).all()
    np.testing.assert_array_equal(best_of_k_sft_credit(s, [0.7], k=1), np.zeros_like(s))  # k = 1 -> plain SFT


def test_sft_smoothing_when_reference_beats_nothing():
    s = np.array([[2.0, 3.0, 4.0]])  # every sample beats the reference at 1.0
    w = best_of_k_sft_credit(s, [1.0], k=3)  # smoothing=1: F_hat = 1/4, F<_hat = 0 -> r = 0, h_F = (k-1)/F = 8
    np.testing.assert_allclose(w, np.zeros((1, 3)), atol=1e-15)  # u = v = 0 for all: no contrast
    with pytest.raises(ValueError, match=r"smoothing=0 needs a sample scoring at or below the reference, got none in row 0"):
        best_of_k_sft_credit(s, [1.0], k=3, smoothing=0)
    s2 = np.array([[0.0, 3.0, 4.0]])  # one sample below: F_hat = 2/4, r = 1/2
    w2 = best_of_k_sft_credit(s2, [1.0], k=2)[0]
    # k = 2: h = log(F + F_), h_F = h_< = 1/(F + F_) = 1/(2/4 + 1/4) = 4/3
    u = np.array([1.0, 0, 0])
    loo = (u.sum() - u) / 2
    np.testing.assert_allclose(w2, (4 / 3) * 2 * (u - loo) / 3, atol=1e-14)


# ---------------------------------------------------------------- invariances

@settings(max_examples=30)
@given(st.integers(2, 9), st.integers(0, 2**31 - 1), st.floats(-50, 50))
def test_equal_rewards_shift_and_permutation(n, seed, shift):
    rng = np.random.default_rng(seed)
    k = int(rng.integers(1, n + 1))
    s = rng.integers(0, 3, size=(3, n)).astype(float)
    R = rng.normal(size=(3, n))
    const = np.full((3, n), rng.normal())
    # common practice: a leave-one-out baseline gives no signal when all rewards agree
    assert (best_of_k_credit(s, const, k=k) == 0).all()
    assert (reinforce_credit(const) == 0).all()
    assert (pass_at_k_credit(np.ones((3, n)), k=k) == 0).all() and (pass_at_k_credit(np.zeros((3, n)), k=k) == 0).all()
    # shifting every reward by a constant leaves loo credit unchanged (the k/n terms cancel)
    np.testing.assert_allclose(best_of_k_credit(s, R + shift, k=k), best_of_k_credit(s, R, k=k), atol=1e-11)
    np.testing.assert_allclose(reinforce_credit(R + shift), reinforce_credit(R), atol=1e-11)
    # permutation equivariance: samples are exchangeable
    perm = rng.permutation(n)
    np.testing.assert_allclose(best_of_k_credit(s[:, perm], R[:, perm], k=k), best_of_k_credit(s, R, k=k)[:, perm], atol=1e-13)
    c = (R > 0).astype(float)
    np.testing.assert_allclose(pass_at_k_credit(c[:, perm], k=k), pass_at_k_credit(c, k=k)[:, perm], atol=1e-14)
    e = rng.integers(0, 3, size=3).astype(float)
    np.testing.assert_allclose(best_of_k_sft_credit(s[:, perm], e, k=k), best_of_k_sft_credit(s, e, k=k)[:, perm], atol=1e-14)


def test_large_pools_stay_finite_and_exact():
    n = 4096
    rng = np.random.default_rng(7)
    s = rng.permutation(n).astype(float)[None]  # distinct scores
    R = rng.normal(size=(1, n))
    top, second = np.argsort(s[0])[-1], np.argsort(s[0])[-2]
    for k in (1, 64, 4095, 4096):
        for baseline in ("loo", "none"):
            w = best_of_k_credit(s, R, k=k, baseline=baseline)
            assert np.isfinite(w).all(), (k, baseline)
        # sum of no-baseline credit = k * U-statistic; U-statistic by bonft.estimate's rank formula
        v = best_of_k_credit(s, R, k=k, baseline="none").sum() / k
        assert abs(v - best_of_k(s[0], R[0], k=k)) < 1e-9, k
        assert np.isfinite(pass_at_k_credit((R > 0), k=k)).all() and np.isfinite(best_of_k_sft_credit(s, [2000.0], k=k)).all()
    # k = n: every subset is the whole pool, so credit is R_top for all (no baseline) and,
    # with loo, 0 except the top sample, which gets R_top - R_second.
    np.testing.assert_allclose(best_of_k_credit(s, R, k=n, baseline="none")[0], np.full(n, R[0, top]), atol=1e-12)
    want = np.zeros(n)
    want[top] = R[0, top] - R[0, second]
    np.testing.assert_allclose(best_of_k_credit(s, R, k=n)[0], want, atol=1e-12)
    # heavy ties: two score levels only
    s2 = (rng.random((2, n)) < 0.5).astype(float)
    for k in (3, 4096):
        w = best_of_k_credit(s2, rng.normal(size=(2, n)), k=k)
        assert np.isfinite(w).all()


# ---------------------------------------------------------------- kinds and errors

def test_numpy_in_numpy_out_torch_in_torch_out():
    s, R = np.array([[1.0, 2.0, 0.0]]), np.array([[0.0, 1.0, 1.0]])
    out_np = best_of_k_credit(s, R, k=2)
    out_t = best_of_k_credit(torch.tensor(s, dtype=torch.float32), torch.tensor(R, dtype=torch.float32), k=2)
    assert isinstance(out_np, np.ndarray) and out_np.dtype == np.float64
    assert isinstance(out_t, torch.Tensor) and out_t.dtype == torch.float32
    np.testing.assert_allclose(out_t.numpy(), out_np, atol=1e-7)
    assert isinstance(pass_at_k_credit(torch.tensor([[True, False]]), k=1), torch.Tensor)
    assert pass_at_k_credit(torch.tensor([[True, False]]), k=1).dtype == torch.float64
    assert isinstance(best_of_k_credit([[1.0, 2.0]], [[0.0, 1.0]], k=1), np.ndarray)  # lists -> numpy


def test_bad_input_messages():
    s, R = np.zeros((2, 4)), np.zeros((2, 4))
    with pytest.raises(ValueError, match=r"k must be <= n \(n=4\), got k=5"):
        best_of_k_credit(s, R, k=5)
    with pytest.raises(ValueError, match=r"k must be >= 1, got k=0"):
        pass_at_k_credit(s, k=0)
    with pytest.raises(TypeError, match=r"k must be an int, got float 2.0"):
        best_of_k_credit(s, R, k=2.0)
    with pytest.raises(ValueError, match=r"rewards must have the same shape as scores \(2, 4\), got \(2, 3\)"):
        best_of_k_credit(s, np.zeros((2, 3)), k=1)
    with pytest.raises(ValueError, match=r"scores must have shape \(B, n\) \(2 dimension\(s\)\), got shape \(4,\)"):
        best_of_k_credit(np.zeros(4), np.zeros(4), k=1)
    bad = R.copy()
    bad[1, 2] = np.nan
    with pytest.raises(ValueError, match=r"rewards must be finite, got nan at index \(1, 2\)"):
        best_of_k_credit(s, bad, k=1)
    with pytest.raises(ValueError, match=r"baseline must be one of \('loo', 'none'\), got 'mean'"):
        best_of_k_credit(s, R, k=1, baseline="mean")
    with pytest.raises(ValueError, match=r"estimator must be one of \('unbiased', 'plugin'\), got 'exact'"):
        pass_at_k_credit(s, k=1, estimator="exact")
    with pytest.raises(ValueError, match=r"correct must hold only 0/1 \(or booleans\), got 0.5 at index \(0, 1\)"):
        pass_at_k_credit([[1, 0.5]], k=1)
    with pytest.raises(TypeError, match=r"positive_only must be a bool, got int 1"):
        pass_at_k_credit(s, k=1, positive_only=1)
    with pytest.raises(ValueError, match=r"reference_scores must have shape \(B,\) = \(2,\) to match scores, got \(3,\)"):
        best_of_k_sft_credit(s, np.zeros(3), k=1)
    with pytest.raises(ValueError, match=r"smoothing must be a finite number >= 0, got smoothing=-1.0"):
        best_of_k_sft_credit(s, np.zeros(2), k=1, smoothing=-1.0)
    with pytest.raises(TypeError, match=r"scores must be an array of numbers, got str"):
        best_of_k_credit("abc", R, k=1)
    with pytest.raises(ValueError, match=r"rewards must not be empty"):
        reinforce_credit(np.zeros((2, 0)))


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning", "ignore:invalid value:RuntimeWarning")
def test_finite_inputs_whose_credit_overflows_are_a_value_error_not_nan():
    # IEEE 754 double arithmetic: 1e308 - (-1e308) = 2e308 exceeds the largest double (1.798e308), so the
    # leave-one-out credit of these finite rewards is +-inf; 1 / 1e-320 overflows too. Named, never returned.
    from bonft.objectives.credit import best_of_k_credit, best_of_k_sft_credit, reinforce_credit

    msg = r"credit must be finite, got (-?inf|nan) at index \(0, \d\) from finite inputs"
    with pytest.raises(ValueError, match=msg):
        reinforce_credit([[1e308, -1e308]])
    with pytest.raises(ValueError, match=msg):
        best_of_k_credit([[0.0, 1.0]], [[1e308, -1e308]], k=1)
    with pytest.raises(ValueError, match=msg):
        best_of_k_sft_credit(np.ones((1, 3)), np.zeros(1), k=2, smoothing=1e-320)
    # large but representable: finite credit, (1e307 - (-1e307)) / 2 = 1e307
    assert reinforce_credit([[1e307, -1e307]]).tolist() == [[1e307, -1e307]]
