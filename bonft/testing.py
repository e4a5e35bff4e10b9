"""Kits for testing what you train against: verifiers, unit tests used as rewards, objectives, log-probs.

Re-exports :mod:`bonft.verifiers.testkit`: :func:`check_verifier`, its
:class:`VerifierReport`, :func:`read_examples`, :func:`roc_auc` and hypothesis
strategies (:func:`prompts`, :func:`responses`, :func:`sample_pools`) for
property tests of your own verifier; and :mod:`bonft.verifiers.probes`:
:func:`probe_code_tests`, which runs gaming candidates against your unit tests
(can they be passed without solving the task?), and its :class:`CodeTestsReport`.
For objectives: :func:`check_objective` (:mod:`bonft.objcheck`), its :class:`ObjectiveReport` and
:class:`ToyPolicy`: is your credit an unbiased gradient of the target it claims?
For a hand-written loop: :func:`check_on_policy` (:mod:`bonft.generation.on_policy`) and its
:class:`OnPolicyReport`: do the log-probs your loss sees describe the policy that sampled?
"""
from bonft.verifiers.probes import ALL_PROBES, PROBES, CodeTestsReport, probe_code_tests  # noqa: F401
from bonft.verifiers.testkit import (  # noqa: F401
    VerifierReport,
    check_verifier,
    prompts,
    read_examples,
    responses,
    roc_auc,
    sample_pools,
)

__all__ = ["check_objective", "ObjectiveReport", "ToyPolicy", "check_verifier", "read_examples", "VerifierReport",
           "roc_auc", "prompts", "responses", "sample_pools", "probe_code_tests", "CodeTestsReport", "PROBES",
           "ALL_PROBES", "check_on_policy", "OnPolicyReport"]


def __getattr__(name: str):
    """check_objective, ObjectiveReport, ToyPolicy, check_on_policy, OnPolicyReport load torch: import them on first use (PEP 562)."""
    if name in ("check_objective", "ObjectiveReport", "ToyPolicy"):
        from bonft import objcheck  # loads torch: only on first use

        return getattr(objcheck, name)
    if name in ("check_on_policy", "OnPolicyReport"):
        from bonft.generation import on_policy  # loads torch: only on first use

        return getattr(on_policy, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
