"""Losses: their gradients equal minus the exact objective gradients, in expectation.

Exactness is shown as in tests/test_credit.py: a categorical policy
softmax(theta), every ordered pool of n samples enumerated (itertools.product)
and weighted by its probability; the exact objective comes from bonft.bon
(autograd) and from closed forms (pass@k = 1 - (1-p)^k, Chen et al. 2021).
"""
import itertools

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.bon import best_of_k_value, log_best_of_k_distribution, softmax_policy
from bonft.estimate import best_of_k_per_prompt
from bonft.objectives.credit import best_of_k_credit, best_of_k_sft_credit
from bonft.objectives.losses import (
    best_of_k_loss,
    best_of_k_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)

TOL = 1e-10


def all_tuples(V, n):
    return torch.tensor(list(itertools.product(range(V), repeat=n)), dtype=torch.long)


def expected_loss_grad(theta, n, loss_fn):
    """grad_theta E_pools[loss(pool)]: loss_fn(logprobs (M, n), Y (M, n)) -> (M,) per pool."""
    V = len(theta)
    Y = all_tuples(V, n)
    th = torch.tensor(theta, dtype=torch.float64, requires_grad=True)
    logp = torch.log_softmax(th, -1)
    P = torch.exp(logp.detach()[Y].sum(-1))  # pool probabilities, no gradient (score-function form)
    per_pool = loss_fn(logp[Y], Y)
    (P * per_pool).sum().backward()
    return th.grad.numpy()


def exact_grad(f, theta):
    th = torch.tensor(theta, dtype=torch.float64, requires_grad=True)
    f(th).backward()
    return th.grad.numpy()


@st.composite
def cfg(draw):
    V = draw(st.integers(3, 5))
    n = draw(st.integers(2, 4 if V == 5 else 5))  # n = 1: no leave-one-out baseline (an error)
    k = draw(st.integers(1, n))
    return V, n, k, draw(st.integers(0, 2**31 - 1))


@settings(max_examples=25)
@given(cfg())
def test_best_of_k_loss_gradient_is_minus_grad_vk(c):
    V, n, k, seed = c
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=V)
    s = torch.tensor(rng.integers(0, 3, size=V).astype(float))
    R = torch.tensor(rng.normal(size=V))
    want = -exact_grad(lambda th: best_of_k_value(softmax_policy(th), s, R, k=k), theta)
    for baseline in ("loo", "none"):
        got = expected_loss_grad(theta, n, lambda lp, Y: best_of_k_loss(
            lp, s[Y], R[Y], k=k, baseline=baseline, reduction="none"))
        assert np.abs(got - want).max() < TOL, (V, n, k, baseline, got, want)


@settings(max_examples=25)
@given(cfg())
def test_pass_and_reinforce_loss_gradients(c):
    V, n, k, seed = c
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=V)
    R = torch.tensor((rng.random(V) < 0.5).astype(float))

    def pass_k(th, kk):  # 1 - (1-p)^k, Chen et al. 2021
        return 1 - (1 - (torch.softmax(th, -1) * R).sum()) ** kk

    got = expected_loss_grad(theta, n, lambda lp, Y: pass_at_k_loss(lp, R[Y], k=k, reduction="none"))
    assert np.abs(got + exact_grad(lambda th: pass_k(th, k), theta)).max() < TOL
    # positive_only estimates grad[(k/(k+1)) pass@(k+1)] for k < n, grad pass@k for k = n
    target = (lambda th: k / (k + 1) * pass_k(th, k + 1)) if k < n else (lambda th: pass_k(th, k))
    got = expected_loss_grad(theta, n, lambda lp, Y: pass_at_k_loss(
        lp, R[Y], k=k, positive_only=True, reduction="none"))
    assert np.abs(got + exact_grad(target, theta)).max() < TOL
    # leave-one-out REINFORCE (Kool et al. 2019) is unbiased for grad E[R]
    Rc = torch.tensor(rng.normal(size=V))
    got = expected_loss_grad(theta, n, lambda lp, Y: reinforce_loss(lp, Rc[Y], reduction="none"))
    assert np.abs(got + exact_grad(lambda th: (torch.softmax(th, -1) * Rc).sum(), theta)).max() < TOL


