"""check_objective's sample-reuse report: the bias of the importance-weighted, clipped gradient, measured exactly.

The independent brute force here: every *ordered* n-tuple drawn from the sampling policy q (itertools.product,
no multiset counting), the clipped surrogate written out as in Schulman et al. 2017, eq. 7,
``sum_i min(r_i w_i, clip(r_i, 1 - eps, 1 + eps) w_i)`` with ``r_i = pi_theta(y_i)/q(y_i)``, differentiated by
torch autograd w.r.t. the logits theta; the target's gradient by autograd of its value written out by hand
(mean reward for k = 1; for best-of-2 the better-scored of an ordered pair, ties averaged: Chow et al. 2024's
V_k). Unclipped, the per-sample ratio is unbiased for leave-one-out REINFORCE (importance sampling: Owen 2013,
ch. 9; the leave-one-out baseline does not depend on y_i: Kool et al. 2019), which the report must show at
rounding level.
"""
import itertools
import json

import numpy as np
import pytest
import torch

from bonft.cli.main import main
from bonft.objcheck import ToyPolicy, builtin, check_objective

THETA = np.array([0.3, -0.8, 1.1, 0.0])
SCORES = np.array([2.0, 0.0, 1.0, 1.0])
REWARDS = np.array([0.7, -0.2, 1.5, 0.4])
ONE = [ToyPolicy(THETA, SCORES, REWARDS)]


def loo_credit(R):
    """Leave-one-out REINFORCE credit of one pool, by hand: (R_i - mean of the others) / n (Kool et al. 2019:
    the estimate of grad E[R] averages its n terms)."""
    n = len(R)
    return [(R[i] - (sum(R) - R[i]) / (n - 1)) / n for i in range(n)]


def brute_surrogate_grad(theta, q_logits, n, credit_of_pool, eps):
    """d/dtheta of E_{y ~ q^n}[ sum_i min(r_i w_i, clip(r_i) w_i) ] over every ordered tuple (eps None: r_i w_i)."""
    th = torch.tensor(theta, requires_grad=True)
    p = torch.softmax(th, 0)
    q = torch.softmax(torch.tensor(q_logits), 0)
    total = torch.zeros((), dtype=torch.float64)
    for ys in itertools.product(range(len(theta)), repeat=n):
        w = credit_of_pool(ys)
        prob = torch.prod(torch.stack([q[y] for y in ys]))
        for y, wi in zip(ys, w):
            r = p[y] / q[y]
            term = r * wi if eps is None else torch.minimum(r * wi, torch.clamp(r, 1 - eps, 1 + eps) * wi)
            total = total + prob * term
    (g,) = torch.autograd.grad(total, th)
    return g.numpy()


def brute_target_grad(theta, value_of_p):
    th = torch.tensor(theta, requires_grad=True)
    (g,) = torch.autograd.grad(value_of_p(torch.softmax(th, 0)), th)
    return g.numpy()


def mean_reward(p):
    return (p * torch.tensor(REWARDS)).sum()


def best_of_2(p):
    """V_2 by hand: the reward of the better-scored of an ordered pair, the mean of the two on a tie."""
    v = torch.zeros((), dtype=torch.float64)
    for a, b in itertools.product(range(len(SCORES)), repeat=2):
        pay = REWARDS[a] if SCORES[a] > SCORES[b] else REWARDS[b] if SCORES[b] > SCORES[a] else (REWARDS[a] + REWARDS[b]) / 2
        v = v + p[a] * p[b] * pay
    return v


def rel(a, b):
    return float(np.linalg.norm(a - b) / np.linalg.norm(b))


@pytest.mark.parametrize("eps", [0.1, 0.2, 0.5])
def test_clip_bias_of_reinforce_matches_brute_force(eps):
    n = 3
    rep = check_objective(builtin.reinforce, target="best_of_k", k=1, n=n, policies=ONE, transformer=False,
                          reuse_shift=0.7, clip_ratio=eps, time_limit=None)
    u = rep.cases[0]["reuse"]
    q_logits = np.array(u["sampling_logits"])
    z = np.random.default_rng([0, 1]).normal(size=4)  # the documented shift: theta + reuse_shift * N(0, 1) from seed
    np.testing.assert_allclose(q_logits, THETA + 0.7 * z, rtol=0, atol=1e-15)
    exact = brute_target_grad(THETA, mean_reward)
    clipped = brute_surrogate_grad(THETA, q_logits, n, lambda ys: loo_credit([REWARDS[y] for y in ys]), eps)
    plain = brute_surrogate_grad(THETA, q_logits, n, lambda ys: loo_credit([REWARDS[y] for y in ys]), None)
    np.testing.assert_allclose(u["estimate_clipped"], clipped, rtol=0, atol=1e-13)
    np.testing.assert_allclose(u["estimate_unclipped"], plain, rtol=0, atol=1e-13)
    assert u["rel_bias_clipped"] == pytest.approx(rel(clipped, exact), rel=1e-9)
    assert u["rel_bias_unclipped"] < 1e-13  # unclipped per-sample ratios: unbiased for leave-one-out REINFORCE
    assert rel(plain, exact) < 1e-13  # ... and so says the brute force
    p, q = np.exp(THETA) / np.exp(THETA).sum(), np.exp(q_logits) / np.exp(q_logits).sum()
    r = p / q  # every ratio a sample can have
    if r.max() > 1 + eps or r.min() < 1 - eps:  # ratios leave the band: clipping is biased
        assert rep.clip_bias == u["rel_bias_clipped"] > 1e-3
    else:  # all inside: the clipped surrogate's gradient is the unclipped one
        assert rep.clip_bias == u["rel_bias_clipped"] < 1e-13
    assert f"largest relative bias of the clipped gradient {rep.clip_bias:.3g}" in str(rep)


