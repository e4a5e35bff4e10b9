"""Best-of-N-aware objectives: per-sample credit (:mod:`~bonft.objectives.credit`, plain arrays, no
autograd) and torch losses (:mod:`~bonft.objectives.losses`), each named loss being
``policy_gradient_loss(logprobs, <credit>(...))``; input checks in :mod:`~bonft.objectives.validation`.
"""
from bonft.objectives.credit import (
    bon_rl_credit,
    bon_sft_credit,
    pass_at_k_credit,
    pool_value,
    reinforce_credit,
)
from bonft.objectives.losses import (
    bon_rl_loss,
    bon_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)

__all__ = [
    "bon_rl_credit", "pass_at_k_credit", "bon_sft_credit", "reinforce_credit", "pool_value",
    "policy_gradient_loss", "bon_rl_loss", "pass_at_k_loss", "bon_sft_loss", "reinforce_loss", "nll_loss",
]