def test_best_of_k_sft_loss_gradient_matches_credit_and_bias_shrinks():
    # Target: grad log pi_bon(y*) (Chow et al. 2024), exact via bonft.bon autograd.
    theta = np.array([0.4, -0.1, 0.2, -0.5])
    s = torch.tensor([0.0, 1.0, 1.0, 2.0])
    y_star, k = 1, 3
    exact = exact_grad(lambda th: log_best_of_k_distribution(softmax_policy(th), s, k=k)[y_star], theta)
    errs = []
    for n in (3, 4, 5, 6):
        V = len(theta)
        Y = all_tuples(V, n)
        th = torch.tensor(theta, dtype=torch.float64, requires_grad=True)
        logp = torch.log_softmax(th, -1)
        P = torch.exp(logp.detach()[Y].sum(-1))
        M = Y.shape[0]
        per = best_of_k_sft_loss(logp[Y], s[Y], logp[y_star].expand(M), torch.full((M,), float(s[y_star])),
                           k=k, reduction="none")
        (P * per).sum().backward()
        got = -th.grad.numpy()
        # same number from the credit function directly
        p = np.exp(theta) / np.exp(theta).sum()
        w = best_of_k_sft_credit(s[Y].numpy(), np.full(M, float(s[y_star])), k=k)
        direct = (np.eye(V)[y_star] - p) + np.einsum("m,mi,miv->v", P.numpy(), w, np.eye(V)[Y.numpy()] - p)
        np.testing.assert_allclose(got, direct, atol=1e-12)
        errs.append(float(np.abs(got - exact).max()))
    assert all(b < a for a, b in zip(errs, errs[1:])) and errs[-1] < 0.7 * errs[0], f"BoN-SFT bias, n=3..6: {errs}"


def test_k3_kl_value_and_gradient_by_enumeration():
    # KL definitions; k3 = exp(d) - d - 1 with d = log ref - log pi (J. Schulman, 2020 note,
    # from memory): E_pi[k3] = KL(pi||ref); E_pi[grad k3] = grad KL(ref||pi).
    theta, theta_ref = np.array([0.2, -0.4, 0.9]), torch.tensor([0.0, 0.3, -0.2], dtype=torch.float64)
    ref_lp = torch.log_softmax(theta_ref, -1)
    Y = all_tuples(3, 1)
    got = expected_loss_grad(theta, 1, lambda lp, Yy: reinforce_loss(
        lp, torch.zeros(len(Yy), 1), baseline="none", anchor_logprobs=ref_lp[Yy], anchor_weight=1.0, reduction="none"))

    def kl_ref_pi(th):
        lp = torch.log_softmax(th, -1)
        return (ref_lp.exp() * (ref_lp - lp)).sum()

    np.testing.assert_allclose(got, exact_grad(kl_ref_pi, theta), atol=1e-12)
    lp = torch.log_softmax(torch.tensor(theta), -1)
    _, info = reinforce_loss(lp[Y], torch.zeros(3, 1), baseline="none", anchor_logprobs=ref_lp[Y], reduction="none",
                             return_info=True)
    d = (ref_lp - lp).numpy()
    assert info["kl"] == pytest.approx(float(np.mean(np.expm1(d) - d)), abs=1e-14)
    kl_pi_ref = float((lp.exp() * (lp - ref_lp)).sum())
    assert float((lp.exp() * (torch.expm1(ref_lp - lp) - (ref_lp - lp))).sum()) == pytest.approx(kl_pi_ref, abs=1e-14)


def token_batch(B=3, n=4, T=6, seed=0):
    """Random token log-probs with ragged lengths; padding holds NaN and -inf."""
    g = torch.Generator().manual_seed(seed)
    lp = -torch.rand(B, n, T, generator=g, dtype=torch.float64)
    lengths = torch.randint(1, T + 1, (B, n), generator=g)
    mask = torch.arange(T)[None, None, :] < lengths[..., None]
    lp = torch.where(mask, lp, torch.tensor(float("nan"), dtype=torch.float64))
    lp[~mask & (torch.arange(T) % 2 == 0)] = float("-inf")
    return lp, mask, lengths


def sliced_sums(lp, lengths):
    """Sequence log-probs by slicing each row to its length (the reference for masking)."""
    B, n, _ = lp.shape
    return torch.stack([torch.stack([lp[b, i, : lengths[b, i]].sum() for i in range(n)]) for b in range(B)])


