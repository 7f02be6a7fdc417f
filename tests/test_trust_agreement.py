"""Regression tests for the measured-vs-predicted comparison and the score (issue "Trust").

Each test names the defect it guards against; each failed before its fix.  Check values are
exact results: a product of orthogonal matrices is orthogonal (every s = 1); a linear map
scaled by c has every s = c; the KS distance by its definition evaluated by brute force; the
length map's slope (Poole et al. 2016) for the input-length direction.
"""

import math

import numpy as np
import pytest

from isoscope.analysis import analyze
from isoscope.report import result_dict, summary_table, to_json
from isoscope.score import ks_distance, score_spectrum, tail_share
from isoscope.spec import parse_spec
from isoscope.spectrum import from_singular_values
from isoscope.theory import free_probability as fp
from isoscope.theory import mean_field as mf


def _analyze(net, init, **analysis):
    analysis.setdefault("inputs", 2)
    return analyze(parse_spec({"network": net, "init": init, "analysis": analysis}))


def _no_disagreement(a):
    return not any("disagree" in w for w in a.warnings)


# ----------------------------------------------------------------------------- atoms and KS
@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_orthogonal_linear_stack_sits_on_its_atom(dtype):
    # J = Q_10 ... Q_1 is orthogonal: every s = 1 exactly (to rounding), and the predicted law
    # is one atom at lambda = 1.  Before: KS 0.64 and "spectra disagree ... widen the network"
    a = _analyze(
        {"width": 64, "depth": 10, "activation": "linear"},
        {"weights": "orthogonal", "sigma_w": 1.0},
        dtype=dtype,
    )
    assert a.predicted.density.atoms == ((1.0, 1.0),)
    assert a.agreement.ks == pytest.approx(0.0, abs=1e-12)
    assert a.score.verdict == "isometric" and _no_disagreement(a), a.warnings


def test_tanh_at_q_star_zero_sits_on_its_atom_and_is_mis_scaled_not_spread():
    # tanh, sigma_b = 0, sigma_w = 0.9 < 1: q* = 0, the input is phi(0) = 0 and
    # J = prod (phi'(0) sigma_w Q_l): every s = 0.9^10 exactly, one atom at 0.81^10.
    # Before: KS 0.64 (tanh sigma_b = 0), and the verdict said "singular values spread"
    a = _analyze(
        {"width": 64, "depth": 10, "activation": "tanh"},
        {"weights": "orthogonal", "sigma_w": 0.9, "sigma_b": 0.0},
    )
    ((loc, weight),) = a.predicted.density.atoms
    assert loc == pytest.approx(0.81**10, rel=1e-12) and weight == 1.0
    assert a.agreement.ks == pytest.approx(0.0, abs=1e-12)
    assert a.score.log_s_std < 1e-12
    assert a.score.verdict == "mis-scaled", a.score


def test_hard_tanh_top_atom_is_matched():
    # hard-tanh, orthogonal: the units that stay in the linear part in every layer form an atom
    # at sigma_w^{2L} of weight 1 - L(1 - p), p = erf(1/sqrt(2 q*)) (free multiplicative
    # convolution of Bernoulli laws).  Before: KS 0.448 with m1 within 3%
    sb = 0.05
    sw = 1.008853485173802
    a = _analyze(
        {"width": 300, "depth": 20, "activation": "hard-tanh"},
        {"weights": "orthogonal", "sigma_w": sw, "sigma_b": sb},
    )
    top = [(x, w) for x, w in a.predicted.density.atoms if x > 0]
    assert len(top) == 1 and top[0][0] == pytest.approx(sw**40, rel=1e-12)
    assert a.agreement.ks < 0.05, a.agreement.ks
    # the measured share on the atom (within its tolerance) against its predicted weight
    ell = 2.0 * a.spectrum.log_s.ravel()
    on = np.mean(np.abs(ell - math.log(top[0][0])) <= a.agreement.atom_tolerance)
    assert on == pytest.approx(top[0][1], abs=0.05), (on, top[0][1])


