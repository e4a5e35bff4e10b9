"""The private homes of shared formulas: seeds, bootstrap counts, tie groups.

pass@k and the U-statistic weights have their own file (tests/test_passk.py).
"""
import numpy as np

from bonft._core.bootstrap import resample_counts
from bonft._core.seeds import derive_seed, float_key
from bonft._core.ties import first_of_group, flat_groups, group_ids, tie_means


def test_seed_is_the_first_seedsequence_word():
    # Reference: numpy's SeedSequence (numpy documentation, "Parallel random number generation")
    want = int(np.random.SeedSequence([3, 7, 0, 1]).generate_state(2, np.uint64)[0]) >> 1
    assert derive_seed(3, 7, 0, 1) == want
    assert derive_seed(3, 7, 0, 1, bits=31) == want >> 32
    assert derive_seed(3, 7, 0, 2) != derive_seed(3, 7, 0, 1)
    assert float_key(0.7) == float_key(0.70000000001) != float_key(0.71)


def test_resample_counts_are_the_drawn_indices():
    # the counts equal a direct tally of rng.integers draws (the percentile bootstrap's resamples,
    # Efron & Tibshirani 1993)
    P, b = 7, 50
    W = resample_counts(np.random.default_rng(5), P, b)
    idx = np.random.default_rng(5).integers(0, P, size=(b, P))
    want = np.stack([np.bincount(row, minlength=P) for row in idx])
    np.testing.assert_array_equal(W, want)
    assert W.dtype == np.float64 and (W.sum(1) == P).all()


def test_tie_groups_by_hand():
    s = np.array([[1.0, 1.0, 2.0, 3.0, 3.0, 3.0], [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]])
    first = first_of_group(s)
    assert first[0].tolist() == [True, False, True, True, False, False] and first[1].all()
    assert group_ids(first)[0].tolist() == [0, 0, 1, 2, 2, 2]
    starts, gid, sizes = flat_groups(first)
    assert starts.tolist() == [0, 2, 3, 6, 7, 8, 9, 10, 11] and sizes.tolist() == [2, 1, 3, 1, 1, 1, 1, 1, 1]
    assert gid.tolist() == [0, 0, 1, 2, 2, 2, 3, 4, 5, 6, 7, 8]
    r = np.array([[1.0, 0.0, 5.0, 3.0, 0.0, 0.0], [1.0, 2, 3, 4, 5, 6]])
    np.testing.assert_allclose(tie_means(r, first), [[0.5, 0.5, 5, 1, 1, 1], [1, 2, 3, 4, 5, 6]])