def test_masks_equal_slicing_and_padding_gets_no_gradient():
    lp0, mask, lengths = token_batch()
    B, n, T = lp0.shape
    g = torch.Generator().manual_seed(1)
    s = torch.randint(0, 3, (B, n), generator=g).double()
    R = torch.rand(B, n, generator=g, dtype=torch.float64)
    for fn in (lambda x, **kw: best_of_k_loss(x, s, R, k=2, **kw),
               lambda x, **kw: pass_at_k_loss(x, R > 0.5, k=3, **kw),
               lambda x, **kw: reinforce_loss(x, R, **kw)):
        lp = lp0.clone().requires_grad_(True)
        loss, info = fn(lp, mask=mask, return_info=True)
        loss.backward()
        assert torch.isfinite(loss) and torch.isfinite(lp.grad).all()
        assert (lp.grad[~mask] == 0).all()
        seq = sliced_sums(lp0.detach(), lengths).requires_grad_(True)
        loss2, info2 = fn(seq, return_info=True)
        loss2.backward()
        assert abs(loss.item() - loss2.item()) < 1e-13
        assert {key: float(v) for key, v in info.items() if key != "masked_frac"} == {
            key: float(v) for key, v in info2.items() if key != "masked_frac"}
        assert float(info["masked_frac"]) == pytest.approx(1 - float(lengths.sum()) / lp0.numel(), abs=1e-15)
        assert float(info2["masked_frac"]) == 0.0
        # each token of sample (b, i) gets the sample's gradient
        np.testing.assert_allclose(lp.grad.numpy(), (seq.grad[..., None] * mask).numpy(), atol=1e-14)
        # 'mean' divides every token by the batch's mean response length
        lp_m = lp0.clone()
        loss_m = fn(lp_m, mask=mask, token_reduction="mean")
        t_bar = float(mask.sum()) / (B * n)
        assert abs(loss_m.item() - loss2.item() / t_bar) < 1e-13


def test_reductions_and_info():
    g = torch.Generator().manual_seed(2)
    lp = -torch.rand(2, 5, generator=g, dtype=torch.float64)
    s = torch.randint(0, 4, (2, 5), generator=g).double()
    R = torch.stack([torch.rand(5, generator=g, dtype=torch.float64), torch.full((5,), 0.3, dtype=torch.float64)])
    none, info = best_of_k_loss(lp, s, R, k=3, reduction="none", return_info=True)
    mean = best_of_k_loss(lp, s, R, k=3)
    total = best_of_k_loss(lp, s, R, k=3, reduction="sum")
    assert none.shape == (2,)
    assert abs(float(mean) - float(none.sum()) / 2) < 1e-15 and abs(float(total) - float(none.sum())) < 1e-15
    w = best_of_k_credit(s, R, k=3)
    np.testing.assert_allclose(none.numpy(), -(w * lp).sum(-1).numpy(), atol=1e-15)
    assert info["pools_with_signal"] == 0.5  # second prompt: all rewards equal -> no signal
    assert info["credit_abs_mean"] == pytest.approx(float(w.abs().mean()), abs=1e-15)
    assert "credit_mean" not in info and "ratio_ess" not in info  # about 0 by construction; no reuse
    # pool value against bonft.estimate's rank formula (Chow et al. 2024)
    assert info["pool_value"] == pytest.approx(float(best_of_k_per_prompt(s.numpy(), R.numpy(), ks=3).mean()), abs=1e-14)
    _, pinfo = pass_at_k_loss(lp, R > 0.5, k=2, return_info=True)
    c = (R > 0.5).sum(-1).numpy()
    # unbiased pass@k 1 - C(n-c,k)/C(n,k) (Chen et al. 2021) for n=5, k=2
    from math import comb
    assert pinfo["pool_value"] == pytest.approx(np.mean([1 - comb(5 - ci, 2) / comb(5, 2) for ci in c]), abs=1e-14)
    assert "kl" not in info
    # KL term adds anchor_weight * mean_i KL_i per prompt
    ref = lp.detach() + 0.2
    with_kl, kinfo = best_of_k_loss(lp, s, R, k=3, anchor_logprobs=ref, anchor_weight=0.5, reduction="none", return_info=True)
    k3 = np.expm1(0.2) - 0.2
    np.testing.assert_allclose((with_kl - none).numpy(), [0.5 * k3, 0.5 * k3], atol=1e-14)
    assert kinfo["kl"] == pytest.approx(k3, abs=1e-14)


