"""A floating mask multiplies the token log-probs: its entries are token weights.

The rule is the one a hand-written loop applies, ``(lp * mask).sum(-1)``; padding (entries equal to 0)
still adds exactly 0 whatever the log-probs hold there. Expected values are worked out by hand in the
comments (the leave-one-out credit of Kool et al. 2019 for n = 2 is ``w_i = (R_i - R_other) / 2``), or
compared with a bool mask of the same 0/1 pattern, the masking rule without weights.
"""
import numpy as np
import pytest
import torch

from bonft.objectives.losses import (
    best_of_k_loss,
    best_of_k_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)

# one prompt, n = 2 responses of T = 3 tokens; row 0 has tokens 0 and 1, row 1 tokens 0 and 2
LP = torch.tensor([[[-1.0, -2.0, -4.0], [-1.5, -3.0, -8.0]]], dtype=torch.float64)
MASK = torch.tensor([[[0.5, 1.0, 0.0], [2.0, 0.0, 0.25]]], dtype=torch.float64)
REWARDS = np.array([[1.0, 0.0]])  # leave-one-out credit (n = 2): w = (0.5, -0.5)


def test_a_fractional_float_mask_weights_each_token_log_prob():
    # seq_0 = 0.5*(-1) + 1*(-2) = -2.5, seq_1 = 2*(-1.5) + 0.25*(-8) = -5
    # loss = -(0.5*(-2.5) + (-0.5)*(-5)) = -1.25 (B = 1)
    # d loss / d lp_it = -w_i * mask_it: row 0 (-0.25, -0.5, 0), row 1 (1, 0, 0.125)
    x = LP.clone().requires_grad_(True)
    loss, info = reinforce_loss(x, REWARDS, mask=MASK, return_info=True)
    loss.backward()
    assert float(loss.detach()) == -1.25
    assert x.grad.tolist() == [[[-0.25, -0.5, 0.0], [1.0, 0.0, 0.125]]]
    assert float(info["masked_frac"]) == pytest.approx(2 / 6, abs=1e-15)  # two of six entries are 0
    assert float(info["pool_value"]) == 0.5  # mean reward
    # token_reduction="mean": tokens = non-zero entries = 4, T_bar = 4 / 2 = 2, every term halved
    y = LP.clone().requires_grad_(True)
    mean_loss = reinforce_loss(y, REWARDS, mask=MASK, token_reduction="mean")
    mean_loss.backward()
    assert float(mean_loss.detach()) == -0.625
    assert y.grad.tolist() == [[[-0.125, -0.25, 0.0], [0.5, 0.0, 0.0625]]]
    # the caller's mask is read, never written (the backward allocates mask * g)
    assert MASK.tolist() == [[[0.5, 1.0, 0.0], [2.0, 0.0, 0.25]]]
    # nll_loss on the two rows: -(-2.5) and -(-5), mean 3.75; tokens counted: 4
    nll, nll_info = nll_loss(LP[0], mask=MASK[0], return_info=True)
    assert float(nll) == 3.75 and float(nll_info["tokens"]) == 4.0


def test_nan_or_infinity_in_the_padding_gives_the_finite_padding_numbers():
    x = LP.clone().requires_grad_(True)
    want = reinforce_loss(x, REWARDS, mask=MASK)
    want.backward()
    for bad in (float("nan"), float("inf"), -float("inf")):
        lp = LP.clone()
        lp[0, 0, 2] = bad  # padding of row 0
        lp[0, 1, 1] = bad  # padding of row 1
        y = lp.requires_grad_(True)
        got = reinforce_loss(y, REWARDS, mask=MASK)
        got.backward()
        assert float(got.detach()) == float(want.detach()) == -1.25
        assert torch.equal(y.grad, x.grad)


def test_the_anchor_kl_weights_each_tokens_k3_by_the_mask():
    # k3(d) = exp(d) - d - 1 per token, d = anchor - lp; with d = 0.5 on every token and weights
    # (0.5, 1 | 2, 0.25): per-sequence KL = 1.5 k3 and 2.25 k3, their mean over n = 2 is 1.875 k3;
    # info["kl"] = (1.5 + 2.25) k3 / 4 tokens
    k3 = float(np.expm1(0.5) - 0.5)
    anchor = LP + 0.5
    anchor[0, 0, 2] = float("nan")  # padding may hold anything in the anchor too
    loss, info = reinforce_loss(LP, REWARDS, mask=MASK, anchor_logprobs=anchor, anchor_weight=2.0, return_info=True)
    assert float(loss) == pytest.approx(-1.25 + 2.0 * 1.875 * k3, rel=1e-14)
    assert float(info["kl"]) == pytest.approx(3.75 * k3 / 4, rel=1e-14)


def test_sample_reuse_takes_the_ratio_over_the_marked_tokens_unweighted():
    # a response's ratio pi/pi_old is over its tokens; the weights scale only its loss term.
    # old = lp - 0.1 on every token: both rows have 2 marked tokens, log ratio 0.2, so the loss
    # value is exp(0.2) * (-1.25) (the ratio multiplies the detached value as a coefficient)
    old = (LP - 0.1).detach()
    old[0, 0, 2] = float("nan")  # padding of the sampling log-probs is not read either
    loss = reinforce_loss(LP, REWARDS, mask=MASK, sampling_logprobs=old)
    assert float(loss) == pytest.approx(np.exp(0.2) * -1.25, rel=1e-14)
    token = reinforce_loss(LP, REWARDS, mask=MASK, sampling_logprobs=old, ratio_level="token")
    assert float(token) == pytest.approx(np.exp(0.1) * -1.25, rel=1e-14)  # every token's ratio: exp(0.1)


