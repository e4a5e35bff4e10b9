"""check_objective against brute force: ordered n-tuples of outcomes (itertools.product), k-tuple
definitions of the targets, and closed-form gradients.

References: best-of-k keeps the top-scored of k i.i.d. draws, ties broken uniformly (Chow et al. 2024,
"Inference-Aware Fine-Tuning for Best-of-N Sampling in LLMs"); pass@k = 1 - (1 - p)^k (Chen et al. 2021),
so d pass@k / dp = k (1 - p)^(k - 1); grad log softmax(theta)_y = e_y - softmax(theta) (standard softmax
identity); leave-one-out REINFORCE (Kool et al. 2019). A baseline that includes the sample's own reward,
w_i = (R_i - mean_j R_j) / n, has mean (1 - 1/n) grad E[R] (common practice; follows from
E[R_i grad log pi(y_i)] = grad E[R] and independence of the other samples).
"""
import contextlib
import io
import itertools
import json
import pathlib
import re

import numpy as np
import pytest
import torch

from bonft.cli.main import main
from bonft.objcheck import ToyPolicy, builtin, check_objective

pytest_plugins = ["bonft.pytest_plugin"]

DOC = pathlib.Path(__file__).resolve().parents[1] / "docs" / "objectives.md"


# ---------------------------------------------------------------- brute-force references

def softmax(theta):
    p = np.exp(theta - theta.max())
    return p / p.sum()


def brute_estimate(credit, pol, k, n, sft=False):
    """Mean and trace-covariance of sum_i w_i (e_{y_i} - p) over all V^n ordered pools."""
    p = softmax(np.asarray(pol.logits, float))
    V = len(p)
    Y = np.array(list(itertools.product(range(V), repeat=n)))
    S, R = np.asarray(pol.scores, float)[Y], np.asarray(pol.rewards, float)[Y]
    second = np.full(len(Y), float(pol.scores[pol.reference])) if sft else R
    w = np.asarray(credit(S, second, k=k), float)
    g = np.einsum("mi,miv->mv", w, np.eye(V)[Y] - p)
    if sft:
        g = g + np.eye(V)[pol.reference] - p
    P = p[Y].prod(-1)
    mean = P @ g
    return mean, P @ ((g - mean) ** 2).sum(1)


def brute_target_grad(pol, k, target):
    """Autograd of the target written out over ordered k-tuples (definitions in the module docstring)."""
    V = len(pol.logits)
    Y = np.array(list(itertools.product(range(V), repeat=k)))
    s, r = np.asarray(pol.scores, float)[Y], np.asarray(pol.rewards, float)[Y]
    top = s == s.max(-1, keepdims=True)
    th = torch.tensor(np.asarray(pol.logits, float), requires_grad=True)
    P = torch.softmax(th, -1)[torch.from_numpy(Y)].prod(-1)
    if target == "best_of_k_sft":  # chance that best-of-k keeps an instance of y*
        sel = torch.from_numpy(((Y == pol.reference) & top).sum(-1) / top.sum(-1))
        val = torch.log((P * sel).sum())
    else:
        val = (P * torch.from_numpy((r * top).sum(-1) / top.sum(-1))).sum()
    val.backward()
    return th.grad.numpy()


def pass_grad(pol, k):
    """k (1-p)^(k-1) grad p with p = sum of softmax over correct outcomes (Chen et al. 2021 pass@k)."""
    p = softmax(np.asarray(pol.logits, float))
    good = np.asarray(pol.rewards, float)
    pc = p @ good
    return k * (1 - pc) ** (k - 1) * p * (good - pc)


def rand_policy(seed, V=4, binary=False, reference=None):
    rng = np.random.default_rng(seed)
    r = rng.permutation(np.arange(V) % 2).astype(float) if binary else rng.normal(size=V)
    s = r.copy() if binary else rng.permutation(np.arange(V) % 3).astype(float)
    return ToyPolicy(rng.normal(size=V), s, r, reference)