def test_ks_with_ties_on_an_atom_matches_the_definition():
    # law 0.5 delta_1 + 0.5 Exp(1) in lambda; sample: 48% of values on the atom, jittered by
    # 1e-15 relative either side (as an SVD returns them), the rest Exp(1).  D = sup |F_n - F|
    # by brute force on the de-jittered sample (the definition, Kolmogorov 1933)
    rng = np.random.default_rng(11)
    n = 3000
    on_atom = rng.random(n) < 0.48
    lam = np.where(on_atom, 1.0 + 1e-15 * rng.choice([-1.0, 1.0], n), rng.exponential(size=n))
    ell = np.linspace(-25.0, 4.0, 200001)
    x = np.exp(ell)
    law = fp.Density(
        x,
        0.5 * np.exp(-x),
        ell,
        0.5 * x * np.exp(-x),
        0.0,
        ((1.0, 0.5),),
        (x[0], x[-1]),
        ((x[0], x[-1]),),
        "test law",
    )
    got = ks_distance(np.log(lam), law, atom_tol=1e-12)
    clean = np.sort(np.where(on_atom, 1.0, lam))
    grid = np.unique(np.concatenate([clean, clean * (1 - 1e-9), clean * (1 + 1e-9)]))
    f_emp = np.searchsorted(clean, grid, side="right") / n
    f_law = 0.5 * (1.0 - np.exp(-grid)) + 0.5 * (grid >= 1.0)
    want = np.max(np.abs(f_emp - f_law))
    assert got == pytest.approx(want, abs=1e-4)
    assert ks_distance(np.log(lam), law) > 0.2  # without the tolerance the jump is missed


# ----------------------------------------------------------------------------- gain in logs
def test_score_of_a_gain_below_float64_is_vanishing_not_a_crash():
    # every s = 1e-200: m1 = 1e-400 underflows float64; before: ZeroDivisionError in the score
    sc = score_spectrum(from_singular_values(np.full((2, 8), 1e-200), np.float64), depth=10)
    assert sc.verdict == "vanishing"
    assert sc.log10_gain == pytest.approx(-400.0, rel=1e-12)
    assert sc.normalised_variance == pytest.approx(0.0, abs=1e-12)
    assert sc.gain_per_layer == pytest.approx(1e-40, rel=1e-9)


def test_all_zero_spectrum_has_no_spread_number():
    # every s = 0: mean and std of ln s over no values are both undefined (JSON null);
    # before: std 0.0 beside a null mean
    sp = from_singular_values(np.zeros((2, 4)), np.float64)
    assert math.isnan(sp.log_s_mean) and math.isnan(sp.log_s_std)


# ----------------------------------------------------------------------------- outliers
def test_input_length_direction_is_set_apart_and_the_bulk_is_scored():
    # tanh at the critical point for sigma_b = 0.002, width 32, depth 200: the direction along
    # the input follows the length map, s = V'(q*)^L (Poole et al. 2016), far below the bulk.
    # Before: kept in std ln s (1.02 against a bulk of 0.29) and in the verdict
    sb = 0.002
    sw = mf.critical_point("tanh", sb).sigma_w
    a = _analyze(
        {"width": 32, "depth": 200, "activation": "tanh"},
        {"weights": "orthogonal", "sigma_w": sw, "sigma_b": sb},
        inputs=4,
    )
    (o,) = a.agreement.outliers
    assert o.kind == "input-length direction" and o.side == "bottom"
    q = mf.fixed_point("tanh", sw, sb)
    assert o.predicted_s == pytest.approx(mf.length_map_slope("tanh", sw, q) ** 200, rel=1e-9)
    assert 0.5 < o.measured_s / o.predicted_s < 2.0  # finite width: same order, one draw each
    assert a.spectrum.log_s_std > 2.5 * a.score.log_s_std
    assert a.score.log_s_std == pytest.approx(a.predicted.log_s_std, rel=0.25)
    assert "set apart" in a.score.scored
    r = result_dict(a)
    assert r["agreement"]["outliers"][0]["kind"] == "input-length direction"


