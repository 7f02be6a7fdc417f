"""Tests for isoscope.theory.mean_field.

Oracles, each named beside its use:
  * closed forms of docs/theory-mean-field.md (linear; ReLU arc-cosine kernel, Cho & Saul 2009; erf,
    Williams 1997; hard-tanh, derived in-house), and Gaussian integrals derived from them;
  * mpmath quadrature at 30 digits (tanh, hard-tanh bivariate moments);
  * the docs/check-values.md (tanh critical line and depth scales, two independent solvers);
  * exact identities between activations: 4 sigmoid(h) - 2 = 2 tanh(h/2), and
    sigmoid(h) = (1 + tanh(h/2))/2;
  * a direct NumPy simulation of wide networks (N = 2000) for the variance trajectories.
"""

from __future__ import annotations

import functools
import math

import mpmath as mp
import numpy as np
import pytest

import isoscope  # noqa: F401  (turns on float64 in jax)
from isoscope.activations import activation_names, get_activation
from isoscope.errors import InputError, SolverError, TheoryError
from isoscope.theory import mean_field as mf

PI = math.pi
QS = (0.05, 0.5, 1.7, 4.0)
CS = (-0.6, 0.0, 0.3, 0.9, 0.999, 0.99999)


# ---------------------------------------------------------------------------------------------
# Closed forms (docs/theory-mean-field.md unless noted)
# ---------------------------------------------------------------------------------------------


def relu_kernel(q: float, c: float) -> tuple[float, float]:
    """E[phi phi], E[phi' phi'] at equal variances q (Cho & Saul 2009, arc-cosine degree 1, halved)."""
    t = math.acos(c)
    return q * (math.sin(t) + (PI - t) * math.cos(t)) / (2 * PI), (PI - t) / (2 * PI)


def erf_kernel(q: float, c: float) -> tuple[float, float]:
    """E[phi phi] (Williams 1997) and E[phi' phi'] = d/dS12 of it (Price's theorem, derived in-house)."""
    a = 1 + 2 * q
    return (2 / PI) * math.asin(2 * q * c / a), (4 / PI) / math.sqrt(a * a - 4 * q * q * c * c)


def hard_tanh_second(q: float) -> float:
    """E[clip(u, -1, 1)^2], u ~ N(0, q) (docs/theory-mean-field.md, derived in-house)."""
    r = 1 / math.sqrt(2 * q)
    return q * (math.erf(r) - math.sqrt(2 / (PI * q)) * math.exp(-1 / (2 * q))) + math.erfc(r)


@pytest.mark.parametrize("q", QS)
def test_length_map_and_chi1_closed_forms(q):
    sw, sb = 1.3, 0.4
    sw2, sb2 = sw * sw, sb * sb
    cases = {
        # activation: (V(q), chi_1) -- docs/theory-mean-field.md
        "linear": (sw2 * q + sb2, sw2),
        "relu": (sw2 * q / 2 + sb2, sw2 / 2),
        "erf": (
            sw2 * (2 / PI) * math.asin(2 * q / (1 + 2 * q)) + sb2,
            (4 * sw2 / PI) / math.sqrt(1 + 4 * q),
        ),
        "hard-tanh": (sw2 * hard_tanh_second(q) + sb2, sw2 * math.erf(1 / math.sqrt(2 * q))),
    }
    for name, (v, x1) in cases.items():
        assert mf.length_map(name, sw, sb, q) == pytest.approx(v, abs=1e-10, rel=1e-10), name
        assert mf.chi1(name, sw, q) == pytest.approx(x1, abs=1e-10, rel=1e-10), name


