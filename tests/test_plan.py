"""Tests of bonft.plan: the temperature x k sweep, budgets, doubling, the T*(k) fit.

Outside references used here:
- brute-force enumeration of all k-tuples of outcomes (the definition of best-of-k with
  ties broken uniformly among the tied samples), written here with no call into bonft;
- the pass@k formula of Chen et al. 2021, 1 - C(n-c, k) / C(n, k), in exact integers (math.comb);
- scipy.stats.linregress for the least-squares line of the fit, scipy.optimize.isotonic_regression
  for the monotone fit.
"""
from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from bonft.io import read_samples, write_samples
from bonft.plan import Pools, fit_best_temperature, plan_exact, plan_pools, plan_samples

# --------------------------------------------------------------------------- independent references


def tempered(logits, t):
    """softmax(logits / t) in plain Python floats."""
    z = [x / t for x in logits]
    m = max(z)
    e = [math.exp(x - m) for x in z]
    return [x / sum(e) for x in e]


def brute_bon_value(p, s, r, k):
    """E[reward of best-of-k] by enumerating all V^k ordered k-tuples (definition; uniform tie-break)."""
    total = 0.0
    for tup in itertools.product(range(len(p)), repeat=k):
        w = math.prod(p[i] for i in tup)
        top = max(s[i] for i in tup)
        tied = [r[i] for i in tup if s[i] == top]
        total += w * sum(tied) / len(tied)
    return total


def brute_bon_value_np(p, s, r, k):
    """Vectorised enumeration of the same definition for larger V^k (numpy only, no bonft)."""
    V = len(p)
    tup = np.indices((V,) * k).reshape(k, -1).T  # (V^k, k) every ordered k-tuple
    w = np.prod(np.asarray(p)[tup], axis=1)
    sc, rw = np.asarray(s)[tup], np.asarray(r)[tup]
    tied = sc == sc.max(axis=1, keepdims=True)
    return float((w * (rw * tied).sum(1) / tied.sum(1)).sum())


def chen_pass_at_k(n, c, k):
    """Chen et al. 2021: pass@k = 1 - C(n-c, k) / C(n, k), exact integers."""
    return 1.0 - math.comb(n - c, k) / math.comb(n, k)


# a two-prompt scenario whose best temperature moves with k (prompt 0: the likely outcome is
# right, with a score tie against a wrong one; prompt 1: the right outcome is rare but scored highest)
LOGITS = [[1.5, 0.5, 0.0, -1.0], [1.0, 0.8, 0.0, -1.2]]
SCORES = [[0.5, 0.2, 0.5, 0.1], [0.3, 0.2, 0.4, 0.9]]
REWARDS = [[1.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 1.0]]
LENGTHS = [[3.0, 9.0, 5.0, 20.0], [4.0, 6.0, 8.0, 30.0]]
GRID = [0.3, 0.6, 1.0, 1.6, 2.5]


def brute_grid(max_k):
    """(T, K) value grid and (T,) mean lengths by enumeration, averaged over the two prompts."""
    val = np.zeros((len(GRID), max_k))
    toks = np.zeros(len(GRID))
    for i, t in enumerate(GRID):
        for lg, s, r, ln in zip(LOGITS, SCORES, REWARDS, LENGTHS):
            p = tempered(lg, t)
            toks[i] += sum(a * b for a, b in zip(p, ln)) / 2
            for k in range(1, max_k + 1):
                val[i, k - 1] += brute_bon_value(p, s, r, k) / 2
    return val, toks


# --------------------------------------------------------------------------- exact mode


def test_exact_mode_matches_brute_force_argmax():
    # reference: enumeration of all k-tuples (definition), argmax by an independent loop
    max_k = 4
    val, toks = brute_grid(max_k)
    res = plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID, max_k=max_k,
                     lengths=LENGTHS, budget_samples=[1, 3], budget_tokens=[12.0, 40.0])
    np.testing.assert_allclose(res.value, val, rtol=0, atol=1e-10)
    np.testing.assert_allclose(res.mean_tokens, toks, rtol=0, atol=1e-10)
    for j in range(max_k):
        best = max(range(len(GRID)), key=lambda i: val[i, j])
        assert res.best_temperature[j] == GRID[best], f"k={j + 1}: plan {res.best_temperature[j]} vs brute {GRID[best]}"
    # the scenario is chosen so that the best temperature moves: low at k=1, high at k=4
    assert res.best_temperature[0] == 0.3 and res.best_temperature[3] == 2.5
    for c in res.budgets:
        cells = [(val[i, j], GRID[i], j + 1) for i in range(len(GRID)) for j in range(max_k)
                 if ((j + 1) <= c.budget if c.kind == "samples" else (j + 1) * toks[i] <= c.budget)]
        v, t, k = max(cells)
        assert (c.temperature, c.k) == (t, k), f"{c.kind} budget {c.budget}: plan ({c.temperature}, {c.k}) vs brute ({t}, {k})"
        assert c.value == pytest.approx(v, abs=1e-10)


def test_exact_mode_probs_input_equals_logits_input():
    # softmax(log p / T) is the same policy as softmax(logits / T) when p = softmax(logits) (definition)
    p = np.array([tempered(lg, 1.0) for lg in LOGITS])
    a = plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID, max_k=4)
    b = plan_exact(probs=p, scores=SCORES, rewards=REWARDS, temperatures=GRID, max_k=4)
    np.testing.assert_allclose(a.value, b.value, rtol=0, atol=1e-10)