def test_clip_bias_of_best_of_2_matches_brute_force():
    n, eps = 3, 0.2
    rep = check_objective(builtin.best_of_k, target="best_of_k", k=2, n=n, policies=ONE, transformer=False,
                          reuse_shift=0.7, clip_ratio=eps, time_limit=None)
    u = rep.cases[0]["reuse"]
    exact = brute_target_grad(THETA, best_of_2)

    def credit_of_pool(ys):  # the credit is the input being checked: bonft's best_of_k credit on this pool
        return builtin.best_of_k(SCORES[list(ys)][None], REWARDS[list(ys)][None], k=2)[0].tolist()

    clipped = brute_surrogate_grad(THETA, np.array(u["sampling_logits"]), n, credit_of_pool, eps)
    plain = brute_surrogate_grad(THETA, np.array(u["sampling_logits"]), n, credit_of_pool, None)
    assert u["rel_bias_clipped"] == pytest.approx(rel(clipped, exact), rel=1e-9)
    assert u["rel_bias_unclipped"] == pytest.approx(rel(plain, exact), rel=1e-9)
    assert u["rel_bias_unclipped"] > 1e-3  # k > 1: the other members of each subset still come from q (biased)
    assert rep.ok  # the on-policy check itself still passes: reuse is measured, not judged


def test_inside_the_band_clipping_changes_nothing():
    # a tiny shift keeps every ratio inside [1 - eps, 1 + eps]: the clipped mean is the unclipped one exactly
    rep = check_objective(builtin.reinforce, target="best_of_k", k=1, n=3, policies=ONE, transformer=False,
                          reuse_shift=1e-3, clip_ratio=0.2, time_limit=None)
    u = rep.cases[0]["reuse"]
    assert 0.8 < u["min_ratio"] <= u["max_ratio"] < 1.2 and u["clip_frac"] == 0.0
    assert u["estimate_clipped"] == u["estimate_unclipped"]
    assert rep.clip_bias < 1e-13


def test_reuse_arguments_are_checked():
    with pytest.raises(ValueError, match=r"clip_ratio=0.2 needs reuse_shift"):
        check_objective(builtin.reinforce, target="best_of_k", k=1, n=3, transformer=False, clip_ratio=0.2)
    with pytest.raises(ValueError, match=r"reuse_shift"):
        check_objective(builtin.reinforce, target="best_of_k", k=1, n=3, transformer=False, reuse_shift=-1.0)
    with pytest.raises(ValueError, match=r"clip_ratio"):
        check_objective(builtin.reinforce, target="best_of_k", k=1, n=3, transformer=False, reuse_shift=0.5,
                        clip_ratio=float("inf"))
    plain = check_objective(builtin.reinforce, target="best_of_k", k=1, n=3, transformer=False, time_limit=None)
    assert "reuse" not in plain.cases[0] and "sample reuse" not in str(plain)
    assert plain.to_dict()["clip_bias"] is None


def test_cli_reports_the_clip_bias(tmp_path, capsys):
    base = ["check-objective", "bonft.objcheck:builtin.reinforce", "--target", "best_of_k", "--k", "1", "--n", "3",
            "--skip-transformer"]
    assert main(base + ["--reuse-shift", "0.7", "--clip-ratio", "0.2", "--json", str(tmp_path / "r.json")]) == 0
    out = capsys.readouterr().out
    want = check_objective(builtin.reinforce, target="best_of_k", k=1, n=3, transformer=False, reuse_shift=0.7,
                           clip_ratio=0.2, time_limit=None)
    assert json.loads((tmp_path / "r.json").read_text())["clip_bias"] == want.clip_bias > 1e-3
    assert f"largest relative bias of the clipped gradient {want.clip_bias:.3g}" in out
    assert main(base + ["--clip-ratio", "0.2"]) == 2
    assert "clip_ratio=0.2 needs reuse_shift" in capsys.readouterr().err
