"""Verifiers: the protocol, built-in checkers, a sandboxed code runner, unit tests from data rows, a
reward model, proxies and combinators; verifiers by name (:func:`make_verifier`)."""
from bonft.verifiers.answers import ExactMatch, NumericMatch, extract_answer
from bonft.verifiers.base import Verdicts, Verifier, as_verdicts
from bonft.verifiers.combine import Cached, MinOf, WeightedSum
from bonft.verifiers.fields import UnitTests, bind_rows
from bonft.verifiers.kinds import VERIFIER_KINDS, make_verifier
from bonft.verifiers.proxies import NoisyProxy
from bonft.verifiers.reward_model import RewardModel
from bonft.verifiers.sandbox.runner import CodeRunner, RunResult, UncheckedTestsWarning
from bonft.verifiers.scoring import BatchFallbackWarning, VerifierError, load_verifier, score_batch

__all__ = [
    "Verdicts", "Verifier", "as_verdicts", "VerifierError", "BatchFallbackWarning", "load_verifier",
    "score_batch",
    "ExactMatch", "NumericMatch", "extract_answer", "CodeRunner", "RunResult", "UncheckedTestsWarning",
    "NoisyProxy", "WeightedSum", "MinOf", "Cached",
    "UnitTests", "RewardModel", "bind_rows", "VERIFIER_KINDS", "make_verifier",
]
