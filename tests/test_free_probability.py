"""Free-probability theory of plain and residual stacks (isoscope.theory.free_probability).

Every check value is computed here by a route independent of the module -- scipy quadrature or
closed forms for mu_k, the closed-form moments and exact laws of docs/theory-free-probability.md, the
Fuss-Catalan law of Penson & Zyczkowski 2011, scipy root finding on the real inverse maps,
mpmath Taylor coefficients -- and its source is named beside it.

Runtime: about 30 s on one core (about 60 densities at the default 400 points).
"""

import math

import mpmath
import numpy as np
import pytest
from scipy import integrate, optimize, special

from isoscope.errors import TheoryError
from isoscope.theory import free_probability as fp
from isoscope.theory import mean_field as mf

ACTIVATIONS = ("linear", "relu", "hard-tanh", "tanh", "erf")
KINDS = ("gaussian", "orthogonal")
DEPTHS = (1, 2, 8, 100, 1000)
SIGMA_B_NEAR_CRITICAL = math.sqrt(
    0.05
)  # sigma_b^2 = 0.05, as in docs/theory-mean-field.md check values


def _point(act: str) -> tuple[float, float]:
    """(sigma_w, q) of a critical point: linear sigma_w = 1 (any q), ReLU sigma_w^2 = 2 (He et al.
    2015; any q), else critical_point(act, sigma_b^2 = 0.05) of the mean-field module."""
    if act == "linear":
        return 1.0, 1.0
    if act == "relu":
        return math.sqrt(2.0), 1.0
    cp = mf.critical_point(act, SIGMA_B_NEAR_CRITICAL)
    return cp.sigma_w, cp.q_star


def _mu_reference(act: str, q: float, k: int) -> float:
    """mu_k = E[phi'(sqrt(q) z)^{2k}] by a route independent of the module's quadrature."""
    if act == "linear":
        return 1.0
    if act == "relu":
        return 0.5  # P(h > 0)
    if act == "hard-tanh":
        return special.erf(1.0 / math.sqrt(2.0 * q))  # P(|h| < 1), docs/theory-mean-field.md
    if act == "erf":
        # phi' = (2/sqrt(pi)) e^{-h^2}: E[e^{-2k h^2}] = 1/sqrt(1 + 4 k q) (Gaussian integral)
        return (4.0 / math.pi) ** k / math.sqrt(1.0 + 4.0 * k * q)
    if act == "tanh":
        f = lambda z: (1.0 / math.cosh(math.sqrt(q) * z)) ** (4 * k) * math.exp(-0.5 * z * z)
        return integrate.quad(f, -40.0, 40.0, epsabs=0.0, epsrel=1e-13, limit=200)[0] / math.sqrt(
            2.0 * math.pi
        )
    raise AssertionError(act)


def _closed_moments(act: str, kind: str, sigma_w: float, q: float, depth: int):
    """m1, m2, m3 from docs/theory-free-probability.md (t1, t2 in terms of mu_k; *derived* there)."""
    mu1, mu2, mu3 = (_mu_reference(act, q, k) for k in (1, 2, 3))
    if kind == "orthogonal":
        t1 = mu2 / mu1**2 - 1.0
        t2 = 1.0 - mu2 / mu1**2 + mu3 / mu1**3 - mu2**2 / mu1**4
    else:
        t1 = mu2 / mu1**2
        t2 = mu3 / mu1**3 - mu2**2 / mu1**4
    m1 = (sigma_w**2 * mu1) ** depth
    L = depth
    return (
        m1,
        m1**2 * (1.0 + L * t1),
        m1**3 * (1.0 + 3 * L * t1 + L * t2 + L * (3 * L - 1) * t1**2 / 2.0),
    )


def _total_mass(d: fp.Density) -> float:
    return d.continuous_mass + sum(w for _, w in d.atoms)


@pytest.fixture(scope="module")
def laws():
    return {act: (fp.derivative_law(act, _point(act)[1]), *_point(act)) for act in ACTIVATIONS}


