"""pass@k and every binomial ratio, against exact rational arithmetic.

Reference: Python's exact integers and fractions (``math.comb``, ``fractions.Fraction``,
standard library); the estimator is Chen et al. 2021, "Evaluating Large Language Models
Trained on Code", pass@k = 1 - C(n-c, k)/C(n, k). Their numerically stable form
``1 - prod_{i=n-c+1}^{n} (1 - k/i)`` gives the exact product used for huge n.
"""
import math
from fractions import Fraction

import numpy as np
import pytest
import torch

from bonft._core.passk import log_miss, pass_at_k_counts
from bonft._core.ustat import count_tables, rank_weights
from bonft.estimate import pass_at_k

REL = 1e-12  # the stated accuracy: ~1e-12 relative for any n in int64


def exact_pass(n, c, k):
    """1 - C(n-c, k)/C(n, k) as a Fraction; the product over min(c, k) factors (exact for any n)."""
    if c == 0:
        return Fraction(0)
    if n - c < k:
        return Fraction(1)
    m, t = min(c, k), max(c, k)  # C(n-c,k)/C(n,k) = prod_{i<c} (n-k-i)/(n-i), symmetric in c and k
    num = den = 1
    for i in range(m):
        num *= n - t - i
        den *= n - i
    return 1 - Fraction(num, den)


