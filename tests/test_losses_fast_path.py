"""The losses' fast masking (a multiply, with ``where`` only after a non-finite result) against ``where`` masking.

Reference: the masking rule written out on its own in float64: padding tokens (mask == 0) are
taken out with ``torch.where(mask != 0, lp, 0)`` before the sum over tokens, so whatever the
padding holds (NaN, +-inf) adds exactly 0; a floating mask then multiplies (its entries are token
weights, as in a hand-written ``(lp * mask).sum(-1)``), a bool or integer one counts each non-zero
entry once. The gradient of ``-(1/B) sum_b sum_i w_bi seq_bi`` w.r.t. a token log-prob is
``-w_bi/B`` times the token's weight, 0 on padding (the score-function loss of Williams 1992; the
k3 KL term of Schulman's 2020 note "Approximating KL divergence", from memory, each token's k3
times its weight). The credits are the public credit functions, which the fast path does not
change. Property tests (hypothesis, derandomized in conftest.py) draw shapes, log-prob dtypes, mask
dtypes and values, where NaN and infinities sit in the padding, every named loss, token- and
sequence-level inputs, both token reductions, the anchor KL term and ``return_info``.
"""
import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.objectives.credit import (
    best_of_k_credit,
    best_of_k_sft_credit,
    pass_at_k_credit,
    pool_value,
    reinforce_credit,
)
from bonft.objectives.losses import (
    best_of_k_loss,
    best_of_k_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)

LOSSES = ("reinforce", "pass_at_k", "pass_at_k_plugin", "best_of_k", "best_of_k_sft", "policy_gradient")
MASK_DTYPES = (torch.bool, torch.float32, torch.float64, torch.float16, torch.bfloat16, torch.int64, torch.int32,
               torch.int8, torch.uint8)
LP_DTYPES = (torch.float32, torch.float64, torch.bfloat16)  # bfloat16 is widened to float32 by the losses
PADDING = ("finite", "nan", "-inf", "+inf", "mixed")


def token_weight(mask):
    """The reference weight of each token (float64): a floating mask as it is, else 1 where non-zero."""
    return mask.double() if mask.dtype.is_floating_point else (mask != 0).double()


def where_seq(lp, mask):
    """The reference masked sum (float64): padding adds exactly 0 whatever it holds, tokens count by weight."""
    return (torch.where(mask != 0, lp.double(), 0.0) * token_weight(mask)).sum(-1)


def fill_padding(lp, mask, how, g):
    """Token log-probs with the padding (mask == 0) holding ``how``."""
    pad = mask == 0
    if how == "finite":
        return torch.where(pad, -50 * torch.rand(lp.shape, generator=g, dtype=lp.dtype), lp)
    if how == "mixed":
        pick = torch.randint(0, 3, lp.shape, generator=g)
        vals = torch.stack([torch.full_like(lp, float("nan")), torch.full_like(lp, -float("inf")),
                            torch.full_like(lp, float("inf"))])
        return torch.where(pad, vals.gather(0, pick[None])[0], lp)
    value = {"nan": float("nan"), "-inf": -float("inf"), "+inf": float("inf")}[how]
    return torch.where(pad, torch.full_like(lp, value), lp)


@st.composite
def cases(draw):
    B, n, T = draw(st.integers(1, 4)), draw(st.integers(2, 5)), draw(st.integers(1, 6))
    seed = draw(st.integers(0, 2**16))
    return {
        "B": B, "n": n, "T": T, "seed": seed,
        "lp_dtype": draw(st.sampled_from(LP_DTYPES)),
        "mask_dtype": draw(st.sampled_from(MASK_DTYPES)),
        "padding": draw(st.sampled_from(PADDING)),
        "loss": draw(st.sampled_from(LOSSES)),
        "k": draw(st.integers(1, n)),
        "token_reduction": draw(st.sampled_from(("sum", "mean"))),
        "reduction": draw(st.sampled_from(("mean", "sum", "none"))),
        "anchor": draw(st.booleans()),
        "return_info": draw(st.booleans()),
        "tokens": draw(st.booleans()),
    }