@pytest.mark.parametrize("mask_dtype", (torch.float32, torch.float64, torch.float16))
def test_a_zero_one_float_mask_gives_the_bool_masks_numbers_bit_for_bit(mask_dtype):
    # 0/1 weights are plain masking: loss, gradient and info equal the bool mask's exactly
    g = torch.Generator().manual_seed(4)
    B, n, T = 3, 5, 7
    lp = -3 * torch.rand(B, n, T, generator=g)
    on = torch.rand(B, n, T, generator=g) < 0.6
    on[..., 0] = True
    lp = torch.where(on, lp, -50 * torch.rand(B, n, T, generator=g))  # finite padding
    anchor = lp - 0.2 * torch.rand(B, n, T, generator=g)
    rng = np.random.default_rng(4)
    scores, rewards = rng.integers(0, 3, (B, n)).astype(float), (rng.random((B, n)) < 0.5).astype(float)
    credit = rng.normal(size=(B, n))
    ref_lp, ref_on = -torch.rand(B, T, generator=g), torch.ones(B, T, dtype=torch.bool)
    calls = {
        "reinforce": lambda x, m, **o: reinforce_loss(x, rewards, mask=m, **o),
        "pass_at_k": lambda x, m, **o: pass_at_k_loss(x, rewards, k=2, mask=m, **o),
        "best_of_k": lambda x, m, **o: best_of_k_loss(x, scores, rewards, k=3, mask=m, **o),
        "best_of_k_sft": lambda x, m, **o: best_of_k_sft_loss(x, scores, ref_lp, scores[:, 0], k=2, mask=m,
                                                             reference_mask=ref_on.to(m.dtype), **o),
        "policy_gradient": lambda x, m, **o: policy_gradient_loss(x, credit, mask=m, **o),
    }
    options = ({}, {"token_reduction": "mean"}, {"anchor_logprobs": anchor, "anchor_weight": 0.1},
               {"reduction": "none"})
    for name, fn in calls.items():
        for opt in options:
            got = []
            for m in (on, on.to(mask_dtype)):
                x = lp.clone().requires_grad_(True)
                loss, info = fn(x, m, return_info=True, **opt)
                loss.sum().backward()
                got.append((loss.detach(), x.grad, info))
            (l0, g0, i0), (l1, g1, i1) = got
            assert torch.equal(l0, l1) and torch.equal(g0, g1), (name, opt)
            assert i0.keys() == i1.keys()
            for key in i0:
                assert torch.equal(i0[key], i1[key]), (name, opt, key)
    x = lp[0].clone().requires_grad_(True)
    y = lp[0].clone().requires_grad_(True)
    nll_loss(x, mask=on[0]).backward()
    nll_loss(y, mask=on[0].to(mask_dtype)).backward()
    assert torch.equal(x.grad, y.grad)


@pytest.mark.parametrize("bad", (float("nan"), float("inf"), -float("inf")))
def test_a_non_finite_weight_in_the_mask_is_an_error_naming_the_mask(bad):
    mask = MASK.clone()
    mask[0, 1, 2] = bad  # a token's weight
    with pytest.raises(ValueError, match=r"mask must hold finite token weights, got (nan|inf|-inf) at index \(0, 1, 2\)"):
        reinforce_loss(LP, REWARDS, mask=mask)
    with pytest.raises(ValueError, match=r"mask must hold finite token weights, got .* at index \(0, 1, 2\)"):
        reinforce_loss(LP, REWARDS, mask=mask, sampling_logprobs=LP.detach())
    with pytest.raises(ValueError, match=r"^mask must hold finite token weights, got .* at index \(1, 2\)"):
        nll_loss(LP[0], mask=mask[0])
    ref_mask = torch.tensor([[1.0, bad, 0.0]])
    with pytest.raises(ValueError, match=r"reference_mask must hold finite token weights, got .* at index \(0, 1\)"):
        best_of_k_sft_loss(LP, np.array([[0.0, 1.0]]), LP[:, 0], np.array([0.5]), k=2, mask=MASK,
                           reference_mask=ref_mask)


def test_check_tokens_still_refuses_a_mask_other_than_zero_one():
    with pytest.raises(ValueError, match="mask"):
        reinforce_loss(LP, REWARDS, mask=MASK, check_tokens=True)
    assert float(reinforce_loss(LP, REWARDS, mask=(MASK != 0).double(), check_tokens=True)) == pytest.approx(
        -(0.5 * (-3.0) - 0.5 * (-9.5)), rel=1e-15)  # 0/1: seq = -1 - 2 = -3 and -1.5 - 8 = -9.5


def test_the_accelerator_branches_give_the_same_numbers(monkeypatch):
    # the count of a float mask and masked_frac take torch's route off the CPU (no read back); the
    # values are those worked out by hand above
    from bonft.objectives import losses

    monkeypatch.setattr(losses, "_NUMPY_ON_CPU", False)
    x = LP.clone().requires_grad_(True)
    loss, info = reinforce_loss(x, REWARDS, mask=MASK, token_reduction="mean", return_info=True)
    loss.backward()
    assert float(loss.detach()) == -0.625
    assert x.grad.tolist() == [[[-0.125, -0.25, 0.0], [0.5, 0.0, 0.0625]]]
    assert float(info["masked_frac"]) == pytest.approx(2 / 6, abs=1e-15)
    assert float(info["pools_with_signal"]) == 1.0  # the one prompt's credit (0.5, -0.5) is not all zero
    mask = MASK.clone()
    mask[0, 1, 2] = float("nan")
    with pytest.raises(ValueError, match=r"mask must hold finite token weights, got nan at index \(0, 1, 2\)"):
        reinforce_loss(LP, REWARDS, mask=mask)