# ----------------------------------------------------------------------------------------
# The law of d and the moments
# ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("act", ACTIVATIONS)
def test_derivative_law_moments_match_independent_integrals(laws, act):
    law, _, q = laws[act]
    for k in (1, 2, 3, 4):
        assert law.moment(k) == pytest.approx(_mu_reference(act, q, k), rel=1e-11)
    assert law.positive_weight + law.zero_weight == pytest.approx(1.0, abs=1e-14)


def test_derivative_law_atoms_of_piecewise_linear():
    # ReLU {0: 1/2, 1: 1/2}; hard-tanh {1: erf(1/sqrt(2q)), 0: erfc(1/sqrt(2q))} (docs/theory-free-probability.md)
    relu = fp.derivative_law("relu", 0.7)
    assert relu.exact and relu.zero_weight == pytest.approx(0.5, abs=1e-15)
    np.testing.assert_allclose(relu.values, [1.0])
    q = 0.3
    ht = fp.derivative_law("hard-tanh", q)
    assert ht.zero_weight == pytest.approx(special.erfc(1 / math.sqrt(2 * q)), rel=1e-13)
    assert ht.weights[0] == pytest.approx(special.erf(1 / math.sqrt(2 * q)), rel=1e-13)
    # q = 0: point mass at phi'(0)^2 for smooth phi, refused where phi' jumps at 0
    assert fp.derivative_law("tanh", 0.0).values.tolist() == [1.0]
    with pytest.raises(TheoryError, match="phi' jumps at h = 0"):
        fp.derivative_law("relu", 0.0)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("act", ACTIVATIONS)
def test_plain_moments_match_closed_forms(laws, act, kind):
    law, sw, q = laws[act]
    for L in DEPTHS:
        got = fp.plain_moments(law, kind, sw, L)
        want = _closed_moments(act, kind, sw, q, L)
        np.testing.assert_allclose([got.m1, got.m2, got.m3], want, rtol=1e-9)


@pytest.mark.parametrize("L", [1, 2, 3, 4, 7])
def test_plain_moments_linear_gaussian_are_fuss_catalan(L):
    # Penson & Zyczkowski 2011 (Phys Rev E 83, 061118), eq. (2): FC_L(k) = binom((L+1)k, k)/(Lk+1)
    law = fp.derivative_law("linear", 1.0)
    got = fp.plain_moments(law, "gaussian", 1.0, L)
    want = [special.comb((L + 1) * k, k, exact=True) / (L * k + 1) for k in (1, 2, 3, 4)]
    np.testing.assert_allclose(got[:4], want, rtol=1e-13)
    np.testing.assert_allclose(got.logs, np.log(want), rtol=1e-13, atol=1e-15)
    # sigma_w scales lambda by sigma_w^{2L}: m_k -> sigma_w^{2Lk} m_k
    got = fp.plain_moments(law, "gaussian", 1.3, L)
    np.testing.assert_allclose(
        got[:4], [w * 1.3 ** (2 * L * k) for k, w in zip((1, 2, 3, 4), want)], rtol=1e-12
    )


# ----------------------------------------------------------------------------------------
# Plain-stack densities: mass, atoms, moments
# ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("L", DEPTHS)
@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("act", ACTIVATIONS)
def test_plain_density_mass_and_moments(laws, act, kind, L):
    law, sw, q = laws[act]
    d = fp.plain_density(law, kind, sw, L)
    m1, m2, _ = _closed_moments(act, kind, sw, q, L)
    # atom at zero: P(phi'(h) = 0) in both ensembles (docs/theory-free-probability.md, atoms)
    # (for the Bernoulli laws of ReLU and hard-tanh, P(phi' = 0) = 1 - mu_1)
    zero = 1.0 - _mu_reference(act, q, 1) if act in ("relu", "hard-tanh") else 0.0
    assert d.atom_at_zero == pytest.approx(zero, abs=1e-12)
    assert _total_mass(d) == pytest.approx(1.0, abs=1e-3)
    assert d.moment(1) == pytest.approx(m1, rel=1e-3)
    assert d.moment(2) == pytest.approx(m2, rel=1e-3)
    assert np.all(np.diff(d.log_x) > 0) and np.all(d.rho_log >= 0)