def test_best_of_k_sft_and_nll_with_masks():
    lp, mask, lengths = token_batch(B=2, n=3, T=5, seed=3)
    e_lp, e_mask, e_len = token_batch(B=2, n=1, T=7, seed=4)
    e_lp, e_mask, e_len = e_lp[:, 0], e_mask[:, 0], e_len[:, 0]
    s = torch.tensor([[0.0, 1.0, 2.0], [2.0, 2.0, 0.5]], dtype=torch.float64)
    e_s = torch.tensor([1.0, 1.0], dtype=torch.float64)
    loss, info = best_of_k_sft_loss(lp, s, e_lp, e_s, k=2, reference_mask=e_mask, mask=mask, reduction="none", return_info=True)
    seq = sliced_sums(lp, lengths)
    e_seq = torch.stack([e_lp[b, : e_len[b]].sum() for b in range(2)])
    w = best_of_k_sft_credit(s, e_s, k=2)
    np.testing.assert_allclose(loss.numpy(), (-(e_seq + (w * seq).sum(-1))).numpy(), atol=1e-13)
    assert info["beaten_frac"] == pytest.approx(3 / 6) and info["reference_logprob"] == pytest.approx(float(e_seq.mean()))
    nll, ninfo = nll_loss(e_lp, mask=e_mask, return_info=True)
    assert float(nll) == pytest.approx(-float(e_seq.mean()), abs=1e-14) and ninfo["tokens"] == float(e_mask.sum())
    nll_m = nll_loss(e_lp, mask=e_mask, token_reduction="mean", reduction="sum")
    assert float(nll_m) == pytest.approx(-float(e_seq.sum()) / (float(e_mask.sum()) / 2), abs=1e-13)
    assert float(nll_loss(torch.tensor([-1.0, -3.0]))) == 2.0


def test_bad_input_messages():
    lp, mask, _ = token_batch(B=2, n=3, T=4)
    s = torch.zeros(2, 3)
    bad_mask = mask.clone()
    bad_mask[1, 2] = False
    with pytest.raises(ValueError, match=r"mask must mark at least one token per sequence, got an all-zero row at index \(1, 2\)"):
        best_of_k_loss(lp, s, s, k=2, mask=bad_mask, check_tokens=True)
    with pytest.raises(ValueError, match=r"mask must hold only 0/1 \(or booleans\), got 2.0 at index \(0, 0, 0\)"):
        reinforce_loss(lp, s, mask=mask.double() * 2, check_tokens=True)
    with pytest.raises(ValueError, match=r"mask must have the same shape as logprobs \(2, 3, 4\), got \(2, 3, 3\)"):
        reinforce_loss(lp, s, mask=mask[..., :3])
    with pytest.raises(ValueError, match=r"logprobs must be finite, got nan at index \(0, 0, 0\)"):
        reinforce_loss(torch.full((2, 3, 4), float("nan")), s, check_tokens=True)
    # without check_tokens the O(B n T) checks are skipped, but a NaN under the mask is never hidden
    assert torch.isnan(reinforce_loss(torch.full((2, 3, 4), float("nan")), s + torch.eye(2, 3)))
    with pytest.raises(TypeError, match=r"logprobs must be a torch.Tensor, got ndarray"):
        reinforce_loss(np.zeros((2, 3)), s)
    with pytest.raises(ValueError, match=r"k must be <= n \(n=3\), got k=4"):
        best_of_k_loss(lp, s, s, k=4, mask=mask)
    with pytest.raises(ValueError, match=r"rewards must have shape \(B, n\) of logprobs \(2, 3\), got \(2, 4\)"):
        best_of_k_loss(lp, s, torch.zeros(2, 4), k=1, mask=mask)
    with pytest.raises(ValueError, match=r"token_reduction must be one of \('sum', 'mean'\), got 'max'"):
        reinforce_loss(lp, s, mask=mask, token_reduction="max")
    with pytest.raises(ValueError, match=r"reduction must be one of \('none', 'mean', 'sum'\), got 'avg'"):
        nll_loss(lp[:, 0], reduction="avg")
    with pytest.raises(ValueError, match=r"anchor_weight must be a finite number >= 0, got anchor_weight=-0.1"):
        reinforce_loss(lp, s, mask=mask, anchor_weight=-0.1)
    with pytest.raises(ValueError, match=r"token_reduction='mean' needs token log-probs \(3 dimensions\), got logprobs of shape \(2, 3\)"):
        reinforce_loss(torch.zeros(2, 3), s, token_reduction="mean")
    with pytest.raises(ValueError, match=r"anchor_logprobs must have the same shape as logprobs \(2, 3\), got \(2, 4\)"):
        reinforce_loss(torch.zeros(2, 3), s, anchor_logprobs=torch.zeros(2, 4), anchor_weight=0.1)
    with pytest.raises(ValueError, match=r"anchor_logprobs has no effect with anchor_weight=0 and return_info=False"):
        reinforce_loss(torch.zeros(2, 3), s, anchor_logprobs=torch.zeros(2, 3))  # a forgotten weight: no KL at all
    with pytest.raises(ValueError, match=r"correct must hold only 0/1 \(or booleans\), got 2.0 at index \(0, 0\)"):
        pass_at_k_loss(torch.zeros(2, 3), torch.full((2, 3), 2.0), k=1)
    # a NaN or an infinity is named as not finite, before the 0/1 check and the log-probs' checks
    with pytest.raises(ValueError, match=r"correct must be finite, got nan at index \(1, 2\)"):
        pass_at_k_loss(torch.zeros(2, 3), np.array([[0.5, 1, 0], [0, 1, np.nan]]), k=1)
    with pytest.raises(ValueError, match=r"correct must be finite, got inf at index \(0, 0\)"):
        pass_at_k_loss(torch.zeros(2, 3, dtype=torch.long), np.array([[np.inf, 1, 0], [0, 1, 0]]), k=1)
    with pytest.raises(ValueError, match=r"rewards must be finite, got nan at index \(0, 1\)"):
        reinforce_loss(torch.zeros(2, 4), np.array([[0, np.nan, 1], [0, 1, 0]]))
    with pytest.raises(ValueError, match=r"reference_scores must have shape \(B,\) = \(2,\) to match scores, got \(3,\)"):
        best_of_k_sft_loss(torch.zeros(2, 3), s, torch.zeros(2), torch.zeros(3), k=1)
    with pytest.raises(ValueError, match=r"mask needs token log-probs \(3 dimensions\), got logprobs of shape \(2, 3\)"):
        reinforce_loss(torch.zeros(2, 3), s, mask=torch.ones(2, 3))