def test_exact_doubling_and_marginal_gains_against_enumeration():
    # reference: enumeration; gain of one more sample V_{k+1} - V_k and of doubling V_2k - V_k
    val, _ = brute_grid(4)
    res = plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID, max_k=4, min_gain=0.02)
    np.testing.assert_allclose(res.gain_one, val[:, 1:] - val[:, :-1], atol=1e-10)
    np.testing.assert_allclose(res.gain_double, val[:, [1, 3]] - val[:, [0, 1]], atol=1e-10)
    steps = {d.k: d.gain for d in res.doubling}
    assert steps[1] == pytest.approx(val[:, 1].max() - val[:, 0].max(), abs=1e-10)
    assert steps[2] == pytest.approx(val[:, 3].max() - val[:, 1].max(), abs=1e-10)
    # 1 -> 2 gains ~0.017 (< min_gain 0.02) but 2 -> 4 gains more: doubling still pays at the last step
    assert steps[1] < 0.02 < steps[2] and res.doubling_stops_at is None
    assert [d.pays for d in res.doubling] == [False, True]
    assert "(earlier, 1->2 (+0.0167) was not above 0.02; later steps were)" in res.table()


# --------------------------------------------------------------------------- sampling mode: CI coverage


def test_bootstrap_ci_covers_exact_value():
    # reference for the truth: enumeration of all k-tuples (definition). 200 seeded repeats of
    # 60 prompts x 8 samples drawn from the exact tempered policy at 3 temperatures.
    # n_boot=1000: the percentile endpoints' Monte Carlo error is small next to the CI width.
    logits, s, r = [1.2, 0.4, 0.0, -0.8], [0.4, 0.9, 0.4, 0.7], [1.0, 0.0, 0.0, 1.0]
    temps, ks, P, n = [0.5, 1.0, 1.8], [1, 3, 8], 60, 8
    probs = {t: tempered(logits, t) for t in temps}
    truth = {(t, k): brute_bon_value_np(probs[t], s, r, k) for t in temps for k in ks}
    s_a, r_a = np.asarray(s), np.asarray(r)
    hits = {c: 0 for c in truth}
    reps = 200
    for rep in range(reps):
        rng = np.random.default_rng(1000 + rep)
        pools = {}
        for t in temps:
            idx = rng.choice(4, size=(P, n), p=probs[t])  # (P, n) outcome drawn for each sample
            pools[t] = Pools(s_a[idx], r_a[idx])
        res = plan_pools(pools, n_boot=1000, seed=rep)
        for t, k in truth:
            i = temps.index(t)
            hits[(t, k)] += res.lo[i, k - 1] <= truth[(t, k)] <= res.hi[i, k - 1]
    cover = {c: h / reps for c, h in hits.items()}
    pooled = sum(hits.values()) / (reps * len(hits))
    msg = f"pooled coverage {pooled:.3f}; per (T, k): " + ", ".join(f"{c}: {v:.3f}" for c, v in cover.items())
    assert pooled >= 0.90, msg
    assert min(cover.values()) >= 0.87, msg  # 9 cells of 200 repeats: binomial sd ~0.017 at 0.94


# --------------------------------------------------------------------------- budgets, from a samples file


def _pass_at_k_file(path, *, P=40, n=32):
    """Low T (0.5): half the prompts solved 16/32, half never; short answers (3 or 5 tokens, mean 4).
    High T (1.2): every prompt solved 4/32; long answers (30 or 34 tokens, mean 32). Score = reward."""
    rows = []
    for p in range(P):
        c_low = 16 if p % 2 == 0 else 0
        for i in range(n):
            rows.append({"prompt_id": f"q{p}", "score": float(i < c_low), "reward": float(i < c_low),
                         "temperature": 0.5, "n_tokens": 3 if i % 2 else 5})
            rows.append({"prompt_id": f"q{p}", "score": float(i < 4), "reward": float(i < 4),
                         "temperature": 1.2, "n_tokens": 30 if i % 2 else 34})
    write_samples(path, rows)
    return read_samples(path)


def chen_grid(n=32):
    """(2, n) exact V_k: pass@k per prompt type (Chen et al. 2021), averaged over prompts."""
    low = [0.5 * chen_pass_at_k(n, 16, k) for k in range(1, n + 1)]
    high = [chen_pass_at_k(n, 4, k) for k in range(1, n + 1)]
    return np.array([low, high])


def test_samples_file_values_and_budgets_sample_vs_token(tmp_path):
    table = _pass_at_k_file(tmp_path / "s.jsonl")
    res = plan_samples(table, budget_samples=8, budget_tokens=128, n_boot=500)
    ref = chen_grid()
    np.testing.assert_allclose(res.value, ref, rtol=0, atol=1e-12)  # Chen et al. 2021
    np.testing.assert_allclose(res.mean_tokens, [4.0, 32.0])  # measured from n_tokens
    assert res.paired
    by = {c.kind: c for c in res.budgets}
    # 8 samples: high T at k=8 (0.70) beats low T (0.50)
    assert (by["samples"].temperature, by["samples"].k) == (1.2, 8)
    assert by["samples"].value == pytest.approx(chen_pass_at_k(32, 4, 8), abs=1e-12)
    # 128 tokens: high T affords k=4 (0.43), low T affords k=32 (0.50) -> the answer flips to low T;
    # low T reaches 0.5 exactly from k=17 on (C(16, k) = 0), and ties go to the cheapest cell
    assert (by["tokens"].temperature, by["tokens"].k) == (0.5, 17)
    assert by["tokens"].value == 0.5 and by["tokens"].cost == pytest.approx(17 * 4.0)
    assert ref[1, 3] < ref[0, 16] == ref[0, 31]
    # low T is significantly worse at k=8 (0.50 vs 0.70 on 40 prompts)
    assert not res.near_best[0, 7] and res.near_best[1, 7]


@settings(max_examples=25)
@given(b=st.integers(min_value=1, max_value=40))
def test_sample_budget_never_exceeds_budget(b, tmp_path_factory):
    # reference: Chen et al. 2021 values, argmax over cells with k <= b by an independent loop
    table = _pass_at_k_file(tmp_path_factory.mktemp("b") / "s.jsonl", P=8, n=32)
    res = plan_samples(table, budget_samples=b, n_boot=50)
    c = res.budgets[0]
    assert c.k <= b
    ref = chen_grid()
    best = max(ref[i, j] for i in range(2) for j in range(min(b, 32)))
    assert c.value == pytest.approx(best, abs=1e-12)
    assert (c.note is not None) == (b > 32)


