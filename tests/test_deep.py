"""The deep route: ln s of J = J_L ... J_1 by the stabilised U D T product.

References: numpy's SVD of the dense Jacobian where it is accurate; an mpmath product and SVD
at enough digits to resolve the whole spectrum; Newman's formula for the Lyapunov exponents of
Gaussian products; the determinant identity ln|det J| = sum_l ln|det J_l| with the layers'
determinants from numpy's slogdet and the pre-activations.
"""

import math

import jax
import jax.numpy as jnp
import mpmath
import numpy as np
import pytest
from scipy.special import digamma

from isoscope import jacobian as jac
from isoscope import network as nw


def _draw(net, seed=0, scale=1.0):
    params = net.init(jax.random.PRNGKey(seed))
    x = scale * jax.random.normal(jax.random.PRNGKey(seed + 1000), (net.width,), jnp.float64)
    return params, x


@pytest.mark.parametrize(
    "act,weights,sigma_w,sigma_b",
    [
        ("tanh", "orthogonal", 1.05, 0.1),
        ("tanh", "gaussian", 1.3, 0.05),
        ("relu", "gaussian", 2**0.5, 0.0),
        ("erf", "orthogonal", 1.2, 0.2),
    ],
)
def test_deep_route_agrees_with_the_dense_svd_where_that_is_accurate(
    act, weights, sigma_w, sigma_b
):
    # an SVD in float64 has absolute error about N eps s_max (Golub & Van Loan 2013, sec. 8.6),
    # so ln s_i is accurate to N eps s_max / s_i: compare to 1e-9 wherever that bound is below
    # 1e-10, and require agreement within the bound elsewhere among the nonzero values
    net = nw.plain_stack(32, 24, act, weights=weights, sigma_w=sigma_w, sigma_b=sigma_b)
    params, x = _draw(net, seed=3, scale=0.5)
    s = np.linalg.svd(np.asarray(jac.dense_jacobian(net, params, x)), compute_uv=False)
    deep = jac.stable_log_singular_values(net, params, x).log_s
    # an SVD value of exactly 0 (a ReLU stack's dead directions) has an unbounded bound
    bound = 32 * np.finfo(np.float64).eps * s[0] / np.maximum(s, np.finfo(np.float64).tiny)
    sharp = bound < 1e-10
    assert sharp.sum() >= 8
    np.testing.assert_allclose(deep[sharp], np.log(s[sharp]), rtol=0, atol=1e-9)
    loose = (~sharp) & (bound < 1e-2)
    assert np.all(np.abs(deep[loose] - np.log(s[loose])) < 10 * bound[loose])


def test_residual_and_partial_depths_agree_with_dense_partial_products():
    net = nw.residual_stack(24, 30, "tanh", weights="gaussian", sigma_w=0.4, sigma_b=0.1)
    params, x = _draw(net, seed=4)
    out = jac.stable_log_singular_values(net, params, x, depths=[1, 7, 30])
    layer = jax.jacfwd(net.layer, argnums=1)
    j, h, rows = np.eye(24), x, {}
    for l, p in enumerate(jax.tree_util.tree_map(lambda a: a, list(_layers(net, params)))):
        j = np.asarray(layer(p, h)) @ j
        h = net.layer(p, h)
        rows[l + 1] = np.log(np.linalg.svd(j, compute_uv=False))
    for depth, got in zip(out.depths, out.partial_log_s):
        np.testing.assert_allclose(got, rows[int(depth)], rtol=0, atol=1e-9)
    np.testing.assert_allclose(out.log_s, rows[30], rtol=0, atol=1e-9)


def _layers(net, params):
    slices = net.layer_slices(params)
    for l in range(net.depth):
        yield jax.tree_util.tree_map(lambda a, l=l: a[l], slices)


def _mp_log_singular_values(weights, digits):
    """ln s of W_L ... W_1 in mpmath at ``digits`` significant digits (the float64 entries are
    converted exactly), by mpmath's SVD (mpmath.svd_r)."""
    with mpmath.workdps(digits):
        prod = mpmath.eye(weights.shape[1])
        for w in weights:
            prod = mpmath.matrix(w.tolist()) * prod
        s = mpmath.svd_r(prod, compute_uv=False)
        return np.array(sorted((float(mpmath.log(v)) for v in s), reverse=True))