# ---------------------------------------------------------------- the built-in objectives

@pytest.mark.parametrize("name,target,k,n", [
    ("best_of_k", "best_of_k", 2, 4), ("best_of_k", "best_of_k", 3, 3), ("best_of_k", "best_of_k", 1, 5),
    ("best_of_k_no_baseline", "best_of_k", 2, 5), ("pass_at_k", "pass_at_k", 2, 5), ("pass_at_k", "pass_at_k", 4, 4),
    ("pass_at_k", "pass_at_k", 4, 8), ("reinforce", "best_of_k", 1, 4)])
def test_unbiased_builtins_pass(name, target, k, n):
    rep = check_objective(getattr(builtin, name), target=target, k=k, n=n, transformer=False)
    assert rep.ok, str(rep)
    assert rep.max_rel_error < 1e-10 and all(abs(c["projection"] - 1) < 1e-10 for c in rep.cases)
    assert all(c["fd_error"] < 1e-6 for c in rep.cases)


def test_report_vectors_equal_ordered_enumeration():
    # multisets with multinomial weights (the check) == all V^n ordered tuples (brute force)
    pols = [rand_policy(1), rand_policy(2, V=3)]
    for name, k, n in (("best_of_k", 2, 4), ("best_of_k_no_baseline", 3, 5)):
        rep = check_objective(getattr(builtin, name), target="best_of_k", k=k, n=n, policies=pols, transformer=False)
        for pol, case in zip(pols, rep.cases):
            mean, var = brute_estimate(getattr(builtin, name), pol, k, n)
            np.testing.assert_allclose(case["estimate"], mean, atol=1e-13)
            assert abs(case["variance"] - var) < 1e-12 * max(1, var)
            np.testing.assert_allclose(case["exact"], brute_target_grad(pol, k, "best_of_k"), atol=1e-13)
            assert case["pools"] < len(pol.logits) ** n  # fewer pools than ordered tuples
    pb = [rand_policy(3, binary=True)]
    rep = check_objective(builtin.pass_at_k, target="pass_at_k", k=3, n=5, policies=pb, transformer=False)
    np.testing.assert_allclose(rep.cases[0]["exact"], pass_grad(pb[0], 3), atol=1e-14)


def test_plugin_pass_at_k_flagged_and_bias_shrinks_with_n():
    # same policy as tests/test_credit.py: theta (0.3, -0.2, 0.5), outcome 0 correct, k = 2
    pol = ToyPolicy(np.array([0.3, -0.2, 0.5]), np.array([1.0, 0, 0]), np.array([1.0, 0, 0]))
    biases, rels = [], []
    for n in range(2, 8):
        rep = check_objective(builtin.pass_at_k_plugin, target="pass_at_k", k=2, n=n, policies=[pol], transformer=False)
        assert not rep.ok and rep.problems[0].startswith("biased for pass@2 with n=%d" % n), rep.problems
        mean, _ = brute_estimate(builtin.pass_at_k_plugin, pol, 2, n)
        want = np.abs(mean - pass_grad(pol, 2)).max()
        assert abs(rep.max_abs_error - want) < 1e-13  # the kit measures what brute force measures
        biases.append(rep.max_abs_error)
        rels.append(rep.max_rel_error)
        assert rep.cases[0]["cosine"] > 1 - 1e-12 and rep.cases[0]["projection"] < 1  # right direction, too short
    assert all(b1 < b0 for b0, b1 in zip(biases, biases[1:])), biases
    # measured here: 0.1812 -> 0.0586 (largest logit-gradient error), the figures of tests/test_credit.py
    assert round(biases[0], 4) == 0.1812 and round(biases[-1], 4) == 0.0586, biases
    assert rels[-1] < 0.4 * rels[0]