def test_doubling_stops_paying_against_chen(tmp_path):
    table = _pass_at_k_file(tmp_path / "s.jsonl")
    res = plan_samples(table, n_boot=300, min_gain=0.06)
    ref = chen_grid()
    env = ref.max(axis=0)  # best temperature at each k
    for d in res.doubling:
        assert d.gain == pytest.approx(env[2 * d.k - 1] - env[d.k - 1], abs=1e-12), d
    # 16 -> 32 at T=1.2 gains 1 - pass@16 = 0.0506 < 0.06 (8 -> 16 gains 0.245): all prompts
    # are alike at T=1.2, so the CI of that gain is a point
    assert res.doubling_stops_at == 16
    assert res.best_temperature[0] == 0.5 and res.best_temperature[-1] == 1.2


def test_paired_identical_pools_are_never_significantly_different():
    rng = np.random.default_rng(3)
    s, r = rng.normal(size=(30, 10)), rng.integers(0, 2, size=(30, 10)).astype(float)
    res = plan_pools({0.7: Pools(s, r), 1.0: Pools(s.copy(), r.copy())}, n_boot=300)
    assert res.paired and res.near_best.all()
    np.testing.assert_allclose(res.value[0], res.value[1])


def test_a_temperature_that_solves_nothing_gets_the_exact_interval_not_a_zero_width_one():
    # 20 prompts that no sample solves at T = 1.4: every per-prompt value is 0 for every k. Clopper & Pearson 1934,
    # 0 successes in 20, two-sided 95%: [0, 1 - 0.025^(1/20)] = [0, 0.1684]; the other temperature keeps its
    # percentile interval
    rng = np.random.default_rng(5)
    s = rng.normal(size=(20, 6))
    solved = (rng.random((20, 6)) < 0.4).astype(float)
    res = plan_pools({0.7: Pools(s, solved), 1.4: Pools(s.copy(), np.zeros((20, 6)))}, n_boot=200, seed=1)
    np.testing.assert_array_equal(res.value[1], 0.0)
    np.testing.assert_array_equal(res.lo[1], 0.0)
    np.testing.assert_allclose(res.hi[1], 1 - 0.025 ** (1 / 20), rtol=1e-12)
    assert (res.hi[0] > res.lo[0]).all() and (res.hi[0] < 1).all()


def test_unpaired_when_prompt_sets_differ():
    rng = np.random.default_rng(4)
    a = Pools(rng.normal(size=(20, 6)), rng.random((20, 6)), prompt_keys=[f"a{i}" for i in range(20)])
    b = Pools(rng.normal(size=(25, 6)), rng.random((25, 6)), prompt_keys=[f"b{i}" for i in range(25)])
    res = plan_pools({0.5: a, 1.0: b}, n_boot=200)
    assert not res.paired and any("unpaired" in n for n in res.notes)
    assert list(res.n_prompts) == [20, 25]


def test_ragged_pools_cap_k_at_the_smallest_pool():
    rng = np.random.default_rng(5)
    s = [rng.normal(size=m) for m in (5, 9, 7)]
    r = [rng.random(m) for m in (5, 9, 7)]
    res = plan_pools({1.0: Pools(s, r)}, n_boot=100)
    assert res.ks[-1] == 5
    # k=1 is the mean reward of each pool (definition), averaged over prompts
    assert res.value[0, 0] == pytest.approx(np.mean([x.mean() for x in r]), abs=1e-12)


# --------------------------------------------------------------------------- fit, report, plots


def test_fit_line_matches_scipy_linregress():
    ks = np.arange(1, 33)
    tb = np.array([0.4, 0.4, 0.7, 0.7, 1.0, 1.0, 1.3, 1.3] * 4)[:32]
    f = fit_best_temperature(ks, tb)
    pts = [1, 2, 4, 8, 16, 32]
    ref = stats.linregress(np.log(pts), tb[np.array(pts) - 1])  # reference library
    assert f.slope == pytest.approx(ref.slope, abs=1e-12)
    assert f.intercept == pytest.approx(ref.intercept, abs=1e-12)
    assert f.r2 == pytest.approx(ref.rvalue**2, abs=1e-12)
    assert f.caveat == "a fit of this data, not a law"
    const = fit_best_temperature(ks, np.full(32, 0.7))
    assert const.r2 is None and const.monotone_direction == "constant" and const.rmse == 0.0
    dec = fit_best_temperature(np.arange(1, 9), [1.3, 1.3, 1.0, 1.0, 1.0, 1.0, 1.0, 0.7])
    assert dec.monotone_direction == "decreasing" and dec.monotone_rmse == 0.0 and dec.slope < 0


@given(y=st.lists(st.floats(min_value=0.1, max_value=3.0, allow_nan=False), min_size=1, max_size=12))
def test_isotonic_matches_scipy(y):
    # reference library: scipy.optimize.isotonic_regression (pool-adjacent-violators)
    from scipy.optimize import isotonic_regression

    from bonft.plan.decisions import isotonic

    np.testing.assert_allclose(isotonic(np.array(y)), isotonic_regression(np.array(y)).x, rtol=0, atol=1e-12)


def test_not_worse_rule_is_the_percentile_interval():
    # percentile bootstrap (Efron & Tibshirani 1993, ch. 13, chapter from memory): "significantly worse" iff the
    # (1 - alpha) interval of the gap lies above 0, i.e. fewer than alpha/2 of the gaps are <= 0
    from bonft.plan.decisions import not_worse

    gaps = np.linspace(-0.1, 1.9, 200)  # 10 of 200 (5%) are <= 0
    assert not_worse(gaps[:, None], 0.05)[0]  # 5% >= 2.5%: interval reaches 0
    assert not not_worse(gaps[:, None] + 0.1, 0.05)[0]  # only 1 of 200 <= 0
    assert np.quantile(gaps + 0.1, 0.025) > 0 and np.quantile(gaps, 0.025) <= 0