@pytest.mark.parametrize("q", QS)
def test_length_map_slope_against_derivative_of_closed_forms(q):
    sw = 1.1
    mp.mp.dps = 30
    # erf: d/dq (2/pi) asin(2q/(1+2q)) = (4/pi)/((1+2q) sqrt(1+4q))  (derived in-house)
    erf_slope = sw * sw * (4 / PI) / ((1 + 2 * q) * math.sqrt(1 + 4 * q))
    assert mf.length_map_slope("erf", sw, q) == pytest.approx(erf_slope, rel=1e-10)
    # relu: V = sigma_w^2 q / 2 (docs/theory-mean-field.md)
    assert mf.length_map_slope("relu", sw, q) == pytest.approx(sw * sw / 2, rel=1e-10)
    # hard-tanh: mpmath.diff of the closed form of E[phi^2] (docs/theory-mean-field.md), 30 digits
    ht = lambda t: (
        t * (mp.erf(1 / mp.sqrt(2 * t)) - mp.sqrt(2 / (mp.pi * t)) * mp.exp(-1 / (2 * t)))
        + mp.erfc(1 / mp.sqrt(2 * t))
    )  # noqa: E731
    assert mf.length_map_slope("hard-tanh", sw, q) == pytest.approx(
        sw * sw * float(mp.diff(ht, q)), rel=1e-10
    )


def test_length_map_slope_limits_at_zero():
    # q -> 0+: V'(0) = sigma_w^2 phi'(0)^2 for smooth phi(0) = 0; ReLU's two-sided average 1/2;
    # sigmoid: phi'(0)^2 + phi(0) phi''(0) = 1/16 (phi''(0) = 0).
    assert mf.length_map_slope("tanh", 0.9, 0.0) == pytest.approx(0.81, rel=1e-12)
    assert mf.length_map_slope("centred-sigmoid", 1.0, 0.0) == pytest.approx(1.0, rel=1e-12)
    assert mf.length_map_slope("relu", 1.2, 0.0) == pytest.approx(0.72, rel=1e-12)
    assert mf.length_map_slope("sigmoid", 2.0, 0.0) == pytest.approx(4 / 16, rel=1e-12)
    # and the small-q values approach the limit (finite differences of the quadrature)
    assert mf.length_map_slope("tanh", 0.9, 1e-6) == pytest.approx(0.81, rel=1e-5)


@pytest.mark.parametrize("q", (0.4, 1.3))
def test_bivariate_moments_closed_forms(q):
    # with sigma_w = 1, sigma_b = 0: q C(c) = E[phi(u1) phi(u2)], C'(c) = E[phi'(u1) phi'(u2)]
    for c in CS:
        for name, kernel in (
            ("relu", relu_kernel),
            ("erf", erf_kernel),
            ("linear", lambda q_, c_: (q_ * c_, 1.0)),
        ):
            e_pp, e_dd = kernel(q, c)
            assert q * mf.correlation_map(name, 1.0, 0.0, q, c) == pytest.approx(e_pp, abs=1e-10), (
                name,
                c,
            )
            assert mf.correlation_slope(name, 1.0, q, c) == pytest.approx(e_dd, abs=1e-10), (
                name,
                c,
            )


def _mp_bivariate_hard_tanh(q: float, c: float) -> tuple[float, float]:
    """E[phi phi], E[phi' phi'] for hard-tanh by a 1-D mpmath integral over u1 of closed-form
    conditional expectations given u1 (u2 | u1 ~ N(c u1, q (1 - c^2))), 30 digits."""
    mp.mp.dps = 30
    q, c = mp.mpf(q), mp.mpf(c)
    s = mp.sqrt(q * (1 - c * c))

    def clip_mean(m):  # E[clip(Y, -1, 1)], Y ~ N(m, s^2)
        a, b = (-1 - m) / s, (1 - m) / s
        return (
            -mp.ncdf(a)
            + (1 - mp.ncdf(b))
            + m * (mp.ncdf(b) - mp.ncdf(a))
            + s * (mp.npdf(a) - mp.npdf(b))
        )

    def inside(m):  # P(|Y| < 1)
        return mp.ncdf((1 - m) / s) - mp.ncdf((-1 - m) / s)

    dens = lambda u: mp.npdf(u, 0, mp.sqrt(q))  # noqa: E731
    clip = lambda u: max(-1, min(1, u))  # noqa: E731
    e_pp = mp.quad(lambda u: dens(u) * clip(u) * clip_mean(c * u), [-mp.inf, -1, 1, mp.inf])
    e_dd = mp.quad(lambda u: dens(u) * inside(c * u), [-1, 1])
    return float(e_pp), float(e_dd)