@pytest.mark.parametrize("L", [1, 2, 3, 4])
def test_linear_gaussian_density_is_fuss_catalan(L):
    """Product of L Ginibre matrices: Penson & Zyczkowski 2011, eqs. (5)-(6) (docs/theory-free-probability.md):
    x(phi) = sin^{L+1}((L+1)phi) / (sin(phi) sin^L(L phi)),
    rho = sin^2(phi) sin^{L-1}(L phi) / (pi sin^L((L+1)phi)), 0 < phi < pi/(L+1)."""
    s = L

    def x_of(phi):
        return np.sin((s + 1) * phi) ** (s + 1) / (np.sin(phi) * np.sin(s * phi) ** s)

    def rho_of(phi):
        return (
            np.sin(phi) ** 2 * np.sin(s * phi) ** (s - 1) / (math.pi * np.sin((s + 1) * phi) ** s)
        )

    top = math.pi / (s + 1)
    # the parametric formula itself, checked against the Fuss-Catalan moments (mass included)
    for k in range(4):
        # |dx/dphi| = x |(s+1)^2 cot((s+1)phi) - cot(phi) - s^2 cot(s phi)|
        def f(phi, k=k):
            dlog = (
                (s + 1) ** 2 / math.tan((s + 1) * phi)
                - 1 / math.tan(phi)
                - s**2 / math.tan(s * phi)
            )
            return x_of(phi) ** (k + 1) * rho_of(phi) * abs(dlog)

        val = integrate.quad(f, 0.0, top, limit=400, epsrel=1e-11)[0]
        assert val == pytest.approx(special.comb((s + 1) * k, k) / (s * k + 1), rel=1e-8)
    edge = (s + 1) ** (s + 1) / s**s  # support [0, (L+1)^{L+1}/L^L]
    d = fp.plain_density(fp.derivative_law("linear", 1.0), "gaussian", 1.0, L)
    assert d.support[1] == pytest.approx(edge, rel=1e-10)
    inside = (d.x > 1e-6 * edge) & (d.x < (1 - 1e-6) * edge)
    assert inside.sum() > 200
    phis = [
        optimize.brentq(
            lambda p, lam=lam: x_of(p) - lam, 1e-14, top - 1e-14, xtol=1e-15, rtol=1e-15
        )
        for lam in d.x[inside]
    ]
    np.testing.assert_allclose(d.rho[inside], rho_of(np.array(phis)), rtol=1e-4)


def test_relu_orthogonal_depth_two_is_arcsine():
    # docs/derivations.md: L = 2, sigma_w^2 = 2: (1/2) delta(0) + 1/(2 pi sqrt(l (4 - l)))
    d = fp.plain_density(fp.derivative_law("relu", 1.0), "orthogonal", math.sqrt(2.0), 2)
    assert d.atom_at_zero == pytest.approx(0.5, abs=1e-15)
    assert d.support[1] == pytest.approx(4.0, rel=1e-9)
    # up to 1e-6 from the singular edges (the relative imaginary part 1e-9 of the solve shifts
    # an inverse-square-root density by about 1e-9/distance there: measured 5.5e-6 at most)
    bulk = (d.x > 1e-6) & (d.x < 4 - 1e-6)
    assert bulk.sum() > 250
    np.testing.assert_allclose(
        d.rho[bulk], 1 / (2 * math.pi * np.sqrt(d.x[bulk] * (4 - d.x[bulk]))), rtol=2e-5
    )