def test_default_path_reads_once_per_mask_on_the_host(monkeypatch):
    # On a CPU the small (B, n) checks read the tensors' memory through numpy, which is no sync; the
    # count below is that of the path an accelerator takes, switched on here. A device sync happens
    # when Python reads a tensor's value (bool, float, int, item, tolist, numpy, nonzero). With host
    # scores/rewards the default path reads exactly once per mask (the zero-sum test of the rows
    # and the finiteness test of the fast path, together) and nothing
    # without a mask; NaN or an infinity in the padding costs two more reads per mask (the exact
    # row check, then the finiteness test that sends it to where); check_tokens=True reads more.
    from torch.overrides import TorchFunctionMode

    from bonft.objectives import losses
    from bonft.objectives.losses import policy_gradient_loss

    monkeypatch.setattr(losses, "_NUMPY_ON_CPU", False)
    reads = {torch.Tensor.__bool__, torch.Tensor.__float__, torch.Tensor.__int__, torch.Tensor.item,
             torch.Tensor.tolist, torch.Tensor.numpy, torch.Tensor.nonzero, torch.nonzero}

    class HostReads(TorchFunctionMode):
        def __init__(self):
            super().__init__()
            self.seen = []

        def __torch_function__(self, func, types, args=(), kwargs=None):
            if func in reads:
                self.seen.append(func)
            return func(*args, **(kwargs or {}))

    nan_lp, mask, lengths = token_batch(B=3, n=4, T=5)  # NaN and -inf in the padding
    rng = np.random.default_rng(0)
    s, R = rng.integers(0, 3, (3, 4)).astype(float), (rng.random((3, 4)) < 0.5).astype(float)
    e_lp, e_s = -torch.rand(3, 5, dtype=torch.float64), rng.integers(0, 3, 3).astype(float)
    for lp0, nan in ((torch.where(mask, nan_lp, -3.0), False), (nan_lp, True)):
        seq0 = sliced_sums(lp0, lengths)
        calls = [  # (call, masks it is given, of which with NaN padding: the reference's padding is finite)
            (lambda lp, m: best_of_k_loss(lp, s, R, k=2, mask=m, anchor_logprobs=lp0.detach() - 0.1 if m is not None
                                          else seq0 - 0.1, anchor_weight=0.1, return_info=True), 1, 1),
            (lambda lp, m: pass_at_k_loss(lp, R, k=2, mask=m, return_info=True), 1, 1),
            (lambda lp, m: reinforce_loss(lp, R, mask=m, return_info=True), 1, 1),
            (lambda lp, m: best_of_k_sft_loss(lp, s, e_lp, e_s, k=2, mask=m,
                                              reference_mask=None if m is None else m[:, 0], return_info=True), 2, 1),
            (lambda lp, m: policy_gradient_loss(lp, R, mask=m, return_info=True), 1, 1),
        ]
        for call, masks, with_nan in calls:
            for tokens in (True, False):
                lp = (lp0 if tokens else seq0).clone().requires_grad_(True)
                with HostReads() as mode:
                    loss, info = call(lp, mask if tokens else None)
                loss.backward()
                assert torch.isfinite(loss) and all(not v.requires_grad for v in info.values())
                assert torch.isfinite(lp.grad).all()
                assert len(mode.seen) == ((masks + 2 * nan * with_nan) if tokens else 0), mode.seen
        with HostReads() as mode:
            nll_loss(lp0[:, 0], mask=mask[:, 0], return_info=True)
        assert len(mode.seen) == 1 + 2 * nan, mode.seen
    with HostReads() as mode:  # the opt-in checks read more
        reinforce_loss(lp0, R, mask=mask, check_tokens=True)
    assert len(mode.seen) > 1


