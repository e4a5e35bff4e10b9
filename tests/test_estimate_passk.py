"""bonft.estimate.passk against outside references: the exact integer formula and enumeration."""
import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
import torch

from bonft.estimate import pass_at_k


def chen_pass_at_k(n, c, k) -> Fraction:
    # Chen et al. 2021, "Evaluating Large Language Models Trained on Code", eq. (1): 1 - C(n-c, k) / C(n, k)
    return 1 - Fraction(math.comb(n - c, k), math.comb(n, k))


# ----------------------------------------------------------------------------- pass@k


@pytest.mark.parametrize("n,c", [(1, 0), (1, 1), (5, 2), (10, 3), (20, 0), (20, 20), (30, 7)])
def test_pass_at_k_equals_chen_formula_and_enumeration(n, c):
    ks = list(range(1, n + 1))
    got = pass_at_k(n, c, k=ks)
    want = [chen_pass_at_k(n, c, k) for k in ks]  # Chen et al. 2021 eq. (1), exact integers
    np.testing.assert_allclose(got, [float(w) for w in want], rtol=1e-12, atol=1e-14)
    if n <= 10:
        # brute force: share of k-subsets holding at least one of the c correct samples (first c indices)
        for k in ks:
            subsets = list(itertools.combinations(range(n), k))
            hits = sum(any(i < c for i in s) for s in subsets)
            assert got[k - 1] == pytest.approx(hits / len(subsets), abs=1e-12)


def test_pass_at_k_broadcasts_and_returns_float_for_scalars():
    assert isinstance(pass_at_k(10, 3, k=2), float)
    # Chen et al. 2021 eq. (1): 1 - C(7,2)/C(10,2) = 1 - 21/45 = 8/15
    assert pass_at_k(10, 3, k=2) == pytest.approx(8 / 15, abs=1e-14)
    got = pass_at_k(np.array([[10], [20]]), np.array([3, 5]), k=2)
    want = [[float(chen_pass_at_k(10, 3, 2)), float(chen_pass_at_k(10, 5, 2))],
            [float(chen_pass_at_k(20, 3, 2)), float(chen_pass_at_k(20, 5, 2))]]
    np.testing.assert_allclose(got, want, rtol=1e-12)
    np.testing.assert_allclose(pass_at_k(torch.tensor([10, 20]), torch.tensor([3, 5]), k=4),
                               [float(chen_pass_at_k(10, 3, 4)), float(chen_pass_at_k(20, 5, 4))], rtol=1e-12)


def test_pass_at_k_of_no_correct_sample_is_plus_zero():
    # Chen et al. 2021 eq. (1) with c = 0: 1 - C(n, k)/C(n, k) = 0, printed as 0.0, never -0.0
    assert math.copysign(1.0, pass_at_k(10, 0, k=3)) == 1.0
    assert not np.signbit(pass_at_k(np.array([10, 10, 5000]), np.array([0, 0, 0]), k=3)).any()
    big = pass_at_k(np.full(5000, 10), np.zeros(5000, dtype=int), k=3)  # the shared-table path for long vectors
    assert not np.signbit(big).any()


def test_pass_at_k_large_n_matches_chen_stable_product():
    # Chen et al. 2021, Fig. 3 numerically stable form: 1 - prod_{i=n-c+1}^{n} (1 - k / i)
    n, c, k = 100_000, 3, 10_000
    want = 1.0 - np.prod(1.0 - k / np.arange(n - c + 1, n + 1))
    got = pass_at_k(n, c, k=k)
    assert math.isfinite(got)
    assert got == pytest.approx(want, rel=1e-10)


def test_pass_at_k_long_vectors_match_chen_and_name_the_bad_element():
    # vectors longer than the block size (2**15) go through the block scan and the (pool size, c) table;
    # reference: Chen et al. 2021 eq. (1) with exact integers on every distinct (n, c)
    rng = np.random.default_rng(0)
    n = rng.choice([16, 64, 256], 80_000)
    c = rng.integers(0, n + 1)
    got = pass_at_k(n, c, k=8)
    want = {(a, b): float(chen_pass_at_k(a, b, 8)) for a, b in set(zip(n.tolist(), c.tolist()))}
    np.testing.assert_allclose(got, [want[a, b] for a, b in zip(n.tolist(), c.tolist())], rtol=1e-12, atol=1e-15)
    c[70_000] = n[70_000] + 1  # in the third block
    with pytest.raises(ValueError, match=rf"c must be <= n \(n={n[70_000]}\), got c={n[70_000] + 1}"):
        pass_at_k(n, c, k=8)


def test_pass_at_k_rejects_bad_input():
    with pytest.raises(ValueError, match=r"k must be <= n \(n=8\), got k=16"):
        pass_at_k(8, 2, k=16)
    with pytest.raises(ValueError, match=r"k must be >= 1"):
        pass_at_k(8, 2, k=0)
    with pytest.raises(ValueError, match=r"c must be <= n \(n=8\), got c=9"):
        pass_at_k(8, 9, k=1)
    with pytest.raises(ValueError, match=r"c must be >= 0"):
        pass_at_k(8, -1, k=1)
    with pytest.raises(TypeError, match=r"k must hold ints, got dtype float64"):
        pass_at_k(8, 2, k=1.5)
    with pytest.raises(ValueError, match=r"must broadcast together"):
        pass_at_k([8, 9], [1, 2, 3], k=1)


# ----------------------------------------------------------------------------- best-of-k vs brute force