def _bernoulli_edge(kind: str, p: float, sigma_w: float, L: int) -> float:
    """Largest lambda from the real inverse map of docs/theory-free-probability.md, by scipy alone:
    orthogonal z(M) = s^{2L} (M+p)^L / (M (1+M)^{L-1}), Gaussian z(M) = s^{2L}(1+M)(M+p)^L / M;
    the edge is the minimum of z over M > 0."""
    s2L = sigma_w ** (2 * L)
    if kind == "orthogonal":
        lz = lambda m: math.log(s2L) + L * math.log(m + p) - math.log(m) - (L - 1) * math.log1p(m)
    else:
        lz = lambda m: math.log(s2L) + math.log1p(m) + L * math.log(m + p) - math.log(m)
    r = optimize.minimize_scalar(
        lambda t: lz(math.exp(t)), bounds=(-30, 10), method="bounded", options={"xatol": 1e-12}
    )
    return math.exp(r.fun)


@pytest.mark.parametrize("L, edge", [(8, 20.372), (32, 85.622)])
def test_relu_orthogonal_edges(L, edge):
    # docs/theory-free-probability.md check values (ReLU orthogonal largest lambda), and the real inverse map
    d = fp.plain_density(fp.derivative_law("relu", 1.0), "orthogonal", math.sqrt(2.0), L)
    assert d.support[1] == pytest.approx(edge, abs=6e-4)
    assert d.support[1] == pytest.approx(
        _bernoulli_edge("orthogonal", 0.5, math.sqrt(2), L), rel=1e-8
    )
    g = fp.plain_density(fp.derivative_law("relu", 1.0), "gaussian", math.sqrt(2.0), L)
    assert g.support[1] == pytest.approx(
        _bernoulli_edge("gaussian", 0.5, math.sqrt(2), L), rel=1e-8
    )


def test_tanh_check_values_at_q_half():
    # docs/theory-free-probability.md: tanh, q* = 0.5 on chi_1 = 1: sigma_w^2 = 1.687975, sigma_b^2 = 0.0380412,
    # mu_2/mu_1^2 - 1 = 0.299244; largest lambda of the orthogonal stack at L = 8: 7.493
    law = fp.derivative_law("tanh", 0.5)
    sw2 = 1.0 / law.moment(1)
    assert sw2 == pytest.approx(1.687975, abs=1e-6)
    assert law.moment(2) / law.moment(1) ** 2 - 1 == pytest.approx(0.299244, abs=1e-6)
    assert mf.length_map("tanh", math.sqrt(sw2), math.sqrt(0.0380412), 0.5) == pytest.approx(
        0.5, abs=1e-6
    )
    d = fp.plain_density(law, "orthogonal", math.sqrt(sw2), 8)
    assert d.support[1] == pytest.approx(7.493, abs=1e-3)


@pytest.mark.parametrize("L", [1, 2, 5, 100, 1000])
def test_orthogonal_bernoulli_atoms(L):
    # docs/theory-free-probability.md atoms (*derived*): weight 1 - p at 0; with L(1 - p) < 1 an atom at
    # sigma_w^{2L} of weight 1 - L(1 - p).  hard-tanh at q = 0.1: 1 - p = erfc(sqrt(5)) = 1.6e-3.
    q, sw = 0.1, 1.05
    p = special.erf(1 / math.sqrt(2 * q))
    d = fp.plain_density(fp.derivative_law("hard-tanh", q), "orthogonal", sw, L)
    assert d.atom_at_zero == pytest.approx(1 - p, rel=1e-12)
    top = [(a, w) for a, w in d.atoms if a > 0]
    if L * (1 - p) < 1:
        assert len(top) == 1
        assert top[0][0] == pytest.approx(sw ** (2 * L), rel=1e-12)
        assert top[0][1] == pytest.approx(1 - L * (1 - p), rel=1e-12)
    else:
        assert top == []
    assert _total_mass(d) == pytest.approx(1.0, abs=1e-3)
    m1, m2, _ = _closed_moments("hard-tanh", "orthogonal", sw, q, L)
    assert d.moment(1) == pytest.approx(m1, rel=1e-3)
    assert d.moment(2) == pytest.approx(m2, rel=1e-3)