def make_batch(c):
    g = torch.Generator().manual_seed(c["seed"])
    B, n, T = c["B"], c["n"], c["T"]
    lengths = torch.randint(1, T + 1, (B, n), generator=g)
    on = torch.arange(T)[None, None] < lengths[..., None]
    perm = torch.argsort(torch.rand(B, n, T, generator=g), -1)  # tokens need not come first in a row
    on = on.gather(-1, perm)
    if c["mask_dtype"] == torch.bool:
        mask = on
    elif c["mask_dtype"].is_floating_point:  # token weights, fractional and negative included
        level = torch.tensor([0.5, 1.0, 2.0, -1.0], dtype=c["mask_dtype"])[torch.randint(0, 4, (B, n, T), generator=g)]
        mask = torch.where(on, level, torch.tensor([0.0, -0.0])[torch.randint(0, 2, (B, n, T), generator=g)])
        mask = mask.to(c["mask_dtype"])  # -0.0 marks padding like 0.0
    elif c["mask_dtype"] in (torch.int64, torch.int32):  # 256 and -1 are tokens too (not 0 once cast to a byte)
        level = torch.tensor([1, 2, 256, -1], dtype=c["mask_dtype"])[torch.randint(0, 4, (B, n, T), generator=g)]
        mask = torch.where(on, level, 0)
    else:
        mask = on.to(c["mask_dtype"]) * torch.randint(1, 3, (B, n, T), generator=g).to(c["mask_dtype"])
    lp = -3 * torch.rand(B, n, T, generator=g, dtype=c["lp_dtype"])
    lp = fill_padding(lp, mask, c["padding"], g)
    anchor = fill_padding(lp - 0.3 * torch.rand(B, n, T, generator=g, dtype=c["lp_dtype"]), mask, c["padding"], g)
    rng = np.random.default_rng(c["seed"])
    scores = rng.integers(0, 3, (B, n)).astype(float)
    rewards = (rng.random((B, n)) < 0.5).astype(float)
    ref_lp = -torch.rand(B, T, generator=g, dtype=c["lp_dtype"])
    ref_mask = torch.arange(T)[None] < torch.randint(1, T + 1, (B,), generator=g)[:, None]
    ref_scores = rng.integers(0, 3, B).astype(float)
    return lp, mask, anchor, scores, rewards, ref_lp, ref_mask, ref_scores


def call(c, lp, mask, anchor, scores, rewards, ref_lp, ref_mask, ref_scores, credit):
    kw = {"reduction": c["reduction"], "return_info": c["return_info"]}
    if c["tokens"]:
        kw.update(mask=mask, token_reduction=c["token_reduction"])
    if c["anchor"]:
        kw.update(anchor_logprobs=anchor, anchor_weight=0.3)
    name, k = c["loss"], c["k"]
    if name == "reinforce":
        return reinforce_loss(lp, rewards, **kw)
    if name == "pass_at_k":
        return pass_at_k_loss(lp, rewards, k=k, **kw)
    if name == "pass_at_k_plugin":
        return pass_at_k_loss(lp, rewards, k=k, estimator="plugin", **kw)
    if name == "best_of_k":
        return best_of_k_loss(lp, scores, rewards, k=k, **kw)
    if name == "best_of_k_sft":
        ref = (ref_lp, {"reference_mask": ref_mask}) if c["tokens"] else (ref_lp.sum(-1), {})
        return best_of_k_sft_loss(lp, scores, ref[0], ref_scores, k=k, **ref[1], **kw)
    return policy_gradient_loss(lp, credit, **kw)


