"""The per-layer view of the depth profile: q^l, each layer's own gain, the isometry score of
the partial products and the depth up to which a design stays isometric.

Check values come from closed forms (named beside each); the statistical ones state their
tolerance in standard errors, derived from the exact variance where one is known.
"""

import math

import numpy as np
import pytest
from scipy import integrate

from isoscope import jacobian as jac
from isoscope import report
from isoscope.analysis import analyze, isometric_until
from isoscope.network import plain_stack, residual_stack
from isoscope.score import ISOMETRIC_SCORE, predicted_isometry
from isoscope.spec import parse_spec
from isoscope.theory import free_probability as fp
from isoscope.theory.predict import predict


def _mean_sech4(q):
    """``E[tanh'(sqrt(q) z)^2] = E[sech^4(sqrt(q) z)]`` by scipy quad over |z| <= 12 (the normal
    weight beyond is below 1e-31)."""
    return integrate.quad(
        lambda z: (
            math.exp(-z * z / 2 - 4 * math.log(math.cosh(math.sqrt(q) * z)))
            / math.sqrt(2 * math.pi)
        ),
        -12.0,
        12.0,
        epsabs=1e-14,
        limit=200,
    )[0]


def _profile(
    width,
    depth,
    act,
    weights,
    sigma_w,
    sigma_b=0.0,
    *,
    family="plain",
    alpha=None,
    inputs=4,
    seed=0,
    **analysis,
):
    net = {"width": width, "depth": depth, "activation": act, "family": family}
    if alpha is not None:
        net["alpha"] = alpha
    a = analyze(
        parse_spec(
            {
                "network": net,
                "init": {"weights": weights, "sigma_w": sigma_w, "sigma_b": sigma_b},
                "analysis": {"inputs": inputs, "seed": seed, **analysis},
            }
        )
    )
    assert a.profile is not None
    return a, a.profile


# ------------------------------------------------------------------ the closed-form gain of a layer
def test_layer_statistics_equal_the_frobenius_norm_of_each_layers_jacobian():
    # g^l = ||J_l||_F^2 / N with J_l from jax.jacfwd of one layer, and q^l = |h^l|^2/N from the
    # layer's own pre-activation: the closed forms D W and I + alpha D W are exact (to rounding)
    import jax
    import jax.numpy as jnp

    for net in (
        plain_stack(24, 4, "tanh", weights="gaussian", sigma_w=1.4, sigma_b=0.3),
        residual_stack(24, 4, "gelu", weights="orthogonal", sigma_w=0.8, sigma_b=0.2, alpha=0.6),
    ):
        params = net.init(jax.random.PRNGKey(3))
        x = jax.random.normal(jax.random.PRNGKey(4), (24,))
        got = jac.layer_statistics(net, params, x)
        for layer in range(4):
            p = {"W": params["W"][layer], "b": params["b"][layer], "alpha": params["alpha"]}
            j = jax.jacfwd(net.layer, argnums=1)(p, x)
            h = p["W"] @ x + p["b"]
            assert got.gain[layer] == pytest.approx(float(jnp.sum(j * j)) / 24, rel=1e-13)
            assert got.q[layer] == pytest.approx(float(h @ h) / 24, rel=1e-13)
            x = net.layer(p, x)


def test_orthogonal_linear_layers_have_gain_sigma_w_squared_exactly():
    # every row of an orthogonal matrix has unit norm, so ||sigma_w Q||_F^2 / N = sigma_w^2
    # (to rounding); phi' = 1 for the linear activation
    a, pr = _profile(64, 12, "linear", "orthogonal", 0.9)
    assert np.max(np.abs(pr.measured_layer_gain - 0.81)) < 1e-12
    assert np.max(np.abs(pr.predicted_layer_gain - 0.81)) < 1e-12


def test_gaussian_linear_layers_have_gain_sigma_w_squared_in_expectation():
    # ||W||_F^2 with N^2 entries N(0, sigma_w^2/N) is sigma_w^2/N times a chi-square with N^2
    # degrees of freedom: g = ||W||_F^2/N has mean sigma_w^2 and variance 2 sigma_w^4 / N^2
    # (exact).  Mean over L layers and D draws: 4 standard errors.
    n, depth, draws, sw = 96, 20, 3, 1.3
    a, pr = _profile(n, depth, "linear", "gaussian", sw, inputs=draws)
    se = math.sqrt(2.0) * sw**2 / n / math.sqrt(depth * draws)
    assert abs(pr.measured_layer_gain.mean() - sw**2) < 4 * se
    assert np.max(np.abs(pr.predicted_layer_gain - sw**2)) < 1e-12