@pytest.mark.parametrize("sigma_b", [1e-3, 1e-4])
def test_near_isometric_tanh_orthogonal_depth_1000(sigma_b):
    # chi_1 = 1 at tiny q*: the spectrum of 1000 layers is squeezed near 1 (docs/theory-free-probability.md:
    # variance L (mu_2/mu_1^2 - 1), about 8 L q*^2 for tanh; for small c = L(mu_2/mu_1^2 - 1)
    # the law is close to a semicircle of variance c, edges 1 +- 2 sqrt(c))
    cp = mf.critical_point("tanh", sigma_b)
    law = fp.derivative_law("tanh", cp.q_star)
    L = 1000
    d = fp.plain_density(law, "orthogonal", cp.sigma_w, L)
    m1, m2, _ = _closed_moments("tanh", "orthogonal", cp.sigma_w, cp.q_star, L)
    c = L * (_mu_reference("tanh", cp.q_star, 2) / _mu_reference("tanh", cp.q_star, 1) ** 2 - 1)
    assert m2 / m1**2 - 1 == pytest.approx(8 * L * cp.q_star**2, rel=0.2)
    assert _total_mass(d) == pytest.approx(1.0, abs=1e-3)
    assert d.moment(1) == pytest.approx(m1, rel=1e-3)
    assert d.moment(2) == pytest.approx(m2, rel=1e-3)
    lo, hi = d.support
    assert 0 < lo < 1 < hi
    if c < 0.1:
        assert hi - lo == pytest.approx(4 * math.sqrt(c), rel=0.05)
    # well inside the large-depth limit's support, slightly narrower (docs/theory-free-probability.md)
    llo, lhi = fp.plain_limit_edges(c)
    assert llo * 0.8 < lo and hi < lhi


def test_orthogonal_smooth_single_layer_is_pushforward():
    # One orthogonal layer: the law of sigma_w^2 phi'(h)^2 itself.  Check the cdf against a
    # direct scipy integral of the Gaussian over {h: sigma_w^2 sech^4(sqrt(q) z) <= t}.
    sw, q = _point("tanh")
    d = fp.plain_density(fp.derivative_law("tanh", q), "orthogonal", sw, 1)
    assert d.support[1] == pytest.approx(sw**2, rel=1e-12)  # max of d is phi'(0)^2 = 1
    for t in (0.05, 0.5, 1.0, 1.5, 0.999 * sw**2):
        # sech^4(h) <= t / sw^2  <=>  |h| >= acosh((sw^2/t)^{1/4})
        h0 = math.acosh((sw**2 / t) ** 0.25)
        want = special.erfc(h0 / math.sqrt(2 * q))
        assert d.cdf(t) == pytest.approx(want, abs=1e-3)


# ----------------------------------------------------------------------------------------
# Residual law and the large-depth orthogonal law
# ----------------------------------------------------------------------------------------


def _lagrange_mp(k: int, log_inv_s) -> float:
    """m_k = (1/k)[z^{k-1}] ((1+z)/S(z))^k (P17 eq. 18) by mpmath Taylor coefficients."""
    coeffs = mpmath.taylor(lambda z: ((1 + z) * mpmath.exp(log_inv_s(z))) ** k, 0, k - 1)
    return float(coeffs[k - 1] / k)


@pytest.mark.parametrize("tau", [0.0, 0.05, 1.0, 3.0])
def test_residual_moments(tau):
    # docs/theory-free-probability.md sec. 7: m1 = e^tau, m2 = e^{2 tau}(1 + 2 tau); m3, m4 by Lagrange inversion (mpmath)
    got = fp.residual_moments(tau)
    assert got.m1 == pytest.approx(math.exp(tau), rel=1e-14)
    assert got.m2 == pytest.approx(math.exp(2 * tau) * (1 + 2 * tau), rel=1e-14)
    log_inv_s = lambda z: tau * (1 + 2 * z)  # 1/S = exp(tau (1 + 2 z))
    np.testing.assert_allclose(
        [got.m3, got.m4], [_lagrange_mp(3, log_inv_s), _lagrange_mp(4, log_inv_s)], rtol=1e-12
    )


