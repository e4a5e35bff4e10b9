"""The sandboxed code runner: unit tests of each prompt run against model-written code.

* :mod:`~bonft.verifiers.sandbox.runner` -- :class:`CodeRunner` and :class:`RunResult`;
* :mod:`~bonft.verifiers.sandbox.pool` -- :class:`SandboxPool`, pre-started workers that fork each
  candidate (``CodeRunner(..., pool=True)``); :mod:`~bonft.verifiers.sandbox.zygote` -- their bootstrap;
* :mod:`~bonft.verifiers.sandbox.candidate` -- bootstrap of the candidate's process;
* :mod:`~bonft.verifiers.sandbox.judge` -- bootstrap of the trusted process that runs the tests;
* :mod:`~bonft.verifiers.sandbox.wire` -- the framed JSON protocol between the two;
* :mod:`~bonft.verifiers.sandbox.oslayer` -- OS limits and namespaces;
* :mod:`~bonft.verifiers.sandbox.outcome` -- turning exits and messages into a verdict;
* :mod:`~bonft.verifiers.sandbox.procs` -- finding and killing what a candidate left running.

Running model-written code is dangerous: this lowers the risk, it is not a security boundary.
"""
from bonft.verifiers.sandbox.runner import CodeRunner, RunResult, UncheckedTestsWarning, extract_code

__all__ = ["CodeRunner", "RunResult", "UncheckedTestsWarning", "extract_code"]