def reference(c, lp, mask, anchor, scores, rewards, ref_lp, ref_mask, ref_scores, credit):
    """(per-prompt loss (B,) in float64, gradient w.r.t. lp, info values) by where-masking."""
    name, k = c["loss"], c["k"]
    w = {"reinforce": lambda: reinforce_credit(rewards),
         "pass_at_k": lambda: pass_at_k_credit(rewards, k=k),
         "pass_at_k_plugin": lambda: pass_at_k_credit(rewards, k=k, estimator="plugin"),
         "best_of_k": lambda: best_of_k_credit(scores, rewards, k=k),
         "best_of_k_sft": lambda: best_of_k_sft_credit(scores, ref_scores, k=k),
         "policy_gradient": lambda: credit}[name]()
    w = torch.as_tensor(np.asarray(w), dtype=torch.float64)
    lp64 = lp.detach().double().requires_grad_(True)
    scale = 1.0
    if c["tokens"]:
        seq = where_seq(lp64, mask)
        if c["token_reduction"] == "mean":
            scale = seq.numel() / float((mask != 0).sum())
    else:
        seq = lp64
    per_prompt = -(w * seq * scale).sum(-1)
    info = {}
    if c["anchor"]:
        d = anchor.double() - lp64
        if c["tokens"]:
            d = torch.where(mask != 0, d, 0.0)
        k3 = torch.expm1(d) - d
        if c["tokens"]:
            k3 = k3 * token_weight(mask)
        kl_seq = k3.sum(-1) * scale if c["tokens"] else k3
        per_prompt = per_prompt + 0.3 * kl_seq.mean(-1)
        info["kl"] = float(k3.detach().sum()) / float((mask != 0).sum() if c["tokens"] else k3.numel())
    if name == "best_of_k_sft":
        if c["tokens"]:
            ref_seq = torch.where(ref_mask, ref_lp.double(), 0.0).sum(-1)
            if c["token_reduction"] == "mean":
                ref_seq = ref_seq * (ref_seq.numel() / float(ref_mask.sum()))
        else:
            ref_seq = ref_lp.sum(-1).double()  # the sequence log-probs the loss is given
        per_prompt = per_prompt - ref_seq
    red = {"mean": per_prompt.mean(), "sum": per_prompt.sum(), "none": per_prompt}[c["reduction"]]
    red.sum().backward()
    if c["tokens"]:
        info["masked_frac"] = 1 - float((mask != 0).sum()) / mask.numel()
    if name == "best_of_k":
        info["pool_value"] = float(pool_value(scores, rewards, k=k).mean())
    elif name.startswith("pass_at_k"):
        info["pool_value"] = float(pool_value(rewards, rewards, k=k).mean())  # Chen et al. 2021 as a U-statistic
    elif name == "reinforce":
        info["pool_value"] = float(rewards.mean())
    return red.detach(), lp64.grad, info


@settings(max_examples=200)  # derandomized by the profile in conftest.py; more examples: the space is large
@given(cases())
def test_fast_path_gives_where_masking_results_nan_in_padding_included(c):
    lp, mask, anchor, scores, rewards, ref_lp, ref_mask, ref_scores = make_batch(c)
    if not c["tokens"]:  # sequence level: (B, n) log-probs, finite (there is no padding)
        lp, anchor = where_seq(lp, mask).to(lp.dtype), where_seq(anchor, mask).to(lp.dtype)
    credit = np.random.default_rng(c["seed"] + 1).normal(size=lp.shape[:2])
    args = (mask, anchor, scores, rewards, ref_lp, ref_mask, ref_scores, credit)
    x = lp.clone().requires_grad_(True)
    out = call(c, x, *args)
    loss, info = out if c["return_info"] else (out, None)
    loss.sum().backward()
    want, want_grad, want_info = reference(c, lp, *args)
    # bfloat16 log-probs are summed in float32 (exactly widened), their gradient rounded back to bfloat16
    tol = {"rtol": 1e-10, "atol": 1e-10} if c["lp_dtype"] == torch.float64 else {"rtol": 1e-5, "atol": 1e-5}
    assert loss.dtype == (torch.float32 if c["lp_dtype"] == torch.bfloat16 else c["lp_dtype"])
    assert x.grad.dtype == c["lp_dtype"]
    torch.testing.assert_close(loss.detach().double(), want, **tol)
    grad_tol = {"rtol": 2 ** -8, "atol": 1e-6} if c["lp_dtype"] == torch.bfloat16 else tol
    torch.testing.assert_close(x.grad.double(), want_grad, **grad_tol)
    assert torch.isfinite(x.grad).all()
    if c["return_info"]:
        for key, value in want_info.items():
            assert float(info[key]) == pytest.approx(value, rel=1e-5, abs=1e-6), key


@pytest.mark.parametrize("mask_dtype", MASK_DTYPES)
@pytest.mark.parametrize("padding", PADDING)
def test_a_non_finite_log_prob_under_the_mask_still_gives_a_non_finite_loss(mask_dtype, padding):
    # the fast path's fallback must not hide a bad log-prob of a response token (never hidden)
    g = torch.Generator().manual_seed(3)
    lp = -torch.rand(2, 3, 4, generator=g)
    mask = torch.tensor([1, 1, 0, 0]).repeat(2, 3, 1).to(mask_dtype)
    lp = fill_padding(lp, mask, padding, g)
    lp[1, 2, 0] = float("nan")
    rewards = np.array([[1.0, 0, 0], [0, 1, 0]])
    assert torch.isnan(reinforce_loss(lp, rewards, mask=mask))
    assert torch.isnan(nll_loss(lp.view(6, 4), mask=mask.view(6, 4)))