@pytest.mark.parametrize("q,c", [(0.4, 0.3), (1.3, -0.6), (1.3, 0.9), (2.5, 0.0)])
def test_bivariate_moments_hard_tanh_mpmath(q, c):
    e_pp, e_dd = _mp_bivariate_hard_tanh(q, c)
    assert q * mf.correlation_map("hard-tanh", 1.0, 0.0, q, c) == pytest.approx(e_pp, abs=1e-10)
    assert mf.correlation_slope("hard-tanh", 1.0, q, c) == pytest.approx(e_dd, abs=1e-10)


def test_tanh_expectation_mpmath_spot_check():
    # mpmath.quad with the normal density, 30 digits: E[tanh(sqrt(0.7) z)^2] and E[tanh'^2]
    mp.mp.dps = 30
    s = mp.sqrt(mp.mpf("0.7"))
    e2 = mp.quad(lambda z: mp.tanh(s * z) ** 2 * mp.npdf(z), [-mp.inf, 0, mp.inf])
    d2 = mp.quad(lambda z: mp.sech(s * z) ** 4 * mp.npdf(z), [-mp.inf, 0, mp.inf])
    assert mf.length_map("tanh", 1.0, 0.0, 0.7) == pytest.approx(float(e2), abs=1e-12)
    assert mf.chi1("tanh", 1.0, 0.7) == pytest.approx(float(d2), abs=1e-12)


def test_derivative_moments_closed_forms():
    q = 0.8
    ks = np.arange(1, 6)
    # relu: phi'^2 in {0, 1} with P = 1/2; hard-tanh: P(|h| < 1) = erf(1/sqrt(2q)) (docs/theory-free-probability.md)
    np.testing.assert_allclose(mf.derivative_moments("relu", q, 5), 0.5, atol=1e-12)
    np.testing.assert_allclose(
        mf.derivative_moments("hard-tanh", q, 5), math.erf(1 / math.sqrt(2 * q)), atol=1e-12
    )
    np.testing.assert_allclose(mf.derivative_moments("linear", q, 5), 1.0, atol=1e-12)
    # erf: phi'^(2k) = (4/pi)^k exp(-2k h^2), E = (4/pi)^k / sqrt(1 + 4kq) (Gaussian integral, derived)
    np.testing.assert_allclose(
        mf.derivative_moments("erf", q, 5), (4 / PI) ** ks / np.sqrt(1 + 4 * ks * q), rtol=1e-11
    )
    # q -> 0+ limit: ReLU keeps 1/2 (not phi'(0)^2 = 0), tanh gives phi'(0)^(2k) = 1
    np.testing.assert_allclose(mf.derivative_moments("relu", 0.0, 3), 0.5, atol=1e-15)
    np.testing.assert_allclose(mf.derivative_moments("tanh", 0.0, 3), 1.0, atol=1e-15)
    assert mf.derivative_moments("tanh", q).shape == (4,)


# ---------------------------------------------------------------------------------------------
# Fixed points, phases, depth scales
# ---------------------------------------------------------------------------------------------

# docs/theory-mean-field.md check values (two independent in-house solvers, agree to 1e-12)
TANH_CRITICAL = [
    (0.01, 1.424205290489, 0.273300913458),
    (0.05, 1.760954639607, 0.570047881641),
    (0.1, 1.986072641136, 0.805799181913),
]


@pytest.mark.parametrize("sb2,sw2,q_star", TANH_CRITICAL)
def test_tanh_critical_points(sb2, sw2, q_star):
    cp = mf.critical_point("tanh", math.sqrt(sb2))
    assert cp.sigma_w2 == pytest.approx(sw2, abs=1e-9)
    assert cp.q_star == pytest.approx(q_star, abs=1e-9)
    assert cp.sigma_w == pytest.approx(math.sqrt(cp.sigma_w2), rel=1e-15)
    assert cp.sigma_b2 == pytest.approx(sb2, rel=1e-15)
    res = mf.mean_field("tanh", cp.sigma_w, cp.sigma_b)
    assert res.phase == "critical"
    assert res.xi_c == math.inf
    assert res.c_star == 1.0
    assert math.isfinite(res.xi_q)


