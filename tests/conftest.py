"""Shared test configuration.

Property tests are deterministic: the ``bonft`` hypothesis profile derandomizes
example generation so a CI run can never be flaky. Set HYPOTHESIS_PROFILE=dev
locally to explore with random examples.
"""
import os

import pytest
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


@pytest.fixture(scope="module")
def one_thread():
    """torch on one thread for a test module (tiny matrices: thread hand-offs cost more than the math), restored after."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