def grid():
    """n from 1 to 10^18 and int64's max; c and k at the edges, the middle and at random."""
    rng = np.random.default_rng(0)
    cases = set()
    for n in [1, 2, 3, 5, 10, 31, 100, 1024, 10**4, 10**6, 10**9, 10**12, 10**15, 10**18, 2**63 - 1]:
        for c in {0, 1, 2, 3, 7, 100, n // 2, n - 1, n, n // 10, n // 1000}:
            for k in {1, 2, 3, 10, 100, n // 2, n - 1, n, n // 10, n // 1000}:
                if 0 <= c <= n and 1 <= k <= n and (min(c, k) <= 2000 or n - c < k):
                    cases.add((n, c, k))
    for _ in range(1500):
        n = max(1, int(10 ** rng.uniform(0, 18.9)))
        c = int(rng.integers(0, min(n, 2000) + 1)) if rng.random() < 0.5 else int(rng.integers(0, n + 1, dtype=np.uint64))
        k = int(rng.integers(1, min(n, 2000) + 1))
        if rng.random() < 0.5:
            c, k = min(k, n), max(1, min(c, n))
        cases.add((n, c, k))
    return sorted(cases)


def test_pass_at_k_matches_exact_fractions_up_to_1e18():
    cases = grid()
    n, c, k = (np.array(v, dtype=np.int64) for v in zip(*cases))
    got = pass_at_k(n, c, k=k)
    want = np.array([float(exact_pass(*t)) for t in cases])
    rel = np.abs(got - want) / np.where(want > 0, want, 1.0)
    worst = int(np.argmax(rel))
    assert rel.max() < REL, (cases[worst], got[worst], want[worst])
    assert len(cases) > 1500 and max(t[0] for t in cases) == 2**63 - 1


def test_both_large_against_math_comb():
    # c and k both large (the product above would be long): math.comb directly, n up to 20000
    rng = np.random.default_rng(1)
    n = rng.integers(1, 20001, 300)
    c = np.array([rng.integers(0, v + 1) for v in n])
    k = np.array([rng.integers(1, v + 1) for v in n])
    want = np.array([float(1 - Fraction(math.comb(a - b, d), math.comb(a, d))) for a, b, d in zip(n, c, k)])
    got = pass_at_k(n, c, k=k)
    assert np.max(np.abs(got - want) / np.where(want > 0, want, 1.0)) < REL


def test_huge_pools_and_limits():
    # 10^15 and 10^18 samples, one correct, k = n/10: exactly 1/10 (C(n-1, k) / C(n, k) = (n-k)/n, by hand)
    assert pass_at_k(10**15, 1, k=10**14) == pytest.approx(0.1, rel=1e-15)
    assert pass_at_k(10**18, 1, k=10**17) == pytest.approx(0.1, rel=1e-15)
    assert pass_at_k(2**63 - 1, 1, k=1) == pytest.approx(1 / (2**63 - 1), rel=1e-15)
    assert pass_at_k(10**18, 10**18, k=1) == 1.0 and pass_at_k(10**18, 0, k=10**17) == 0.0
    with pytest.raises(ValueError, match=r"n must fit in int64 \(\|n\| <= 2\*\*63 - 1\), got n=9223372036854775808"):
        pass_at_k(2**63, 1, k=1)
    with pytest.raises(ValueError, match=r"k must fit in int64"):
        pass_at_k(5, 1, k=[1, 2**64])
    with pytest.raises(ValueError, match=r"n must fit in int64"):
        pass_at_k(np.array([2**63], dtype=np.uint64), 1, k=1)


def test_torch_path_matches_numpy():
    cases = grid()[::7]
    n, c, k = (np.array(v, dtype=np.int64) for v in zip(*cases))
    a = pass_at_k_counts(n, c, k)
    b = pass_at_k_counts(torch.from_numpy(n), torch.from_numpy(c), torch.from_numpy(k), torch).numpy()
    np.testing.assert_allclose(b, a, rtol=1e-14, atol=0)
    assert log_miss(5, 3, 3) == -np.inf and log_miss(5, 0, 3) == 0.0


def test_rank_weights_and_count_tables_match_fractions():
    # w_k(i) = C(i, k-1)/C(n, k) and the credit tables, exact rationals (math.comb)
    for n in [1, 2, 3, 7, 64, 65, 130, 500]:
        ks = sorted({k for k in (1, 2, 3, n // 2, n - 1, n) if 1 <= k <= n})
        W = rank_weights(n, ks)
        assert W.shape == (len(ks), n)
        for j, k in enumerate(ks):
            want = np.array([float(Fraction(math.comb(i, k - 1), math.comb(n, k))) for i in range(n)])
            nz = want > 1e-290
            assert np.all(W[j][~nz] < 1e-280)
            assert np.max(np.abs(W[j][nz] - want[nz]) / want[nz]) < REL, (n, k)
            ck, ck1, cb = count_tables(n, k)
            kb = max(min(k, n - 1), 0)

            def C(a, b):
                return math.comb(a, b) if 0 <= b <= a else 0

            for x in range(-1, n + 1):
                for tab, num, den in ((ck, C(x, k), math.comb(n, k)), (ck1, C(x, k - 1), math.comb(n, k)),
                                      (cb, C(x, kb), math.comb(n - 1, kb) if n > 1 else 0)):
                    if den:
                        v = float(Fraction(num, den))
                        assert tab[x + 1] == pytest.approx(v, rel=REL, abs=1e-280), (n, k, x)


def test_large_arrays_share_values_and_stay_exact():
    # > 4096 elements take the shared-table path (one evaluation per distinct (n, c, k)); same numbers
    rng = np.random.default_rng(2)
    n = rng.choice([16, 64, 1000], 20000)
    c = (rng.random(20000) * (n + 1)).astype(np.int64)
    for k in (1, 8, np.minimum(n, 12)):
        got = pass_at_k(n, c, k=k)
        np.testing.assert_array_equal(got, pass_at_k_counts(n, c, k))
        for j in range(0, 20000, 997):
            kj = int(np.broadcast_to(k, n.shape)[j])
            assert got[j] == pytest.approx(float(exact_pass(int(n[j]), int(c[j]), kj)), rel=REL, abs=0)


def test_banded_best_of_k_matches_exact_sums():
    # all k in 1..n on n = 300: the banded weighted sums against exact rational sums (fractions)
    from bonft.estimate import best_of_k_per_prompt

    rng = np.random.default_rng(3)
    n = 300
    scores = rng.permutation(n)[None, :].astype(float)
    rewards = rng.integers(0, 5, (1, n)).astype(float)
    got = best_of_k_per_prompt(scores, rewards, ks=list(range(1, n + 1)))[0]
    r = rewards[0][np.argsort(scores[0])].astype(int)
    for k in (1, 2, 17, 150, 299, 300):
        want = Fraction(sum(math.comb(i, k - 1) * int(r[i]) for i in range(n)), math.comb(n, k))
        assert got[k - 1] == pytest.approx(float(want), rel=1e-13, abs=1e-15), k