def test_tanh_depth_scales_check_values():
    sb = math.sqrt(0.05)
    # docs/theory-mean-field.md: sigma_w^2 = 1.0: q* = 0.193593, chi_1 = 0.759032, xi_q = 1.7476, xi_c = 3.6270
    r = mf.mean_field("tanh", 1.0, sb)
    assert r.phase == "ordered" and r.c_star == 1.0
    assert r.q_star == pytest.approx(0.193593, abs=5e-7)
    assert r.chi1 == pytest.approx(0.759032, abs=5e-7)
    assert r.xi_q == pytest.approx(1.7476, abs=5e-5)
    assert r.xi_c == pytest.approx(3.6270, abs=5e-5)
    # sigma_w^2 = 3.0: q* = 1.428008, chi_1 = 1.208934, c* = 0.299318, xi_q = 1.0415, xi_c = 9.0515
    r = mf.mean_field("tanh", math.sqrt(3.0), sb)
    assert r.phase == "chaotic"
    assert r.q_star == pytest.approx(1.428008, abs=5e-7)
    assert r.chi1 == pytest.approx(1.208934, abs=5e-7)
    assert r.c_star == pytest.approx(0.299318, abs=5e-7)
    assert r.xi_q == pytest.approx(1.0415, abs=5e-5)
    assert r.xi_c == pytest.approx(9.0515, abs=5e-5)
    # c* is a fixed point of the literal map (sigma_w^2 E[phi phi] + sigma_b^2)/q*, which the solver
    # (working on the fixed-point form) does not evaluate
    assert mf.correlation_map("tanh", math.sqrt(3.0), sb, r.q_star, r.c_star) == pytest.approx(
        r.c_star, abs=1e-10
    )


def test_erf_closed_form_critical_line():
    # docs/theory-mean-field.md (derived): q* = ((4 sw2/pi)^2 - 1)/4, sb2 = q* - sw2 (2/pi) asin(2q*/(1+2q*))
    for sw2 in (0.9, 1.2, 2.0, 3.0):
        q = ((4 * sw2 / PI) ** 2 - 1) / 4
        sb2 = q - sw2 * (2 / PI) * math.asin(2 * q / (1 + 2 * q))
        cp = mf.critical_point("erf", math.sqrt(sb2))
        assert cp.sigma_w2 == pytest.approx(sw2, abs=1e-9)
        assert cp.q_star == pytest.approx(q, abs=1e-9)
    line = mf.critical_line("erf", q_max=3.0, points=50)
    assert len(line.q_star) == 50
    np.testing.assert_allclose(line.sigma_w2, (PI / 4) * np.sqrt(1 + 4 * line.q_star), rtol=1e-11)
    np.testing.assert_allclose(
        line.sigma_b2,
        line.q_star - line.sigma_w2 * (2 / PI) * np.arcsin(2 * line.q_star / (1 + 2 * line.q_star)),
        atol=1e-11,
    )
    assert line.sigma_w2[0] == pytest.approx(PI / 4, rel=1e-12)  # q* = 0 end: sigma_w^2 >= pi/4
    cp0 = mf.critical_point("erf", 0.0)
    assert cp0.q_star == 0.0 and cp0.sigma_w2 == pytest.approx(PI / 4, rel=1e-12)


def test_default_critical_line_spans_sigma_b2_up_to_one():
    line = mf.critical_line("tanh")
    assert line.sigma_b2[0] == 0.0 and line.sigma_b2[-1] == pytest.approx(1.0, abs=1e-9)
    assert np.all(np.diff(line.sigma_w2) > 0) and np.all(line.sigma_b2 >= 0)
    # every point is critical: chi_1 = 1 at its own fixed point
    for i in (0, 57, 199):
        assert mf.chi1("tanh", math.sqrt(line.sigma_w2[i]), line.q_star[i]) == pytest.approx(
            1.0, abs=1e-12
        )


