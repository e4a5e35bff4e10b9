"""token_logprobs: a causal LM's logits and labels -> the (B, n, T) token log-probs and mask the losses take.

References: the definition log softmax(z / tau)_y = z_y / tau - log sum_v exp(z_v / tau), computed
element by element in float64 numpy; its gradient (1{v = y} - softmax(z / tau)_v) / tau (standard
softmax identity); bonft.generation.sequence_logprobs on a tiny GPT-2 built from a transformers
config (an independent code path: a KV cache per prompt, rows expanded per sample).
"""
import math

import numpy as np
import pytest
import torch

from bonft.objectives import reinforce_loss, token_logprobs


def direct(logits, labels, temperature, ignore_index=-100):
    """Shifted log-probs by the definition, one position at a time, float64."""
    z = logits.detach().double().numpy()
    y = labels.numpy()
    lead = z.shape[:-2]
    T = z.shape[-2]
    out = np.zeros((*lead, T - 1))
    mask = np.zeros((*lead, T - 1), dtype=bool)
    for idx in np.ndindex(*lead):
        for t in range(T - 1):
            label = y[idx + (t + 1,)]
            if label == ignore_index:
                continue
            row = z[idx + (t,)] / temperature
            top = max(row)  # log sum exp(v) = top + log sum exp(v - top), an identity that avoids overflow
            out[idx + (t,)] = row[label] - top - math.log(sum(math.exp(v - top) for v in row))
            mask[idx + (t,)] = True
    return out, mask


def batch(N=6, T=5, V=7, seed=0, dtype=torch.float32, scale=3.0):
    g = torch.Generator().manual_seed(seed)
    logits = (scale * torch.randn(N, T, V, generator=g)).to(dtype)
    labels = torch.randint(0, V, (N, T), generator=g)
    labels[:, :2] = -100  # a prompt of 2 tokens
    labels[0, -1] = labels[min(3, N - 1), -2:] = -100  # padding after shorter responses
    return logits, labels


@pytest.mark.parametrize("temperature", [1.0, 0.7, 1.6])
def test_matches_the_definition_in_every_layout(temperature):
    logits, labels = batch()
    want, want_mask = direct(logits, labels, temperature)
    lp, mask = token_logprobs(logits, labels, temperature=temperature)
    assert lp.shape == (6, 4) and lp.dtype == torch.float32
    np.testing.assert_array_equal(mask.numpy(), want_mask)
    np.testing.assert_allclose(lp.numpy(), want, rtol=0, atol=2e-6)
    assert (lp[~mask] == 0).all()
    # pools: rows b*n .. b*n+n-1 are prompt b's samples; (B, n, T, V) logits give the same numbers
    lp3, mask3 = token_logprobs(logits, labels, temperature=temperature, pool_size=3)
    assert lp3.shape == (2, 3, 4)
    torch.testing.assert_close(lp3, lp.view(2, 3, 4), rtol=0, atol=0)
    lp4, mask4 = token_logprobs(logits.view(2, 3, 5, 7), labels.view(2, 3, 5), temperature=temperature)
    torch.testing.assert_close(lp4, lp3, rtol=0, atol=0)
    assert torch.equal(mask4, mask3) and torch.equal(mask3, mask.view(2, 3, 4))


def test_gradient_is_the_softmax_identity():
    logits, labels = batch(N=2, T=4, V=5, dtype=torch.float64)
    tau = 0.8
    x = logits.clone().requires_grad_(True)
    lp, mask = token_logprobs(x, labels, temperature=tau)
    lp.sum().backward()
    p = torch.softmax(logits[:, :-1] / tau, -1)
    onehot = torch.nn.functional.one_hot(labels[:, 1:].clamp(min=0), 5).double()
    want = torch.zeros_like(logits)
    want[:, :-1] = (onehot - p) / tau * mask[..., None]
    torch.testing.assert_close(x.grad, want, rtol=0, atol=1e-15)


def test_half_precision_logits_are_upcast_and_large_logits_stay_finite():
    logits, labels = batch(scale=1e3, dtype=torch.bfloat16)  # float16 would overflow exp, bfloat16 sums badly
    lp, mask = token_logprobs(logits, labels)
    assert lp.dtype == torch.float32 and torch.isfinite(lp).all()
    want, _ = direct(logits.float(), labels, 1.0)  # the same bfloat16 values, by the definition in float64
    np.testing.assert_allclose(lp.numpy(), want, rtol=1e-6, atol=1e-3)
    lp64, _ = token_logprobs(logits.double(), labels)
    assert lp64.dtype == torch.float64  # float64 stays float64; nothing else is widened to it