def test_named_losses_are_their_credit_through_the_core():
    # each named loss = policy_gradient_loss(logprobs, <its credit function>(...)), values and gradients
    from bonft.objectives.credit import pass_at_k_credit, reinforce_credit
    from bonft.objectives.losses import policy_gradient_loss

    lp0, mask, _ = token_batch(B=3, n=5, T=4)
    rng = np.random.default_rng(1)
    s, R = rng.integers(0, 3, (3, 5)).astype(float), (rng.random((3, 5)) < 0.5).astype(float)
    pairs = [
        (lambda lp, **kw: best_of_k_loss(lp, s, R, k=3, **kw), best_of_k_credit(s, R, k=3)),
        (lambda lp, **kw: pass_at_k_loss(lp, R, k=2, **kw), pass_at_k_credit(R, k=2)),
        (lambda lp, **kw: reinforce_loss(lp, R, **kw), reinforce_credit(R)),
    ]
    for named, credit in pairs:
        for kw in ({"mask": mask}, {"mask": mask, "token_reduction": "mean", "reduction": "none"}):
            a, b = lp0.clone().requires_grad_(True), lp0.clone().requires_grad_(True)
            la, lb = named(a, **kw), policy_gradient_loss(b, credit, **kw)
            la.sum().backward()
            lb.sum().backward()
            torch.testing.assert_close(la, lb, rtol=0, atol=1e-14)
            torch.testing.assert_close(a.grad, b.grad, rtol=0, atol=1e-14)
    with pytest.raises(ValueError, match=r"credit must have shape \(B, n\) = \(3, 5\) to match logprobs, got \(3, 4\)"):
        policy_gradient_loss(lp0, np.zeros((3, 4)), mask=mask)
    with pytest.raises(ValueError, match=r"credit must be finite, got nan at index \(0, 1\)"):
        policy_gradient_loss(lp0, np.array([[0, np.nan, 0, 0, 0]] * 3), mask=mask)


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning", "ignore:invalid value:RuntimeWarning")
@pytest.mark.parametrize("numpy_on_cpu", [True, False])
def test_finite_rewards_whose_credit_overflows_are_a_value_error_not_a_nan_loss(numpy_on_cpu, monkeypatch):
    # IEEE 754 double arithmetic: 1.5e308 - (-1.5e308) = 3e308 exceeds the largest double (1.798e308), so
    # the leave-one-out credit of these finite rewards overflows: its row sum is +inf and the first
    # credit (0 - inf/2)/3 = -inf. The named losses check the credit they compute on every path: with the
    # loss's own read on a CPU (sequence level, the masked fast path), before the loss elsewhere (sample
    # reuse, an accelerator, simulated by the numpy switch).
    from bonft.objectives import losses

    monkeypatch.setattr(losses, "_NUMPY_ON_CPU", numpy_on_cpu)
    R = np.array([[-1.5e308, 1.5e308, 0.0], [0.0, 1.0, 0.0]])
    lp_tok = -torch.rand(2, 3, 4, generator=torch.Generator().manual_seed(0))
    mask = torch.ones(2, 3, 4, dtype=torch.bool)
    mask[:, :, 3] = False
    cases = [(lp_tok.sum(-1), {}), (lp_tok.sum(-1).double(), {"reduction": "none", "return_info": True}),
             (lp_tok, {"mask": mask}), (lp_tok, {"mask": mask.float(), "return_info": True}),
             (lp_tok.sum(-1), {"sampling_logprobs": lp_tok.sum(-1)}), (lp_tok, {"anchor_logprobs": lp_tok, "anchor_weight": 0.1})]
    for lp, kw in cases:
        with pytest.raises(ValueError, match=r"credit must be finite, got -inf at index \(0, 0\)"):
            reinforce_loss(lp.clone().requires_grad_(True), R, **kw)
        with pytest.raises(ValueError, match=r"credit must be finite, got"):  # its tie sums overflow elsewhere
            best_of_k_loss(lp.clone().requires_grad_(True), np.zeros((2, 3)), R, k=1, **kw)
    # the error a non-finite credit gives comes before the errors of the other options, as when it was
    # checked first: here an anchor of the wrong shape
    with pytest.raises(ValueError, match=r"credit must be finite"):
        reinforce_loss(lp_tok.sum(-1), R, anchor_logprobs=lp_tok, anchor_weight=0.1)
    # a non-finite loss from a non-finite log-prob (finite credit) is returned as it is, not an error
    lp = lp_tok.sum(-1).clone()
    lp[1, 1] = -torch.inf
    loss = reinforce_loss(lp, np.array([[0.0, 1.0, 0.0], [0.0, 1.0, 0.0]]))
    assert torch.isinf(loss) and float(loss) > 0  # credit 1/3 for the -inf log-prob: -(1/3)(-inf)/2 = +inf