def test_sft_credit_flagged_and_bias_shrinks_with_n():
    # same setting as tests/test_credit.py: reference y* = 1 ties with outcome 2, k = 3
    pol = ToyPolicy(np.array([0.4, -0.1, 0.2, -0.5]), np.array([0.0, 1, 1, 2]), np.zeros(4), reference=1)
    exact = brute_target_grad(pol, 3, "best_of_k_sft")
    biases = []
    for n in (3, 4, 5, 6):
        rep = check_objective(builtin.best_of_k_sft, target="best_of_k_sft", k=3, n=n, policies=[pol], transformer=False)
        assert not rep.ok and "biased for log pi_bon(y*) at k=3" in rep.problems[0]
        np.testing.assert_allclose(rep.cases[0]["exact"], exact, atol=1e-12)
        mean, _ = brute_estimate(builtin.best_of_k_sft, pol, 3, n, sft=True)
        assert abs(rep.max_abs_error - np.abs(mean - exact).max()) < 1e-13
        biases.append(rep.max_abs_error)
    assert all(b1 < b0 for b0, b1 in zip(biases, biases[1:])), biases
    assert round(biases[0], 4) == 0.0945 and round(biases[-1], 4) == 0.0512, biases


def test_positive_only_estimates_a_shrunk_pass_gradient():
    # bonft.objectives.credit derives: positive-only credit has mean (1 - p) grad pass@k for k < n
    pols = [rand_policy(s, binary=True) for s in range(3)]
    rep = check_objective(builtin.pass_at_k_positive, target="pass_at_k", k=2, n=4, policies=pols,
                          transformer=False)
    assert not rep.ok
    for pol, c in zip(pols, rep.cases):
        pc = softmax(pol.logits) @ pol.rewards
        assert abs(c["projection"] - (1 - pc)) < 1e-12 and c["cosine"] > 1 - 1e-12
    assert check_objective(builtin.pass_at_k_positive, target="pass_at_k", k=4, n=4, transformer=False).ok


# ---------------------------------------------------------------- user objectives

def kept_reward(S, R):
    """A user's payoff, row by row from the definition: the mean reward of the top-scored samples."""
    out = []
    for s, r in zip(S.tolist(), R.tolist()):
        kept = [ri for si, ri in zip(s, r) if si == max(s)]
        out.append(sum(kept) / len(kept))
    return np.array(out)


def test_user_payoff_enumeration_matches_closed_form():
    pols = [rand_policy(s) for s in range(3)]
    a = check_objective(builtin.best_of_k, target="best_of_k", k=3, n=4, policies=pols, transformer=False)
    b = check_objective(builtin.best_of_k, target=kept_reward, k=3, n=4, policies=pols, transformer=False)
    assert a.ok and b.ok and b.target == "kept_reward"
    for pol, ca, cb in zip(pols, a.cases, b.cases):
        # the user payoff's gradient against autograd over every ordered k-tuple, and against bonft.bon's
        # closed form
        np.testing.assert_allclose(cb["exact"], brute_target_grad(pol, 3, "best_of_k"), atol=1e-13)
        np.testing.assert_allclose(cb["exact"], ca["exact"], atol=1e-13)


def test_self_including_baseline_is_caught_with_the_right_size():
    def mean_baseline(scores, rewards, *, k):  # deliberately wrong: the baseline sees the sample's own reward
        return (rewards - rewards.mean(1, keepdims=True)) / rewards.shape[1]

    for n in (2, 4):
        rep = check_objective(mean_baseline, target="best_of_k", k=1, n=n, transformer=False)
        assert not rep.ok
        for c in rep.cases:  # mean (1 - 1/n) grad E[R]: same direction, shrunk
            assert abs(c["projection"] - (n - 1) / n) < 1e-12 and c["cosine"] > 1 - 1e-12
            assert abs(c["rel_error"] - 1 / n) < 1e-12
        assert f"shrinks the exact gradient to {(n - 1) / n:.3f} x" in rep.problems[0]


