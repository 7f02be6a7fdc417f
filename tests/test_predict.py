"""The joined prediction (theory/predict.py) and the measured-vs-predicted agreement (score.py).

Check values: closed forms of docs/theory-mean-field.md, docs/theory-free-probability.md (m1 = chi_1^L; ReLU tau = L alpha^2 sigma_w^2/2;
the length-map slope), scipy.stats.kstest for the KS distance, and the KS definition evaluated
by brute force.
"""

import dataclasses
import math

import numpy as np
import pytest
from scipy import stats

from isoscope.errors import TheoryError
from isoscope.score import agreement, ks_distance
from isoscope.spectrum import from_singular_values
from isoscope.theory import free_probability as fp
from isoscope.theory import mean_field as mf
from isoscope.theory.predict import log_lambda_stats, predict


def _law(ell, rho_log, atoms=()):
    """A Density built by hand from a known law (density of ln lambda on a grid, atoms)."""
    x = np.exp(ell)
    hull = (x[0], x[-1]) if x.size else (0.0, 0.0)
    return fp.Density(
        x,
        rho_log / x,
        ell,
        rho_log,
        sum(w for a, w in atoms if a == 0.0),
        tuple(atoms),
        hull,
        (hull,) if x.size else (),
        "test law",
    )


def _exponential(weight=1.0, atoms=()):
    ell = np.linspace(-25.0, 4.0, 200001)
    lam = np.exp(ell)
    return _law(ell, weight * lam * np.exp(-lam), atoms)


def test_ks_distance_matches_scipy_kstest_for_a_continuous_law():
    # lambda ~ Exp(1): the one-sample KS statistic of scipy.stats.kstest
    sample = stats.expon.rvs(size=3000, random_state=np.random.default_rng(3))
    want = stats.kstest(sample, "expon").statistic
    got = ks_distance(np.log(sample), _exponential())
    assert got == pytest.approx(want, abs=2e-5)


def test_ks_distance_with_an_atom_at_zero_matches_the_definition():
    # law 0.4 delta_0 + 0.6 Exp(1); sample with 35% exact zeros; D = sup_x |F_n(x) - F(x)|
    # evaluated by brute force on a fine grid straddling every sample point.
    rng = np.random.default_rng(5)
    n = 2000
    sample = np.where(rng.random(n) < 0.35, 0.0, rng.exponential(size=n))
    density = _exponential(0.6, atoms=((0.0, 0.4),))
    got = ks_distance(np.where(sample > 0, np.log(np.maximum(sample, 1e-300)), -np.inf), density)
    s = np.sort(sample)
    grid = np.unique(np.concatenate([s, s * (1 - 1e-12), s * (1 + 1e-12), [0.0]]))
    f_emp = np.searchsorted(s, grid, side="right") / n
    f_law = 0.4 + 0.6 * (1.0 - np.exp(-grid))
    left = np.searchsorted(s, grid, side="left") / n  # F_n just below each grid point
    f_law_left = np.where(grid > 0, f_law, 0.0)
    want = max(np.max(np.abs(f_emp - f_law)), np.max(np.abs(left - f_law_left)))
    assert got == pytest.approx(want, abs=1e-6)
    assert got > 0.04  # 35% zeros against a 40% atom: the test can fail


def test_plain_prediction_m1_is_chi1_to_the_depth():
    # docs/theory-free-probability.md: m1 = chi_1^L; chi_1 from mean field at the same point
    p = predict("tanh", "orthogonal", 1.2, 0.1, 20)
    x1 = mf.chi1("tanh", 1.2, p.mean_field.q_star)
    assert p.moments.m1 == pytest.approx(x1**20, rel=1e-10)
    assert p.q_law == p.mean_field.q_star
    assert not p.notes


def test_length_mode_is_the_length_map_slope_to_the_depth():
    # Poole et al. 2016: a relative change of the input length propagates with V'(q*) per layer
    p = predict("tanh", "orthogonal", 1.0091, 0.001, 64)
    assert p.length_mode_s == pytest.approx(math.exp(-64 / p.mean_field.xi_q), rel=1e-9)