@pytest.mark.parametrize("n,depth,seed", [(6, 1000, 0), (8, 400, 1)])
def test_deep_route_agrees_with_mpmath_across_hundreds_of_decades(n, depth, seed):
    # a linear Gaussian stack: J = W_L ... W_1 exactly, independent of the input
    net = nw.plain_stack(n, depth, "linear", weights="gaussian", sigma_w=1.0)
    params, x = _draw(net, seed=seed)
    deep = jac.stable_log_singular_values(net, params, x).log_s
    span = (deep[0] - deep[-1]) / math.log(10)
    digits = int(span) + 60  # the whole spectrum plus 60 digits to spare
    ref = _mp_log_singular_values(np.asarray(params["W"]), digits)
    if n == 6:
        assert span > 600  # s spans more than 10^600
    np.testing.assert_allclose(deep, ref, rtol=0, atol=1e-8)


def test_gaussian_product_exponents_match_newman():
    # Newman 1986 (Commun. Math. Phys. 103, 121): for i.i.d. N(0, sigma^2/N) entries the
    # Lyapunov exponents are mu_i = ln sigma + (1/2) [ln(2/N) + psi((N - i + 1)/2)]
    n, depth, draws = 8, 600, 12
    net = nw.plain_stack(n, depth, "linear", weights="gaussian", sigma_w=1.0)
    est = []
    for seed in range(draws):
        params, x = _draw(net, seed=seed)
        est.append(jac.stable_log_singular_values(net, params, x).log_s / depth)
    est = np.array(est)
    mean, se = est.mean(axis=0), est.std(axis=0, ddof=1) / math.sqrt(draws)
    i = np.arange(1, n + 1)
    newman = 0.5 * (math.log(2.0 / n) + digamma((n - i + 1) / 2.0))
    assert np.all(np.abs(mean - newman) < 3 * se), (mean, newman, se)
    # the smallest exponent is far below the largest: psi(1/2) - psi(4) is about -3.2
    assert newman[0] - newman[-1] > 1.5


def test_ten_thousand_layer_chaotic_tanh_is_finite_and_keeps_the_determinant():
    # tanh at sigma_w = 2 is chaotic (chi_1 > 1, Schoenholz et al. 2017): over 10,000 layers
    # the singular values spread over thousands of e-folds.  sum ln s_i = ln|det J| =
    # sum_l [ln|det W_l| + sum_i ln phi'(h^l_i)], phi'(h) = 1 - tanh(h)^2, from the trace's
    # pre-activations and numpy.linalg.slogdet, independently of the route
    n, depth = 12, 10_000
    net = nw.plain_stack(n, depth, "tanh", weights="gaussian", sigma_w=2.0, sigma_b=0.1)
    params, x = _draw(net, seed=7)
    out = jac.stable_log_singular_values(net, params, x)
    assert np.all(np.isfinite(out.log_s))
    assert out.log_s[0] - out.log_s[-1] > 700  # beyond what float64 can hold
    _, h = net.trace(params, x)
    h = np.asarray(h)
    _, logdet_w = np.linalg.slogdet(np.asarray(params["W"]))
    logdet = float(np.sum(logdet_w) + np.sum(np.log1p(-(np.tanh(h) ** 2))))
    assert float(np.sum(out.log_s)) == pytest.approx(logdet, rel=1e-8)
    # the per-layer stretch (the Lyapunov view) sums to the same determinant
    assert float(np.sum(out.layer_log_stretch)) == pytest.approx(logdet, rel=1e-8)


def test_orthogonal_linear_stack_is_exactly_sigma_w_to_the_depth():
    net = nw.plain_stack(16, 300, "linear", weights="orthogonal", sigma_w=1.01)
    params, x = _draw(net)
    out = jac.stable_log_singular_values(net, params, x)
    np.testing.assert_allclose(out.log_s, 300 * math.log(1.01), rtol=0, atol=1e-10)


def test_relu_rank_loss_gives_exact_zeros_not_nan():
    # each ReLU layer zeroes the rows of its inactive units; the product's rank is at most the
    # fewest active units, and the remaining values are exact zeros (-inf) or rounding noise
    net = nw.plain_stack(16, 40, "relu", weights="gaussian", sigma_w=2**0.5)
    params, x = _draw(net, seed=2)
    out = jac.stable_log_singular_values(net, params, x)
    assert not np.any(np.isnan(out.log_s))
    _, h = net.trace(params, x)
    fewest = int(np.min(np.sum(np.asarray(h) > 0, axis=1)))
    resolved = out.log_s > out.log_s[0] + math.log(16 * np.finfo(np.float64).eps)
    assert resolved.sum() <= fewest


def test_deep_route_compiles_once_per_shape():
    net = nw.plain_stack(10, 50, "tanh", weights="orthogonal", sigma_w=1.1)
    params, x = _draw(net, seed=1)
    jac.stable_log_singular_values(net, params, x)
    before = jac.trace_count()
    for seed in (2, 3):
        params, x = _draw(net, seed=seed)
        jac.stable_log_singular_values(net, params, x)
    assert jac.trace_count() == before