def test_table_json_and_plots(tmp_path):
    table = _pass_at_k_file(tmp_path / "s.jsonl")
    res = plan_samples(table, budget_samples=[8, 64], budget_tokens=128, n_boot=200)
    text = res.table()
    assert "T=0.5" in text and "budget 8 samples/prompt: T=1.2, k=8" in text
    assert "a fit of this data, not a law" in text and "choice limited to k <= 32" in text
    d = json.loads(json.dumps(res.to_dict()))
    assert d["value"][1][7] == pytest.approx(chen_pass_at_k(32, 4, 8), abs=1e-12)
    assert d["budgets"][2]["temperature"] == 0.5 and d["best_temperature_fit"]["caveat"].startswith("a fit")
    for name in ("heat.png", "curves.png"):
        path = tmp_path / "plots" / name
        (res.plot_heatmap if name == "heat.png" else res.plot_curves)(path)
        data = path.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 5000
    ex = plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID, max_k=4)
    assert json.loads(json.dumps(ex.to_dict()))["lo"] is None and "[" not in ex.table().splitlines()[3]
    ex.plot_curves(tmp_path / "ex.png")


# --------------------------------------------------------------------------- bad input


def _pools(n=8, P=5, nan=False):
    s = np.arange(P * n, dtype=float).reshape(P, n)
    if nan:
        s[2, 3] = np.nan
    return Pools(s, np.ones((P, n)))


def test_bad_input_errors():
    with pytest.raises(ValueError, match="at least one temperature, got an empty grid"):
        plan_pools({})
    with pytest.raises(ValueError, match="at least one temperature, got an empty grid"):
        plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=[])
    with pytest.raises(ValueError, match=r"max_k must be <= the smallest pool at every temperature \(n=4: prompt '0' at "
                                         r"temperature 1\), got max_k=8"):
        plan_pools({0.5: _pools(8), 1.0: _pools(4)}, max_k=8)
    with pytest.raises(ValueError, match=r"scores \(temperature 0.5\) must be finite, got nan at index \(2, 3\)"):
        plan_pools({0.5: _pools(nan=True)})
    with pytest.raises(ValueError, match="temperature must be a finite number > 0, got temperature=-1"):
        plan_pools({-1.0: _pools()})
    with pytest.raises(TypeError, match=r"pools\[0.5\] must be a Pools, got tuple"):
        plan_pools({0.5: (np.ones((2, 2)), np.ones((2, 2)))})
    with pytest.raises(ValueError, match="budget_tokens needs the mean response length at every temperature"):
        plan_pools({0.5: _pools()}, budget_tokens=100)
    with pytest.raises(ValueError, match="budget_samples must be >= 1, got budget_samples=0"):
        plan_pools({0.5: _pools()}, budget_samples=0)
    with pytest.raises(TypeError, match="budget_samples must be an int, got float 2.5"):
        plan_pools({0.5: _pools()}, budget_samples=2.5)
    with pytest.raises(ValueError, match=r"confidence must be in \(0, 1\), got confidence=1.5"):
        plan_pools({0.5: _pools()}, confidence=1.5)
    with pytest.raises(ValueError, match="budget_tokens must afford one sample at some temperature"):
        plan_pools({0.5: Pools(np.ones((2, 2)), np.ones((2, 2)), mean_tokens=10.0)}, budget_tokens=5)
    with pytest.raises(ValueError, match="exactly one of logits or probs, got both"):
        plan_exact(logits=LOGITS, probs=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID)
    with pytest.raises(ValueError, match="budget_tokens needs lengths"):
        plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID, budget_tokens=50)
    with pytest.raises(ValueError, match=r"scores must broadcast against \(2, 4\) outcomes, got shape \(3,\)"):
        plan_exact(logits=LOGITS, scores=[1, 2, 3], rewards=REWARDS, temperatures=GRID)
    with pytest.raises(TypeError, match="min_gain must be a real number, got str 'a'"):
        plan_pools({0.5: _pools()}, min_gain="a")
    res = plan_pools({0.5: _pools()}, n_boot=20)
    assert res.value_at(0.5, 1) == 1.0  # every reward is 1
    with pytest.raises(ValueError, match=r"k must be <= n \(n=8\), got k=9"):
        res.value_at(0.5, 9)
    with pytest.raises(ValueError, match="temperature must be one of"):
        res.value_at(0.7, 1)
    with pytest.raises(ValueError, match="temperatures must be distinct"):
        plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=[1.0, 1.0])


_NAN = float("nan")


