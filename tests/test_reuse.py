"""Sample reuse: the losses with ``sampling_logprobs`` (importance ratio pi/pi_old, optional clipping).

Proofs by exact enumeration, as in tests/test_credit.py: a categorical policy softmax(theta) over V
outcomes, pools of n samples drawn from a *different* categorical policy pi_old; every ordered pool
(itertools.product) weighted by its probability under pi_old. The target gradient is exact: best-of-k
from bonft.bon.best_of_k_value (autograd), pass@k = 1 - (1-p)^k (Chen et al. 2021), E[R] for
REINFORCE. Importance sampling identity: E_old[(pi/pi_old)(Y) f(Y)] = E_pi[f(Y)] (textbook, e.g.
Owen 2013, "Monte Carlo theory, methods and examples", ch. 9). The clipped surrogate is written out
from Schulman et al. 2017 ("Proximal Policy Optimization Algorithms", eq. 7):
L = E[min(r A, clip(r, 1 - eps, 1 + eps) A)].
"""
import itertools
import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.bon import best_of_k_value, softmax_policy
from bonft.objectives.credit import best_of_k_credit, reinforce_credit
from bonft.objectives.losses import (
    best_of_k_loss,
    best_of_k_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)

TOL = 1e-10


def all_tuples(V, n):
    return torch.tensor(list(itertools.product(range(V), repeat=n)), dtype=torch.long)


def reused_grad(theta, theta_old, n, loss_fn):
    """grad_theta of E_{Y ~ pi_old^n}[loss(Y)]: loss_fn(logprobs (M, n), sampling_logprobs (M, n), Y) -> (M,)."""
    Y = all_tuples(len(theta), n)
    th = torch.tensor(theta, dtype=torch.float64, requires_grad=True)
    logp = torch.log_softmax(th, -1)
    old = torch.log_softmax(torch.tensor(theta_old, dtype=torch.float64), -1)
    P = torch.exp(old[Y].sum(-1))  # probability of each ordered pool under the sampling policy
    (P * loss_fn(logp[Y], old[Y], Y)).sum().backward()
    return th.grad.numpy()


def exact_grad(f, theta):
    th = torch.tensor(theta, dtype=torch.float64, requires_grad=True)
    f(th).backward()
    return th.grad.numpy()


@st.composite
def cfg(draw):
    V = draw(st.integers(3, 4))
    n = draw(st.integers(2, 4 if V == 3 else 3))
    k = draw(st.integers(1, n))
    return V, n, k, draw(st.integers(0, 2**31 - 1))


def problem(V, seed, spread=0.8):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=V)
    theta_old = theta + spread * rng.normal(size=V)  # the policy that sampled: a different one
    s = torch.tensor(rng.integers(0, 3, size=V).astype(float))  # few levels -> ties
    R = torch.tensor(rng.normal(size=V))
    return theta, theta_old, s, R


# ---------------------------------------------------------------- unbiasedness by enumeration

@settings(max_examples=25)
@given(cfg())
def test_pool_ratio_is_unbiased_for_every_objective(c):
    # E_old[prod_i r_i * sum_i w_i grad log pi(y_i)] = E_pi[sum_i w_i grad log pi(y_i)] = grad target
    V, n, k, seed = c
    theta, theta_old, s, R = problem(V, seed)
    want = -exact_grad(lambda th: best_of_k_value(softmax_policy(th), s, R, k=k), theta)
    for baseline in ("loo", "none"):
        got = reused_grad(theta, theta_old, n, lambda lp, old, Y: best_of_k_loss(
            lp, s[Y], R[Y], k=k, baseline=baseline, sampling_logprobs=old, ratio_level="pool", reduction="none"))
        assert np.abs(got - want).max() < TOL, (V, n, k, baseline, got, want)
    good = (R > 0).double()
    want_pass = -exact_grad(lambda th: 1 - (1 - (torch.softmax(th, -1) * good).sum()) ** k, theta)
    got = reused_grad(theta, theta_old, n, lambda lp, old, Y: pass_at_k_loss(
        lp, good[Y], k=k, sampling_logprobs=old, ratio_level="pool", reduction="none"))
    assert np.abs(got - want_pass).max() < TOL, (V, n, k, got, want_pass)


