"""Verifiers: the protocol, built-in checkers, a sandboxed code runner, proxies and combinators."""
from .answers import ExactMatch, NumericMatch, extract_answer
from .base import Verdicts, Verifier, as_verdicts
from .combine import Cached, MinOf, WeightedSum
from .proxies import NoisyProxy
from .sandbox import CodeRunner, RunResult
from .scoring import VerifierError, load_verifier, score_batch

__all__ = [
    "Verdicts", "Verifier", "as_verdicts", "VerifierError", "load_verifier", "score_batch",
    "ExactMatch", "NumericMatch", "extract_answer", "CodeRunner", "RunResult",
    "NoisyProxy", "WeightedSum", "MinOf", "Cached",
]