def test_flat_rewards_give_a_zero_gradient_that_is_no_evidence():
    # V_k does not depend on theta: the credit is unbiased there (zero mean), but the policy shows nothing
    flat = ToyPolicy([0.2, -0.4, 0.9], [0.0, 1.0, 1.0], [0.7, 0.7, 0.7])
    for name in ("best_of_k", "best_of_k_no_baseline"):
        rep = check_objective(getattr(builtin, name), target="best_of_k", k=2, n=3, policies=[flat], transformer=False)
        assert np.abs(rep.cases[0]["exact"]).max() < 1e-15 and rep.cases[0]["rel_error"] < 1e-6
        assert rep.policies_informative == 0 and rep.problems == [
            "only 0 of 1 given policies have a non-zero gradient of the target (flat: policy 1): a flat target "
            "cannot show bias"], str(rep)


def test_order_dependent_credit_uses_ordered_pools():
    def first_vs_second(scores, rewards, *, k):  # unbiased for grad E[R], but looks at positions
        w = np.zeros_like(rewards)
        w[:, 0] = rewards[:, 0] - rewards[:, 1]
        return w

    rep = check_objective(first_vs_second, target="best_of_k", k=1, n=3, transformer=False)
    assert rep.ok and all(c["ordered_pools"] and c["pools"] == 4**3 for c in rep.cases)


def test_variance_against_leave_one_out_reinforce():
    rep = check_objective(builtin.reinforce, target="best_of_k", k=1, n=4, transformer=False)
    assert abs(rep.variance_ratio - 1) < 1e-12  # k = 1: the same estimator
    rep = check_objective(builtin.best_of_k, target="best_of_k", k=2, n=4, transformer=False)
    for c in rep.cases:
        assert c["reinforce_rel_error"] < 1e-12  # the reference is unbiased too
        assert c["variance"] > 0 and c["reinforce_variance"] > 0
    assert 0 < rep.variance_ratio < 1, rep.variance_ratio  # measured: all k-subsets beat 2 disjoint pairs


# ---------------------------------------------------------------- the transformer

def test_transformer_check_unbiased_and_biased():
    good = check_objective(builtin.best_of_k, target="best_of_k", k=2, n=4, policies=1, mc_pools=300)
    tr = good.transformer
    assert good.ok, str(good)
    assert tr["responses"] == 64 and tr["rel_error"] < 1e-9 and tr["fd_error"] < 1e-6
    assert all(r["covered"] and abs(r["expected"] - r["exact"]) < 1e-9 * tr["grad_norm"] for r in tr["directions"])
    bad = check_objective(builtin.pass_at_k_plugin, target="pass_at_k", k=2, n=3, policies=1, mc_pools=300)
    assert not bad.ok and bad.transformer["rel_error"] > 0.05
    assert any(p.startswith("biased on the transformer") for p in bad.problems)


# ---------------------------------------------------------------- report, errors, CLI, fixture, docs