@pytest.mark.parametrize("padding", ("finite", "nan"))
def test_an_empty_row_with_credit_is_an_error_on_both_paths(padding):
    # an empty row sums to exactly 0 on the fast path: the exact row check runs and names it
    lp = -torch.rand(2, 3, 4)
    mask = torch.ones(2, 3, 4, dtype=torch.bool)
    mask[1, 0] = False
    lp = fill_padding(lp, mask, padding, torch.Generator().manual_seed(0))
    rewards = np.array([[1.0, 0, 0], [1.0, 0, 0]])
    with pytest.raises(ValueError, match=r"mask must mark at least one token per sequence with non-zero credit, "
                                         r"got an all-zero row at index \(1, 0\)"):
        reinforce_loss(lp, rewards, mask=mask)
    rewards[1] = 0.0  # no credit in that row: nothing is lost, no error
    assert torch.isfinite(reinforce_loss(lp, rewards, mask=mask))


def test_a_response_of_certain_tokens_sums_to_zero_and_is_not_an_empty_row():
    # a row whose log-probs are all 0 (probability 1) sums to 0 like an empty one; the exact count clears it
    lp = -torch.rand(2, 3, 4, generator=torch.Generator().manual_seed(1))
    lp[0, 1] = 0.0
    mask = torch.ones(2, 3, 4)
    rewards = np.array([[1.0, 0, 0], [1.0, 0, 0]])
    x = lp.clone().requires_grad_(True)
    loss = reinforce_loss(x, rewards, mask=mask)
    loss.backward()
    w = torch.as_tensor(reinforce_credit(rewards))
    # float32 sums of terms below 1 against float64 ones: within a few float32 roundings
    assert float(loss.detach()) == pytest.approx(float(-(w * lp.double().sum(-1)).sum(-1).mean()), rel=1e-6, abs=1e-6)
    torch.testing.assert_close(x.grad, (-w / 2)[..., None].float().expand(2, 3, 4))


@pytest.mark.parametrize("mask_dtype", MASK_DTYPES)
def test_token_weights_are_one_exactly_where_the_mask_is_not_zero(mask_dtype):
    # reference: the definition "any non-zero entry marks a token", evaluated element by element in Python
    from bonft.objectives.validation import token_weights

    values = [0, 1, 2, -1, 0.5, 256, -0.0, 1e-30, 65536]
    if not mask_dtype.is_floating_point and mask_dtype != torch.bool:
        info = torch.iinfo(mask_dtype)
        values = [v for v in values if float(v).is_integer() and info.min <= v <= info.max]
    mask = torch.tensor(values).to(mask_dtype)
    want = [0.0 if float(v) == 0 else 1.0 for v in mask.tolist()]
    for dtype in (torch.float32, torch.float64):
        w = token_weights(mask.view(1, 1, -1), dtype)
        assert w.dtype == dtype and w.view(-1).tolist() == want, (mask_dtype, mask.tolist(), w.view(-1).tolist())
    strided = torch.tensor(values[:4] * 2).to(mask_dtype).view(2, 4).t()  # non-contiguous
    assert token_weights(strided, torch.float32).tolist() == [[0.0 if float(v) == 0 else 1.0 for v in row]
                                                              for row in strided.tolist()]


@pytest.mark.parametrize("mask_dtype", (torch.bool, torch.float32, torch.int64))
def test_a_second_backward_and_a_differentiable_one_give_the_same_gradient(mask_dtype):
    # the fast path hands its 0/1 weights over as the gradient on the first backward; a second
    # backward through the retained graph (and create_graph) must still see the weights, not the gradient
    g = torch.Generator().manual_seed(5)
    lp = -torch.rand(3, 4, 6, generator=g, dtype=torch.float64)
    mask = (torch.rand(3, 4, 6, generator=g) < 0.7)
    mask[..., 0] = True
    mask = mask.to(mask_dtype)
    credit = np.random.default_rng(5).normal(size=(3, 4))
    want = (-torch.as_tensor(credit)[..., None] / 3 * (mask != 0)).expand(3, 4, 6)  # d/dlp of -(1/B) sum w seq
    x = lp.clone().requires_grad_(True)
    loss = policy_gradient_loss(x, credit, mask=mask)
    (first,) = torch.autograd.grad(loss, x, retain_graph=True)
    (second,) = torch.autograd.grad(loss, x, retain_graph=True)
    (third,) = torch.autograd.grad(loss, x, create_graph=True)
    for got in (first, second, third):
        torch.testing.assert_close(got, want, rtol=1e-12, atol=1e-15)
    y = lp.clone().requires_grad_(True)
    nll = nll_loss(y.view(12, 6), mask=mask.view(12, 6), reduction="sum")
    nll.backward(retain_graph=True)
    nll.backward()  # accumulates: twice the gradient of the sum, -1 on every token
    torch.testing.assert_close(y.grad, -2.0 * (mask != 0).double(), rtol=0, atol=0)


