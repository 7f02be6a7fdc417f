"""Shared test set-up: float64 on (importing isoscope does it), one tolerance helper."""

import os

import numpy as np
import pytest
from hypothesis import HealthCheck, settings
from hypothesis.database import DirectoryBasedExampleDatabase

import isoscope  # noqa: F401  (enables jax_enable_x64)

# Property tests (tests/test_properties.py): by default the generation is derandomized - the same
# cases on every run and machine, no example database read or written - so a CI failure
# reproduces with the same command.  ISOSCOPE_HYPOTHESIS=explore draws new cases (ten times as
# many) and keeps any failing one in .hypothesis/ for the next run.
settings.register_profile(
    "fixed",
    derandomize=True,
    database=None,
    deadline=None,
    print_blob=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
settings.register_profile(
    "explore",
    parent=settings.get_profile("fixed"),
    derandomize=False,
    database=DirectoryBasedExampleDatabase(".hypothesis"),
    max_examples=1000,
)
settings.load_profile(os.environ.get("ISOSCOPE_HYPOTHESIS", "fixed"))


def tol(dtype) -> float:
    """Default relative tolerance for exact identities in a dtype (100 eps)."""
    return 100 * float(np.finfo(np.dtype(dtype)).eps)


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)