@settings(max_examples=25)
@given(cfg())
def test_sequence_ratio_is_unbiased_for_leave_one_out_reinforce(c):
    # r_i * (R_i - mean of the others): the others' mean is independent of sample i, so
    # E_old[r_i b_i grad log pi(y_i)] = E[b] E_pi[grad log pi] = 0 and the reward term is importance sampling
    V, n, _, seed = c
    theta, theta_old, _, R = problem(V, seed)
    want = -exact_grad(lambda th: (torch.softmax(th, -1) * R).sum(), theta)
    got = reused_grad(theta, theta_old, n, lambda lp, old, Y: reinforce_loss(
        lp, R[Y], sampling_logprobs=old, reduction="none"))  # ratio_level="sequence" is the default
    assert np.abs(got - want).max() < TOL, (V, n, got, want)


def test_sequence_ratio_is_biased_for_best_of_k_and_the_bias_vanishes_on_policy():
    # k > 1: the other members of each k-subset still come from pi_old, so the per-sample ratio
    # does not reweight the subset; the bias is real and shrinks as pi_old -> pi.
    V, n, k = 4, 3, 3
    rng = np.random.default_rng(5)
    theta = rng.normal(size=V)
    direction = rng.normal(size=V)
    s = torch.tensor([0.0, 1.0, 2.0, 3.0])
    R = torch.tensor(rng.normal(size=V))
    want = -exact_grad(lambda th: best_of_k_value(softmax_policy(th), s, R, k=k), theta)
    biases = []
    for spread in (0.8, 0.4, 0.1, 0.0):
        got = reused_grad(theta, theta + spread * direction, n, lambda lp, old, Y: best_of_k_loss(
            lp, s[Y], R[Y], k=k, sampling_logprobs=old, reduction="none"))
        biases.append(float(np.abs(got - want).max()))
    assert biases[0] > 1e-2, biases  # measured: see the numbers in the message of the next line
    assert biases[0] > biases[1] > biases[2] > biases[3], f"sequence-level bias by spread 0.8, 0.4, 0.1, 0: {biases}"
    assert biases[3] < TOL, biases


def test_clipping_bias_is_measured_and_zero_inside_the_band():
    # A clipped surrogate is biased when ratios leave the band and exact when they all stay inside.
    n = 3
    theta = np.array([0.3, -0.5, 0.2])
    R = torch.tensor([1.0, 0.0, 0.5], dtype=torch.float64)
    want = -exact_grad(lambda th: (torch.softmax(th, -1) * R).sum(), theta)

    def clipped(theta_old, eps):
        return reused_grad(theta, theta_old, n, lambda lp, old, Y: reinforce_loss(
            lp, R[Y], sampling_logprobs=old, clip_ratio=eps, reduction="none"))

    near = theta + np.array([0.01, -0.01, 0.0])  # every sequence ratio within [0.98, 1.02]
    assert np.abs(clipped(near, 0.2) - want).max() < TOL
    far = theta + np.array([1.0, -1.0, 0.0])
    bias = float(np.abs(clipped(far, 0.2) - want).max())
    assert bias > 1e-3, f"clipping bias at eps=0.2, logits moved by 1: {bias}"


# ---------------------------------------------------------------- ratio 1 is the on-policy gradient exactly

def token_batch(B=3, n=4, T=5, seed=0):
    g = torch.Generator().manual_seed(seed)
    lp = -torch.rand(B, n, T, generator=g, dtype=torch.float64)
    lengths = torch.randint(1, T + 1, (B, n), generator=g)
    mask = torch.arange(T)[None, None, :] < lengths[..., None]
    lp = torch.where(mask, lp, torch.tensor(float("nan"), dtype=torch.float64))  # padding holds NaN
    return lp, mask


