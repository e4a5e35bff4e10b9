"""The temperature x N planner: which temperature and how many samples for a budget.

Modules: :mod:`.sweep` (the temperature x k table from pools, a pool file or a
finite outcome set), :mod:`.decisions` (paired bootstrap, budget choices, the
T*(k) fit), :mod:`.result` (:class:`PlanResult` and its parts),
:mod:`.from_model` (draw pools from a model, cached on disk; imported on its own as
``bonft.plan.from_model``, since it loads torch and the sampler). Figures live in
:mod:`bonft.viz`. See :mod:`bonft.plan.sweep` for the method and its references.
"""
from bonft.plan.decisions import fit_best_temperature
from bonft.plan.result import BudgetChoice, DoublingStep, PlanResult, TemperatureFit
from bonft.plan.sweep import Pools, plan_exact, plan_pools, plan_samples

__all__ = [
    "Pools", "PlanResult", "BudgetChoice", "DoublingStep", "TemperatureFit",
    "plan_pools", "plan_samples", "plan_exact", "fit_best_temperature",
]
