"""Registry-wide contract tests: every activation row inherits these."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from isoscope.activations import activation_names, get_activation
from isoscope.errors import InputError

NAMES = activation_names()


@pytest.mark.parametrize("name", NAMES)
def test_derivative_matches_central_differences(name):
    act = get_activation(name)
    h = jnp.linspace(-3.0, 3.0, 601)
    h = h[np.all(np.abs(np.asarray(h)[:, None] - np.asarray(act.kinks or [99.0])[None, :]) > 1e-3, axis=1)]
    eps = 1e-6
    fd = (act.fn(h + eps) - act.fn(h - eps)) / (2 * eps)  # central difference, error O(eps^2)
    np.testing.assert_allclose(act.derivative(h), fd, atol=1e-8)


@pytest.mark.parametrize("name", NAMES)
def test_declared_kinks_and_values(name):
    act = get_activation(name)
    h = np.linspace(-4.0, 4.0, 4001)
    d = np.asarray(act.derivative(jnp.asarray(h)))
    jumps = h[1:][np.abs(np.diff(d)) > 0.05]
    for j in jumps:  # every jump of phi' sits at a declared kink
        assert any(abs(j - k) < 0.01 for k in act.kinks), (name, j)
    if act.derivative_values is not None:
        assert set(np.unique(np.round(d, 12))) <= set(act.derivative_values)


@pytest.mark.parametrize("name", NAMES)
def test_symmetry_and_dtype(name):
    act = get_activation(name)
    h = jnp.linspace(-2.0, 2.0, 41)
    if act.odd:
        np.testing.assert_allclose(act.fn(-h), -act.fn(h), atol=1e-14)
    for dtype in (jnp.float32, jnp.float64):
        assert act.fn(h.astype(dtype)).dtype == dtype
        assert jax.jit(act.derivative)(h.astype(dtype)).dtype == dtype


def test_reference_values():
    # SELU constants: Klambauer et al. 2017, eq. (14); selu(1) = lambda.
    np.testing.assert_allclose(get_activation("selu").fn(jnp.asarray(1.0)), 1.0507009873554805, rtol=1e-15)
    # 4 sigmoid(x) - 2 = 2 tanh(x/2) (THEORY.md sec. 2)
    x = jnp.linspace(-5, 5, 11)
    np.testing.assert_allclose(get_activation("centred-sigmoid").fn(x), 2 * np.tanh(np.asarray(x) / 2), atol=1e-14)
    # gelu(1) = Phi(1) = 0.8413447460685429 (scipy.stats.norm.cdf(1))
    np.testing.assert_allclose(get_activation("gelu").fn(jnp.asarray(1.0)), 0.8413447460685429, rtol=1e-14)


def test_unknown_activation_lists_allowed():
    with pytest.raises(InputError, match="unknown activation 'tahn'.*tanh"):
        get_activation("tahn")
    assert get_activation("swish").name == "silu"
