"""strategy_loss (bonft.strategies.loss): its gradient is minus the credit (the policy-gradient identity,
Williams 1992), the credit and pool value by k-subset enumeration, and training with it raises the exact value."""
from __future__ import annotations

import numpy as np
import torch
from strategy_refs import brute_pool

from bonft.strategies import majority_vote_value, strategy_loss


def test_strategy_loss_gradient_is_minus_credit():
    # d loss / d logprobs = -w / B, the policy-gradient identity (Williams 1992), with the credit
    # w_i = V_k(pool) - V_k(pool without i) (leave-one-out, k <= n - 1) and the pool value V_k, each by
    # k-subset enumeration
    a = np.array([[0, 1, 1, 2], [3, 3, 1, 1]])
    r = np.array([[1.0, 0.0, 0.0, 1.0], [0.0, 0.0, 1.0, 1.0]])
    lp = torch.zeros(2, 4, dtype=torch.float64, requires_grad=True)
    loss, info = strategy_loss(lp, None, r, strategy="majority_vote", k=3, answers=a, return_info=True)
    loss.backward()
    credit = [[brute_pool("majority_vote", a[b], None, r[b], 3)
               - brute_pool("majority_vote", np.delete(a[b], i), None, np.delete(r[b], i), 3) for i in range(4)]
              for b in range(2)]
    np.testing.assert_allclose(lp.grad.numpy(), -np.array(credit) / 2, atol=1e-15)
    value = np.mean([brute_pool("majority_vote", a[b], None, r[b], 3) for b in range(2)])
    np.testing.assert_allclose(float(info["pool_value"]), value, atol=1e-15)
    assert isinstance(strategy_loss(lp.detach(), None, r, strategy="majority_vote", k=3, answers=a), torch.Tensor)


def test_training_with_majority_credit_raises_majority_value():
    # a categorical policy whose plurality answer is wrong (correct mass 0.14 over two surface
    # forms): Adam on strategy_loss with sampled pools must drive the exact majority@8 from 0.07
    # to near 1 (the policy-gradient identity in use, Williams 1992; exact value by majority_vote_value)
    ans = np.array([0, 0, 1, 1, 2, 2, 3, 3])
    R = np.array([1.0, 1.0, 0, 0, 0, 0, 0, 0])
    z = torch.tensor([0.0, -0.5, 0.9, 0.5, 0.7, 0.2, 0.3, 0.0], dtype=torch.float64, requires_grad=True)
    before = float(majority_vote_value(torch.softmax(z, -1).detach(), ans, R, k=8))
    opt = torch.optim.Adam([z], lr=0.02)
    rng = np.random.default_rng(0)
    for _ in range(150):
        p = torch.softmax(z, -1)
        y = rng.choice(8, size=(8, 16), p=p.detach().numpy())  # 8 prompts' pools of 16 samples
        loss = strategy_loss(torch.log(p)[y], None, R[y], strategy="majority_vote", k=8, answers=ans[y])
        opt.zero_grad()
        loss.backward()
        opt.step()
    after = float(majority_vote_value(torch.softmax(z, -1).detach(), ans, R, k=8))
    assert before < 0.1 and after > 0.9