@pytest.mark.parametrize("mask_dtype", (torch.bool, torch.float32, torch.float64, torch.int64))
def test_the_backward_leaves_the_inputs_alone_and_each_call_gets_its_own_gradient(mask_dtype):
    # the fast path's backward scales its 0/1 weights in place and hands them over as the gradient;
    # the caller's mask and log-probs must stay as they were, and two calls must not share a tensor
    # (autograd's contract: a backward returns new tensors; common practice, no source)
    g = torch.Generator().manual_seed(11)
    lp = -torch.rand(4, 3, 5, generator=g, dtype=torch.float64)
    mask = torch.rand(4, 3, 5, generator=g) < 0.6
    mask[..., 0] = True
    mask = mask.to(mask_dtype)
    if mask_dtype.is_floating_point:
        mask = mask * 2.5  # a floating mask weights its tokens: 2.5 each
    mask_before, lp_before = mask.clone(), lp.clone()
    credit = np.random.default_rng(11).normal(size=(4, 3))
    grads = []
    for scale in (1.0, 3.0):  # a second call with another credit: its gradient must not land in the first
        x = lp.clone().requires_grad_(True)
        policy_gradient_loss(x, scale * credit, mask=mask, reduction="sum").backward()
        grads.append(x.grad)
    assert torch.equal(mask, mask_before) and torch.equal(lp, lp_before)
    for scale, got in zip((1.0, 3.0), grads):
        # d/dlp of -sum_b sum_i w_bi sum_t weight_bit lp_bit = -w_bi weight_bit on the tokens, 0 on padding
        want = (-scale * torch.as_tensor(credit)[..., None] * token_weight(mask_before)).expand(4, 3, 5)
        torch.testing.assert_close(got, want, rtol=1e-15, atol=0)
    assert grads[0].data_ptr() != grads[1].data_ptr()


@given(st.integers(1, 5), st.integers(1, 70), st.integers(0, 2**16), st.booleans())
def test_the_credit_running_sums_are_numpys_cumsum_number_for_number(B, n, seed, signed_zeros):
    # reference: np.cumsum, whose left-to-right float64 additions the best-of-k credit used before
    from bonft.objectives.credit import _running_sum

    rng = np.random.default_rng(seed)
    x = rng.normal(size=(B, n)) * 10.0 ** rng.integers(-300, 300, size=(B, n))  # rounding in every sum
    if signed_zeros:
        x[rng.random((B, n)) < 0.5] = -0.0
    for a in (x, x[:, ::2], x.ravel()):  # rows, a strided view, one flat run
        got, want = _running_sum(a), np.cumsum(a, axis=-1)
        assert got.dtype == np.float64 and got.shape == want.shape
        assert np.array_equal(got, want)  # equal numbers (a leading -0.0 may come back as +0.0: the same value)


def test_the_pool_values_of_pass_at_k_loss_are_chens_estimator_by_exact_counting():
    # reference: 1 - C(n-c, k)/C(n, k) (Chen et al. 2021, the unbiased pass@k), in exact integers
    from math import comb

    from bonft.objectives.credit import _pass_values

    for n in range(1, 41):
        for k in range(1, n + 1):
            table = _pass_values(n, k)
            want = [1 - comb(n - c, k) / comb(n, k) for c in range(n + 1)]
            np.testing.assert_allclose(table, want, rtol=1e-13, atol=1e-15)
    rewards = np.array([[1.0, 0, 0, 0], [1, 1, 0, 1], [0, 0, 0, 0]])  # c = 1, 3, 0 of n = 4, k = 2
    _, info = pass_at_k_loss(-torch.rand(3, 4), rewards, k=2, return_info=True)
    assert float(info["pool_value"]) == pytest.approx((0.5 + 1.0 + 0.0) / 3, rel=1e-15)  # 1 - C(3,2)/C(4,2) = 1/2