@pytest.mark.parametrize("call, exc, match", [
    (lambda: fit_best_temperature([], []), ValueError, "ks must not be empty"),
    (lambda: fit_best_temperature([1, 2, 4], [0.5, 0.7]), ValueError,
     r"best_temperature must hold one temperature per k \(3\), got 2"),
    (lambda: fit_best_temperature([4, 2, 1], [0.5, 0.7, 0.9]), ValueError, r"ks must be strictly increasing, got \[4, 2, 1\]"),
    (lambda: fit_best_temperature([1, 2, 2], [0.5, 0.7, 0.9]), ValueError, "ks must be strictly increasing"),
    (lambda: fit_best_temperature([0, 1, 2], [0.5, 0.7, 0.9]), ValueError, "ks must be >= 1, got ks=0"),
    (lambda: fit_best_temperature([-2, 1, 2], [0.5, 0.7, 0.9]), ValueError, "ks must be >= 1, got ks=-2"),
    (lambda: fit_best_temperature([1.5, 2.5], [0.5, 0.7]), TypeError, "ks must be an int, got float 1.5"),
    (lambda: fit_best_temperature(1, 0.5), TypeError, "ks must be a sequence of ints, got int 1"),
    (lambda: fit_best_temperature([1, 2, 4], [_NAN, 0.7, 0.9]), ValueError, "best_temperature must be finite, got nan"),
    (lambda: fit_best_temperature([1, 2], [0.5, 0.0]), ValueError, "best_temperature must be > 0, got 0 at index 1"),
    (lambda: plan_pools({1.0: Pools(np.zeros((3, 2)), np.ones((3, 2)), prompt_keys=5)}, n_boot=20), ValueError,
     r"prompt_keys must be a 1-D sequence of 3 keys at temperature 1, got shape \(\)"),
    (lambda: plan_pools({1.0: Pools(np.zeros((3, 2)), np.ones((3, 2)), mean_tokens=10.0),
                         2.0: Pools(np.zeros((3, 2)), np.ones((3, 2)))}, n_boot=20), ValueError,
     r"mean_tokens must be given at every temperature or at none, got it at \['1'\] but not at \['2'\]"),
    (lambda: plan_pools({1.0: Pools(np.zeros((3, 2)), np.ones((3, 2)), mean_tokens=_NAN)}, n_boot=20), ValueError,
     r"mean_tokens \(temperature 1\) must be a finite number > 0, got .*nan"),
    (lambda: plan_exact(logits=LOGITS, scores=SCORES, rewards=REWARDS, temperatures=GRID, lengths=[1, 2, 3]),
     ValueError, r"lengths must broadcast against \(2, 4\) outcomes \(tokens per outcome\), got shape \(3,\)"),
    (lambda: plan_exact(scores=[0, 1], rewards=[0, 1], temperatures=[1.0, 1e-320], probs=[0.4, 0.6], max_k=2),
     ValueError, r"temperatures must keep log\(probs\) / temperature finite in float64 .*got temperature 1e-320"),
    (lambda: plan_exact(scores=[0, 1], rewards=[0, 1], temperatures=[1e-320], logits=[0.0, 1.0], max_k=2),
     ValueError, r"temperatures must keep logits / temperature finite .*got temperature 1e-320 with a row's largest "
                 r"logit 1"),
    (lambda: plan_exact(scores=[0, 1], rewards=[0, 1], temperatures=[0.5], logits=[1e308, -1e308], max_k=2),
     ValueError, r"got temperature 0.5 with a row's largest logit 1e\+308"),
])
def test_bad_plan_and_fit_inputs_name_the_argument(call, exc, match):
    with pytest.raises(exc, match=match):
        call()


def test_tiny_temperature_on_equal_probs_is_still_exact():
    # log(0.5) / 1e-300 = -6.9e299 stays finite: the tempered policy is uniform, so V_1 = mean reward = 0.5 and
    # V_2 = 1 - 0.5^2 (definition: the higher-scored outcome has reward 1)
    res = plan_exact(scores=[0, 1], rewards=[0, 1], temperatures=[1e-300], probs=[0.5, 0.5], max_k=2)
    np.testing.assert_allclose(res.value, [[0.5, 0.75]], rtol=0, atol=1e-15)


def test_token_means_known_at_some_temperatures_are_dropped_from_a_file_without_a_token_budget(tmp_path):
    # n_tokens 0 at T=1: no mean response length there (plan_samples keeps only a mean > 0)
    rows = [{"prompt_id": p, "score": float(i), "reward": float(i % 2), "temperature": t,
             "n_tokens": 5 if t == 0.5 else 0} for t in (0.5, 1.0) for p in range(3) for i in range(2)]
    write_samples(tmp_path / "s.jsonl", rows)
    table = read_samples(tmp_path / "s.jsonl")
    assert plan_samples(table, n_boot=20).mean_tokens is None
    with pytest.raises(ValueError, match=r"budget_tokens needs the mean response length at every temperature, "
                                         r"missing at \['1'\]"):
        plan_samples(table, n_boot=20, budget_tokens=10)


def test_table_without_temperatures_is_refused(tmp_path):
    write_samples(tmp_path / "s.jsonl", [{"prompt_id": "a", "score": 1.0, "reward": 1.0}])
    with pytest.raises(ValueError, match="table must have a temperature column"):
        plan_samples(read_samples(tmp_path / "s.jsonl"))
    table = _pass_at_k_file(tmp_path / "t.jsonl", P=2, n=4)
    with pytest.raises(ValueError, match=r"temperatures must be in the samples file \(present: 0.5, 1.2\), got 0.7"):
        plan_samples(table, temperatures=[0.7])


def test_a_temperature_stored_as_float32_is_selected_by_the_value_typed(tmp_path):
    # 0.699999988079071 is 0.7 written as float32: --temperatures 0.7 selects it (it was "not in the samples file
    # (present: ['0.7', '1'])"); the values are those of the same pools selected by their stored value
    t32 = float(np.float32(0.7))
    rng = np.random.default_rng(2)
    rows = [{"prompt_id": p, "sample": i, "score": float(rng.random()), "reward": int(rng.random() < 0.4), "temperature": t}
            for t in (t32, 1.0) for p in range(12) for i in range(4)]
    write_samples(tmp_path / "f32.jsonl", rows)
    table = read_samples(tmp_path / "f32.jsonl")
    typed = plan_samples(table, temperatures=[0.7], n_boot=50)
    stored = plan_samples(table, temperatures=[t32], n_boot=50)
    np.testing.assert_array_equal(typed.value, stored.value)
    assert len(plan_samples(table, n_boot=50).temperatures) == 2


def test_too_few_prompts_print_no_interval():
    # a bootstrap over 4 prompts is no confidence interval; the table says n/a instead of a
    # zero-width or misleading band, and 12 prompts print the band again
    rng = np.random.default_rng(0)
    few = plan_pools({0.7: Pools(rng.normal(size=(4, 8)), rng.random((4, 8))),
                      1.0: Pools(rng.normal(size=(4, 8)), rng.random((4, 8)))}, budget_samples=4, n_boot=50)
    text = few.table()
    assert "[n/a]" in text and "intervals n/a: 4 prompt(s)" in text
    many = plan_pools({0.7: Pools(rng.normal(size=(12, 8)), rng.random((12, 8))),
                       1.0: Pools(rng.normal(size=(12, 8)), rng.random((12, 8)))}, budget_samples=4, n_boot=50)
    assert "n/a" not in many.table()


