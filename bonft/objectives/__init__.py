"""Best-of-N-aware objectives: per-sample credit (:mod:`~bonft.objectives.credit`, plain arrays, no
autograd), torch losses (:mod:`~bonft.objectives.losses`), each named loss being
``policy_gradient_loss(logprobs, <credit>(...), **common)``, token log-probs from a causal LM's logits
(:mod:`~bonft.objectives.logprobs`), and every input check with the shared loss options
(:mod:`~bonft.objectives.validation`).
"""
from bonft.objectives.credit import (
    best_of_k_credit,
    best_of_k_sft_credit,
    pass_at_k_credit,
    pool_value,
    reinforce_credit,
)
from bonft.objectives.logprobs import token_logprobs
from bonft.objectives.losses import (
    best_of_k_loss,
    best_of_k_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)
from bonft.objectives.validation import LossOptions

__all__ = [
    "best_of_k_credit", "pass_at_k_credit", "best_of_k_sft_credit", "reinforce_credit", "pool_value",
    "policy_gradient_loss", "best_of_k_loss", "pass_at_k_loss", "best_of_k_sft_loss", "reinforce_loss", "nll_loss",
    "token_logprobs", "LossOptions",
]