def _exp_law_edges_scipy(a: float, c: float) -> tuple[float, float]:
    """Edges of S(z) = exp(a - c z): extrema of z(M) = (1 + M) e^{cM - a}/M, by scipy alone
    (lambda_+ = min over M > 0, lambda_- = max over M < -1)."""
    lz = lambda m: math.log(abs(1 + m)) + c * m - a - math.log(abs(m))
    hi = optimize.minimize_scalar(
        lambda t: lz(math.exp(t)), bounds=(-40, 20), method="bounded", options={"xatol": 1e-12}
    ).fun
    lo = -optimize.minimize_scalar(
        lambda t: -lz(-1 - math.exp(t)),
        bounds=(-40, 20),
        method="bounded",
        options={"xatol": 1e-12},
    ).fun
    return math.exp(lo), math.exp(hi)


@pytest.mark.parametrize("tau", [1e-3, 0.1, 1.0, 5.0])
def test_residual_edges(tau):
    lo, hi = fp.residual_edges(tau)
    assert lo * hi == pytest.approx(1.0, rel=1e-12)  # docs/theory-free-probability.md sec. 7
    for p, edge in zip(
        ((-1 + math.sqrt(1 + 2 / tau)) / 2, (-1 - math.sqrt(1 + 2 / tau)) / 2), (hi, lo)
    ):
        assert edge == pytest.approx((1 + p) / p * math.exp(tau * (1 + 2 * p)), rel=1e-12)
    np.testing.assert_allclose((lo, hi), _exp_law_edges_scipy(-tau, 2 * tau), rtol=1e-9)
    assert fp.residual_edges(0.0) == (1.0, 1.0)


@pytest.mark.parametrize("tau", [0.02, 0.5, 2.0, 8.0])
def test_residual_density(tau):
    d = fp.residual_density(tau)
    m = fp.residual_moments(tau)
    assert d.atoms == ()
    assert d.continuous_mass == pytest.approx(1.0, abs=1e-3)
    assert d.moment(1) == pytest.approx(m.m1, rel=1e-3)
    assert d.moment(2) == pytest.approx(m.m2, rel=1e-3)
    np.testing.assert_allclose(d.support, fp.residual_edges(tau), rtol=1e-6)
    point = fp.residual_density(0.0)
    assert point.atoms == ((1.0, 1.0),) and point.x.size == 0


def test_residual_tau():
    # docs/theory-free-probability.md sec. 7: ReLU with sigma_b = 0: tau = L alpha^2 sigma_w^2 / 2 exactly (any q^l);
    # linear: L alpha^2 sigma_w^2; tanh: the sum of sigma_w^2 alpha^2 E[sech^4] along q^l
    qs = np.geomspace(0.3, 40.0, 50)
    assert fp.residual_tau("relu", 0.2, qs, alpha=0.7) == pytest.approx(
        50 * 0.49 * 0.04 / 2, rel=1e-12
    )
    assert fp.residual_tau("linear", 0.2, qs, alpha=0.7) == pytest.approx(
        50 * 0.49 * 0.04, rel=1e-12
    )
    want = sum(0.49 * 0.04 * _mu_reference("tanh", q, 1) for q in qs[:8])
    assert fp.residual_tau("tanh", 0.2, qs[:8], alpha=0.7) == pytest.approx(want, rel=1e-11)
    want = 0.04 * sum(_mu_reference("hard-tanh", q, 1) for q in qs[:8])
    assert fp.residual_tau("hard-tanh", 0.2, qs[:8]) == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("c", [1e-4, 0.03, 0.3, 3.0, 30.0])
