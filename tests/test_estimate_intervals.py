"""bonft.estimate.intervals: the percentile bootstrap (coverage against the known mean), default_ks,
and summarize's curves against Chen et al. 2021's pass@k and brute-force k-subset enumeration."""
import itertools
import json
import math
from fractions import Fraction

import numpy as np
import pytest

from bonft.estimate import CurveSummary, bootstrap_ci, default_ks, summarize
from bonft.viz import plot_best_of_k_curves


def brute_best_of_k(scores, rewards, k) -> Fraction:
    """Average over all k-subsets of the reward the verifier keeps, ties split uniformly (exact rationals)."""
    total, count = Fraction(0), 0
    for sub in itertools.combinations(range(len(scores)), k):
        top = max(scores[i] for i in sub)
        best = [Fraction(rewards[i]) for i in sub if scores[i] == top]
        total += sum(best) / len(best)
        count += 1
    return total / count


def chen_pass_at_k(n, c, k) -> Fraction:
    # Chen et al. 2021, "Evaluating Large Language Models Trained on Code", eq. (1): 1 - C(n-c, k) / C(n, k)
    return 1 - Fraction(math.comb(n - c, k), math.comb(n, k))


@pytest.mark.parametrize(
    "call,exc,match",
    [
        (lambda: bootstrap_ci(np.zeros((3, 2)), confidence=1.0), ValueError, r"confidence must be in \(0, 1\)"),
        (lambda: bootstrap_ci(np.zeros((3, 2)), n_boot=0), ValueError, r"n_boot must be >= 1"),
        (lambda: bootstrap_ci(np.array([1.0, np.nan])), ValueError, r"values must be finite"),
        (lambda: summarize(np.zeros((2, 3)), np.zeros((2, 3)), ks=[4]), ValueError, r"ks must be <= n \(n=3\), got ks=4"),
    ],
)
def test_bad_input_names_the_argument(call, exc, match):
    with pytest.raises(exc, match=match):
        call()


# ----------------------------------------------------------------------------- bootstrap


def test_bootstrap_is_seedable_and_orders_bounds():
    v = np.random.default_rng(0).normal(size=(50, 3))
    a, b = bootstrap_ci(v, seed=7, n_boot=500), bootstrap_ci(v, seed=7, n_boot=500)
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x, y)
    c = bootstrap_ci(v, seed=8, n_boot=500)
    assert not np.array_equal(a[1], c[1])
    mean, lo, hi = a
    np.testing.assert_allclose(mean, v.mean(0), rtol=1e-12)
    assert (lo < mean).all() and (mean < hi).all()
    # percentile interval width ~ 2 * 1.96 * sd / sqrt(P) for a mean (normal approximation, common practice)
    want = 2 * 1.96 * v.std(0, ddof=1) / math.sqrt(50)
    np.testing.assert_allclose(hi - lo, want, rtol=0.2)


def test_bootstrap_covers_true_mean_at_nominal_rate():
    # values ~ N(0.3, 1) per prompt, P = 80: a 90% interval should cover 0.3 in about 90% of repeats
    repeats, hits = 300, 0
    for rep in range(repeats):
        v = np.random.default_rng(1000 + rep).normal(0.3, 1.0, size=80)
        _, lo, hi = bootstrap_ci(v, confidence=0.9, n_boot=400, seed=rep)
        hits += lo <= 0.3 <= hi
    share = hits / repeats
    # binomial sd of the share at 300 repeats is ~0.017; percentile intervals run slightly narrow at P=80
    assert 0.84 <= share <= 0.95, f"coverage {share:.3f} ({hits}/{repeats}) for nominal 0.90"


def test_bootstrap_single_prompt_and_constant_values():
    mean, lo, hi = bootstrap_ci(np.full((1, 2), 0.25))
    np.testing.assert_array_equal(mean, [0.25, 0.25])
    np.testing.assert_array_equal(lo, mean)
    np.testing.assert_array_equal(hi, mean)


# ----------------------------------------------------------------------------- summary


def test_default_ks():
    assert default_ks(1) == [1]
    assert default_ks(8) == [1, 2, 4, 8]
    assert default_ks(12) == [1, 2, 4, 8, 12]
    with pytest.raises(ValueError, match=r"smallest_pool must be >= 1"):
        default_ks(0)


def test_summarize_binary_rewards_table_dict_and_plot(tmp_path):
    rng = np.random.default_rng(3)
    P, n = 40, 12
    r = (rng.random((P, n)) < rng.random((P, 1))).astype(float)
    s = r + rng.normal(0, 0.7, (P, n))  # an imperfect verifier
    summ = summarize(s, r, n_boot=300, seed=1)
    assert isinstance(summ, CurveSummary)
    assert list(summ.ks) == [1, 2, 4, 8, 12] and summ.n_prompts == P and summ.smallest_pool == n
    c = r.sum(1).astype(int)
    want = np.stack([[float(chen_pass_at_k(n, ci, k)) for k in summ.ks] for ci in c])  # Chen et al. 2021
    np.testing.assert_allclose(summ.per_prompt_pass_at_k, want, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(summ.pass_at_k_mean, want.mean(0), rtol=1e-10)
    assert (summ.pass_at_k_mean >= summ.best_of_k_mean - 1e-12).all()  # a verifier cannot beat pass@k
    assert summ.best_of_k_mean[0] == pytest.approx(r.mean(), abs=1e-12)
    d = summ.to_dict()
    back = json.loads(json.dumps(d))
    assert back["ks"] == [1, 2, 4, 8, 12] and len(back["per_prompt_best_of_k"]) == P
    assert back["pass_at_k_mean"] == pytest.approx(list(want.mean(0)), rel=1e-10)
    text = summ.table()
    assert f"prompts: {P}" in text and f"{summ.best_of_k_mean[-1]:.4f}" in text and "95% CI" in text
    out = plot_best_of_k_curves({"": summ}, tmp_path / "c.png")
    assert open(out, "rb").read(8) == b"\x89PNG\r\n\x1a\n"
    plot_best_of_k_curves({"T=0.6": summ, "T=1": summ}, tmp_path / "two.png")
    assert (tmp_path / "two.png").stat().st_size > 1000
    with pytest.raises(TypeError, match=r"curves\['x'\] must be a CurveSummary"):
        plot_best_of_k_curves({"x": 1}, tmp_path / "bad.png")


def test_summarize_ragged_pools():
    rng = np.random.default_rng(4)
    ss = [rng.normal(size=m) for m in (5, 9, 5, 7)]
    rr = [rng.integers(0, 2, size=m).astype(float) for m in (5, 9, 5, 7)]
    summ = summarize(ss, rr, n_boot=100)
    assert list(summ.ks) == [1, 2, 4, 5] and summ.smallest_pool == 5
    want = np.stack([[float(brute_best_of_k(list(s), list(r), k)) for k in (1, 2, 4, 5)] for s, r in zip(ss, rr)])
    np.testing.assert_allclose(summ.per_prompt_best_of_k, want, rtol=1e-10, atol=1e-12)