def test_relu_at_sigma_w_squared_two_has_unit_gain_per_layer():
    # He et al. 2015: E[relu'(h)^2] = 1/2, so sigma_w^2 = 2 keeps the mean squared singular value
    # of every layer at 1.  Predicted: exactly 1.  Measured: the mean over layers within 4
    # standard errors, taken from the layers' own spread (the layers are independent given
    # their inputs: fresh weights in every layer).
    a, pr = _profile(256, 32, "relu", "gaussian", math.sqrt(2.0))
    g = pr.measured_layer_gain
    assert abs(g.mean() - 1.0) < 4 * g.std(ddof=1) / math.sqrt(g.size)
    assert np.max(np.abs(pr.predicted_layer_gain - 1.0)) < 1e-12


def test_residual_linear_branch_gain_and_q_growth():
    # J_l = I + alpha W: (1/N)||I + alpha W||_F^2 = 1 + 2 alpha tr(W)/N + alpha^2 ||W||_F^2/N,
    # mean 1 + alpha^2 sigma_w^2 and variance (4 alpha^2 sigma_w^2 + 2 alpha^4 sigma_w^4)/N^2
    # (tr W ~ N(0, sigma_w^2), ||W||_F^2 chi-square as above; the two are uncorrelated).
    # q^l: E|x + alpha W x|^2 = (1 + alpha^2 sigma_w^2)|x|^2, so q^l = sigma_w^2 q0 (1 +
    # alpha^2 sigma_w^2)^(l-1) with q0 = input_variance = 1 (derived in-house, exact).
    n, depth, draws, sw, alpha = 128, 24, 3, 1.0, 0.4
    a, pr = _profile(
        n, depth, "linear", "gaussian", sw, family="residual", alpha=alpha, inputs=draws
    )
    c = alpha**2 * sw**2
    se = math.sqrt(4 * c + 2 * c * c) / n / math.sqrt(depth * draws)
    assert abs(pr.measured_layer_gain.mean() - (1 + c)) < 4 * se
    assert np.max(np.abs(pr.predicted_layer_gain - (1 + c))) < 1e-12
    # the branch strengths s_l = gain - 1 sum to the residual law's tau (Tarnowski et al. 2019)
    assert np.sum(pr.predicted_layer_gain - 1.0) == pytest.approx(a.predicted.tau, rel=1e-12)
    want_q = sw**2 * (1 + c) ** np.arange(depth)
    assert np.max(np.abs(pr.predicted_q / want_q - 1)) < 1e-12


# ------------------------------------------------------------------ q^l against mean field
@pytest.mark.parametrize("case", ["plain-tanh-off-fixed-point", "residual-tanh"])
def test_measured_q_follows_the_mean_field_trajectory_at_width_512(case):
    # |h^l|^2/N of N Gaussian values of variance q^l has relative standard deviation sqrt(2/N)
    # (chi-square); the sampled weights, bias and input add terms of the same O(1/sqrt(N)).
    # Tolerance: every layer's mean of 4 draws within 4 sqrt(2/N) relative (0.25 at N = 512),
    # about twice the largest deviation seen over four seeds (a margin, not a confidence level;
    # the plain map contracts deviations, V'(q*) = 0.42 here, so they do not accumulate; the
    # residual one adds O(1/sqrt(N)) per block, 24 blocks of alpha^2 = 1/16 stay within it).
    n = 512
    if case.startswith("plain"):
        # Gaussian inputs of variance 1: q^1 = 1.5^2 + 0.3^2 = 2.34 relaxes to q* = 0.96
        a, pr = _profile(n, 16, "tanh", "gaussian", 1.5, 0.3, input="gaussian")
        assert pr.predicted_q[0] == pytest.approx(1.5**2 + 0.3**2, rel=1e-12)
        assert pr.predicted_q[-1] == pytest.approx(a.predicted.mean_field.q_star, rel=1e-3)
    else:
        a, pr = _profile(n, 24, "tanh", "gaussian", 1.0, family="residual", alpha=0.25)
    rel = np.abs(pr.measured_q / pr.predicted_q - 1)
    assert np.max(rel) < 4 * math.sqrt(2.0 / n), rel
    assert np.all(pr.measured_q_draw_std > 0) and pr.measured_q_draw_std.shape == (pr.layers.size,)


def test_chaotic_tanh_layer_gain_is_chi_1_at_the_fixed_point():
    # chi_1 = sigma_w^2 E[sech^4(sqrt(q*) z)] (Poole et al. 2016; Schoenholz et al. 2017), by
    # scipy quad; steady-state inputs put every layer at q*
    a, pr = _profile(128, 8, "tanh", "gaussian", 2.0, 0.1, inputs=2)
    q = a.predicted.mean_field.q_star
    want = 4.0 * _mean_sech4(q)
    assert np.max(np.abs(pr.predicted_layer_gain / want - 1)) < 1e-9
    assert np.max(np.abs(pr.predicted_q / q - 1)) < 1e-9
    assert want > 1.2  # chaotic: every layer stretches


