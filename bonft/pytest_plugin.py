"""Pytest fixtures for testing verifiers and objectives: ``verifier_check``, ``objective_check``.

Opt in from your top-level ``conftest.py`` (or a test module) with
``pytest_plugins = ["bonft.pytest_plugin"]``; bonft does not register it
automatically, so installing bonft never changes other projects' test runs.
In a test::

    def test_my_verifier(verifier_check):
        report = verifier_check(my_verifier, examples)   # fails the test with the report if not ok
        assert report.auc > 0.8

Extra keyword arguments go to :func:`bonft.testing.check_verifier`; pass
``expect_ok=False`` to get the report without failing. ``objective_check`` does the same for a
credit function, with :func:`bonft.testing.check_objective`::

    def test_my_credit(objective_check):
        objective_check(my_credit, target="pass_at_k", k=4, n=8)   # fails the test if biased
"""
from __future__ import annotations

import pytest


@pytest.fixture
def verifier_check():
    """``verifier_check(verifier, examples, *, expect_ok=True, **kw) -> VerifierReport``."""

    def run(verifier, examples, *, expect_ok: bool = True, **kw):
        from bonft.testing import check_verifier  # loaded when a fixture is used, not at pytest's start

        report = check_verifier(verifier, examples, **kw)
        if expect_ok and not report.ok:
            pytest.fail(f"verifier check found problems:\n{report}", pytrace=False)
        return report

    return run


@pytest.fixture
def objective_check():
    """``objective_check(credit, *, target, k, n, expect_ok=True, **kw) -> ObjectiveReport``."""

    def run(credit, *, target, k, n, expect_ok: bool = True, **kw):
        from bonft.testing import check_objective  # loads torch: only when the fixture is used

        report = check_objective(credit, target=target, k=k, n=n, **kw)
        if expect_ok and not report.ok:
            pytest.fail(f"objective check found problems:\n{report}", pytrace=False)
        return report

    return run