def test_centred_sigmoid_identities():
    # docs/theory-mean-field.md: 4 sigmoid - 2 = 2 tanh(h/2): chi_1 = 1 exactly at sigma_w = 1, sigma_b = 0,
    # with q* = 0
    r = mf.mean_field("centred-sigmoid", 1.0, 0.0)
    assert r.q_star == 0.0
    assert r.chi1 == pytest.approx(1.0, abs=1e-12)
    assert r.phase == "critical" and r.xi_c == math.inf and r.xi_q == math.inf
    # with sigma_b = 0, q* is 4x tanh's and chi_1 equals tanh's at the same sigma_w
    for sw in (1.5, 2.2):
        cs, th = mf.mean_field("centred-sigmoid", sw, 0.0), mf.mean_field("tanh", sw, 0.0)
        assert cs.q_star == pytest.approx(4 * th.q_star, rel=1e-11)
        assert cs.chi1 == pytest.approx(th.chi1, rel=1e-11)


def test_sigmoid_critical_point_maps_onto_tanh():
    # sigmoid(h) = (1 + tanh(h/2))/2 (exact): the sigmoid stack at (sw, sb) with variance q is the tanh
    # stack at sigma_w' = sw/4, sigma_b'^2 = sw^2/16 + sb^2/4 with variance q/4, and
    # chi_1(sigmoid) = chi_1(tanh) there (derived in-house by substitution).
    cp = mf.critical_point("sigmoid", 0.0)
    assert cp.sigma_w2 > 16.0  # chi_1 <= sigma_w^2/16 for the sigmoid (docs/theory-mean-field.md)
    tanh = mf.mean_field("tanh", cp.sigma_w / 4, math.sqrt(cp.sigma_w2 / 16))
    assert tanh.q_star == pytest.approx(cp.q_star / 4, rel=1e-9)
    assert tanh.chi1 == pytest.approx(1.0, abs=1e-9)
    assert mf.chi1("sigmoid", cp.sigma_w, cp.q_star) == pytest.approx(1.0, abs=1e-12)
    # the bound itself: E[sigmoid'^2] <= 1/16
    for q in (0.0, 0.5, 5.0):
        assert mf.chi1("sigmoid", 3.0, q) <= 9.0 / 16 + 1e-15


def test_relu_critical_point_and_errors():
    cp = mf.critical_point("relu", 0.0)  # He et al. 2015: sigma_w^2 = 2, sigma_b = 0
    assert cp.sigma_w2 == pytest.approx(2.0, rel=1e-12) and cp.sigma_b == 0.0 and cp.q_star == 0.0
    line = mf.critical_line("relu")
    assert line.sigma_w2.tolist() == pytest.approx([2.0]) and line.sigma_b2.tolist() == [0.0]
    assert mf.critical_line("linear").sigma_w2.tolist() == pytest.approx([1.0])
    with pytest.raises(TheoryError, match="sigma_b = 0.1"):
        mf.critical_point("relu", 0.1)
    with pytest.raises(TheoryError, match="grows without bound"):
        mf.fixed_point("relu", math.sqrt(2.5), 0.0)
    with pytest.raises(TheoryError, match="grows without bound"):
        mf.fixed_point("relu", math.sqrt(2.0), 0.1)
    with pytest.raises(TheoryError):
        mf.mean_field("relu", math.sqrt(2.5), 0.0)
    # at (2, 0) every q is preserved: critical, both depth scales infinite
    r = mf.mean_field("relu", math.sqrt(2.0), 0.0)
    assert r.phase == "critical" and r.xi_q == math.inf and r.xi_c == math.inf