def test_too_few_prompts_make_no_significance_claims_anywhere():
    # fewer than 10 prompts: no interval (the rule of bonft estimate, docs/estimate.md), so no "~" marks, no "not
    # significantly worse" lists and no "significantly" in the doubling sentence; JSON says intervals_valid false
    rng = np.random.default_rng(0)
    pools = {t: Pools(rng.integers(0, 3, size=(3, 4)).astype(float), (rng.random((3, 4)) < 0.3 + 0.1 * t).astype(float))
             for t in (0.5, 1.0)}
    res = plan_pools(pools, budget_samples=2, n_boot=50)
    text = res.table()
    rows = [ln for ln in text.splitlines() if ln[:5].strip().isdigit()]
    assert rows and not any("~" in ln for ln in rows)
    assert "significantly" not in text and "not significantly worse" not in text
    assert res.budgets[0].alternatives == [] and not res.intervals_valid
    d = json.loads(json.dumps(res.to_dict()))
    assert d["intervals_valid"] is False and d["lo"] is None and d["hi"] is None
    assert d["budgets"][0]["lo"] is None and all(s["lo"] is None for s in d["doubling"])
    # the object holds no interval either (NaN), where it held a bootstrap over 3 prompts that its docstring called a CI
    assert np.isnan(res.lo).all() and np.isnan(res.hi).all() and np.isfinite(res.value).all()
    assert np.isnan([res.budgets[0].lo, res.budgets[0].hi]).all()
    assert all(np.isnan([s.lo, s.hi]).all() and np.isfinite(s.gain) for s in res.doubling)
    many = plan_pools({t: Pools(rng.integers(0, 3, size=(12, 4)).astype(float), rng.random((12, 4))) for t in (0.5, 1.0)},
                      n_boot=50)
    assert many.intervals_valid and json.loads(json.dumps(many.to_dict()))["intervals_valid"] is True
    # the value at the chosen temperature is the largest of 2 estimates: the table says it is biased upward
    assert "V at best is the largest of several estimates: biased upward" in many.table()
    assert "V at best is the largest" not in text


def _equal_law_runs(reps, temps, P=60, n=8):
    """Pools at temperatures that share ONE outcome law (all equally good): yields each run's PlanResult."""
    rng0 = np.random.default_rng(11)
    logits = rng0.normal(scale=1.5, size=(6, 5))
    pol = np.exp(logits - logits.max(1, keepdims=True))
    pol /= pol.sum(1, keepdims=True)
    scores = np.array([[0, 1, 1, 2, 2]] * 6, float)
    rewards = rng0.choice([0.0, 1.0], size=(6, 5), p=[0.55, 0.45])
    for rep in range(reps):
        rng = np.random.default_rng(5000 + rep)
        types = rng.integers(0, 6, size=P)
        pools = {}
        for t in temps:
            idx = np.array([rng.choice(5, size=n, p=pol[ty]) for ty in types])
            pools[t] = Pools(scores[types][np.arange(P)[:, None], idx], rewards[types][np.arange(P)[:, None], idx])
        yield plan_pools(pools, n_boot=1000, seed=rep, budget_samples=n)


def test_the_best_temperature_and_cell_are_kept_despite_being_picked_from_the_same_data():
    # six temperatures of EQUAL true value: every one is a true best. With the best picked from the data, an
    # unadjusted 95% test marked some of them significantly worse in 34-41% of runs. Bonferroni over the m
    # comparisons made with the chosen one (Dunn 1961) keeps any given true best with probability >= 95%:
    # each non-chosen temperature (a true best) is marked worse in <= 5% of runs (bootstrap: about), and the true
    # best cells (every temperature at k = 8) all stay among the budget's choice and alternatives in >= 95%
    temps, marked, trials, left_out, reps = (0.4, 0.6, 0.8, 1.0, 1.2, 1.5), 0, 0, 0, 60
    for res in _equal_law_runs(reps, temps):
        marked += int((~res.near_best).sum())
        trials += (len(temps) - 1) * res.ks.size
        c = res.budgets[0]
        kept = {(c.temperature, c.k)} | {tuple(a) for a in c.alternatives}
        left_out += any((t, 8) not in kept for t in temps)
    assert marked / trials <= 0.06, marked / trials
    assert left_out / reps <= 0.1, left_out / reps


def test_doubling_stops_after_the_last_significant_step():
    # 40 prompts of 0/1 rewards, score = reward: pass@k (Chen et al. 2021). pass@1 = pass@2 when every prompt has
    # pools of all-0 or all-1 (no gain from 1 to 2), but later steps can still pay: here they are constant too,
    # so no step pays and doubling stops from k=1, the sentence naming every step
    r = np.repeat((np.arange(40) % 2 == 0)[:, None], 8, axis=1).astype(float)
    res = plan_pools({1.0: Pools(r, r.copy())}, n_boot=200)
    assert res.doubling_stops_at == 1 and not any(d.pays for d in res.doubling)
    assert "doubling stops paying from k=1: 1->2 gains +0.0000, 2->4 gains +0.0000, 4->8 gains +0.0000, none " \
           "significantly above 0" in res.table()


def test_a_column_where_every_prompt_has_the_same_value_prints_no_spread_as_estimate_does():
    # every score tied, 10 of 30 rewards 1: best-of-k serves a uniform sample, V_k = 1/3 for every prompt and k (the
    # definition); a bootstrap of equal values has width 0, and 1/3 is at neither bound of [0, 1]: no interval, the
    # rule of summarize's table ("no spread"); the plan printed "0.3333 [0.3333, 0.3333]"
    s, r = np.zeros((12, 30)), np.zeros((12, 30))
    r[:, :10] = 1.0
    rng = np.random.default_rng(0)
    res = plan_pools({0.7: Pools(s, r), 1.0: Pools(rng.normal(size=(12, 30)), (rng.random((12, 30)) < 0.1) * 1.0)},
                     n_boot=200, budget_samples=[4])
    np.testing.assert_allclose(res.value[0], 1 / 3, rtol=1e-14)
    assert res.no_interval[0].all() and not res.no_interval[1].any()
    assert res.to_dict()["no_interval"][0] == [True] * 30
    table = res.table()
    assert "0.3333 no spread" in table and "[0.3333, 0.3333]" not in table
    assert "no spread (T=0.7 k=1,2,4,8,16,30)" in table