def test_agrees_with_sequence_logprobs_on_a_tiny_gpt2():
    from transformers import GPT2Config, GPT2LMHeadModel

    from bonft.generation import sequence_logprobs

    torch.manual_seed(0)
    V, B, n, P, T = 24, 2, 3, 4, 5
    cfg = GPT2Config(vocab_size=V, n_positions=32, n_embd=32, n_layer=2, n_head=2, bos_token_id=0, eos_token_id=1,
                     pad_token_id=2)
    model = GPT2LMHeadModel(cfg).eval()
    prompts = torch.randint(3, V, (B, P))
    responses = torch.randint(3, V, (B, n, T))
    valid = torch.ones(B, n, T, dtype=torch.long)
    valid[0, 1, 3:] = valid[1, 2, 1:] = 0  # shorter responses, right-padded
    responses = torch.where(valid.bool(), responses, 2)
    for temperature in (1.0, 1.3):
        want = sequence_logprobs(model, prompts, torch.ones_like(prompts), responses, valid, temperature=temperature)
        ids = torch.cat([prompts.repeat_interleave(n, 0), responses.view(B * n, T)], 1)  # (B*n, P+T)
        labels = ids.clone()
        labels[:, :P] = -100
        labels[:, P:][valid.view(B * n, T) == 0] = -100
        lp, mask = token_logprobs(model(ids).logits, labels, temperature=temperature, pool_size=n)
        lp, mask = lp[..., P - 1:], mask[..., P - 1:]  # the response positions
        assert torch.equal(mask, valid.bool())
        torch.testing.assert_close(lp, want, rtol=0, atol=2e-5)


def test_output_feeds_the_losses():
    logits, labels = batch(N=6, T=6, V=9, seed=4)
    x = logits.clone().requires_grad_(True)
    lp, mask = token_logprobs(x, labels, pool_size=3)
    rewards = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 1.0]])
    loss = reinforce_loss(lp, rewards, mask=mask)
    loss.backward()
    assert torch.isfinite(loss) and (x.grad[:, 0] == 0).all()  # position 0 predicts a prompt token: no gradient
    assert x.grad[:, 1:].abs().sum() > 0


def test_bad_input_messages():
    logits, labels = batch()
    with pytest.raises(ValueError, match=r"labels must have the shape of logits without the vocabulary axis \(6, 5\), got \(6, 4\)"):
        token_logprobs(logits, labels[:, :4])
    bad = labels.clone()
    bad[2, 3] = 7
    with pytest.raises(ValueError, match=r"labels must be token ids in \[0, 7\) or ignore_index=-100, got 7 at index \(2, 3\)"):
        token_logprobs(logits, bad)
    bad[2, 3] = -5
    with pytest.raises(ValueError, match=r"labels must be token ids in \[0, 7\) or ignore_index=-100, got -5 at index \(2, 3\)"):
        token_logprobs(logits, bad)
    with pytest.raises(TypeError, match=r"labels must be an integer tensor of token ids, got dtype torch.float32"):
        token_logprobs(logits, labels.float())
    with pytest.raises(TypeError, match=r"logits must be a floating tensor, got dtype torch.int64"):
        token_logprobs(labels[..., None], labels)
    with pytest.raises(ValueError, match=r"logits must have shape \(N, T, V\) or \(B, n, T, V\), got shape \(5, 7\)"):
        token_logprobs(logits[0], labels[0])
    with pytest.raises(ValueError, match=r"temperature must be a finite number > 0, got temperature=0.0"):
        token_logprobs(logits, labels, temperature=0.0)
    with pytest.raises(ValueError, match=r"pool_size must divide the number of rows N=6 of logits .* got pool_size=4"):
        token_logprobs(logits, labels, pool_size=4)
    with pytest.raises(ValueError, match=r"pool_size applies to flat \(N, T, V\) logits"):
        token_logprobs(logits.view(2, 3, 5, 7), labels.view(2, 3, 5), pool_size=3)
    with pytest.raises(ValueError, match=r"logits must have at least 2 positions .* got T=1"):
        token_logprobs(logits[:, :1], labels[:, :1])


def test_narrow_integer_labels_and_nan_sources():
    logits, labels = batch()
    ref, mask = token_logprobs(logits, labels)
    # labels of any integer dtype give the same log-probs (gather needs int64 ids: converted, not an error)
    small = labels.clamp(min=0).to(torch.uint8)
    a, _ = token_logprobs(logits, small, ignore_index=0)
    b, _ = token_logprobs(logits, small.long(), ignore_index=0)
    assert torch.equal(a, b)
    assert torch.equal(token_logprobs(logits, labels.to(torch.int32))[0], ref)
    # IEEE 754 single precision: 3 / 1e-40 overflows to inf, and inf - logsumexp(inf, ...) = inf - inf is NaN;
    # such a temperature is named instead of returning NaN log-probs
    with pytest.raises(ValueError, match=r"temperature must leave logits / temperature finite, got temperature=1e-40 "
                                         r"with largest \|logit\| \d"):
        token_logprobs(logits, labels, temperature=1e-40)
    nan = logits.clone()
    nan[1, 3, 2] = float("nan")
    with pytest.raises(ValueError, match=r"logits must not hold NaN, got NaN at index \(1, 3, 2\)"):
        token_logprobs(nan, labels)
    # a -inf logit (a token the model forbids) is no NaN: its own log-prob is -inf, the others finite
    forbid = logits.clone()
    forbid[..., 6] = -float("inf")
    lp, _ = token_logprobs(forbid, labels)
    assert not torch.isnan(lp).any()
