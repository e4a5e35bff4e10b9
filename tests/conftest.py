"""Shared test configuration.

Property tests are deterministic: the ``bonft`` hypothesis profile derandomizes
example generation so a CI run can never be flaky. Set HYPOTHESIS_PROFILE=dev
locally to explore with random examples.
"""
import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "bonft",
    derandomize=True,
    deadline=None,
    max_examples=50,
    print_blob=True,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile("dev", deadline=None, max_examples=200)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "bonft"))
