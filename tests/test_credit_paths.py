"""The credit cores' fast paths against the definitions written out in exact binomials.

Best-of-k with distinct scores (no ties) goes through products with a cached (n, n + 1) matrix
for n <= 64 and through prefix sums above; both are checked here against the k-subset definition of
Chow et al. 2024 counted with ``math.comb`` (with sorted scores, rank j is the top of C(j, k-1)
k-subsets and sits below the top in C(t-1, k-2) of those topped by rank t > j), at pool sizes
where enumerating the subsets is out of reach. The best-of-k SFT credit is checked against its
docstring's elementwise formula (Chow et al. 2024, BoN-SFT), written here as a Python loop.
"""
from math import comb

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.objectives.credit import best_of_k_credit, best_of_k_sft_credit, pool_value


def counted_credit(s, R, k, loo):
    """One pool, distinct scores: the subset-sum credit and the pool U-statistic by exact subset counts."""
    n = len(s)
    order = np.argsort(s)
    r = [float(x) for x in np.asarray(R)[order]]  # rewards by ascending score rank

    def top_sums(vals, size):  # sum over size-subsets of the top's reward, and the count of subsets
        return sum(v * comb(j, size - 1) for j, v in enumerate(vals)), comb(len(vals), size)

    w = np.empty(n)
    for i in range(n):
        # subsets holding rank i: i on top (C(i, k-1)), or a higher rank t on top with i among the rest
        own = r[i] * comb(i, k - 1) + sum(r[t] * comb(t - 1, k - 2) for t in range(i + 1, n)) if k > 1 \
            else r[i]
        value = own / comb(n, k)
        if loo:
            kb = k if k < n else k - 1
            others = r[:i] + r[i + 1:]
            total, count = top_sums(others, kb)
            value -= comb(n - 1, k - 1) / comb(n, k) * total / count
        w[order[i]] = value
    total, count = top_sums(r, k)
    return w, total / count


@pytest.mark.parametrize("n", (2, 5, 64, 65, 128, 200))  # the cached product up to 64, prefix sums above
def test_distinct_scores_credit_matches_exact_subset_counts(n):
    rng = np.random.default_rng(n)
    s = rng.normal(size=(3, n))
    R = np.stack([rng.normal(size=n), (rng.random(n) < 0.3).astype(float), rng.normal(size=n) * 1e3 + 5])
    for k in sorted({1, 2, min(3, n), n // 2 or 1, n}):
        for loo in (True, False):
            got = best_of_k_credit(s, R, k=k, baseline="loo" if loo else "none")
            values = pool_value(s, R, k=k)
            for b in range(3):
                want, value = counted_credit(s[b], R[b], k, loo)
                scale = np.abs(R[b]).max()
                np.testing.assert_allclose(got[b], want, rtol=0, atol=1e-12 * scale, err_msg=f"n={n} k={k} loo={loo}")
                assert abs(values[b] - value) <= 1e-12 * scale


@pytest.mark.parametrize("n", (64, 65, 129))
def test_equal_rewards_give_exact_zeros_on_every_path(n):
    # common practice: a leave-one-out baseline gives no signal when all rewards agree (exactly 0)
    rng = np.random.default_rng(0)
    for s in (rng.normal(size=(4, n)), rng.integers(0, 3, (4, n)).astype(float)):
        for k in (1, 4, n):
            assert (best_of_k_credit(s, np.full((4, n), 0.37), k=k) == 0).all()


def sft_reference(s, e, k, smoothing):
    """The docstring's formula for one pool, entry by entry."""
    n = len(s)
    u = [1.0 if x <= e else 0.0 for x in s]
    v = [1.0 if x < e else 0.0 for x in s]
    F = (sum(u) + smoothing) / (n + smoothing)
    Fl = sum(v) / (n + smoothing)
    z = sum(F ** j * Fl ** (k - 1 - j) for j in range(k))  # h = log z
    h_F = sum(j * F ** (j - 1) * Fl ** (k - 1 - j) for j in range(1, k)) / z
    h_l = sum((k - 1 - j) * F ** j * Fl ** (k - 2 - j) for j in range(k - 1)) / z
    out = []
    for i in range(n):
        mu = (sum(u) - u[i]) / (n - 1) if n > 1 else 0.0
        mv = (sum(v) - v[i]) / (n - 1) if n > 1 else 0.0
        out.append((h_F * (u[i] - mu) + h_l * (v[i] - mv)) / n)
    return np.array(out)


@settings(max_examples=60)
@given(st.integers(1, 12), st.integers(1, 6), st.integers(0, 2**16), st.sampled_from((1.0, 0.5, 3.0)))
def test_best_of_k_sft_credit_matches_its_formula_entry_by_entry(n, k, seed, smoothing):
    k = min(k, n)
    rng = np.random.default_rng(seed)
    s = rng.integers(0, 4, (3, n)).astype(float)  # ties with the reference too
    e = rng.integers(0, 4, 3).astype(float)
    got = best_of_k_sft_credit(s, e, k=k, smoothing=smoothing)
    for b in range(3):
        np.testing.assert_allclose(got[b], sft_reference(s[b], e[b], k, smoothing), rtol=1e-12, atol=1e-14)


@settings(max_examples=40)
@given(n=st.integers(2, 70), k_frac=st.floats(0, 1), seed=st.integers(0, 2**31 - 1),
       dtype=st.sampled_from([torch.float32, torch.float64]))
def test_pass_at_k_loss_uses_the_public_credit_rounded_once_to_the_log_probs_dtype(n, k_frac, seed, dtype):
    # pass_at_k_loss makes its unbiased credit in the log-probs' dtype from per-pool values; the gradient of
    # its reduction="sum" loss w.r.t. sequence log-probs is minus that credit exactly (-sum_i w_i log pi_i,
    # Williams 1992), so it must equal minus the public float64 credit (checked against exhaustive
    # enumeration in tests/test_credit.py) converted to the dtype, bit for bit, all-0 and all-1 pools included.
    from bonft.objectives.credit import pass_at_k_credit
    from bonft.objectives.losses import pass_at_k_loss

    rng = np.random.default_rng(seed)
    k = 1 + int(k_frac * (n - 1))
    c = (rng.random((6, n)) < rng.random((6, 1))) * 1.0
    c[0], c[1] = 0.0, 1.0
    lp = torch.from_numpy(-rng.random((6, n)) * 5).to(dtype).requires_grad_(True)
    pass_at_k_loss(lp, c, k=k, reduction="sum").backward()
    want = -torch.from_numpy(pass_at_k_credit(c, k=k)).to(dtype)
    assert torch.equal(lp.grad.view(torch.int64 if dtype == torch.float64 else torch.int32),
                       want.view(torch.int64 if dtype == torch.float64 else torch.int32))