@pytest.mark.parametrize("numpy_on_cpu", [True, False])
def test_finite_credit_beyond_the_logprobs_dtype_is_a_value_error_not_a_nan_loss(numpy_on_cpu, monkeypatch):
    # IEEE 754 single precision: the largest float32 is 3.4028e38, so a float64 credit of -5e38 (the
    # leave-one-out credit of rewards (0, 1e39): (0 - 1e39)/2) becomes -inf in the cast to float32 log-probs,
    # and the loss NaN or an infinity. Every path names the credit instead.
    from bonft.objectives import losses

    monkeypatch.setattr(losses, "_NUMPY_ON_CPU", numpy_on_cpu)
    lp_tok = -torch.rand(1, 2, 3, generator=torch.Generator().manual_seed(0))
    mask = torch.ones(1, 2, 3, dtype=torch.bool)
    R = np.array([[0.0, 1e39]])
    cases = [(lp_tok.sum(-1), {}), (lp_tok.sum(-1), {"return_info": True, "reduction": "none"}),
             (lp_tok, {"mask": mask}), (lp_tok, {"mask": mask.float(), "return_info": True}),
             (lp_tok.sum(-1), {"sampling_logprobs": lp_tok.sum(-1)}), (lp_tok, {"anchor_logprobs": lp_tok, "anchor_weight": 0.1})]
    msg = r"credit must fit the log-probs' dtype torch.float32 \(\|credit\| <= 3.403e\+38\), got -5e\+38 at index \(0, 0\)"
    for lp, kw in cases:
        with pytest.raises(ValueError, match=msg):
            reinforce_loss(lp.clone().requires_grad_(True), R, **kw)
        with pytest.raises(ValueError, match=msg):
            best_of_k_loss(lp.clone().requires_grad_(True), np.zeros((1, 2)), R, k=1, **kw)
    # a credit of the caller's own: the generic conversion checks the cast too (float16 and bfloat16 as well)
    with pytest.raises(ValueError, match=r"credit must fit the log-probs' dtype torch.float32 .* got 1e\+300 at index \(0, 1\)"):
        policy_gradient_loss(lp_tok.sum(-1), np.array([[1.0, 1e300]]))
    # half-precision log-probs are computed in float32 (a credit of 7e4 > 65504 is no overflow there), so the
    # limit is float32's for them too
    assert torch.isfinite(policy_gradient_loss(lp_tok.sum(-1).half(), np.array([[1.0, 7e4]])))
    for half in (torch.float16, torch.bfloat16):
        with pytest.raises(ValueError, match=r"dtype torch.float32 .* got 1e\+300"):
            policy_gradient_loss(lp_tok.sum(-1).to(half), np.array([[1.0, 1e300]]))
    # the same numbers in float64 log-probs fit: a finite loss, 5e38 * (lp_0 - lp_1) / 1
    lp64 = lp_tok.sum(-1).double()
    loss = reinforce_loss(lp64, R)
    assert torch.isfinite(loss)
    torch.testing.assert_close(loss, -(-5e38 * lp64[0, 0] + 5e38 * lp64[0, 1]), rtol=1e-15, atol=0)
    # just inside float32's range: no error, a finite loss
    assert torch.isfinite(policy_gradient_loss(lp_tok.sum(-1), np.array([[1.0, 3e38]])))


