r"""The policy-gradient loss of a strategy's value: its credit into :func:`bonft.objectives.losses.policy_gradient_loss`.

References: Chow et al. 2024 (best-of-N policy gradients); Kool et al. 2019 (leave-one-out
baselines); Wang et al. 2023 (majority vote).
"""
from __future__ import annotations

import numpy as np
import torch

from bonft.objectives.losses import policy_gradient_loss
from bonft.strategies.base import get_strategy
from bonft.strategies.estimators import MAX_SUBSETS

__all__ = ["strategy_loss"]


def strategy_loss(logprobs, scores, rewards, *, strategy, k, answers=None, mask=None, return_info=False,
                  max_subsets=MAX_SUBSETS, seed=0, conflicts="error", **options):
    r"""Policy-gradient loss for a strategy's value: credit from :meth:`bonft.strategies.Strategy.credit`.

    Shape: ``logprobs (B, n)`` sequence log-probs or ``(B, n, T)`` token log-probs [+ ``mask``],
    ``scores, rewards, answers (B, n) -> loss ()``; ``(loss, info)`` with ``return_info=True``.

    .. math:: \ell = -\frac1B\sum_b\sum_i w_{bi}\,\log\pi(y_{bi}),\qquad
              E[-\nabla\ell] = \nabla\,\mathrm{mean}_b V_k

    The credit ``w`` is plain data; the loss itself is :func:`bonft.objectives.losses.policy_gradient_loss`
    (``mask`` and ``options`` such as the anchor KL term go there); ``max_subsets``, ``seed`` and
    ``conflicts`` go to the strategy (an error where it does not read them, as are ``scores`` /
    ``answers`` it does not read). info adds ``pool_value``,
    the mean over prompts of the unbiased pool estimate of ``V_k`` (detached).

    References: Chow et al. 2024; Kool et al. 2019; Wang et al. 2023.

    Caution: see :mod:`bonft.strategies.base` on reward hacking.
    """
    if not isinstance(logprobs, torch.Tensor):
        raise TypeError(f"logprobs must be a torch tensor (B, n) or (B, n, T), got {type(logprobs).__name__}")
    st = get_strategy(strategy)
    opts = st.options(max_subsets=max_subsets, seed=seed, conflicts=conflicts)  # refuses one it does not read
    w = st.credit(scores, rewards, k=k, answers=answers, **opts)
    w = torch.as_tensor(np.asarray(w.detach().cpu() if isinstance(w, torch.Tensor) else w),
                        dtype=logprobs.dtype, device=logprobs.device)
    if w.shape != logprobs.shape[:2]:
        raise ValueError(f"logprobs must have (B, n) = {tuple(w.shape)} leading axes like rewards, got {tuple(logprobs.shape)}")
    out = policy_gradient_loss(logprobs, w, mask=mask, return_info=return_info, **options)
    if not return_info:
        return out
    loss, info = out
    v, _ = st.estimate(ks=[k], rewards=rewards, scores=scores, answers=answers, **opts)
    info = dict(info)
    info["pool_value"] = torch.tensor(float(np.mean(v)), dtype=torch.float64)
    return loss, info
