"""bonft's own credit functions in the signature :func:`bonft.objcheck.check_objective` takes.

``builtin.NAME(scores, rewards, *, k) -> credit``, named as the objectives, e.g.
``bonft check-objective bonft.objcheck:builtin.pass_at_k_plugin --target pass_at_k``.
"""
from __future__ import annotations

from types import SimpleNamespace

from bonft.objectives.credit import best_of_k_credit, best_of_k_sft_credit, pass_at_k_credit, reinforce_credit

__all__ = ["builtin"]


def _best_of_k(scores, rewards, *, k):
    return best_of_k_credit(scores, rewards, k=k)


def _best_of_k_no_baseline(scores, rewards, *, k):
    return best_of_k_credit(scores, rewards, k=k, baseline="none")


def _pass_at_k(scores, rewards, *, k):
    return pass_at_k_credit(rewards, k=k)


def _pass_at_k_plugin(scores, rewards, *, k):
    return pass_at_k_credit(rewards, k=k, estimator="plugin")


def _pass_at_k_positive(scores, rewards, *, k):
    return pass_at_k_credit(rewards, k=k, positive_only=True)


def _best_of_k_sft(scores, reference_scores, *, k):
    return best_of_k_sft_credit(scores, reference_scores, k=k)


def _reinforce(scores, rewards, *, k):
    return reinforce_credit(rewards)


#: bonft's built-in credit functions in the ``(scores, rewards, *, k)`` signature.
builtin = SimpleNamespace(
    best_of_k=_best_of_k, best_of_k_no_baseline=_best_of_k_no_baseline, pass_at_k=_pass_at_k,
    pass_at_k_plugin=_pass_at_k_plugin, pass_at_k_positive=_pass_at_k_positive,
    best_of_k_sft=_best_of_k_sft, reinforce=_reinforce,
)
