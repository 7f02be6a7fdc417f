"""The joined prediction (theory/predict.py) and the measured-vs-predicted agreement (score.py).

Check values: closed forms of THEORY.md sec. 2-4 (m1 = chi_1^L; ReLU tau = L alpha^2 sigma_w^2/2;
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
    return fp.Density(x, rho_log / x, ell, rho_log, sum(w for a, w in atoms if a == 0.0),
                      tuple(atoms), hull, (hull,) if x.size else (), "test law")


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
    left = np.searchsorted(s, grid, side="left") / n          # F_n just below each grid point
    f_law_left = np.where(grid > 0, f_law, 0.0)
    want = max(np.max(np.abs(f_emp - f_law)), np.max(np.abs(left - f_law_left)))
    assert got == pytest.approx(want, abs=1e-6)
    assert got > 0.04  # 35% zeros against a 40% atom: the test can fail


def test_plain_prediction_m1_is_chi1_to_the_depth():
    # THEORY.md sec. 3: m1 = chi_1^L; chi_1 from mean field at the same point
    p = predict("tanh", "orthogonal", 1.2, 0.1, 20)
    x1 = mf.chi1("tanh", 1.2, p.mean_field.q_star)
    assert p.moments.m1 == pytest.approx(x1 ** 20, rel=1e-10)
    assert p.q_law == p.mean_field.q_star
    assert not p.notes


def test_length_mode_is_the_length_map_slope_to_the_depth():
    # Poole et al. 2016: a relative change of the input length propagates with V'(q*) per layer
    p = predict("tanh", "orthogonal", 1.0091, 0.001, 64)
    assert p.length_mode_s == pytest.approx(math.exp(-64 / p.mean_field.xi_q), rel=1e-9)


def test_marginal_relu_takes_every_layer_at_its_own_variance():
    # ReLU at sigma_w^2 = 2, sigma_b = 0: V(q) = q for every q (THEORY.md sec. 2), q* = 0 says
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
    # THEORY.md sec. 4: ReLU, sigma_b = 0: tau = L alpha^2 sigma_w^2 / 2 whatever q^l does;
    # m1 = e^tau, m2/m1^2 = 1 + 2 tau; the mean mode is flagged (E[relu(h)] > 0)
    p = predict("relu", "gaussian", math.sqrt(2.0), 0.0, 64, family="residual", alpha=0.125)
    assert p.tau == pytest.approx(64 * 0.125 ** 2 * 2.0 / 2.0, rel=1e-12)
    assert p.moments.m1 == pytest.approx(math.e, rel=1e-12)
    assert p.moments.m2 / p.moments.m1 ** 2 == pytest.approx(3.0, rel=1e-12)
    assert p.mean_mode and p.mean_field is None


def test_residual_tanh_has_no_mean_mode():
    p = predict("tanh", "orthogonal", math.sqrt(2.0 / 32), 0.0, 32, family="residual")
    assert not p.mean_mode
    assert 0 < p.tau < 2.0        # tanh: E[phi'^2] < 1, so tau < L sigma_w^2 = 2


def test_log_lambda_stats_of_a_point_law():
    # law 0.5 delta_0 + 0.5 delta_4: over the non-zero part ln lambda = ln 4 exactly
    d = _law(np.array([]), np.array([]), atoms=((0.0, 0.5), (4.0, 0.5)))
    mean, std = log_lambda_stats(d)
    assert mean == pytest.approx(math.log(4.0)) and std == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("kwargs, match", [
    (dict(weights="delta"), "weights"),
    (dict(family="conv2d"), "family"),
])
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
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (p.density.rho_log[1:] + p.density.rho_log[:-1])
                                           * np.diff(p.density.log_x))])
    ell = np.interp(u * cum[-1], cum, p.density.log_x)          # inverse-CDF sampling
    s = np.concatenate([np.full((3, 1), 70.0), np.exp(ell / 2.0)], axis=1)
    spec = from_singular_values(s, np.float64)
    g = agreement(spec, p)
    assert [o.kind for o in g.outliers] == ["mean mode"]
    assert g.outliers[0].measured_s == pytest.approx(70.0)
    assert g.ks < 0.04
    assert any("mean mode" in w for w in g.warnings)
    g_all = agreement(spec, dataclasses.replace(p, mean_mode=False))
    assert g_all.m1_rel_error > 1.0                 # the outlier dominates m1 when kept


def test_unbounded_variance_with_a_q_free_law_is_still_predicted():
    # linear, sigma_w = 1.2, sigma_b = 0.1: V(q) = 1.44 q + 0.01 has no finite fixed point, yet
    # J = W^L...W^1 does not depend on the inputs. Product of L Ginibre matrices (Penson &
    # Zyczkowski 2011, Phys. Rev. E 83, 061118): m1 = sigma_w^{2L}, m2/m1^2 = L + 1
    p = predict("linear", "gaussian", 1.2, 0.1, 4)
    assert p.mean_field is None and p.family == "plain"
    assert p.moments.m1 == pytest.approx(1.44 ** 4, rel=1e-12)
    assert p.moments.m2 / p.moments.m1 ** 2 == pytest.approx(5.0, rel=1e-12)
    assert p.q_layers[-1] > p.q_layers[0]
    assert any("no finite fixed point" in n and "prediction stands" in n for n in p.notes)


def test_unbounded_variance_with_a_q_dependent_law_is_refused():
    # GELU's phi' law depends on q, and q grows without bound at sigma_w^2 = 4: no number
    with pytest.raises(TheoryError, match="no finite stable fixed point"):
        predict("gelu", "gaussian", 2.0, 0.1, 4)
