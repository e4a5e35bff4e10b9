"""Inference strategies: best-of-k, majority vote, verifier-weighted vote, pass@k.

* :mod:`bonft.strategies.base` -- the :class:`Strategy` classes (exact value, pool estimate and
  credit as methods), :func:`get_strategy` and the by-id functions;
* :mod:`bonft.strategies.exact` -- exact vote values on a finite outcome set;
* :mod:`bonft.strategies.estimators` -- unbiased vote values and credit from pools;
* :mod:`bonft.strategies.counting` -- the dynamic programmes over answer counts behind them;
* :mod:`bonft.strategies.loss` -- :func:`strategy_loss`;
* :mod:`bonft.strategies.curves` -- several strategies side by side with paired intervals.
"""
from bonft.strategies.base import (
    STRATEGY_NAMES,
    BestOfK,
    MajorityVote,
    PassAtK,
    Strategy,
    WeightedVote,
    get_strategy,
    strategy_credit,
    strategy_per_prompt,
    strategy_value,
)
from bonft.strategies.curves import StrategyCurves, compare_strategies
from bonft.strategies.estimators import (
    MAX_SUBSETS,
    majority_vote_credit,
    majority_vote_per_prompt,
    weighted_vote_credit,
    weighted_vote_per_prompt,
)
from bonft.strategies.exact import majority_vote_value, weighted_vote_value
from bonft.strategies.loss import strategy_loss

__all__ = [
    "Strategy", "BestOfK", "MajorityVote", "WeightedVote", "PassAtK", "STRATEGY_NAMES", "get_strategy",
    "strategy_value", "strategy_per_prompt", "strategy_credit", "strategy_loss",
    "majority_vote_value", "weighted_vote_value",
    "majority_vote_per_prompt", "weighted_vote_per_prompt", "majority_vote_credit", "weighted_vote_credit",
    "MAX_SUBSETS", "StrategyCurves", "compare_strategies",
]
