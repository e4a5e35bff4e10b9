"""Check an objective before training on it: is its credit an unbiased gradient of the target it claims?

* :mod:`bonft.objcheck.check` -- :func:`check_objective` (time limit, informative policies);
* :mod:`bonft.objcheck.enumeration` -- targets, enumerated pools, exact target values, calling the credit;
* :mod:`bonft.objcheck.categorical` -- small categorical policies, :class:`ToyPolicy`;
* :mod:`bonft.objcheck.transformer` -- the tiny-transformer check;
* :mod:`bonft.objcheck.report` -- :class:`ObjectiveReport`;
* :mod:`bonft.objcheck.credits` -- ``builtin``: bonft's own credits in the checked signature.
"""
from bonft.objcheck.categorical import ToyPolicy
from bonft.objcheck.check import CheckTimeout, check_objective
from bonft.objcheck.credits import builtin
from bonft.objcheck.enumeration import TARGETS
from bonft.objcheck.report import ObjectiveReport

__all__ = ["check_objective", "CheckTimeout", "ObjectiveReport", "ToyPolicy", "TARGETS", "builtin"]