def test_plain_limit_edges(c):
    lo, hi = fp.plain_limit_edges(c)
    np.testing.assert_allclose((lo, hi), _exp_law_edges_scipy(0.0, c), rtol=1e-9)
    if c < 0.05:  # small c: semicircle of variance c around 1 (m2 - m1^2 = c)
        assert hi - lo == pytest.approx(4 * math.sqrt(c), rel=2 * math.sqrt(c))
    # the residual law is the same family scaled by e^tau: S = e^{-tau} exp(-2 tau z)
    rlo, rhi = fp.residual_edges(c / 2)
    np.testing.assert_allclose((rlo, rhi), (math.exp(c / 2) * lo, math.exp(c / 2) * hi), rtol=1e-12)
    assert fp.plain_limit_edges(0.0) == (1.0, 1.0)


# ----------------------------------------------------------------------------------------
# Bad input
# ----------------------------------------------------------------------------------------


def test_errors_name_what_was_received():
    law = fp.derivative_law("tanh", 0.5)
    with pytest.raises(TheoryError, match=r"unknown weights kind 'haar'.*gaussian, orthogonal"):
        fp.plain_density(law, "haar", 1.0, 4)
    with pytest.raises(TheoryError, match=r"unknown weights kind 'uniform'.*use 'gaussian'"):
        fp.plain_moments(law, "uniform", 1.0, 4)
    with pytest.raises(TheoryError, match=r"depth must be an integer >= 1.*received 0"):
        fp.plain_density(law, "gaussian", 1.0, 0)
    for bad in (2.5, True, "3"):
        with pytest.raises(TheoryError, match="depth must be an integer"):
            fp.plain_moments(law, "gaussian", 1.0, bad)
    with pytest.raises(TheoryError, match=r"sigma_w must be finite and > 0, received -1.0"):
        fp.plain_density(law, "orthogonal", -1.0, 4)
    with pytest.raises(TheoryError, match="sigma_w must be finite"):
        fp.plain_moments(law, "orthogonal", float("nan"), 4)
    with pytest.raises(TheoryError, match="sigma_w must be a number, received 'big'"):
        fp.plain_moments(law, "orthogonal", "big", 4)
    with pytest.raises(TheoryError, match=r"points must be an integer >= 32.*received 31"):
        fp.plain_density(law, "orthogonal", 1.0, 4, points=31)
    with pytest.raises(TheoryError, match="law must be a DerivativeLaw"):
        fp.plain_density("tanh", "orthogonal", 1.0, 4)
    with pytest.raises(TheoryError, match=r"variance q must be finite and >= 0, received -0.1"):
        fp.derivative_law("tanh", -0.1)
    with pytest.raises(TheoryError, match=r"tau must be finite and >= 0, received -1"):
        fp.residual_moments(-1)
    with pytest.raises(TheoryError, match="tau must be a number, received 'x'"):
        fp.residual_edges("x")
    with pytest.raises(TheoryError, match="tau must be finite"):
        fp.residual_density(float("inf"))
    with pytest.raises(TheoryError, match=r"points must be an integer >= 32"):
        fp.residual_density(1.0, points=8)
    with pytest.raises(TheoryError, match=r"c must be finite and >= 0, received -0.5"):
        fp.plain_limit_edges(-0.5)
    with pytest.raises(TheoryError, match="q_trajectory must hold one positive finite variance"):
        fp.residual_tau("tanh", 0.5, [])
    with pytest.raises(TheoryError, match="q_trajectory must hold one positive finite variance"):
        fp.residual_tau("tanh", 0.5, [0.3, -1.0])
    with pytest.raises(TheoryError, match="sigma_w must be finite and > 0"):
        fp.residual_tau("tanh", 0.0, [0.3])
    with pytest.raises(TheoryError, match="moment order must be an integer"):
        law.moment(-1)