# ----------------------------------------------------------------------------- heavy tails
def test_tail_share_of_exact_laws():
    # one atom (every lambda = 1): nothing lies above the top quantile level, share 0
    one = fp.Density(
        np.zeros(0),
        np.zeros(0),
        np.zeros(0),
        np.zeros(0),
        0.0,
        ((1.0, 1.0),),
        (1.0, 1.0),
        (),
        "atom",
    )
    assert tail_share(one, 1, 100) == pytest.approx(0.0, abs=1e-15)
    assert tail_share(one, 2, 8) == pytest.approx(0.0, abs=1e-15)
    # Exp(1), m1 = 1: E[(lambda - Q)_+] = e^{-Q} = 1/N at the 1 - 1/N quantile Q = ln N
    # (direct integration); m2 = 2: E[(lambda^2 - Q^2)_+] = e^{-Q}(2Q + 2) = 2(1 + ln N)/N
    ell = np.linspace(-30.0, 4.0, 400001)
    x = np.exp(ell)
    expo = fp.Density(
        x, np.exp(-x), ell, x * np.exp(-x), 0.0, (), (x[0], x[-1]), ((x[0], x[-1]),), "Exp(1)"
    )
    n = 50
    assert tail_share(expo, 1, n) == pytest.approx(1.0 / n, rel=2e-3)
    assert tail_share(expo, 2, n) == pytest.approx((1.0 + math.log(n)) / n, rel=2e-3)


def test_heavy_tail_gain_is_judged_by_a_robust_statistic():
    # leaky ReLU, orthogonal, width 256, depth 64: 13% of the predicted m1 lies above the top
    # 1/256 quantile level, so the measured m1 (a third below theory here) cannot be compared
    # with the predicted 1.005.  Before: "gain near 1" with no warning
    a = _analyze(
        {"width": 256, "depth": 64, "activation": "leaky-relu"},
        {"weights": "orthogonal", "sigma_w": 1.4142, "sigma_b": 0.1},
        inputs=4,
    )
    g = a.agreement
    assert not g.m1_reliable and g.tail_share[0] > 0.1
    assert any("cannot estimate the gain m1" in w for w in a.warnings)
    assert not g.disagree or "m1 off" not in " ".join(a.warnings)
    if a.score.gain_basis == "predicted m1":
        assert "mean of ln s" in a.score.reason and "agrees with theory" in a.score.reason
    text = summary_table([a]) + to_json(result_dict(a))
    assert "inf%" not in text and "nan" not in text.lower().replace("nanoseconds", "")


# ----------------------------------------------------------------------------- warnings
def test_depth_above_width_is_not_a_warning_when_the_spectra_agree():
    # linear orthogonal, width 16, depth 32: L >= N, yet every s = 1 and KS = 0.  Before: the
    # blanket "the infinite-width prediction does not apply (widen the network)"
    a = _analyze(
        {"width": 16, "depth": 32, "activation": "linear"},
        {"weights": "orthogonal", "sigma_w": 1.0},
    )
    assert a.agreement.ks == pytest.approx(0.0, abs=1e-12)
    assert not any("width" in w for w in a.warnings), a.warnings


def test_disagreement_names_the_inputs_not_finite_width():
    # hard-tanh with inputs of variance 25 far from q* = 0.279: the prediction takes every layer
    # at q*, so the disagreement is the inputs' doing.  Before: "finite width is the likely
    # cause ... widen"
    a = _analyze(
        {"width": 64, "depth": 20, "activation": "hard-tanh"},
        {"weights": "orthogonal", "sigma_w": 1.05, "sigma_b": 0.05},
        input="gaussian",
        input_variance=25.0,
    )
    assert a.agreement.disagree
    assert a.agreement.cause.startswith("the inputs are not at the fixed point")
    said = [w for w in a.warnings if "disagree" in w]
    assert len(said) == 1 and "finite width" not in said[0], said


def test_moments_are_taken_in_logs_and_the_terminal_shows_a_dash_where_json_has_null():
    # s spanning 1e-150..1e150 (40 log-spaced values): m2 = 1e600/40 overflows float64, but
    # m2/m1^2 - 1 = 40 sum(s^4)/sum(s^2)^2 - 1 is 39 to rounding (the top value dominates both)
    s = np.geomspace(1e-150, 1e150, 40)[None, :]
    sc = score_spectrum(from_singular_values(s, np.float64), depth=4)
    assert sc.normalised_variance == pytest.approx(39.0, rel=1e-9)
    # every s = 0: std ln s undefined -> JSON null and "—" on the terminal (before: 0.000)
    from isoscope.report import _cell

    zero = score_spectrum(from_singular_values(np.zeros((1, 4)), np.float64), depth=4)
    assert math.isnan(zero.log_s_std) and _cell(zero.log_s_std, ".3f") == "—"
    assert _cell(math.inf, ".3g") == "—" and _cell(0.5, ".3f") == "0.500"