def test_marginal_relu_takes_every_layer_at_its_own_variance():
    # ReLU at sigma_w^2 = 2, sigma_b = 0: V(q) = q for every q (docs/theory-mean-field.md), q* = 0 says
    # nothing; the law of phi'^2 is Bernoulli(1/2) at any q, the zero atom 1/2 (sec. 3).
    # input_variance is the input mean square q^0, so q^1 = sigma_w^2 q^0 = 1.4 at every layer
    p = predict("relu", "orthogonal", math.sqrt(2.0), 0.0, 8, input_variance=0.7)
    assert p.q_law == pytest.approx(2.0 * 0.7)
    assert p.density.atom_at_zero == pytest.approx(0.5, abs=1e-12)
    assert p.moments.m1 == pytest.approx(1.0, rel=1e-12)
    assert not p.notes


def test_inputs_off_the_fixed_point_are_noted():
    p = predict("tanh", "orthogonal", 1.2, 0.1, 10, input_variance=3.0)
    assert any("not at the fixed point" in n for n in p.notes)


def test_residual_relu_tau_is_exact():
    # docs/theory-free-probability.md sec. 7: ReLU, sigma_b = 0: tau = L alpha^2 sigma_w^2 / 2 whatever q^l does;
    # m1 = e^tau, m2/m1^2 = 1 + 2 tau; the mean mode is flagged (E[relu(h)] > 0)
    p = predict("relu", "gaussian", math.sqrt(2.0), 0.0, 64, family="residual", alpha=0.125)
    assert p.tau == pytest.approx(64 * 0.125**2 * 2.0 / 2.0, rel=1e-12)
    assert p.moments.m1 == pytest.approx(math.e, rel=1e-12)
    assert p.moments.m2 / p.moments.m1**2 == pytest.approx(3.0, rel=1e-12)
    assert p.mean_mode and p.mean_field is None


def test_residual_tanh_has_no_mean_mode():
    p = predict("tanh", "orthogonal", math.sqrt(2.0 / 32), 0.0, 32, family="residual")
    assert not p.mean_mode
    assert 0 < p.tau < 2.0  # tanh: E[phi'^2] < 1, so tau < L sigma_w^2 = 2


def test_log_lambda_stats_of_a_point_law():
    # law 0.5 delta_0 + 0.5 delta_4: over the non-zero part ln lambda = ln 4 exactly
    d = _law(np.array([]), np.array([]), atoms=((0.0, 0.5), (4.0, 0.5)))
    mean, std = log_lambda_stats(d)
    assert mean == pytest.approx(math.log(4.0)) and std == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(weights="delta"), "weights"),
        (dict(family="conv2d"), "family"),
    ],
)
def test_prediction_refuses_what_theory_does_not_cover(kwargs, match):
    base = dict(activation="tanh", weights="orthogonal", sigma_w=1.1, sigma_b=0.1, depth=4)
    base.update(kwargs)
    with pytest.raises(TheoryError, match=match):
        predict(**base)


def test_agreement_excludes_the_mean_mode_and_warns():
    # a sample drawn from the predicted law itself, plus one huge value per draw
    p = predict("relu", "gaussian", math.sqrt(2.0), 0.0, 64, family="residual", alpha=0.125)
    rng = np.random.default_rng(0)
    u = rng.random((3, 500))
    cum = np.concatenate(
        [
            [0.0],
            np.cumsum(
                0.5 * (p.density.rho_log[1:] + p.density.rho_log[:-1]) * np.diff(p.density.log_x)
            ),
        ]
    )
    ell = np.interp(u * cum[-1], cum, p.density.log_x)  # inverse-CDF sampling
    s = np.concatenate([np.full((3, 1), 70.0), np.exp(ell / 2.0)], axis=1)
    spec = from_singular_values(s, np.float64)
    g = agreement(spec, p)
    assert [o.kind for o in g.outliers] == ["mean mode"]
    assert g.outliers[0].measured_s == pytest.approx(70.0)
    assert g.ks < 0.04
    assert any("mean mode" in w for w in g.warnings)
    g_all = agreement(spec, dataclasses.replace(p, mean_mode=False))
    assert g_all.m1_rel_error > 1.0  # the outlier dominates m1 when kept


