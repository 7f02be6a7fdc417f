"""The matrix-free route: stochastic Lanczos quadrature of J^T J from jvp/vjp products.

References: numpy's eigen-decomposition of J^T J (numpy.linalg.eigvalsh) and its traces; the
Gauss-rule exactness of Lanczos (Golub & Meurant 2010, ch. 6: m steps integrate polynomials of
degree <= 2m - 1 exactly); the infinite-width prediction for the wide cases.

The wide agreement test runs at N = 1024 in CI; ``ISOSCOPE_WIDE=4096`` runs it at the width
the route is made for (minutes on two cores, most of it in the dense reference).
"""

import json
import os

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from isoscope import cli, matrix_free
from isoscope import jacobian as jac
from isoscope import network as nw


def _draw(net, seed=0, scale=0.4):
    params = net.init(jax.random.PRNGKey(seed))
    x = scale * jax.random.normal(jax.random.PRNGKey(seed + 1), (net.width,), jnp.float64)
    return params, x


def test_lanczos_rule_is_exact_per_probe_for_low_moments():
    net = nw.plain_stack(40, 6, "tanh", weights="gaussian", sigma_w=1.2, sigma_b=0.1)
    params, x = _draw(net)
    j = np.asarray(jac.dense_jacobian(net, params, x))
    a = j.T @ j
    key = jax.random.PRNGKey(9)
    rule = matrix_free.lanczos_quadrature(net, params, x, key, probes=3, steps=12)
    z = np.asarray(matrix_free.rademacher_probes(key, 3, 40, jnp.float64))
    nodes, weights = np.asarray(rule.nodes), np.asarray(rule.weights)
    for p in range(3):
        q = z[p] / np.linalg.norm(z[p])
        for k in range(1, 8):  # degree <= 2 * 12 - 1
            exact = q @ np.linalg.matrix_power(a, k) @ q
            assert np.sum(weights[p] * nodes[p] ** k) == pytest.approx(exact, rel=1e-9)


def test_full_krylov_space_gives_the_extreme_eigenvalues_with_residuals():
    net = nw.plain_stack(30, 4, "tanh", weights="orthogonal", sigma_w=1.3, sigma_b=0.2)
    params, x = _draw(net, seed=2)
    j = np.asarray(jac.dense_jacobian(net, params, x))
    lam = np.linalg.eigvalsh(j.T @ j)
    rule = matrix_free.lanczos_quadrature(
        net, params, x, jax.random.PRNGKey(1), probes=64, steps=30
    )
    summary = matrix_free.quadrature_summary(rule)
    assert summary["lambda_max"] == pytest.approx(lam[-1], rel=1e-9)
    assert summary["lambda_min"] == pytest.approx(lam[0], rel=1e-6)
    assert summary["lambda_max_residual"] < 1e-8
    # with N steps each probe's rule is exact for every moment: only the probes vary
    m1 = np.trace(j.T @ j) / 30
    assert abs(summary["m1"] - m1) < 4 * summary["m1_se"] + 1e-12


def test_few_steps_still_bound_the_top_eigenvalue_from_below():
    # Ritz values interlace: the largest is at most lambda_max (Parlett 1998, ch. 10), and
    # its residual bound says how far it can be from an eigenvalue
    net = nw.plain_stack(200, 4, "relu", weights="gaussian", sigma_w=2**0.5)
    params, x = _draw(net, seed=5)
    j = np.asarray(jac.dense_jacobian(net, params, x))
    top = np.linalg.eigvalsh(j.T @ j)[-1]
    s = matrix_free.quadrature_summary(
        matrix_free.lanczos_quadrature(net, params, x, jax.random.PRNGKey(3), probes=4, steps=40)
    )
    assert s["lambda_max"] <= top * (1 + 1e-10)
    assert top - s["lambda_max"] <= s["lambda_max_residual"] + 1e-9 * top


def test_bad_settings_are_refused():
    net = nw.plain_stack(8, 2, "tanh")
    params, x = _draw(net)
    with pytest.raises(Exception, match="probes"):
        matrix_free.lanczos_quadrature(net, params, x, jax.random.PRNGKey(0), probes=0)
    with pytest.raises(Exception, match="lanczos_steps"):
        matrix_free.lanczos_quadrature(net, params, x, jax.random.PRNGKey(0), steps=-1)


WIDE = int(os.environ.get("ISOSCOPE_WIDE", "1024"))


def _spec(path, route, act, weights, sigma_w, sigma_b, depth):
    path.write_text(f"""name = "wide-{act}"
[network]
family = "plain"
width = {WIDE}
depth = {depth}
activation = "{act}"
[init]
weights = "{weights}"
sigma_w = {sigma_w}
sigma_b = {sigma_b}
[analysis]
inputs = 2
seed = 11
probes = 16
route = "{route}"
dtype = "float64"
""")
    return path


@pytest.mark.parametrize(
    "act,weights,sigma_w,sigma_b,depth",
    [("tanh", "orthogonal", 1.05, 0.05, 8), ("relu", "gaussian", 1.4142135623730951, 0.0, 4)],
)
def test_wide_matrix_free_matches_dense_moments_and_the_predicted_density(
    act, weights, sigma_w, sigma_b, depth, tmp_path, capsys
):
    out = {}
    for route in ("dense", "matrix-free"):
        spec = _spec(tmp_path / f"{route}.toml", route, act, weights, sigma_w, sigma_b, depth)
        assert cli.main(["analyze", str(spec), "--out", str(tmp_path / route)]) == 0
        out[route] = json.loads((tmp_path / route / "result.json").read_text())
    capsys.readouterr()
    dense, free = out["dense"]["measured"], out["matrix-free"]["measured"]
    assert free["route"] == "matrix-free" and dense["route"] == "dense"
    q = free["quadrature"]["pooled"]
    for k in ("m1", "m2"):
        # the same draws: the quadrature's moments are exact per probe, so they differ from
        # the dense ones only by the probes' Hutchinson error (relative standard error about
        # sqrt(2 m2 / (N P)) / m1): within 4 standard errors, and within 2 % from N = 4096
        err = abs(q[k] - dense["lambda_moments"][k])
        assert err < 4 * q[f"{k}_se"]
        if WIDE >= 4096:
            assert err < 0.02 * dense["lambda_moments"][k]
    assert out["matrix-free"]["agreement"]["ks"] < 0.05
    assert out["dense"]["agreement"]["ks"] < 0.05
