"""Verifiers: the protocol, built-in checkers, a sandboxed code runner, proxies and combinators."""
from bonft.verifiers.answers import ExactMatch, NumericMatch, extract_answer
from bonft.verifiers.base import Verdicts, Verifier, as_verdicts
from bonft.verifiers.combine import Cached, MinOf, WeightedSum
from bonft.verifiers.proxies import NoisyProxy
from bonft.verifiers.sandbox.runner import CodeRunner, RunResult
from bonft.verifiers.scoring import VerifierError, load_verifier, score_batch

__all__ = [
    "Verdicts", "Verifier", "as_verdicts", "VerifierError", "load_verifier", "score_batch",
    "ExactMatch", "NumericMatch", "extract_answer", "CodeRunner", "RunResult",
    "NoisyProxy", "WeightedSum", "MinOf", "Cached",
]