def test_unbounded_variance_with_a_q_free_law_is_still_predicted():
    # linear, sigma_w = 1.2, sigma_b = 0.1: V(q) = 1.44 q + 0.01 has no finite fixed point, yet
    # J = W^L...W^1 does not depend on the inputs. Product of L Ginibre matrices (Penson &
    # Zyczkowski 2011, Phys. Rev. E 83, 061118): m1 = sigma_w^{2L}, m2/m1^2 = L + 1
    p = predict("linear", "gaussian", 1.2, 0.1, 4)
    assert p.mean_field is None and p.family == "plain"
    assert p.moments.m1 == pytest.approx(1.44**4, rel=1e-12)
    assert p.moments.m2 / p.moments.m1**2 == pytest.approx(5.0, rel=1e-12)
    assert p.q_layers[-1] > p.q_layers[0]
    assert any("no finite fixed point" in n and "prediction stands" in n for n in p.notes)


def test_unbounded_variance_with_a_q_dependent_law_is_refused():
    # GELU's phi' law depends on q, and q grows without bound at sigma_w^2 = 4: no number
    with pytest.raises(TheoryError, match="no finite stable fixed point"):
        predict("gelu", "gaussian", 2.0, 0.1, 4)


# ---------------------------------------------------------------------------------------------
# Issue 8: homogeneous stacks at q* = 0, logs, tails, labels, near-isometric laws, leaky slope
# ---------------------------------------------------------------------------------------------


def _spec(**network):
    from isoscope.spec import parse_spec

    init = network.pop("init", {})
    analysis = network.pop("analysis", {})
    return parse_spec({"network": network, "init": init, "analysis": analysis})


def test_relu_at_q_star_zero_is_predicted_with_the_length_decay():
    # ReLU, Gaussian, sigma_w = 1, sigma_b = 0: q* = 0; m1 = chi_1^L = (sigma_w^2/2)^L
    # (Poole et al. 2016; P17: m1 = chi_1^L), the variance halves per layer (V(q) = q/2).
    from isoscope.analysis import plan_inputs, predict_spec

    spec = _spec(activation="relu", depth=10, init={"weights": "gaussian", "sigma_w": 1.0})
    plan, _ = plan_inputs(spec)
    assert plan.variance == 1.0 and "homogeneous" in plan.detail  # not the zero input
    p = predict_spec(spec)
    assert p.mean_field.q_star == 0.0
    assert p.moments.m1 == pytest.approx(2.0**-10, rel=1e-12)
    assert p.moments.log_m1 == pytest.approx(-10 * math.log(2.0), rel=1e-12)
    assert p.length_factor == pytest.approx(0.5, rel=1e-12)
    assert any("q* = 0" in n and "0.5 per layer" in n for n in p.notes)
    assert p.q_law > 0 and p.density.atom_at_zero == pytest.approx(0.5)


def test_log_moments_where_the_moments_underflow():
    # tanh Gaussian sigma_w = 0.3, sigma_b = 0.1, L = 1000: m1 = chi_1^L = e^-2429, below float64.
    # ln m1 = L ln chi_1 exactly, ln m2 = 2 ln m1 + ln(1 + L t1), t1 = mu2/mu1^2 (Gaussian;
    # Pennington et al. 2017, moments by Lagrange inversion).
    L = 1000
    p = predict("tanh", "gaussian", 0.3, 0.1, L)
    mfp = p.mean_field
    mu1, mu2 = mf.derivative_moments("tanh", mfp.q_star, 2)
    assert p.moments.log_m1 == pytest.approx(L * math.log(mfp.chi1), rel=1e-12)
    assert p.moments.log_m2 == pytest.approx(
        2 * p.moments.log_m1 + math.log1p(L * mu2 / mu1**2), rel=1e-12
    )
    assert p.moments.m1 is None and p.moments.unrepresentable() == ("m1", "m2", "m3", "m4")
    assert all(math.isfinite(v) for v in p.moments.logs)
    lo, hi = p.density.log_support
    assert math.isfinite(lo) and math.isfinite(hi) and hi < -708
    assert all(math.isnan(v) for v in p.density.support)  # never a silent 0.0
    assert not p.density.in_float_range
    assert any("outside the float64 range" in n for n in p.notes)


@pytest.mark.parametrize("act, sw, sb, L", [("tanh", 3.0, 0.1, 2000), ("erf", 2.5, 0.0, 3000)])
def test_log_moments_where_the_moments_overflow(act, sw, sb, L):
    p = predict(act, "gaussian", sw, sb, L)
    assert p.moments.log_m1 == pytest.approx(L * math.log(p.mean_field.chi1), rel=1e-12)
    assert p.moments.m1 is None and p.moments.log_m1 > 710
    assert math.isnan(p.density.support[1]) and p.density.log_support[1] > 710