def test_relu_fixed_point_exact_below_criticality():
    # V(q) = sw^2 q / 2 + sb^2 is linear: q* = sb^2 / (1 - sw^2/2); chi_1 = sw^2/2 (docs/theory-mean-field.md)
    sw, sb = 1.2, 0.3
    r = mf.mean_field("relu", sw, sb)
    assert r.q_star == pytest.approx(sb * sb / (1 - sw * sw / 2), rel=1e-12)
    assert r.chi1 == pytest.approx(sw * sw / 2, rel=1e-12)
    assert r.xi_q == pytest.approx(-1 / math.log(sw * sw / 2), rel=1e-10)
    # sigma_b = 0: q* = 0 and chi_1 is the q -> 0+ limit sw^2/2 (not sw^2 phi'(0)^2 = 0)
    r0 = mf.mean_field("relu", sw, 0.0)
    assert r0.q_star == 0.0 and r0.chi1 == pytest.approx(sw * sw / 2, rel=1e-12)
    # C'(c) at q -> 0+ is ReLU's q-independent kernel
    assert mf.correlation_slope("relu", sw, 0.0, 0.3) == pytest.approx(
        sw * sw * relu_kernel(1.0, 0.3)[1], abs=1e-12
    )


def test_zero_fixed_point_is_exact():
    # tanh below criticality, sigma_b = 0: q* = 0 exactly (docs/theory-mean-field.md: root-find, do not iterate)
    assert mf.fixed_point("tanh", 0.9, 0.0) == 0.0
    assert mf.fixed_point("erf", 0.8, 0.0) == 0.0  # chi_1(0) = 4 * 0.64 / pi < 1
    assert mf.fixed_point("tanh", 1.0, 0.0) == 0.0  # marginal: V(q) < q for q > 0
    r = mf.mean_field("tanh", 0.9, 0.0)
    assert r.q_star == 0.0 and r.phase == "ordered"
    assert r.chi1 == pytest.approx(0.81, rel=1e-12)
    # sigma_b -> 0+ continuity: xi_c = -1/ln chi_1 at q* = 0 equals the limit of small biases
    small = mf.mean_field("tanh", 0.9, 1e-4)
    assert small.q_star == pytest.approx(1e-8 / (1 - 0.81), rel=1e-4)
    assert r.xi_c == pytest.approx(-1 / math.log(0.81), rel=1e-12)
    assert small.xi_c == pytest.approx(r.xi_c, rel=1e-6)
    # above criticality q* > 0 even at sigma_b = 0, and c* = 0 by symmetry (odd phi)
    hot = mf.mean_field("tanh", 2.0, 0.0)
    assert hot.q_star > 1.0 and hot.phase == "chaotic" and hot.c_star == 0.0


def test_selu_self_normalising_fixed_point():
    # Klambauer et al. 2017, eq. (14) constants are chosen so that E[selu(z)] = 0 and
    # E[selu(z)^2] = 1 for z ~ N(0, 1): with sigma_w = 1, sigma_b = 0, q* = 1, and c(0) = 0 is fixed.
    r = mf.mean_field("selu", 1.0, 0.0)
    assert r.q_star == pytest.approx(1.0, abs=1e-9)
    assert r.phase == "chaotic" and r.c_star == pytest.approx(0.0, abs=1e-12)


def test_fixed_point_properties_against_length_map():
    for name, sw, sb in (
        ("tanh", 1.7, 0.3),
        ("hard-tanh", 1.4, 0.2),
        ("selu", 1.0, 0.1),
        ("sigmoid", 2.0, 0.5),
        ("erf", 2.5, 0.05),
    ):
        q = mf.fixed_point(name, sw, sb)
        assert mf.length_map(name, sw, sb, q) == pytest.approx(q, rel=1e-13), name
        assert mf.length_map_slope(name, sw, q) < 1.0, name


def test_correlation_fixed_point_and_input_checks():
    q = mf.fixed_point("tanh", 1.0, 0.2)
    assert mf.correlation_fixed_point("tanh", 1.0, 0.2, q) == 1.0  # ordered
    with pytest.raises(InputError, match="not a fixed point"):
        mf.correlation_fixed_point("tanh", 1.0, 0.2, 2 * q)
    with pytest.raises(InputError, match="V\\(0\\)"):
        mf.correlation_map("tanh", 1.0, 0.2, 0.0, 0.5)
    with pytest.raises(InputError):
        mf.correlation_map("tanh", 1.0, 0.2, q, 1.5)
    with pytest.raises(InputError):
        mf.length_map("tanh", -1.0, 0.0, 1.0)
    with pytest.raises(InputError):
        mf.q_trajectory("tanh", 1.0, 0.0, 1.0, 5, family="conv")
    with pytest.raises(InputError):
        mf.derivative_moments("tanh", 1.0, kmax=0)
    # q = 0 fixed point (sigma_b = 0): the limit map of smooth odd phi is linear, chi_1 c + 1 - chi_1
    assert mf.correlation_map("tanh", 0.9, 0.0, 0.0, 0.4) == pytest.approx(
        0.81 * 0.4 + 0.19, abs=1e-12
    )


