"""Shared test set-up: float64 on (importing isoscope does it), one tolerance helper."""

import numpy as np
import pytest

import isoscope  # noqa: F401  (enables jax_enable_x64)


def tol(dtype) -> float:
    """Default relative tolerance for exact identities in a dtype (100 eps)."""
    return 100 * float(np.finfo(np.dtype(dtype)).eps)


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)