def test_saturated_tanh_has_no_spurious_zero_atom_and_m1_is_chi1_to_the_depth():
    # tanh' = sech^2 never vanishes; chi_1 = sigma_w^2 E[sech^4(sqrt(q*) z)] by mpmath.quad
    import mpmath

    sw, L = 10.0, 30
    m = mf.mean_field("tanh", sw, 0.0)
    law = fp.derivative_law("tanh", m.q_star)
    assert law.zero_weight == 0.0
    mpmath.mp.dps = 30
    s = mpmath.sqrt(m.q_star)
    want = (
        sw
        * sw
        * mpmath.quad(
            lambda z: mpmath.sech(s * z) ** 4 * mpmath.npdf(z), [-mpmath.inf, -2, 0, 2, mpmath.inf]
        )
    )
    assert m.chi1 == pytest.approx(float(want), rel=1e-12)
    assert sw * sw * law.moment(1) == pytest.approx(float(want), rel=1e-12)
    p = predict("tanh", "orthogonal", sw, 0.0, L)
    assert p.density.atom_at_zero == 0.0
    assert p.moments.log_m1 == pytest.approx(L * math.log(m.chi1), rel=1e-12)


def test_chi1_within_the_critical_band_is_critical():
    cp = mf.critical_point("tanh", 0.05)
    near = mf.mean_field("tanh", cp.sigma_w * (1 + 1e-7), 0.05)
    assert 1e-9 < near.chi1 - 1.0 < mf.CRITICAL_TOL  # once labelled "chaotic"
    assert near.phase == "critical" and near.xi_c == math.inf
    assert mf.mean_field("tanh", cp.sigma_w * (1 + 1e-4), 0.05).phase == "chaotic"


def test_uniform_weights_are_named_as_asked():
    from isoscope.cli import _prediction_text

    p = predict("tanh", "uniform", 1.2, 0.05, 4)
    assert p.weights == "uniform" and p.ensemble == "gaussian"
    text = _prediction_text(p)
    assert (
        "uniform weights (predicted as Gaussian: same variance, same infinite-width limit)" in text
    )
    assert "gaussian weights" not in text


def test_terminal_prints_what_json_holds():
    from isoscope.cli import _prediction_text
    from isoscope.report import prediction_dict

    p = predict("tanh", "gaussian", 0.3, 0.1, 1000)
    text, d = _prediction_text(p), prediction_dict(p)
    assert d["lambda_moments"]["m1"] is None
    assert d["log_lambda_moments"]["log_m1"] == pytest.approx(p.moments.log_m1)
    assert "inf" not in text.replace("infinity", "").replace("infinite", "")
    assert "m1 = null (ln -2429" in text and "support of lambda: [null (ln -1" in text


def test_near_isometric_law_is_a_narrow_semicircle():
    # tanh orthogonal at its critical point for sigma_b = 1e-12, L = 1000: once "density
    # integrates to 0.987" (exit 2).  Spread sqrt(L Var(d)/E[d]^2) = 2.5e-8.
    cp = mf.critical_point("tanh", 1e-12)
    p = predict("tanh", "orthogonal", cp.sigma_w, 1e-12, 1000)
    assert "near-isometric" in p.density.regime
    assert p.density.continuous_mass == pytest.approx(1.0, abs=1e-4)
    law = fp.derivative_law("tanh", cp.q_star)
    c = 1000 * law.relative_variance()
    r = 2 * math.sqrt(c)
    lo, hi = p.density.log_support
    assert hi - lo == pytest.approx(math.log1p(r) - math.log1p(-r), rel=1e-6)


@pytest.mark.parametrize("sb", [1e-8, 1e-9])
def test_narrow_law_matches_the_large_depth_edges(sb):
    # small c = L (mu2/mu1^2 - 1): the large-depth law S = exp(-c z) (Pennington et al. 2018)
    # has edges (1 + m) e^{cm}/m; the semicircle's must agree to O(c) (here < 1e-3 of the width)
    cp = mf.critical_point("tanh", sb)
    law = fp.derivative_law("tanh", cp.q_star)
    c = 1000 * law.relative_variance()
    assert c < fp.NARROW_SPREAD**2
    d = fp.plain_density(law, "orthogonal", cp.sigma_w, 1000)
    lo, hi = (math.log(v) for v in fp.plain_limit_edges(c))
    width = hi - lo
    shift = 1000 * math.log(cp.sigma_w**2 * law.moment(1))  # ln m1 (chi_1 = 1 to 1e-12)
    np.testing.assert_allclose(np.array(d.log_support) - shift, (lo, hi), atol=1e-3 * width)


