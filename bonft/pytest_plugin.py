"""A pytest fixture for testing verifiers: ``verifier_check``.

Opt in from your top-level ``conftest.py`` (or a test module) with
``pytest_plugins = ["bonft.pytest_plugin"]``; bonft does not register it
automatically, so installing bonft never changes other projects' test runs.
In a test::

    def test_my_verifier(verifier_check):
        report = verifier_check(my_verifier, examples)   # fails the test with the report if not ok
        assert report.auc > 0.8

Extra keyword arguments go to :func:`bonft.testing.check_verifier`; pass
``expect_ok=False`` to get the report without failing.
"""
from __future__ import annotations

import pytest


@pytest.fixture
def verifier_check():
    """``verifier_check(verifier, examples, *, expect_ok=True, **kw) -> VerifierReport``."""

    def run(verifier, examples, *, expect_ok: bool = True, **kw):
        from bonft.testing import check_verifier

        report = check_verifier(verifier, examples, **kw)
        if expect_ok and not report.ok:
            pytest.fail(f"verifier check found problems:\n{report}", pytrace=False)
        return report

    return run
