"""Verifiers: the protocol, built-in checkers, a sandboxed code runner, proxies and combinators."""
from .base import Verdicts, Verifier, as_verdicts

__all__ = ["Verdicts", "Verifier", "as_verdicts"]