def test_doubling_gains_at_the_rounding_level_are_not_significant():
    # all scores tied, 3 of 5 rewards 1: V_k = 3/5 for every k (the definition), so doubling gains exactly 0; the
    # computed V_1 = 0.6 and V_2 = 0.6000000000000001 differ by one ulp, which was judged a significant gain
    s, r = np.zeros((12, 5)), np.zeros((12, 5))
    r[:, :3] = 1.0
    res = plan_pools({1.0: Pools(s, r)}, n_boot=200)
    np.testing.assert_allclose(res.value[0], 0.6, rtol=1e-14)
    assert res.doubling_stops_at == 1
    assert "doubling stops paying from k=1" in res.table()


def test_doubling_decisions_do_not_depend_on_an_offset_of_the_rewards():
    # rewards 1e6 + 1e-7 x {0, 1}: the same plan as rewards {0, 1} scaled by 1e-7, a real gain of ~2.5e-8 at 1->2 is
    # significant (a threshold of 1e-12 of |V| = 1e-6 called it rounding); the rounding allowance is 8 ulps of
    # |V| (about 1.9e-9 here) plus 1e-12 of the grid's spread
    rng = np.random.default_rng(3)
    r01 = (rng.random((40, 16)) < 0.3).astype(float)
    s = r01 + rng.normal(size=(40, 16))  # a verifier that ranks right samples higher: best-of-k grows with k
    base = plan_pools({1.0: Pools(s, r01)}, n_boot=200)
    shifted = plan_pools({1.0: Pools(s, 1e6 + 1e-7 * r01)}, n_boot=200)
    np.testing.assert_allclose((shifted.value - 1e6) / 1e-7, base.value, atol=0.01)  # ulps of 1e6 are 1.2e-10
    assert base.doubling[0].lo > 0.05 and shifted.doubling[0].lo > 0.05 * 1e-7  # 1->2: a gain, by its interval
    assert base.doubling_stops_at == shifted.doubling_stops_at != 1


def test_a_column_of_ones_gets_the_exact_interval_at_every_k(tmp_path):
    # every reward 1: V_k = 1 exactly at every k (it was 1.0000000000000002 at some k, which lost the exact interval
    # and made doubling's ulp a significant gain). Clopper & Pearson 1934, 20 of 20: [0.025^(1/20), 1] = [0.8316, 1]
    rng = np.random.default_rng(1)
    res = plan_pools({0.5: Pools(rng.normal(size=(20, 29)), np.ones((20, 29)))}, n_boot=200)
    assert (res.value == 1.0).all() and (res.hi == 1.0).all()
    np.testing.assert_allclose(res.lo, 0.025 ** (1 / 20), rtol=1e-12)
    assert res.doubling_stops_at == 1 and all(d.gain == 0.0 for d in res.doubling)


def test_one_short_pool_that_caps_k_is_named():
    # 11 prompts of 30 samples and one ('p4') of 6: k stops at 6 for every prompt, and the plan says which prompt
    rng = np.random.default_rng(6)
    sizes = [30] * 4 + [6] + [30] * 7
    s = [rng.normal(size=m) for m in sizes]
    r = [(rng.random(m) < 0.3) * 1.0 for m in sizes]
    keys = [f"p{i}" for i in range(12)]
    res = plan_pools({0.8: Pools(s, r, prompt_keys=keys)}, n_boot=50)
    assert res.ks[-1] == 6
    note = "k stops at 6, the smallest pool (prompt 'p4' at temperature 0.8); the median pool there holds 30 samples"
    assert any(note in n for n in res.notes) and note in res.table()
    with pytest.raises(ValueError, match=r"max_k must be <= the smallest pool at every temperature \(n=6: prompt 'p4' "
                                         r"at temperature 0.8\), got max_k=7"):
        plan_pools({0.8: Pools(s, r, prompt_keys=keys)}, n_boot=50, max_k=7)
    # equal pools: k stops at their size with no note
    assert not plan_pools({0.8: Pools(np.zeros((12, 5)), np.zeros((12, 5)))}, n_boot=50).notes


def test_exact_mode_with_rewards_at_the_edge_of_float64_is_finite():
    # every reward the largest float64: V_k is that reward for every policy and k (a mean of equal rewards); the mean
    # over two prompts overflowed to inf
    big = np.finfo(float).max
    res = plan_exact(logits=LOGITS, scores=SCORES, rewards=np.full((2, 4), big), temperatures=[0.5, 1.0], max_k=4)
    assert (res.value == big).all()


