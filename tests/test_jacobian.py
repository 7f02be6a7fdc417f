"""The Jacobian routes against each other and against exact random-matrix results."""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate
from scipy.special import binom, polygamma, psi

from isoscope import jacobian as jac
from isoscope.network import plain_stack, residual_stack


def _x(n, seed=1):
    return jax.random.normal(jax.random.PRNGKey(seed), (n,))


def test_linear_stack_jacobian_is_product_of_weights():
    net = plain_stack(30, 7, "linear", weights="gaussian", sigma_w=1.2, sigma_b=0.3)
    p = net.init(jax.random.PRNGKey(0))
    want = np.eye(30)
    for w in np.asarray(p["W"]):
        want = (
            w @ want
        )  # J = W^L ... W^1 (Pennington, Schoenholz & Ganguli 2017, sec. 2, with D = I)
    np.testing.assert_allclose(jac.dense_jacobian(net, p, _x(30)), want, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("family,act", [("plain", "tanh"), ("plain", "gelu"), ("residual", "silu")])
def test_jacfwd_agrees_with_jacrev_layer_product_and_finite_differences(family, act):
    build = plain_stack if family == "plain" else residual_stack
    net = build(24, 9, act, weights="gaussian", sigma_w=1.3, sigma_b=0.2)
    p, x = net.init(jax.random.PRNGKey(2)), _x(24)
    j = np.asarray(jac.dense_jacobian(net, p, x))
    np.testing.assert_allclose(j, jax.jacrev(net.apply, argnums=1)(p, x), rtol=1e-11, atol=1e-13)
    prod, finite = jac.layer_product(net, p, x)
    assert finite.all()
    np.testing.assert_allclose(j, prod, rtol=1e-11, atol=1e-13)
    eps = 1e-6  # central differences: truncation O(eps^2), rounding O(1e-16/eps)
    fd = np.stack(
        [(net.apply(p, x + eps * e) - net.apply(p, x - eps * e)) / (2 * eps) for e in np.eye(24)],
        axis=1,
    )
    np.testing.assert_allclose(j, fd, rtol=1e-6, atol=1e-8)


def test_orthogonal_linear_stack_is_exact_isometry():
    net = plain_stack(128, 50, "linear", weights="orthogonal", sigma_w=1.0)
    s = np.linalg.svd(
        np.asarray(jac.dense_jacobian(net, net.init(jax.random.PRNGKey(3)), _x(128))),
        compute_uv=False,
    )
    np.testing.assert_allclose(s, 1.0, atol=1e-10)


def _linear_gaussian_lambdas(n, depth, draws):
    net = plain_stack(n, depth, "linear", weights="gaussian", sigma_w=1.0)
    out = []
    for i in range(draws):
        j = np.asarray(jac.dense_jacobian(net, net.init(jax.random.PRNGKey(100 + i)), _x(n)))
        out.append(np.linalg.svd(j, compute_uv=False) ** 2)
    return np.stack(out)


@pytest.mark.parametrize("depth", [1, 2, 3, 4])
def test_linear_gaussian_moments_are_fuss_catalan(depth):
    n, draws = 300, 12
    lam = _linear_gaussian_lambdas(n, depth, draws)
    for k in (1, 2, 3):
        # Fuss-Catalan numbers binom((L+1)k, k)/(Lk+1): moments of a product of L Ginibre
        # matrices (Penson & Zyczkowski 2011, eq. 3; L = 2: 1, 3, 12).
        want = binom((depth + 1) * k, k) / (depth * k + 1)
        per_draw = (lam**k).mean(axis=1)
        se = per_draw.std(ddof=1) / math.sqrt(draws)
        # finite-N correction is O(k^2 L / N) relative (L = 1, k = 2: exactly 2 + 1/N for real
        # Wishart matrices, Muirhead 1982 Thm 3.3.15, from memory), plus 4 standard errors
        bias = want * k * k * depth / n
        assert abs(per_draw.mean() - want) < 4 * se + bias, (k, per_draw.mean(), want)


def test_single_gaussian_layer_follows_marchenko_pastur():
    lam = np.sort(_linear_gaussian_lambdas(400, 1, 10).ravel())
    # Marchenko-Pastur, ratio 1: rho(x) = sqrt((4 - x) x) / (2 pi x) on [0, 4] (Marchenko & Pastur 1967)
    cdf = np.array(
        [
            integrate.quad(
                lambda t: math.sqrt(max((4 - t) * t, 0)) / (2 * math.pi * t), 0, min(x, 4)
            )[0]
            for x in lam[::20]
        ]
    )
    emp = (np.arange(lam.size)[::20] + 0.5) / lam.size
    assert np.max(np.abs(cdf - emp)) < 0.02  # finite-N edge effects are O(N^-2/3) ~ 0.02 at most


def test_qr_accumulation_matches_newman_lyapunov_exponents():
    n, depth = 16, 3000
    net = plain_stack(n, depth, "linear", weights="gaussian", sigma_w=1.0)
    est = jac.qr_log_singular_values(net, net.init(jax.random.PRNGKey(9)), _x(n)) / depth
    i = np.arange(1, n + 1)
    s2 = 1.0 / n  # entry variance sigma_w^2 / N
    # Newman 1986 (Commun. Math. Phys. 103), restated by Forrester 2013:
    # mu_i = (1/2) [ln(2 s^2) + psi((N - i + 1)/2)]; QR estimate variance psi'((N-i+1)/2) / (4 M)
    mu = 0.5 * (np.log(2 * s2) + psi((n - i + 1) / 2))
    se = np.sqrt(polygamma(1, (n - i + 1) / 2) / (4 * depth))
    assert np.all(np.abs(est - mu) < 5 * se), np.abs(est - mu) / se


def test_no_recompilation_for_new_parameters_or_sigmas():
    x = _x(32)
    nets = [
        plain_stack(32, 12, "tanh", weights=w, sigma_w=s, sigma_b=b)
        for w, s, b in (("orthogonal", 1.0, 0.0), ("gaussian", 1.5, 0.1), ("uniform", 0.7, 0.3))
    ]
    jac.dense_jacobian(nets[0], nets[0].init(jax.random.PRNGKey(0)), x)
    before = jac.trace_count()
    for k, net in enumerate(nets):
        jac.dense_jacobian(net, net.init(jax.random.PRNGKey(k + 1)), x).block_until_ready()
    assert jac.trace_count() == before
    r1, r2 = (residual_stack(32, 12, "relu", alpha=a) for a in (0.1, 0.5))
    jac.dense_jacobian(r1, r1.init(jax.random.PRNGKey(0)), x)
    before = jac.trace_count()
    jac.dense_jacobian(r2, r2.init(jax.random.PRNGKey(1)), x)
    assert jac.trace_count() == before


def test_float32_overflow_is_located():
    net = plain_stack(16, 200, "linear", weights="orthogonal", sigma_w=3.0)
    p = net.init(jax.random.PRNGKey(0), jnp.float32)
    x = _x(16).astype(jnp.float32)
    fault = jac.forward_fault(net, p, x)
    # |x^l| = 3^l |x^0| exactly; float32 max 3.4e38 = 3^80.9, |x^0| ~ 4 -> overflow near layer 80
    assert fault is not None and fault.stage == "forward" and 75 <= fault.layer <= 82
    j = jac.dense_jacobian(net, p, x)
    assert not np.all(np.isfinite(np.asarray(j)))
    jf = jac.jacobian_fault(net, p, x)
    assert jf is not None and 75 <= jf.layer <= 82  # entries of 3^l Q reach 3.4e38 near l = 80


@pytest.mark.parametrize("dtype", [jnp.float64, jnp.float32])
@pytest.mark.parametrize("family,act", [("plain", "tanh"), ("plain", "gelu"), ("residual", "silu")])
def test_profiled_pass_equals_jacfwd_jacrev_and_finite_differences(family, act, dtype):
    build = plain_stack if family == "plain" else residual_stack
    net = build(24, 9, act, weights="orthogonal", sigma_w=1.3, sigma_b=0.2)
    p, x = net.init(jax.random.PRNGKey(2), dtype), _x(24).astype(dtype)
    pj = jac.profiled_jacobian(net, p, x, [1, 4, 9])
    j = np.asarray(pj.jacobian, dtype=np.float64)
    scale = np.abs(j).max()
    eps = float(np.finfo(np.dtype(dtype)).eps)
    # forward and reverse mode agree to rounding: 100 eps of the largest entry (dtype-keyed)
    for other in (jac.dense_jacobian(net, p, x), jax.jacrev(net.apply, argnums=1)(p, x)):
        assert np.abs(j - np.asarray(other, dtype=np.float64)).max() <= 100 * eps * scale
    if dtype == jnp.float64:
        h = 1e-6  # central differences: truncation O(h^2), rounding O(1e-16/h)
        fd = np.stack(
            [(net.apply(p, x + h * e) - net.apply(p, x - h * e)) / (2 * h) for e in np.eye(24)],
            axis=1,
        )
        np.testing.assert_allclose(j, fd, rtol=1e-6, atol=1e-8)
    # kept partial products: against numpy's SVD of the Jacobian of the first l layers alone
    part = jac.partial_spectra(pj)
    for row, d in enumerate(part.depths):
        short = build(24, int(d), act, weights="orthogonal", sigma_w=1.3, sigma_b=0.2)
        pd = {"W": p["W"][:d], "b": p["b"][:d], "alpha": p["alpha"]}
        want = np.linalg.svd(
            np.asarray(jac.dense_jacobian(short, pd, x), dtype=np.float64), compute_uv=False
        )
        got = np.exp(part.log_s[row])
        assert np.abs(got - want).max() <= 100 * eps * want[0], (d, np.abs(got - want).max())
    np.testing.assert_array_equal(part.singular_values(-1).dtype, np.dtype(dtype))


@pytest.mark.parametrize("sigma_w", [1e-10, 1e10])
def test_partial_spectra_hold_beyond_the_dtype_range(sigma_w):
    # W = sigma_w Q, Q Haar orthogonal: every singular value of W_l ... W_1 is sigma_w^l exactly,
    # so at l = 40 they are 1e-400 (below float64) or 1e400 (above it).
    net = plain_stack(32, 40, "linear", weights="orthogonal", sigma_w=sigma_w)
    p, x = net.init(jax.random.PRNGKey(4)), _x(32)
    pj = jac.profiled_jacobian(net, p, x, [1, 10, 30, 40])
    ls = jac.partial_spectra(pj).log_s
    want = np.array([1, 10, 30, 40])[:, None] * math.log(sigma_w)
    np.testing.assert_allclose(ls, np.broadcast_to(want, ls.shape), rtol=1e-13)
    # the Jacobian itself leaves the range exactly as jax.jacfwd's does (zero, or not finite)
    dense = np.asarray(jac.dense_jacobian(net, p, x))
    if sigma_w < 1:
        assert not np.any(np.asarray(pj.jacobian)) and not np.any(dense)
    else:
        assert not np.all(np.isfinite(np.asarray(pj.jacobian))) and not np.all(np.isfinite(dense))


def test_profiled_pass_rejects_bad_depths():
    net = plain_stack(8, 5, "tanh")
    p, x = net.init(jax.random.PRNGKey(0)), _x(8)
    for bad in ([], [0, 2], [3, 3], [2, 6]):
        with pytest.raises(ValueError, match="depths must increase within 1..5"):
            jac.profiled_jacobian(net, p, x, bad)