def test_ratio_one_gives_the_on_policy_loss_and_gradient_exactly():
    lp0, mask = token_batch()
    rng = np.random.default_rng(2)
    s, R = rng.integers(0, 3, (3, 4)).astype(float), (rng.random((3, 4)) < 0.5).astype(float)
    e_lp, e_s = -torch.rand(3, 6, dtype=torch.float64), rng.integers(0, 3, 3).astype(float)
    calls = [
        lambda lp, **kw: best_of_k_loss(lp, s, R, k=2, **kw),
        lambda lp, **kw: pass_at_k_loss(lp, R, k=3, **kw),
        lambda lp, **kw: reinforce_loss(lp, R, **kw),
        lambda lp, **kw: best_of_k_sft_loss(lp, s, e_lp, e_s, k=2, **kw),
        lambda lp, **kw: policy_gradient_loss(lp, R - 0.5, **kw),
    ]
    reuse = [{"ratio_level": "token"}, {"ratio_level": "sequence"}, {"ratio_level": "pool"},
             {"ratio_level": "token", "clip_ratio": 0.2}, {"ratio_level": "sequence", "clip_ratio": 0.1}]
    for call in calls:
        for common in ({"mask": mask}, {"mask": mask, "token_reduction": "mean", "reduction": "none"},
                       {"mask": mask, "anchor_logprobs": lp0 - 0.3, "anchor_weight": 0.5}):
            a = lp0.clone().requires_grad_(True)
            on = call(a, **common)
            on.sum().backward()
            for extra in reuse:
                b = lp0.clone().requires_grad_(True)
                off = call(b, sampling_logprobs=lp0.detach().clone(), **common, **extra)
                off.sum().backward()
                assert torch.equal(on, off), (common, extra)
                assert torch.equal(torch.nan_to_num(a.grad, nan=7.0), torch.nan_to_num(b.grad, nan=7.0)), (common, extra)
                assert (b.grad[~mask] == 0).all()
    _, info = reinforce_loss(lp0, R, mask=mask, sampling_logprobs=lp0.detach(), clip_ratio=0.2, return_info=True)
    assert float(info["ratio_ess"]) == 1.0 and float(info["clip_frac"]) == 0.0


# ---------------------------------------------------------------- the clipped surrogate, written out

@pytest.mark.parametrize("level", ["sequence", "token"])
def test_clipped_gradient_is_the_surrogate_gradient(level):
    # Schulman et al. 2017 eq. 7 per unit u (a sample, or a token carrying its sample's credit):
    # L = sum_u min(r_u A_u, clip(r_u, 1-eps, 1+eps) A_u), r_u = exp(logp_u - logp_old_u), A_u = credit
    B, n, T, eps = 4, 5, 3, 0.2
    g = torch.Generator().manual_seed(3)
    lp0 = -torch.rand(B, n, T, generator=g, dtype=torch.float64) * 2
    old = lp0 + 0.3 * torch.randn(B, n, T, generator=g, dtype=torch.float64)  # ratios well outside the band
    R = torch.rand(B, n, generator=g, dtype=torch.float64)
    w = reinforce_credit(R)
    a = lp0.clone().requires_grad_(True)
    loss, info = reinforce_loss(a, R, sampling_logprobs=old, clip_ratio=eps, ratio_level=level, reduction="sum",
                                return_info=True)
    loss.backward()
    b = lp0.clone().requires_grad_(True)
    if level == "sequence":
        r = torch.exp(b.sum(-1) - old.sum(-1))
        A = w
    else:
        r = torch.exp(b - old)
        A = w[..., None].expand_as(r)
    surrogate = torch.minimum(r * A, torch.clamp(r, 1 - eps, 1 + eps) * A).sum()
    (-surrogate).backward()
    np.testing.assert_allclose(a.grad.numpy(), b.grad.numpy(), rtol=0, atol=1e-13)
    rd = r.detach()
    dropped = ((A > 0) & (rd > 1 + eps)) | ((A < 0) & (rd < 1 - eps))
    assert 0 < float(dropped.double().mean()) < 1  # the case clips some units, not all
    assert float(info["clip_frac"]) == pytest.approx(float(dropped.double().mean()), abs=1e-15)
    # effective sample size of importance weights (Kish 1965): (sum r)^2 / sum r^2, here as a share of N
    assert float(info["ratio_ess"]) == pytest.approx(float(rd.sum() ** 2 / (rd.numel() * (rd ** 2).sum())), abs=1e-14)
    # the loss value: -sum w r log pi with r detached and clipped units dropped
    coef = torch.where(dropped, 0.0, rd)
    value = -(w * (coef * lp0).sum(-1)).sum() if level == "token" else -(w * coef * lp0.sum(-1)).sum()
    assert float(loss.detach()) == pytest.approx(float(value), abs=1e-13)


def test_pool_ratio_weights_every_term_of_the_pool():
    lp0 = -torch.rand(2, 3, dtype=torch.float64)
    old = lp0 + torch.tensor([[0.1, -0.2, 0.3], [0.0, 0.05, -0.05]], dtype=torch.float64)
    s, R = np.array([[0.0, 1, 2], [2, 1, 0]]), np.array([[0.3, 0.9, 0.1], [1.0, 0.0, 0.5]])
    loss, info = best_of_k_loss(lp0, s, R, k=2, sampling_logprobs=old, ratio_level="pool", reduction="none",
                                return_info=True)
    rho = torch.exp((lp0 - old).sum(-1))  # likelihood ratio of each pool: prod_i pi(y_i)/pi_old(y_i)
    w = torch.from_numpy(best_of_k_credit(s, R, k=2))
    torch.testing.assert_close(loss, -rho * (w * lp0).sum(-1), rtol=0, atol=1e-15)
    assert float(info["ratio_ess"]) == pytest.approx(float(rho.sum() ** 2 / (2 * (rho ** 2).sum())), abs=1e-15)


