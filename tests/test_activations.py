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
    h = h[
        np.all(
            np.abs(np.asarray(h)[:, None] - np.asarray(act.kinks or [99.0])[None, :]) > 1e-3, axis=1
        )
    ]
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
    np.testing.assert_allclose(
        get_activation("selu").fn(jnp.asarray(1.0)), 1.0507009873554805, rtol=1e-15
    )
    # 4 sigmoid(x) - 2 = 2 tanh(x/2) (docs/theory-mean-field.md)
    x = jnp.linspace(-5, 5, 11)
    np.testing.assert_allclose(
        get_activation("centred-sigmoid").fn(x), 2 * np.tanh(np.asarray(x) / 2), atol=1e-14
    )
    # gelu(1) = Phi(1) = 0.8413447460685429 (scipy.stats.norm.cdf(1))
    np.testing.assert_allclose(
        get_activation("gelu").fn(jnp.asarray(1.0)), 0.8413447460685429, rtol=1e-14
    )


def test_unknown_activation_lists_allowed():
    with pytest.raises(InputError, match="unknown activation 'tahn'.*tanh"):
        get_activation("tahn")
    assert get_activation("swish").name == "silu"


# ---------------------------------------------------------------------------------------------
# ln phi'(h)^2 in the tails, against mpmath at 50 digits (closed-form derivatives evaluated in
# mpmath: tanh' = sech^2, erf' = 2 e^{-h^2}/sqrt(pi), sigmoid' = s(h) s(-h), GELU' = Phi + h phi,
# SiLU' = s(h) (1 + h s(-h)), SELU' = lambda alpha e^h for h < 0)
# ---------------------------------------------------------------------------------------------


def _mp_derivatives():
    import mpmath as mp

    from isoscope.activations import SELU_ALPHA, SELU_LAMBDA

    sig = lambda h: 1 / (1 + mp.exp(-h))  # noqa: E731
    return {
        "tanh": lambda h: mp.sech(h) ** 2,
        "erf": lambda h: 2 / mp.sqrt(mp.pi) * mp.exp(-h * h),
        "sigmoid": lambda h: sig(h) * sig(-h),  # 1 - s(h) = s(-h): no cancellation
        "centred-sigmoid": lambda h: 4 * sig(h) * sig(-h),
        "gelu": lambda h: mp.ncdf(h) + h * mp.npdf(h),
        "silu": lambda h: sig(h) * (1 + h * sig(-h)),
        "selu": lambda h: SELU_LAMBDA * (1 if h > 0 else SELU_ALPHA * mp.exp(h)),
    }


@pytest.mark.parametrize("name", sorted(_mp_derivatives()))
def test_log_dphi_sq_keeps_relative_accuracy_in_the_tails(name):
    import mpmath as mp

    mp.mp.dps = 50
    want_fn = _mp_derivatives()[name]
    h = np.array(
        [
            -700.0,
            -300.0,
            -60.0,
            -37.0,
            -20.0,
            -5.0001,
            -4.999,
            -2.0,
            -0.3,
            0.05,
            0.7,
            3.0,
            19.5,
            40.0,
            300.0,
            700.0,
        ]
    )
    got = get_activation(name).numpy_log_dphi_sq()(h)
    want = np.array([float(2 * mp.log(abs(want_fn(mp.mpf(x))))) for x in h])
    np.testing.assert_allclose(got, want, rtol=1e-13, atol=1e-14)
    assert np.all(np.isfinite(got))  # never -inf: phi' of these never vanishes at these h


def test_tanh_grad_underflows_where_the_closed_form_does_not():
    # the reason for log_dphi_sq: jax.grad(tanh) is exactly 0 at h = 20 in float64, while
    # tanh'(20)^2 = sech(20)^4 = 3.3e-34 (mpmath)
    import mpmath as mp

    act = get_activation("tanh")
    assert float(act.derivative(jnp.asarray([20.0]))[0]) == 0.0
    got = act.numpy_dphi_sq()(np.array([20.0]))[0]
    assert got == pytest.approx(float(mp.sech(20) ** 4), rel=1e-13)


# ---------------------------------------------------------------------------------------------
# Leaky ReLU slope
# ---------------------------------------------------------------------------------------------


def test_leaky_relu_slope_is_one_cached_row_per_slope():
    a = get_activation("leaky-relu", slope=0.2)
    assert a is get_activation("leaky_relu").with_slope(0.2)
    assert a is not get_activation("leaky-relu")
    assert get_activation("leaky-relu").slope == 0.01  # the default
    np.testing.assert_allclose(a.fn(jnp.asarray([-2.0, 3.0])), [-0.4, 3.0], rtol=1e-15)
    assert a.derivative_values == (0.2, 1.0)
    # the NumPy callables are compiled per slope, not per name
    assert a.numpy_pair()[1](np.array([-1.0]))[0] == pytest.approx(0.2)
    assert get_activation("leaky-relu").numpy_pair()[1](np.array([-1.0]))[0] == pytest.approx(0.01)


def test_slope_for_another_activation_is_refused():
    with pytest.raises(InputError, match="slope.*'tanh'.*leaky-relu"):
        get_activation("tanh", slope=0.2)
    with pytest.raises(InputError, match="not a finite number"):
        get_activation("leaky-relu", slope=float("nan"))