def test_report_outputs(tmp_path):
    rep = check_objective(builtin.pass_at_k_plugin, target="pass_at_k", k=2, n=3, policies=2, transformer=False)
    d = json.loads(json.dumps(rep.to_dict(), allow_nan=False))
    assert d["ok"] is False and d["max_rel_error"] == pytest.approx(rep.max_rel_error) and len(d["cases"]) == 2
    text = str(rep)
    assert "relative bias" in text and "leave-one-out REINFORCE variance" in text and "outcomes" in text
    assert text.count("PROBLEM:") == len(rep.problems)
    png = rep.plot(tmp_path / "check.png")
    assert pathlib.Path(png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_bad_credit_and_bad_arguments():
    rep = check_objective(lambda s, r, *, k: r[:, :1], target="best_of_k", k=1, n=3, transformer=False)
    assert not rep.ok and "credit must return shape (B, n) = (20, 3), got (20, 1)" in rep.problems[0]
    rep = check_objective(lambda s, r, *, k: np.where(r > 1, np.nan, r), target="best_of_k", k=1, n=2,
                          policies=[ToyPolicy([0.0, 0.1], [0.0, 1.0], [0.5, 2.0])], transformer=False)
    assert not rep.ok and "credit returned nan at pool 1 (scores [0.0, 1.0], rewards [0.5, 2.0])" in rep.problems[0]
    def broken(scores, rewards, *, k):
        return rewards[:, [0, 1, 2, 3]]  # IndexError for n = 3

    rep = check_objective(broken, target="best_of_k", k=1, n=3, transformer=False)
    assert rep.problems == ["the check could not run: IndexError: index 3 is out of bounds for axis 1 with size 3"]
    with pytest.raises(ValueError, match=r"k must be <= n \(n=3\), got k=4"):
        check_objective(builtin.best_of_k, target="best_of_k", k=4, n=3)
    with pytest.raises(ValueError, match=r"target must be one of \('best_of_k', 'pass_at_k', 'best_of_k_sft'\)"):
        check_objective(builtin.best_of_k, target="pass@k", k=1, n=3)
    with pytest.raises(TypeError, match=r"credit must be callable"):
        check_objective("best_of_k", target="best_of_k", k=1, n=3)
    with pytest.raises(ValueError, match=r"policies\[0\].rewards must be 0/1 for target 'pass_at_k'"):
        check_objective(builtin.pass_at_k, target="pass_at_k", k=1, n=2, policies=[rand_policy(0)])


def test_cli_exit_status(tmp_path, capsys):
    f = tmp_path / "my_objective.py"
    f.write_text("from bonft.objcheck import builtin\n"
                 "def credit(scores, rewards, *, k):\n    return builtin.pass_at_k_plugin(scores, rewards, k=k)\n")
    args = ["check-objective", f"{f}:credit", "--target", "pass_at_k", "--k", "2", "--n", "4", "--skip-transformer"]
    assert main(args + ["--json", str(tmp_path / "r.json")]) == 1
    assert "PROBLEM: biased for pass@2 with n=4" in capsys.readouterr().out
    assert json.loads((tmp_path / "r.json").read_text())["ok"] is False
    good = ["check-objective", "bonft.objcheck:builtin.pass_at_k", "--target", "pass_at_k", "--k", "4", "--n", "8",
            "--skip-transformer"]
    assert main(good) == 0 and "OK" in capsys.readouterr().out
    assert main(["check-objective", f"{f}:credit", "--target", "pass_at_k", "--k", "5", "--n", "4"]) == 2
    assert "k must be <= n (n=4), got k=5" in capsys.readouterr().err


def test_pytest_fixture(objective_check):
    rep = objective_check(builtin.pass_at_k, target="pass_at_k", k=2, n=4, transformer=False)
    assert rep.ok
    bad = objective_check(builtin.pass_at_k_plugin, target="pass_at_k", k=2, n=4, transformer=False, expect_ok=False)
    assert not bad.ok


def test_docs_section_runs_and_catches_the_wrong_baseline():
    text = DOC.read_text()
    section = text[text.index("## Writing your own objective"):]
    section = section[:section.find("\n## ", 5)] if "\n## " in section[5:] else section
    (block,) = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    ns, out = {}, io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(block, str(DOC), "exec"), ns)
    assert ns["report"].ok, str(ns["report"])
    # a whole-pool U-statistic baseline keeps 1 - k/n of the gradient: E[U grad log pi(y_i)] = grad V_k / n
    # (each k-subset holding i contributes grad V_k / k; C(n-1, k-1) / C(n, k) = k / n of them)
    assert not ns["wrong"].ok
    assert all(abs(c["projection"] - (1 - 3 / 5)) < 1e-12 and c["cosine"] > 1 - 1e-12 for c in ns["wrong"].cases)
    assert "objective check: target abstain_payoff, k=3, n=5: OK" in out.getvalue()
    assert re.search(r"PROBLEM: biased for the payoff 'abstain_payoff' at k=3 with n=5", out.getvalue())