def test_monitors_by_hand():
    # Hand computation: B = 2 prompts, n = 3, T = 4. Prompt 0 rewards (1, 0, 0): leave-one-out credit
    # w_i = (R_i - mean of the others)/3 = (1/3, -1/6, -1/6); prompt 1 rewards all equal: credit 0.
    lp = -torch.ones(2, 3, 4, dtype=torch.float64)
    mask = torch.ones(2, 3, 4, dtype=torch.bool)
    mask[0, 1, 2:] = mask[1, 0, 1:] = False  # 5 of 24 positions are padding
    _, info = reinforce_loss(lp, np.array([[1.0, 0, 0], [0.5, 0.5, 0.5]]), mask=mask, return_info=True)
    assert float(info["pools_with_signal"]) == 0.5
    assert float(info["credit_abs_mean"]) == pytest.approx((1 / 3 + 1 / 6 + 1 / 6) / 6, abs=1e-15)
    assert float(info["masked_frac"]) == pytest.approx(5 / 24, abs=1e-15)
    assert float(info["pool_value"]) == pytest.approx((1 / 3 + 0.5) / 2, abs=1e-15)


def test_empty_responses_and_single_samples_are_errors_by_default():
    lp, mask, _ = token_batch(B=2, n=3, T=4)
    R = np.array([[1.0, 0, 0], [0, 1, 1]])
    empty = mask.clone()
    empty[1, 2] = False  # a response with credit and no token: it would add nothing, silently
    with pytest.raises(ValueError, match=r"mask must mark at least one token per sequence with non-zero credit, "
                                         r"got an all-zero row at index \(1, 2\)"):
        reinforce_loss(lp, R, mask=empty)
    with pytest.raises(ValueError, match=r"mask must mark at least one token per sequence with non-zero credit"):
        policy_gradient_loss(lp, R - 0.5, mask=empty)
    # the same row with zero credit contributes nothing either way: accepted
    loss = policy_gradient_loss(lp, np.where(empty.any(-1).numpy(), R - 0.5, 0.0), mask=empty)
    assert torch.isfinite(loss)
    with pytest.raises(ValueError, match=r"mask must mark at least one token per sequence, got an all-zero row at index \(1,\)"):
        nll_loss(lp[:, 0], mask=torch.tensor([[True, True, False, False], [False] * 4]))
    # leave-one-out with one sample per prompt has nothing to leave out: an error, not a silent zero loss
    with pytest.raises(ValueError, match=r"n must be >= 2 for the leave-one-out baseline of reinforce_credit .* "
                                         r"draw n >= 2 samples per prompt or use baseline='none'"):
        reinforce_loss(lp[:, :1], R[:, :1], mask=mask[:, :1])
    with pytest.raises(ValueError, match=r"n must be >= 2 for the leave-one-out baseline of best_of_k_credit"):
        best_of_k_loss(lp[:, :1], R[:, :1], R[:, :1], k=1, mask=mask[:, :1])
    assert torch.isfinite(reinforce_loss(lp[:, :1], R[:, :1], mask=mask[:, :1], baseline="none"))