# ---------------------------------------------------------------------------------------------
# Trajectories against a direct simulation
# ---------------------------------------------------------------------------------------------

WIDTH = 2000
REPLICAS = 6  # independent networks per configuration; the test statistic is a t-score with 5 dof
Z_MAX = 5.0  # P(|t_5| > 5) = 0.004 per layer


def _simulate(name, sw, sb, q0, depth, family, alpha, seed):
    """Mean square of h^l = W^l x^{l-1} + b^l in one sampled network of width WIDTH."""
    rng = np.random.default_rng(seed)
    phi, _ = get_activation(name).numpy_pair()
    x = rng.standard_normal(WIDTH)
    x -= x.mean()
    x *= math.sqrt(q0 / np.mean(x * x))  # zero mean, |x|^2/N = q0 exactly
    z = np.empty((WIDTH, WIDTH), dtype=np.float32)
    out = np.empty(depth)
    for layer in range(depth):
        rng.standard_normal(dtype=np.float32, out=z)  # W = (sigma_w / sqrt(N)) z
        h = (sw / math.sqrt(WIDTH)) * (z @ x.astype(np.float32)).astype(np.float64)
        h += sb * rng.standard_normal(WIDTH)
        out[layer] = np.mean(h * h)
        x = phi(h) if family == "plain" else x + alpha * phi(h)
    return out


@functools.cache
def _compare(name, sw, sb, q0, depth, family, alpha):
    runs = np.array(
        [_simulate(name, sw, sb, q0, depth, family, alpha, 1000 + r) for r in range(REPLICAS)]
    )
    mean = runs.mean(axis=0)
    pred = mf.q_trajectory(name, sw, sb, q0, depth, family=family, alpha=alpha)
    # Sampling error of the mean over replicas.  Given x^{l-1}, h^l is exactly Gaussian, so
    # mean(h^2) has relative variance 2/N; by the law of total variance that is a lower bound on
    # the true variance, used as a floor under the 5-dof empirical estimate.
    se_emp = runs.std(axis=0, ddof=1) / math.sqrt(REPLICAS)
    se = np.maximum(se_emp, pred * math.sqrt(2.0 / WIDTH) / math.sqrt(REPLICAS))
    return mean, se, pred


RELU_RESIDUAL = ("relu", 0.4, 0.1, 1.0, 8, "residual", 1.0)


@pytest.mark.parametrize(
    "config",
    [
        ("tanh", 1.5, 0.3, 1.0, 6, "plain", 1.0),
        ("tanh", 0.6, 0.2, 0.5, 8, "residual", 1.0),
        RELU_RESIDUAL,
    ],
)
def test_q_trajectory_matches_wide_network(config):
    name, sw, sb, q0, depth, family, alpha = config
    mean, se, pred = _compare(*config)
    z = (mean - pred) / se
    assert np.all(np.abs(z) < Z_MAX), z
    # the first layer is exact given |x|^2/N = q0: q^1 = sw^2 q0 + sb^2
    assert pred[0] == pytest.approx(sw * sw * q0 + sb * sb, rel=1e-15)