@pytest.mark.parametrize("kw, exc, match", [
    (dict(confidence=1.5), ValueError, r"confidence must be in \(0, 1\), got confidence=1.5"),
    (dict(budget_samples=0), ValueError, "budget_samples must be >= 1, got budget_samples=0"),
    (dict(budget_tokens=-1), ValueError, "budget_tokens must be a finite number > 0"),
    (dict(min_gain=float("nan")), ValueError, "min_gain must be a finite number, got min_gain=nan"),
    (dict(n_boot=3), ValueError, "n_boot"),
    (dict(budget_sample=4), TypeError, r"unknown planner option\(s\) \['budget_sample'\]"),
    (dict(n_boot=1_000_000, n=128), ValueError, r"n_boot x temperatures x max_k must be <= 134,217,728 .*1,000,000 x 2 x 128"),
    (dict(temperatures=[0.5, 0.50000001]), ValueError, r"temperatures must be distinct as float32 .*got 0.5 and "
                                                       r"0.50000001, both T=0.5$"),
    (dict(budget_tokens=0.5), ValueError, r"budget_tokens must be >= 1 \(a sampled response costs at least one"),
    (dict(verifier_name=5), TypeError, r"verifier_name must be a str \(part of the cache key\) or None, got int 5"),
    (dict(budget_samples=[4, 4]), ValueError, r"budget_samples must not repeat a budget .*\(4 more than once\)"),
    (dict(budget_samples=8), ValueError, r"budget_samples must be <= n \(n=4, the samples drawn per prompt\): the grid "
                                         r"cannot reach a larger budget, got budget_samples=8"),
    (dict(budget_samples=4, max_k=2), ValueError, r"budget_samples must be <= max_k \(max_k=2, the largest k planned\)"),
])
def test_plan_model_checks_every_planner_option_before_sampling(kw, exc, match, monkeypatch):
    # a bad option used to be refused only after the whole temperature grid had been sampled
    import bonft.plan.from_model as fm

    def no_sampling(*a, **k):
        raise AssertionError("sampled before the options were checked")

    monkeypatch.setattr(fm, "sample", no_sampling)
    with pytest.raises(exc, match=match):
        fm.plan_model(None, None, ["a prompt"], lambda p, r: [0.0] * len(r), **{"temperatures": [0.5, 1.0], "n": 4,
                      "progress": False, **kw})


def test_plan_samples_refuses_two_temperatures_that_select_one_pool(tmp_path):
    # 0.5 and 0.50000001 are equal as float32 (io.same_temperature): both would plan the file's T=0.5 pool
    table = _pass_at_k_file(tmp_path / "s.jsonl", P=12, n=4)
    with pytest.raises(ValueError, match=r"temperatures must select distinct pools, got 0.5 and 0.50000001, both the "
                                         r"file's 0.5 \(equal as float32\)"):
        plan_samples(table, temperatures=[0.5, 0.50000001], n_boot=20)


def test_plan_model_refuses_a_temperature_whose_every_sample_the_verifier_failed_on():
    # a verifier of negative scores (a log-likelihood) that fails on every sample of one temperature: its stand-in
    # scores (0) outranked every judged temperature, and the plan recommended the temperature it judged nothing at
    from bonft.plan.from_model import plan_model
    from bonft.tasks import build_tokenizer
    from bonft.trainer.models import build_tiny_model
    from bonft.verifiers.scoring import VerifierError

    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=32, heads=2, max_positions=48, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    calls = []

    def down_after_one_batch(prompts, responses):
        calls.append(len(responses))
        if len(calls) > 1:
            raise ConnectionError("scoring service unavailable")
        return [-3.0 - 0.01 * len(r) for r in responses]

    with pytest.raises(VerifierError, match=r"the verifier failed on every one of the 48 samples of prompts 1-12 at "
                                            r"temperature 1 \(ConnectionError: scoring service unavailable\), so that "
                                            r"temperature would be ranked on stand-in scores"):
        plan_model(model, tok, [f"jars {i}+{i} ?" for i in range(12)], down_after_one_batch, temperatures=(0.7, 1.0),
                   n=4, max_new_tokens=8, progress=False)


def test_a_bonferroni_tail_below_the_bootstraps_resolution_is_named_with_the_n_boot_it_needs():
    # a test read in a tail of alpha/(2m) of n_boot resamples is liberal when few resamples are expected there
    # (none below 1/n_boot): at n_boot=20 a budget's list left out a truly best cell in 58% of runs while the table
    # claimed 95%. 2 temperatures x 4 k, budget 4: m = 8 - 1 = 7 comparisons, tail 0.05/14, 10 resamples need
    # n_boot >= 10 * 14 / 0.05 = 2800 (hand arithmetic); the ~ marks: 1 comparison, tail 0.025, n_boot >= 400
    rng = np.random.default_rng(3)
    pools = {t: Pools(rng.normal(size=(12, 4)), rng.random((12, 4))) for t in (0.5, 1.0)}
    res = plan_pools(pools, budget_samples=4, n_boot=20)
    assert res.budgets[0].n_compared == 7 and res.budgets[0].n_boot_needed == 2800 and res.n_boot_needed == 400
    text = res.table()
    assert "note: budget 4 samples: its 'not significantly worse' list tests 7 comparisons" in text
    assert "does not deliver the stated 0.95 confidence" in text and "n_boot >= 2,800 does" in text
    assert "note: the ~ marks test each of 1 comparison in a tail of 0.025" in text and "n_boot >= 400 does" in text
    d = json.loads(json.dumps(res.to_dict()))
    assert d["n_boot_needed"] == 400 and d["budgets"][0]["n_boot_needed"] == 2800
    ok = plan_pools(pools, budget_samples=4, n_boot=2800)
    assert ok.n_boot_needed is None and ok.budgets[0].n_boot_needed is None and "does not deliver" not in ok.table()
    assert plan_pools(pools, budget_samples=4, n_boot=2799).budgets[0].n_boot_needed == 2800


def test_doubling_that_kept_paying_names_the_largest_k_it_tested():
    # one success in 24 samples per prompt, score = reward: pass@k = 1 - C(23, k) / C(24, k) = k / 24 (Chen et al.
    # 2021), so every doubling step gains k / 24 > 0 at every prompt. With max_k 24 the last step tested is 8->16:
    # the sentence said "up to k=24", a k no step reached
    r = np.zeros((12, 24))
    r[:, 0] = 1.0
    res = plan_pools({1.0: Pools(r, r.copy())}, n_boot=200)
    assert [d.k for d in res.doubling] == [1, 2, 4, 8] and res.doubling_stops_at is None
    np.testing.assert_allclose([d.gain for d in res.doubling], [1 / 24, 2 / 24, 4 / 24, 8 / 24], rtol=1e-12)
    text = res.table()
    assert "doubling kept paying (gain significantly > 0) up to k=16" in text and "up to k=24" not in text