def test_derivative_means_match_quadrature_and_the_limit_at_zero():
    # E[tanh'(sqrt(q) z)^2] by scipy quad; at q = 0 the limit tanh'(0)^2 = 1; ReLU 1/2 at any q
    qs = [0.0, 0.3, 0.3, 2.5]
    got = fp.derivative_means("tanh", qs)
    for q, g in zip(qs, got):
        want = 1.0 if q == 0 else _mean_sech4(q)
        assert g == pytest.approx(want, rel=1e-10)
    assert np.allclose(fp.derivative_means("relu", [0.0, 1e-3, 40.0]), 0.5, rtol=0, atol=1e-14)


# ------------------------------------------------------------------ isometry along the stack
def test_predicted_isometry_of_marchenko_pastur_and_of_an_atom():
    # one Gaussian layer, sigma_w = 1, square: lambda follows Marchenko-Pastur with ratio 1,
    # rho(lambda) = sqrt(lambda (4 - lambda)) / (2 pi lambda) on [0, 4] (Marchenko & Pastur 1967);
    # E[min(lambda, 1/lambda)] by scipy quad
    rho = lambda x: math.sqrt(x * (4 - x)) / (2 * math.pi * x)
    want = (
        integrate.quad(lambda x: x * rho(x), 0, 1, epsabs=1e-13)[0]
        + integrate.quad(lambda x: rho(x) / x, 1, 4, epsabs=1e-13)[0]
    )
    got = predicted_isometry(predict("linear", "gaussian", 1.0, 0.0, 1).density)
    assert got == pytest.approx(want, abs=2e-3)  # the density's grid (400 points)
    # an orthogonal linear stack: the point mass at lambda = sigma_w^(2L) = 1
    assert predicted_isometry(predict("linear", "orthogonal", 1.0, 0.0, 7).density) == 1.0


def test_isometric_until_is_the_last_depth_of_the_leading_isometric_run():
    d = np.array([1, 2, 4, 8])
    assert isometric_until(d, [0.9, 0.85, 0.8, 0.95]) == 8
    assert isometric_until(d, [0.9, 0.79, 0.95, 0.95]) == 1  # the run stops at the first failure
    assert isometric_until(d, [0.7, 0.9, 0.9, 0.9]) is None
    assert isometric_until(d, [0.9, math.nan, 0.9, 0.9]) == 1  # no finite score is not isometric
    assert ISOMETRIC_SCORE == 0.8


def test_orthogonal_linear_stack_is_isometric_at_every_depth():
    # a product of orthogonal matrices is orthogonal: every s = 1, score 1 at every depth
    a, pr = _profile(48, 40, "linear", "orthogonal", 1.0, inputs=2)
    assert pr.isometric_until == 40 and pr.predicted_isometric_until == 40
    assert np.all(np.abs(pr.measured_isometry - 1) < 1e-10)
    assert np.all(pr.predicted_isometry == 1.0)


def test_chaotic_design_stops_being_isometric_before_its_depth():
    # tanh at sigma_w = 2 (chi_1 = 1.36 per layer): the spread grows with every layer
    a, pr = _profile(128, 32, "tanh", "gaussian", 2.0, 0.1, inputs=2)
    assert pr.isometric_until is None or pr.isometric_until < 32
    assert pr.predicted_isometric_until is None or pr.predicted_isometric_until < 32
    # the score falls with depth, measured and predicted alike
    assert pr.measured_isometry[-1] < pr.measured_isometry[0]
    assert pr.predicted_isometry[-1] < pr.predicted_isometry[0]


def test_measured_isometry_of_one_gaussian_layer_is_the_marchenko_pastur_value():
    # depth 1, N = 512: the measured score of J_1 is a linear statistic of 512 eigenvalues,
    # whose fluctuations are O(1/N) (eigenvalue rigidity); allowed 0.02 (common practice, no
    # source).  The predicted value is checked against quad above.
    a, pr = _profile(512, 1, "linear", "gaussian", 1.0, inputs=1)
    assert pr.depths.tolist() == [1]
    assert pr.measured_isometry[0] == pytest.approx(pr.predicted_isometry[0], abs=0.02)


# ------------------------------------------------------------------ result.json
def test_result_json_profile_carries_the_per_layer_arrays():
    a, pr = _profile(32, 12, "tanh", "orthogonal", 1.05, 0.02, inputs=2)
    prof = report.result_dict(a)["profile"]
    for key in (
        "depths",
        "measured_log_s_std",
        "predicted_log_s_std",
        "measured_log_m1",
        "predicted_log_m1",
        "measured_isometry",
        "predicted_isometry",
    ):
        assert len(prof[key]) == len(pr.depths), key
    for key in (
        "layers",
        "measured_q",
        "measured_q_draw_std",
        "predicted_q",
        "measured_layer_gain",
        "predicted_layer_gain",
    ):
        assert len(prof[key]) == 12, key
    assert prof["layers"] == list(range(1, 13))
    for key in ("isometric_until", "predicted_isometric_until"):
        assert prof[key] is None or prof[key] in prof["depths"]
    # every profile key has a glossary entry
    glossary = " ".join(k for k in report.GLOSSARY if k.startswith("profile."))
    for key in prof:
        assert key in glossary, key