def test_relative_variance_is_accurate_below_rounding():
    # mu2/mu1^2 - 1 for tanh at q = 1e-12 is about 8 q^2 = 8e-24 (docs/check-values.md: tanh variance
    # ~ 8 L q*^2); the naive difference rounds to 0 in float64.  mpmath at 60 digits.
    import mpmath

    q = 1e-12
    law = fp.derivative_law("tanh", q)
    mpmath.mp.dps = 60
    s = mpmath.sqrt(q)
    f = lambda k: mpmath.quad(
        lambda z: mpmath.sech(s * z) ** (4 * k) * mpmath.npdf(z),  # noqa: E731
        [-mpmath.inf, 0, mpmath.inf],
    )
    want = float(f(2) / f(1) ** 2 - 1)
    assert law.relative_variance() == pytest.approx(want, rel=1e-6)


@pytest.mark.parametrize("depth", [1, 2])
def test_gelu_small_variance_gaussian_profile_points(depth):
    # GELU at q* = 0.0039 (sigma_w = 1.2, sigma_b = 0.05): the top quadrature node of phi'^2
    # carries weight 1e-34, and the Gaussian upper edge is z(top+) (once "no upper edge found",
    # which dropped the depth profile); at the profile's 120 points
    p = predict("gelu", "gaussian", 1.2, 0.05, depth, points=120)
    assert p.density.continuous_mass == pytest.approx(1.0, abs=1e-2)
    assert p.density.moment(1) == pytest.approx(p.moments.m1, rel=2e-3)


def test_solver_limit_exits_1(monkeypatch, capsys):
    from isoscope import analysis, cli
    from isoscope.errors import SolverError

    def fail(*a, **k):
        raise SolverError("solver limit: test")

    monkeypatch.setattr(analysis, "predict_spec", fail)
    assert cli.main(["predict", "--activation", "tanh", "--sigma-w", "1", "--depth", "3"]) == 1
    assert "solver limit" in capsys.readouterr().err


def test_leaky_slope_reaches_network_mean_field_and_theory():
    # E[phi'^2] = (1 + a^2)/2 for h symmetric: chi_1 = sigma_w^2 (1 + a^2)/2 (closed form)
    from isoscope.analysis import analyze, predict_spec

    a, L = 0.2, 8
    m = mf.mean_field(get_leaky(a), 1.0, 0.0)
    assert m.chi1 == pytest.approx((1 + a * a) / 2, rel=1e-13)
    spec = _spec(
        activation="leaky-relu",
        leaky_slope=a,
        width=256,
        depth=L,
        init={"weights": "gaussian", "sigma_w": 1.0},
        analysis={"inputs": 3},
    )
    assert spec.to_dict()["network"]["leaky_slope"] == a
    p = predict_spec(spec)
    assert p.slope == a and p.moments.m1 == pytest.approx(((1 + a * a) / 2) ** L, rel=1e-12)
    res = analyze(spec)
    measured = res.spectrum.lambda_moment(1)
    # width 256, depth 8, 3 draws: m1 fluctuates by a few % (Hanin & Nica 2019: ln|Ju|^2 has
    # variance ~ 5 L/N for ReLU-like layers); the default slope 0.01 would give a ratio 1.37
    assert measured / p.moments.m1 == pytest.approx(1.0, abs=0.12)


def get_leaky(a):
    from isoscope.activations import get_activation

    return get_activation("leaky-relu", slope=a)


def test_leaky_slope_only_with_leaky_relu():
    from isoscope.errors import InputError

    with pytest.raises(InputError, match="network.leaky_slope.*tanh"):
        _spec(activation="tanh", leaky_slope=0.2)
    assert "leaky_slope" not in _spec(activation="tanh").to_dict()["network"]
    assert _spec(activation="leaky-relu").network.leaky_slope == 0.01