# ---------------------------------------------------------------- bad input

def test_reuse_bad_input_messages():
    lp, mask = token_batch(B=2, n=3, T=4)
    R = np.array([[1.0, 0, 0], [0, 1, 1]])
    old = lp.detach().clone()
    with pytest.raises(ValueError, match=r"sampling_logprobs must have the same shape as logprobs \(2, 3, 4\), got \(2, 3\)"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=old[..., 0])
    with pytest.raises(ValueError, match=r"sampling_logprobs must not require grad .* pass sampling_logprobs.detach\(\)"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=old.clone().requires_grad_(True))
    with pytest.raises(TypeError, match=r"sampling_logprobs must be a torch.Tensor, got ndarray"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=old.numpy())
    nan_old = old.clone()
    nan_old[1, 2, 0] = float("nan")  # under the mask (every row has its first token)
    with pytest.raises(ValueError, match=r"sampling_logprobs give a non-finite sequence-level ratio pi/pi_old: "
                                         r"logprobs - sampling_logprobs = nan at index \(1, 2\)"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=nan_old)
    far = old.clone()
    far[0, 1, 0] = -1000.0  # exp(logprobs - sampling_logprobs) overflows
    with pytest.raises(ValueError, match=r"non-finite token-level ratio .* at index \(0, 1, 0\)"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=far, ratio_level="token")
    with pytest.raises(ValueError, match=r"clip_ratio=0.2 needs sampling_logprobs"):
        reinforce_loss(lp, R, mask=mask, clip_ratio=0.2)
    with pytest.raises(ValueError, match=r"ratio_level='token' needs sampling_logprobs"):
        reinforce_loss(lp, R, mask=mask, ratio_level="token")
    with pytest.raises(ValueError, match=r"ratio_level must be one of \('token', 'sequence', 'pool'\), got 'batch'"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=old, ratio_level="batch")
    with pytest.raises(ValueError, match=r"clip_ratio must be a finite number > 0 .* got clip_ratio=0.0"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=old, clip_ratio=0.0)
    with pytest.raises(ValueError, match=r"clip_ratio applies to ratio_level 'token' or 'sequence', got ratio_level='pool'"):
        reinforce_loss(lp, R, mask=mask, sampling_logprobs=old, clip_ratio=0.2, ratio_level="pool")
    with pytest.raises(ValueError, match=r"ratio_level='token' needs token log-probs \(3 dimensions\), got logprobs of shape \(2, 3\)"):
        reinforce_loss(lp[..., 0], R, sampling_logprobs=old[..., 0], ratio_level="token")
    with pytest.raises(TypeError, match=r"reinforce_loss got an unexpected keyword argument 'clip'; the shared options are "
                                        r"\['anchor_logprobs', 'anchor_weight', 'check_tokens', 'clip_ratio', 'mask', "):
        reinforce_loss(lp, R, mask=mask, clip=0.2)
    with pytest.raises(ValueError, match=r"nll_loss does not take sampling_logprobs \(it has no effect there\)"):
        nll_loss(lp[:, 0], mask=mask[:, 0], sampling_logprobs=old[:, 0])
    with pytest.raises(ValueError, match=r"anchor_weight=0.1 needs anchor_logprobs"):
        reinforce_loss(lp, R, mask=mask, anchor_weight=0.1)


def test_ratio_ess_stays_finite_for_ratios_too_large_to_square():
    # (sum r)^2 / (N sum r^2) is unchanged by scaling every r (Kish 1965), so e^300 and e^301 give the
    # same share as 1 and e: (1 + e)^2 / (2 (1 + e^2)), although (e^301)^2 overflows float64
    lp = torch.zeros(1, 2, dtype=torch.float64)
    old = torch.tensor([[-300.0, -301.0]], dtype=torch.float64)
    _, info = reinforce_loss(lp, np.array([[1.0, 0.0]]), sampling_logprobs=old, return_info=True)
    e = math.e
    assert float(info["ratio_ess"]) == pytest.approx((1 + e) ** 2 / (2 * (1 + e * e)), rel=1e-14)