def test_residual_mean_mode_is_needed():
    # Dropping the mean mode (Q^l = Q^{l-1} + alpha^2 E[phi^2]) must be rejected by the simulation:
    # for ReLU E[phi] = sqrt(q/(2 pi)) != 0 and the common offset doubles q by depth 8.
    name, sw, sb, q0, depth, family, alpha = RELU_RESIDUAL
    mean, se, pred = _compare(*RELU_RESIDUAL)
    naive, big_q = np.empty(depth), q0
    for layer in range(depth):
        q = sw * sw * big_q + sb * sb
        naive[layer] = q
        big_q += alpha * alpha * q / 2  # E[relu(h)^2] = q/2
    assert abs(mean[-1] - naive[-1]) > 4 * Z_MAX * se[-1]  # measured: 30 standard errors off
    assert abs(mean[-1] - pred[-1]) < Z_MAX * se[-1]


def test_plain_trajectory_is_length_map_iteration():
    traj = mf.q_trajectory("tanh", 1.3, 0.2, 2.0, 6)
    assert traj[0] == pytest.approx(1.69 * 2.0 + 0.04, rel=1e-15)
    for a, b in zip(traj[:-1], traj[1:]):
        assert b == pytest.approx(mf.length_map("tanh", 1.3, 0.2, a), rel=1e-14)
    # converges to q*
    assert mf.q_trajectory("tanh", 1.3, 0.2, 2.0, 60)[-1] == pytest.approx(
        mf.fixed_point("tanh", 1.3, 0.2), rel=1e-10
    )


def test_residual_linear_trajectory_closed_form():
    # linear branch, sigma_b = 0, zero-mean input: Q^l = (1 + alpha^2 sw^2) Q^{l-1} (derived in-house)
    traj = mf.q_trajectory("linear", 0.3, 0.0, 1.5, 8, family="residual", alpha=0.7)
    g = 1 + 0.49 * 0.09
    np.testing.assert_allclose(traj, 0.09 * 1.5 * g ** np.arange(8), rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# Registry-wide contract
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", activation_names())
def test_every_activation_has_a_mean_field(name):
    sw, sb = 0.9, 0.1
    r = mf.mean_field(name, sw, sb)
    assert math.isfinite(r.q_star) and r.q_star >= 0
    assert math.isfinite(r.chi1) and r.chi1 > 0
    assert mf.length_map(name, sw, sb, r.q_star) == pytest.approx(r.q_star, rel=1e-12)
    assert r.chi1 == pytest.approx(sw * sw * mf.derivative_moments(name, r.q_star, 1)[0], rel=1e-14)
    assert r.phase == (
        "ordered"
        if r.chi1 < 1 - mf.CRITICAL_TOL
        else "chaotic"
        if r.chi1 > 1 + mf.CRITICAL_TOL
        else "critical"
    )
    assert r.sigma_w2 == pytest.approx(sw * sw) and r.sigma_b2 == pytest.approx(sb * sb)
    assert r.xi_q > 0 and r.xi_c > 0


@pytest.mark.parametrize("name", activation_names())
def test_every_activation_critical_point_or_reason(name):
    sb = 0.2
    try:
        cp = mf.critical_point(name, sb)
    except TheoryError as err:
        text = str(err)
        assert name in text and "sigma_b" in text and len(text) > 60
        return
    assert mf.chi1(name, cp.sigma_w, cp.q_star) == pytest.approx(1.0, abs=1e-10)
    assert mf.fixed_point(name, cp.sigma_w, cp.sigma_b) == pytest.approx(
        cp.q_star, rel=1e-9, abs=1e-14
    )


def test_relu_trajectory_without_bias_is_geometric():
    # ReLU (Cho & Saul 2009): E[relu(sqrt(q) z)^2] = q/2, so q^{l+1} = sigma_w^2 q^l / 2 and
    # q^l = sigma_w^2 q0 (sigma_w^2/2)^(l-1) exactly; at depth 10^5 too (one quadrature)
    q = mf.q_trajectory("relu", 1.2, 0.0, 0.7, 100_000)
    want = 1.44 * 0.7 * 0.72 ** np.arange(100_000, dtype=float)
    np.testing.assert_allclose(q[:2000], want[:2000], rtol=1e-12)
    assert q[-1] == 0.0 or q[-1] == pytest.approx(want[-1], rel=1e-9)
    with pytest.raises(SolverError, match="overflowed at layer"):
        mf.q_trajectory("linear", 2.0, 0.0, 1.0, 2000)
