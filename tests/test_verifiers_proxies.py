"""NoisyProxy and the combinators: exact arithmetic by hand, noise checked with scipy.stats."""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from bonft.verifiers import Cached, ExactMatch, MinOf, NoisyProxy, Verdicts, WeightedSum


def truth(prompts, responses):
    """True reward 1 when the response starts with 'ok'."""
    return Verdicts(scores=[float(r.startswith("ok")) for r in responses],
                    rewards=[float(r.startswith("ok")) for r in responses])


def test_length_and_feature_bias_are_exact():
    proxy = NoisyProxy(truth, length_bias=0.5, feature_bias=(r"VERIFIED", 0.25))
    v = proxy(["p"] * 3, ["ok", "no" * 50, "ok VERIFIED VERIFIED"])
    # r + 0.5 * L / 100 + 0.25 * matches:  L = 2, 100, 20
    np.testing.assert_allclose(v.scores, [1 + 0.01, 0 + 0.5, 1 + 0.1 + 0.5])
    np.testing.assert_array_equal(v.rewards, [1, 0, 1])  # rewards stay the truth


def test_flip_rate_matches_binomial():
    proxy = NoisyProxy(truth, flip_rate=0.3, seed=7)
    n = 4000
    v = proxy(["p"] * n, [f"ok {i}" for i in range(n)])
    flips = int((v.scores == 0).sum())
    # binomial test (scipy.stats.binomtest): the hashed flips look like Bernoulli(0.3) draws
    assert stats.binomtest(flips, n, 0.3).pvalue > 1e-3, f"{flips} flips of {n}, expected about {0.3 * n:.0f}"


def test_score_noise_is_gaussian():
    proxy = NoisyProxy(truth, score_noise=2.0, seed=1)
    n = 3000
    z = proxy(["p"] * n, [f"no {i}" for i in range(n)]).scores
    # Kolmogorov-Smirnov test (scipy.stats.kstest) against N(0, 2^2)
    res = stats.kstest(z, "norm", args=(0.0, 2.0))
    assert res.pvalue > 1e-3, f"KS statistic {res.statistic:.4f}, p={res.pvalue:.2g}; std {z.std():.3f} vs 2"


@settings(max_examples=30)
@given(st.text(max_size=30), st.text(max_size=30), st.integers(0, 2**31))
def test_same_input_same_score(prompt, response, seed):
    proxy = NoisyProxy(truth, flip_rate=0.5, score_noise=1.0, seed=seed)
    a = proxy([prompt, "x"], [response, "y"]).scores[0]
    b = proxy([prompt], [response]).scores[0]  # batch composition does not matter
    assert a == b


def test_seed_changes_the_noise():
    r = [f"ok {i}" for i in range(50)]
    a = NoisyProxy(truth, score_noise=1.0, seed=0)(["p"] * 50, r).scores
    b = NoisyProxy(truth, score_noise=1.0, seed=1)(["p"] * 50, r).scores
    assert np.abs(a - b).max() > 0.1


def test_proxy_arguments():
    with pytest.raises(ValueError, match=r"flip_rate must be a finite number in \[0, 1\], got flip_rate=1.5"):
        NoisyProxy(truth, flip_rate=1.5)
    with pytest.raises(ValueError, match="score_noise must be a finite number >= 0, got score_noise=-1.0"):
        NoisyProxy(truth, score_noise=-1)
    with pytest.raises(TypeError, match=r"feature_bias must be a \(regex, weight\) tuple"):
        NoisyProxy(truth, feature_bias="x")
    with pytest.raises(ValueError, match="feature_bias regex must be a valid regular expression"):
        NoisyProxy(truth, feature_bias=("(", 1.0))
    with pytest.raises(TypeError, match="base must be a verifier"):
        NoisyProxy(3)


def test_weighted_sum_and_min():
    exact = ExactMatch({"q": "4"})
    length = lambda p, r: [len(x) / 10 for x in r]  # noqa: E731 - scores only, no rewards
    resp = ["answer: 4", "answer: 5 and more"]
    ws = WeightedSum([(length, 2.0), (exact, 1.0)])(["q", "q"], resp)
    # 2 * L/10 + exact: L = 9, 18
    np.testing.assert_allclose(ws.scores, [2 * 0.9 + 1, 2 * 1.8 + 0])
    np.testing.assert_array_equal(ws.rewards, [1, 0])  # from the first component reporting rewards
    mn = MinOf([length, exact])(["q", "q"], resp)
    np.testing.assert_allclose(mn.scores, [0.9, 0.0])
    with pytest.raises(ValueError, match="parts must not be empty"):
        WeightedSum([])
    with pytest.raises(ValueError, match=r"parts\[0\] weight must be a finite number, got parts\[0\] weight=nan"):
        WeightedSum([(exact, float("nan"))])
    with pytest.raises(TypeError, match=r"verifiers\[1\] must be a verifier"):
        MinOf([exact, "exact"])


def test_failures_propagate_through_combinators():
    def half_failed(p, r):
        return Verdicts(scores=[1.0, 0.0], failed=[False, True], reasons=[None, "boom"])

    out = MinOf([half_failed, truth])(["p", "p"], ["ok", "ok"])
    assert list(out.failed) == [False, True] and out.reasons[1] == "component 0: boom"


def test_cached_counts_hits_and_evicts():
    calls = []

    def counting(prompts, responses):
        calls.append(list(responses))
        return truth(prompts, responses)

    c = Cached(counting, maxsize=2)
    c(["p", "p"], ["ok1", "no"])
    out = c(["p", "p", "p"], ["ok1", "no", "ok2"])
    assert calls == [["ok1", "no"], ["ok2"]]
    np.testing.assert_array_equal(out.scores, [1, 0, 1])
    np.testing.assert_array_equal(out.rewards, [1, 0, 1])
    assert (c.hits, c.misses, len(c)) == (2, 3, 2)
    c(["p"], ["ok1"])  # ok1 was least recently used -> evicted -> recomputed
    assert calls[-1] == ["ok1"]
    with pytest.raises(ValueError, match="maxsize must be >= 1, got maxsize=0"):
        Cached(truth, maxsize=0)
