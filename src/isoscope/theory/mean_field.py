"""Mean-field signal propagation: length map, fixed point, chi_1, correlation map, depth scales.

Model (docs/theory-free-probability.md sec. 1): ``h^l = W^l x^{l-1} + b^l``, ``x^l = phi(h^l)`` with
``W_ij ~ N(0, sigma_w^2/N)`` (``sigma_w`` is a *scale*, not a variance) and ``b_i ~ N(0, sigma_b^2)``;
residual stacks ``x^l = x^{l-1} + alpha phi(h^l)``.  At infinite width the pre-activations of one
layer are i.i.d. ``N(0, q^l)`` and two inputs stay jointly Gaussian with correlation ``c^l``.  This
module computes (docs/theory-mean-field.md; Poole et al. 2016; Schoenholz et al. 2017, sec. 3):

* the length map ``V(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2`` and its slope,
* the stable fixed point ``q*`` (root finding on ``V(q) - q``, never plain iteration),
* ``chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2]`` and the moments ``mu_k = E[phi'^{2k}]``,
* the correlation map ``C(c)``, its slope and stable fixed point ``c*``,
* the depth scales ``xi_q``, ``xi_c`` and the phase (ordered / critical / chaotic),
* the critical point for a given ``sigma_b`` and the critical line,
* the variance trajectory ``q^1..q^L`` of plain and residual stacks.

Every Gaussian expectation goes through :mod:`isoscope.theory.quadrature` (composite
Gauss-Legendre split at the activation's kinks); Gauss-Hermite is never used.

Numerical conventions (see ``docs/theory-mean-field.md``):

* ``q = 0`` is a legitimate fixed point (phi(0) = 0 with ``sigma_b = 0``: tanh, erf below
  criticality; ReLU below sigma_w^2 = 2).  Quantities built from phi' (chi_1, mu_k, V'(0), C'(c))
  and the normalised correlation map are then the limits ``q -> 0+``.  They are computed exactly
  as expectations of the linearisation ``psi(h) = phi'(0+) h`` (h > 0), ``phi'(0-) h`` (h < 0) at
  q = 1 (ReLU: ``E[phi'^2] -> 1/2``, not ``phi'(0)^2 = 0``), never by evaluating phi at tiny h,
  where an activation written as ``4 sigmoid(h) - 2`` has no relative accuracy left.
* 1-D rules get extra panel breaks at h = 0, +-0.5, +-2, +-8, +-32 besides the kinks: at large q
  a saturating or ReLU-like phi switches over a z-interval of width ~1/sqrt(q), which the
  unsplit rule does not resolve (measured against mpmath: tanh at q = 1e4, 3e-6 relative error
  without the breaks, 1e-15 with them; GELU, SiLU and the sigmoid are similar).  2-D rules use the
  kinks only (cost grows with the square of the panel count; the correlation map is needed at
  q = q* = O(1)).
* The phase is "critical" when ``|chi_1 - 1| <= CRITICAL_TOL = 1e-6``.  Why 1e-6: a sigma_w written
  with 7 significant digits (as a user copies it from ``isoscope critical`` or a paper) moves
  chi_1 by up to about 1e-6 from 1, and over L layers the mean squared singular value
  ``m1 = chi_1^L`` then differs from 1 by about ``L * 1e-6``: below 1 % for every depth up to
  10^4, beyond the depths at which a dense Jacobian is measured.  Calling such a point "chaotic"
  or "ordered" would mislead.  Inside the band ``xi_c = inf`` and ``c* = 1``.
* A numerical slope (V'(q*), C'(c*)) within ``PHASE_TOL = 1e-9`` of 1 counts as exactly 1: the
  depth scale is ``math.inf``.  1e-9 sits well above the error of chi_1 at a solved critical
  point (about 1e-13).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from typing import NamedTuple

import jax
import numpy as np
from scipy import optimize

from isoscope.activations import Activation, get_activation
from isoscope.errors import InputError, SolverError, TheoryError
from isoscope.theory.quadrature import expect_bivariate, normal_rule

__all__ = [
    "PHASE_TOL",
    "CRITICAL_TOL",
    "Q_MAX",
    "MeanField",
    "CriticalPoint",
    "CriticalLine",
    "length_map",
    "length_map_slope",
    "fixed_point",
    "derivative_moments",
    "chi1",
    "correlation_map",
    "correlation_slope",
    "correlation_fixed_point",
    "mean_field",
    "q_trajectory",
    "critical_point",
    "critical_line",
]

PHASE_TOL = 1e-9
"""A slope (V'(q*), C'(c*)) within PHASE_TOL of 1 is 1: its depth scale is infinite."""

CRITICAL_TOL = 1e-6
"""Half-width of the "critical" band in chi_1 (see the module docstring for why 1e-6)."""

Q_MAX = 1e16
"""Largest variance searched for a fixed point; beyond it q is treated as growing without bound."""

_SOFT_BREAKS = (0.0, -0.5, 0.5, -2.0, 2.0, -8.0, 8.0, -32.0, 32.0)  # see _rule and the module doc
_SIGN_RTOL = 1e-11  # |V(q) - q| <= _SIGN_RTOL q + _SIGN_ATOL sqrt(q) counts as zero: quadrature
_SIGN_ATOL = 1e-13  # noise, plus phi's own rounding (~1e-16 absolute) times |h| ~ sqrt(q)
_FIXED_POINT_RTOL = 1e-6  # how close q must be to V(q) to be accepted as "the fixed point"
_HERMITE_TERMS = 48  # Mehler-series terms used only to seed the c* solve
_CRITICAL_SB2_SPAN = 1.0  # default critical line: up to sigma_b^2 = 1
_NEAR_ONE_PERP = 0.2  # sqrt(1 - c^2) below which kinked 2-D rules get extra breaks (_bivariate)
_NEAR_ONE_STEPS = (-8.0, -2.0, -0.5, 0.5, 2.0, 8.0)
_CHUNK = 8192  # evaluation chunk (see _padded): a 1-D rule fits in one, a 2-D rule in ~25


# ---------------------------------------------------------------------------------------------
# Result types
# ---------------------------------------------------------------------------------------------


class MeanField(NamedTuple):
    """Mean-field summary of a plain stack at one (sigma_w, sigma_b).

    Attributes:
      sigma_w, sigma_w2: weight scale and its square (the weight variance times N).
      sigma_b, sigma_b2: bias scale and its square.
      q_star: stable fixed point of the length map.
      chi1: ``sigma_w^2 E[phi'(sqrt(q*) z)^2]``, mean squared singular value of one layer's Jacobian.
      c_star: stable fixed point of the correlation map (1 unless chaotic).
      xi_q: depth scale of the variance, ``-1/ln V'(q*)`` (``inf`` when V'(q*) = 1).
      xi_c: depth scale of correlations, ``-1/ln C'(c*)`` (``inf`` at criticality).
      phase: ``"ordered"`` (chi1 < 1), ``"critical"`` (``|chi1 - 1| <= CRITICAL_TOL`` = 1e-6) or
        ``"chaotic"``.
    """

    sigma_w: float
    sigma_w2: float
    sigma_b: float
    sigma_b2: float
    q_star: float
    chi1: float
    c_star: float
    xi_q: float
    xi_c: float
    phase: str


class CriticalPoint(NamedTuple):
    """A point with chi_1 = 1 at its own stable fixed point q*."""

    sigma_w: float
    sigma_w2: float
    sigma_b: float
    sigma_b2: float
    q_star: float


class CriticalLine(NamedTuple):
    """The curve chi_1 = 1 in the (sigma_w^2, sigma_b^2) plane, parametrised by q*.

    Attributes:
      sigma_w2, sigma_b2, q_star: float64 arrays of one length, ordered by increasing q*.
    """

    sigma_w2: np.ndarray
    sigma_b2: np.ndarray
    q_star: np.ndarray


# ---------------------------------------------------------------------------------------------
# Validation and quadrature plumbing (private)
# ---------------------------------------------------------------------------------------------


def _act(activation: str | Activation) -> Activation:
    return get_activation(activation)


def _scale(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} = {value!r} is not a number",
            expected="a finite real >= 0",
            hint=f"pass {name} as a float scale (standard deviation), e.g. 1.0",
        ) from None
    if not math.isfinite(v) or v < 0:
        raise InputError(
            f"{name} = {value!r} is out of range",
            expected="a finite real >= 0",
            hint=f"{name} is a scale (standard deviation), not a variance; pass its absolute value",
        )
    return v


def _variance(q: float, name: str = "q") -> float:
    try:
        v = float(q)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} = {q!r} is not a number",
            expected="a finite variance >= 0",
            hint="pass the pre-activation variance as a float",
        ) from None
    if not math.isfinite(v) or v < 0:
        raise InputError(
            f"{name} = {q!r} is out of range",
            expected="a finite variance >= 0",
            hint="pass a pre-activation variance, e.g. q* from fixed_point()",
        )
    return v


def _correlation(c: float) -> float:
    try:
        v = float(c)
    except (TypeError, ValueError):
        raise InputError(
            f"c = {c!r} is not a number",
            expected="a correlation in [-1, 1]",
            hint="pass the correlation between two inputs' pre-activations",
        ) from None
    if not -1.0 <= v <= 1.0:
        raise InputError(
            f"c = {c!r} is out of range",
            expected="a correlation in [-1, 1]",
            hint="a correlation is a covariance divided by the variance q",
        )
    return v


def _padded(fn: Callable[[np.ndarray], np.ndarray]) -> Callable[[np.ndarray], np.ndarray]:
    """Call a jit-compiled elementwise ``fn`` in zero-padded chunks of one fixed length.

    The activations' NumPy callables are compiled once per input length, and quadrature rules
    split at kinks change length with q and rho.  Feeding every call through chunks of
    ``_CHUNK`` points means one compilation per function (about 0.1 s) instead of one per length.
    """

    def call(x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        flat = x.ravel()
        n = flat.size
        chunks = max(1, -(-n // _CHUNK))
        buf = np.zeros(chunks * _CHUNK)
        buf[:n] = flat
        out = np.concatenate([np.asarray(fn(part)) for part in buf.reshape(chunks, _CHUNK)])
        return out[:n].reshape(x.shape)

    return call


class _Integrand(NamedTuple):
    """What a Gaussian expectation needs of phi: NumPy phi, phi', phi'^2 and the kinks of phi'.

    ``dphi_sq`` is the registry's tail-accurate ``exp(ln phi'^2)``
    (:meth:`~isoscope.activations.Activation.numpy_dphi_sq`), the same function the
    free-probability law of ``phi'(h)^2`` uses, so chi_1 and the law's first moment agree.
    """

    phi: Callable[[np.ndarray], np.ndarray]
    dphi: Callable[[np.ndarray], np.ndarray]
    kinks: tuple[float, ...]
    dphi_sq: Callable[[np.ndarray], np.ndarray]


_INTEGRANDS: dict[Activation, _Integrand] = {}
_LIMITS: dict[Activation, _Integrand] = {}


def _integrand(act: Activation) -> _Integrand:
    if act not in _INTEGRANDS:
        phi, dphi = act.numpy_pair()
        _INTEGRANDS[act] = _Integrand(
            _padded(phi), _padded(dphi), tuple(act.kinks), _padded(act.numpy_dphi_sq())
        )
    return _INTEGRANDS[act]


def _one_sided_slopes(act: Activation) -> tuple[float, float]:
    """``(phi'(0+), phi'(0-))`` from the registry's derivative just either side of 0."""
    d = _integrand(act).dphi(np.array([1e-300, -1e-300]))
    return float(d[0]), float(d[1])


def _limit_integrand(act: Activation) -> _Integrand:
    """The linearisation psi(h) = a h (h > 0), b h (h < 0), a, b = phi'(0+), phi'(0-).

    For phi(0) = 0, ``E[F(phi(sqrt(q) z)/sqrt(q), phi'(sqrt(q) z))] -> E[F(psi(z), psi'(z))]`` as
    q -> 0+, and psi is positively homogeneous, so the q -> 0+ limits of everything in this module
    are expectations of psi at q = 1: exact, with no rounding trouble at tiny h (an activation
    written as ``4 sigmoid(h) - 2`` loses all relative accuracy below h ~ 1e-16).
    """
    if act not in _LIMITS:
        a, b = _one_sided_slopes(act)

        def psi(h: np.ndarray) -> np.ndarray:
            return np.where(h > 0, a * h, b * h)

        def dpsi(h: np.ndarray) -> np.ndarray:
            return np.where(h > 0, a, b) + 0.0 * h

        _LIMITS[act] = _Integrand(psi, dpsi, (0.0,) if a != b else (), lambda h: dpsi(h) ** 2)
    return _LIMITS[act]


def _at(act: Activation, q: float) -> tuple[_Integrand, float]:
    """The integrand and variance to use: phi at q for q > 0, its linearisation at 1 for q = 0."""
    if q > 0.0:
        return _integrand(act), q
    return _limit_integrand(act), 1.0


def _phi0(act: Activation) -> float:
    return float(_integrand(act).phi(np.zeros(1))[0])


def _rule(fn: _Integrand, q: float) -> tuple[np.ndarray, np.ndarray]:
    """Nodes h ~ N(0, q) and weights of a 1-D rule, split at the kinks and the soft breaks."""
    s = math.sqrt(q)
    z, w = normal_rule([k / s for k in (*fn.kinks, *_SOFT_BREAKS)])
    return s * z, w


def _mean_square(act: Activation, q: float) -> float:
    """``E[phi(sqrt(q) z)^2]`` (continuous at q = 0, where it is phi(0)^2)."""
    if q == 0.0:
        return _phi0(act) ** 2
    fn = _integrand(act)
    h, w = _rule(fn, q)
    return float(np.dot(w, fn.phi(h) ** 2))


def _dphi_sq(act: Activation, q: float) -> float:
    """``E[phi'(sqrt(q) z)^2]`` (q -> 0+ limit at q = 0)."""
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    return float(np.dot(w, fn.dphi_sq(h)))


def _slope_ratio(act: Activation, q: float) -> float:
    """``E[u phi(u) phi'(u)]/q`` for u ~ N(0, q): (1/sigma_w^2) dV/dq; q -> 0+ limit at q = 0."""
    if q == 0.0 and _phi0(act) != 0.0:
        if 0.0 in act.kinks:
            # phi(0) != 0 with a jump of phi' at 0: E[u phi phi']/q ~ phi(0)(a - b)/sqrt(2 pi q).
            a, b = _one_sided_slopes(act)
            jump = _phi0(act) * (a - b)
            if jump != 0.0:
                return math.copysign(math.inf, jump)
        # Taylor expansion at 0: E[u phi phi']/q -> phi'(0)^2 + phi(0) phi''(0) (Stein's lemma).
        d1 = jax.grad(lambda t: act.fn(t))
        x = np.float64(0.0)
        return float(act.fn(x) * jax.grad(d1)(x) + d1(x) ** 2)
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    return float(np.dot(w, h * fn.phi(h) * fn.dphi(h))) / qe


def _homogeneous(act: Activation) -> bool:
    """phi piecewise linear with phi(0) = 0 and no kink away from 0: phi(t h) = t phi(h), t > 0."""
    return act.law_free_of_q and _phi0(act) == 0.0


def _residual_g(act: Activation, sw2: float, sb2: float, q: float) -> float:
    return sw2 * _mean_square(act, q) + sb2 - q


# ---------------------------------------------------------------------------------------------
# Length map and fixed point
# ---------------------------------------------------------------------------------------------


def length_map(activation: str | Activation, sigma_w: float, sigma_b: float, q: float) -> float:
    """One step of the variance (length) map.

    ``V(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2``, z ~ N(0, 1): the variance of the next
    layer's pre-activations when this layer's have variance q.

    Args:
      activation: registry name or :class:`~isoscope.activations.Activation`.
      sigma_w: weight scale (``W_ij ~ N(0, sigma_w^2/N)``).
      sigma_b: bias scale (``b_i ~ N(0, sigma_b^2)``).
      q: pre-activation variance, >= 0.

    Returns:
      V(q) as a float.

    References:
      Poole et al. 2016 (NeurIPS), sec. 2; Schoenholz et al. 2017 (ICLR), sec. 3; docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, sb, q = _scale("sigma_w", sigma_w), _scale("sigma_b", sigma_b), _variance(q)
    return sw * sw * _mean_square(act, q) + sb * sb


def length_map_slope(activation: str | Activation, sigma_w: float, q: float) -> float:
    """Slope of the length map, ``V'(q) = sigma_w^2 E[u phi(u) phi'(u)]/q``, u ~ N(0, q).

    Obtained by differentiating ``E[phi(sqrt(q) z)^2]`` under the integral; the form needs only
    phi', so it holds for kinked phi (ReLU, hard-tanh).  At q = 0 the limit q -> 0+ is returned:
    ``sigma_w^2 (phi'(0)^2 + phi(0) phi''(0))`` for phi smooth at 0, the two-sided average
    ``sigma_w^2 (phi'(0+)^2 + phi'(0-)^2)/2`` for phi(0) = 0 with a kink at 0, and a signed infinity
    when phi(0) != 0 and phi' jumps at 0 (V then has a sqrt(q) cusp).

    Args:
      activation: registry name or Activation.
      sigma_w: weight scale.
      q: variance >= 0.

    Returns:
      V'(q).  At a fixed point, ``1/xi_q = -ln V'(q*)``.

    References:
      Schoenholz et al. 2017 (ICLR), sec. 3 (depth scale of q); docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, q = _scale("sigma_w", sigma_w), _variance(q)
    if sw == 0.0:
        return 0.0
    return sw * sw * _slope_ratio(act, q)


def fixed_point(activation: str | Activation, sigma_w: float, sigma_b: float) -> float:
    """The stable fixed point q* of the length map, by bracketing and Brent root finding.

    q* solves ``V(q) = q`` with ``V'(q*) <= 1``; where several exist it is the one reached by
    iterating V from ``q -> 0+`` (the lowest attracting one).  Search:

    * ``V(0) > 0`` (a bias, or phi(0) != 0): ``g(q) = V(q) - q`` is positive at 0; double q from
      V(0) until g is negative beyond the quadrature noise (``1e-11 q + 1e-13 sqrt(q)``), then
      solve g = 0 by Brent's method between the last positive q and that one.  So a fixed point
      with ``1 - V'(q*)`` below about 1e-11 counts as "unbounded": it cannot be told apart from
      ReLU at sigma_w^2 = 2 with a bias, whose computed V(q) - q = sigma_b^2 + O(1e-16 q) would
      otherwise give a spurious root near q = 1e14.
    * ``V(0) = 0``: q = 0 is a fixed point.  If ``V'(0) < 1 - PHASE_TOL`` it is stable and exactly
      ``0.0`` is returned.  Otherwise the sign of g just above 0 decides: negative (e.g. tanh at
      sigma_w = 1) returns 0.0; positive means 0 repels, and the search continues upwards.  When
      ``V(q) = q`` for every q (ReLU at sigma_w^2 = 2, linear at sigma_w = 1, sigma_b = 0), 0.0 is
      returned too: every variance is preserved, and 0.0 is the limit from below.

    Args:
      activation: registry name or Activation.
      sigma_w: weight scale.
      sigma_b: bias scale.

    Returns:
      q* as a float (exactly 0.0 where 0 is the attracting fixed point).

    Raises:
      TheoryError: when ``V(q) > q`` for all q up to ``Q_MAX = 1e16``: q grows without bound with
        depth (ReLU with sigma_w^2 > 2, or sigma_w^2 = 2 and sigma_b > 0).

    References:
      Poole et al. 2016 (NeurIPS), sec. 2; docs/theory-mean-field.md (root finding at q* = 0).
    """
    act = _act(activation)
    sw, sb = _scale("sigma_w", sigma_w), _scale("sigma_b", sigma_b)
    sw2, sb2 = sw * sw, sb * sb

    def g(q: float) -> float:
        return _residual_g(act, sw2, sb2, q)

    v0 = g(0.0)
    if v0 > 0.0:
        # Double until g is *clearly* negative: a marginal map (ReLU at sigma_w^2 = 2 with a bias,
        # V(q) - q = sigma_b^2 + O(1e-16) q) must not produce a spurious root at q ~ 1e14.
        pos, hi = 0.0, v0  # g(pos) > 0 throughout
        while (g_hi := g(hi)) >= -_noise(hi):
            if g_hi > 0.0:
                pos = hi
            hi *= 2.0
            if hi > Q_MAX:
                _raise_unbounded(act, sw, sb)
        return _brent(g, pos, hi)

    # V(0) = 0: q = 0 is a fixed point.
    if length_map_slope(act, sw, 0.0) < 1.0 - PHASE_TOL:
        return 0.0
    q = 1e-20
    while True:
        val = g(q)
        noise = _noise(q)
        if val < -noise:
            return 0.0  # attracted back to 0 from above
        if val > noise:
            break  # 0 repels: look for the attracting fixed point above
        q *= 2.0
        if q > Q_MAX:
            return 0.0  # V(q) = q for all q (homogeneous phi at its critical point)
    lo, hi = q, 2.0 * q
    while g(hi) > 0.0:
        lo, hi = hi, 2.0 * hi
        if hi > Q_MAX:
            _raise_unbounded(act, sw, sb)
    return _brent(g, lo, hi)


def _noise(q: float) -> float:
    """Size below which V(q) - q is indistinguishable from 0 (quadrature and phi rounding)."""
    return _SIGN_RTOL * q + _SIGN_ATOL * math.sqrt(q)


def _brent(f: Callable[[float], float], lo: float, hi: float) -> float:
    try:
        return float(optimize.brentq(f, lo, hi, xtol=1e-300, rtol=1e-15, maxiter=500))
    except (RuntimeError, ValueError) as exc:  # pragma: no cover - bracket was verified
        raise SolverError(
            f"root finding did not converge on [{lo:.6g}, {hi:.6g}]: {exc}; "
            "try a slightly different sigma_w or sigma_b"
        ) from exc


def _raise_unbounded(act: Activation, sw: float, sb: float) -> None:
    growth = sw * sw * _mean_square(act, Q_MAX) / Q_MAX
    hint = (
        "for ReLU-like phi (E[phi(sqrt(q) z)^2] ~ k q at large q) the variance stays finite only "
        "when sigma_w^2 k < 1, or sigma_w^2 k = 1 with sigma_b = 0 (ReLU: sigma_w^2 = 2, He "
        "initialization); lower sigma_w, set sigma_b = 0 at the critical sigma_w, use a bounded "
        "activation (tanh, erf), or a residual stack with a small branch scale"
    )
    raise TheoryError(
        f"no finite stable fixed point of the length map for {act.name} at sigma_w = {sw:g} "
        f"(sigma_w^2 = {sw * sw:g}), sigma_b = {sb:g}: V(q) > q for every q up to {Q_MAX:g} "
        f"(V(q)/q -> {growth:.6g} there), so the pre-activation variance grows without bound with "
        f"depth; {hint}"
    )


# ---------------------------------------------------------------------------------------------
# Derivative moments and chi_1
# ---------------------------------------------------------------------------------------------


def derivative_moments(activation: str | Activation, q: float, kmax: int = 4) -> np.ndarray:
    """Moments of the squared derivative, ``mu_k = E[phi'(sqrt(q) z)^{2k}]`` for k = 1..kmax.

    These are the moments of the law of ``D^2 = phi'(h)^2`` entering the free-probability
    S-transform (docs/theory-free-probability.md: ``t1 = mu_2/mu_1^2 - 1`` etc.).  At q = 0 the limit q -> 0+ is
    returned (ReLU: every mu_k = 1/2).

    Args:
      activation: registry name or Activation.
      q: pre-activation variance >= 0 (usually q*).
      kmax: number of moments, >= 1.

    Returns:
      float64 array of shape ``(kmax,)``: ``[mu_1, ..., mu_kmax]``.

    References:
      Pennington, Schoenholz, Ganguli 2017 (NeurIPS), sec. 2.3; docs/theory-free-probability.md (moments).
    """
    act = _act(activation)
    q = _variance(q)
    if isinstance(kmax, bool) or not isinstance(kmax, (int, np.integer)) or kmax < 1:
        raise InputError(
            f"kmax = {kmax!r} is invalid",
            expected="an integer >= 1",
            hint="ask for at least the first moment, e.g. kmax=4",
        )
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    d2 = fn.dphi_sq(h)
    powers = d2[None, :] ** np.arange(1, int(kmax) + 1)[:, None]
    return powers @ w


def chi1(activation: str | Activation, sigma_w: float, q: float) -> float:
    """``chi_1 = sigma_w^2 E[phi'(sqrt(q) z)^2]``: mean squared singular value of one layer's Jacobian.

    Evaluated at the fixed point q = q*, chi_1 < 1 is the ordered phase (gradients vanish),
    chi_1 > 1 chaotic (they explode), chi_1 = 1 critical.  It is also ``C'(1)``, the slope of the
    correlation map at c = 1.  At q = 0 the limit q -> 0+ is used.

    Args:
      activation: registry name or Activation.
      sigma_w: weight scale.
      q: pre-activation variance >= 0.

    Returns:
      chi_1 as a float.

    References:
      Poole et al. 2016 (NeurIPS), sec. 3; Schoenholz et al. 2017 (ICLR), sec. 3; docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, q = _scale("sigma_w", sigma_w), _variance(q)
    return sw * sw * _dphi_sq(act, q)


# ---------------------------------------------------------------------------------------------
# Correlation map
# ---------------------------------------------------------------------------------------------


def _bivariate(fn: _Integrand, which: str, form: str, q: float, c: float) -> float:
    """``E[F(u1, u2)]``, u1, u2 ~ N(0, q) with correlation c, by quadrature.expect_bivariate.

    ``which`` picks g = phi or phi'; ``form`` is ``"product"`` (F = g(u1) g(u2)) or ``"square"``
    (F = (g(u1) - g(u2))^2).  g is evaluated on u1 and u2 in one padded call.
    """
    g = fn.phi if which == "phi" else fn.dphi

    def f(u1: np.ndarray, u2: np.ndarray) -> np.ndarray:
        vals = g(np.concatenate([u1, u2]))
        a, b = vals[: u1.size], vals[u1.size :]
        return a * b if form == "product" else (a - b) ** 2

    kinks = fn.kinks
    perp = math.sqrt(max(0.0, 1.0 - c * c))
    if kinks and 0.0 < perp < _NEAR_ONE_PERP:
        # Near |c| = 1 the inner integral, as a function of u1, switches over a width
        # sqrt(q) perp around each kink; extra breaks there keep the outer rule exact (without them
        # ReLU's E[phi' phi'] is off by 5e-10 at c = 0.999 and 1e-6 at c = 0.9999).
        width = math.sqrt(q) * perp
        kinks = tuple(sorted({*kinks, *(k + m * width for k in kinks for m in _NEAR_ONE_STEPS)}))
    return expect_bivariate(f, q, q, c, kinks)


def _fp_map(act: Activation, sw2: float, q: float, c: float) -> float:
    """Correlation map in fixed-point form, ``1 - sigma_w^2 E[(phi(u1) - phi(u2))^2]/(2q)``.

    Equal to ``(sigma_w^2 E[phi(u1) phi(u2)] + sigma_b^2)/q`` when V(q) = q (subtract the
    fixed-point equation); the integrand is non-negative, so 1 - C(c) keeps full relative accuracy
    near c = 1, and the expression has a finite limit at q -> 0+.
    """
    fn, qe = _at(act, q)
    return 1.0 - sw2 * _bivariate(fn, "phi", "square", qe, c) / (2.0 * qe)


def correlation_map(
    activation: str | Activation, sigma_w: float, sigma_b: float, q: float, c: float
) -> float:
    """The correlation map at variance q: ``C(c) = (sigma_w^2 E[phi(u1) phi(u2)] + sigma_b^2)/q``.

    ``u1 = sqrt(q) z1``, ``u2 = sqrt(q) (c z1 + sqrt(1 - c^2) z2)``, z1, z2 independent N(0, 1);
    the expectation is a two-dimensional Gauss-Legendre rule (quadrature.expect_bivariate).  q is
    meant to be the fixed point q*(sigma_w, sigma_b), where C(1) = 1 and C maps the correlation of
    two inputs' pre-activations at one layer to the next.  At q = 0, which is a fixed point only
    when V(0) = 0, the value is the limit q* -> 0+ of the fixed-point form
    ``C(c) = 1 - sigma_w^2 E[(phi(u1) - phi(u2))^2]/(2q)`` (for smooth odd phi:
    ``chi_1 c + 1 - chi_1``).

    Args:
      activation: registry name or Activation.
      sigma_w, sigma_b: weight and bias scales.
      q: variance > 0, or 0 when V(0) = 0.
      c: correlation in [-1, 1].

    Returns:
      C(c) as a float.

    Raises:
      InputError: q = 0 while V(0) > 0 (q = 0 is not a fixed point; the map is undefined there).

    References:
      Poole et al. 2016 (NeurIPS), sec. 2; Schoenholz et al. 2017 (ICLR), eq. for C and sec. 3;
      docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, sb, q, c = (
        _scale("sigma_w", sigma_w),
        _scale("sigma_b", sigma_b),
        _variance(q),
        _correlation(c),
    )
    sw2, sb2 = sw * sw, sb * sb
    if q == 0.0:
        v0 = sw2 * _mean_square(act, 0.0) + sb2
        if v0 != 0.0:
            raise InputError(
                f"correlation_map at q = 0 for {act.name}, sigma_w = {sw:g}, sigma_b = {sb:g}",
                expected="q > 0, or q = 0 only where it is a fixed point (V(0) = 0)",
                hint=f"V(0) = {v0:.6g} > 0 here; pass q = fixed_point(...)",
            )
        return _fp_map(act, sw2, 0.0, c)
    return (sw2 * _bivariate(_integrand(act), "phi", "product", q, c) + sb2) / q


def correlation_slope(activation: str | Activation, sigma_w: float, q: float, c: float) -> float:
    """Slope of the correlation map, ``C'(c) = sigma_w^2 E[phi'(u1) phi'(u2)]``.

    Price's theorem, ``d/dc E[phi(u1) phi(u2)] = q E[phi'(u1) phi'(u2)]``, divided by the
    normalisation q* = q; valid for kinked phi.  ``C'(1) = chi_1``.  At q = 0 the limit q -> 0+ is
    returned (ReLU: ``sigma_w^2 (pi - arccos c)/(2 pi)``).

    Args:
      activation: registry name or Activation.
      sigma_w: weight scale.
      q: variance >= 0 (the fixed point q*).
      c: correlation in [-1, 1].

    Returns:
      C'(c) as a float; ``1/xi_c = -ln C'(c*)``.

    References:
      Schoenholz et al. 2017 (ICLR), sec. 3 (chi_c and xi_c); docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, q, c = _scale("sigma_w", sigma_w), _variance(q), _correlation(c)
    fn, qe = _at(act, q)
    return sw * sw * _bivariate(fn, "dphi", "product", qe, c)


def _hermite_coefficients(act: Activation, q: float, terms: int) -> np.ndarray:
    """``b_k = E[phi(sqrt(q) z) He_k(z)]/sqrt(k!)``, k < terms (normalised probabilists' Hermite).

    Mehler's formula gives ``E[phi(u1) phi(u2)] = sum_k b_k^2 c^k``; used only to seed the c* solve.
    """
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    z = h / math.sqrt(qe)
    fw = w * fn.phi(h)
    out = np.empty(terms)
    prev, cur = np.zeros_like(z), np.ones_like(z)
    for k in range(terms):
        out[k] = np.dot(fw, cur)
        prev, cur = cur, (z * cur - math.sqrt(k) * prev) / math.sqrt(k + 1)
    return out


def correlation_fixed_point(
    activation: str | Activation, sigma_w: float, sigma_b: float, q: float
) -> float:
    """The stable fixed point c* of the correlation map at the fixed point variance q = q*.

    ``C`` is convex on [0, 1] (its Mehler series has non-negative coefficients), ``C(1) = 1`` and
    ``C'(1) = chi_1``.  So if ``chi_1 <= 1 + PHASE_TOL`` (ordered or critical) c* = 1; otherwise
    (chaotic) c = 1 repels and the unique c* in [0, 1) is found from
    ``(C(c) - c)/(1 - c) = 0``, a decreasing function with value ``C(0) >= 0`` at 0, which is the
    limit reached by iterating C from c = 0.  The solve is seeded by the Mehler series
    (Hermite coefficients by 1-D quadrature) and finished by safeguarded Newton steps on the
    bivariate quadrature of the fixed-point form of C, until ``|C(c) - c| <= 1e-13``.

    Args:
      activation: registry name or Activation.
      sigma_w, sigma_b: weight and bias scales.
      q: the fixed point variance q*(sigma_w, sigma_b) (checked to relative 1e-6).

    Returns:
      c* in [0, 1].

    Raises:
      InputError: q is not a fixed point of the length map at (sigma_w, sigma_b).

    References:
      Poole et al. 2016 (NeurIPS), sec. 2 (c* < 1 in the chaotic phase); Schoenholz et al. 2017
      (ICLR), sec. 3; docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, sb, q = _scale("sigma_w", sigma_w), _scale("sigma_b", sigma_b), _variance(q)
    _require_fixed_point(act, sw, sb, q)
    sw2 = sw * sw
    slope1 = sw2 * _dphi_sq(act, q)
    if slope1 <= 1.0 + PHASE_TOL:
        return 1.0
    qe = q if q > 0 else 1.0  # q = 0: the series of the linearisation psi at q = 1 (see _at)
    b2 = _hermite_coefficients(act, q, _HERMITE_TERMS) ** 2
    ks = np.arange(b2.size)
    # Mehler series of C in fixed-point form, C(c) = 1 - sigma_w^2 sum_k b_k^2 (1 - c^k)/q, with
    # sum_k b_k^2 = E[phi^2] taken exactly, so only the tail sum_{k >= K} b_k^2 c^k is dropped
    # (kinked phi have b_k^2 ~ k^(-5/2): truncating 1 - c^k instead would cost ~1e-3).
    fn, _ = _at(act, q)
    h, w = _rule(fn, qe)
    total = float(np.dot(w, fn.phi(h) ** 2))
    c_ser = lambda c: 1.0 - sw2 * (total - float(np.dot(b2, c**ks))) / qe  # noqa: E731
    dc_ser = lambda c: sw2 * float(np.dot(ks[1:] * b2[1:], c ** (ks[1:] - 1))) / qe  # noqa: E731
    top = 1.0 - 1e-9

    def h_ser(c: float) -> float:
        return (c_ser(c) - c) / (1.0 - c)

    if h_ser(0.0) <= 1e-14:  # C(0) = 0 (odd phi, sigma_b = 0): c* = 0 by symmetry
        seed = 0.0
    elif h_ser(top) >= 0.0:
        seed = top
    else:
        seed = float(optimize.brentq(h_ser, 0.0, top, xtol=1e-14))
    return _newton_c(act, sw2, q, seed, dc_ser)


def _newton_c(
    act: Activation, sw2: float, q: float, seed: float, dc_ser: Callable[[float], float]
) -> float:
    lo, hi = 0.0, 1.0
    c = seed
    for _ in range(40):
        g = _fp_map(act, sw2, q, c) - c
        if abs(g) <= 1e-13:
            return c
        if g > 0.0:
            lo = c
        else:
            hi = c
        slope = dc_ser(c) - 1.0
        step = -g / slope if slope < 0.0 else math.nan
        new = c + step
        if not (lo < new < hi) or not math.isfinite(new):
            new = 0.5 * (lo + hi)
        if abs(new - c) <= 1e-15:
            return new
        c = new
    raise SolverError(  # pragma: no cover - Newton with bisection safeguard converges
        f"correlation fixed point did not converge for {act.name} (last c = {c:.15g}); "
        "try a sigma_w further from the critical point"
    )


def _require_fixed_point(act: Activation, sw: float, sb: float, q: float) -> None:
    v = sw * sw * _mean_square(act, q) + sb * sb
    if abs(v - q) > _FIXED_POINT_RTOL * q + (0.0 if q > 0 else 1e-300):
        raise InputError(
            f"q = {q!r} is not a fixed point of the length map of {act.name} at sigma_w = {sw:g}, "
            f"sigma_b = {sb:g} (V(q) = {v:.12g})",
            expected=f"q with |V(q) - q| <= {_FIXED_POINT_RTOL:g} q",
            hint="pass q = fixed_point(activation, sigma_w, sigma_b)",
        )


# ---------------------------------------------------------------------------------------------
# Summary
# ---------------------------------------------------------------------------------------------


def _depth_scale(slope: float) -> float:
    """``-1/ln|slope|``: inf within PHASE_TOL of 1, 0 for slope 0."""
    s = abs(slope)
    if abs(s - 1.0) <= PHASE_TOL:
        return math.inf
    if s == 0.0:
        return 0.0
    if s > 1.0:
        raise SolverError(
            f"slope {slope:.12g} > 1 at a fixed point that should be stable; "
            "this is a bug or a fixed point the root finder misclassified"
        )
    return -1.0 / math.log(s)


def mean_field(activation: str | Activation, sigma_w: float, sigma_b: float) -> MeanField:
    """Mean-field summary of a plain stack: q*, chi_1, c*, depth scales and phase.

    * ``q*`` from :func:`fixed_point`; ``chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2]``.
    * Phase: "critical" if ``|chi_1 - 1| <= CRITICAL_TOL`` (1e-6: a sigma_w given to 7 significant
      digits is critical, and chi_1^L stays within about L 1e-6 of 1), else ordered (< 1) /
      chaotic (> 1); c* = 1 and xi_c = inf inside the critical band.
    * ``1/xi_q = -ln V'(q*)``; ``xi_q = inf`` when ``|V'(q*) - 1| <= PHASE_TOL`` (for example at
      q* = 0 on the line sigma_b = 0, or ReLU at sigma_w^2 = 2, where V(q) = q).
    * Ordered and critical: c* = 1, C'(1) = chi_1, so ``xi_c = -1/ln chi_1`` (``math.inf`` exactly
      at criticality).  Chaotic: c* < 1 from :func:`correlation_fixed_point` and
      ``xi_c = -1/ln C'(c*)``.

    At q* = 0 (sigma_b = 0, phi(0) = 0, below criticality) the correlation quantities are the
    limits q* -> 0+ (reached along sigma_b -> 0+), so xi_c = -1/ln chi_1 stays continuous in
    sigma_b; exactly at sigma_b = 0 the signal itself decays on the same scale xi_q.

    Args:
      activation: registry name or Activation.
      sigma_w, sigma_b: weight and bias scales.

    Returns:
      :class:`MeanField`.

    Raises:
      TheoryError: no finite stable fixed point (see :func:`fixed_point`).

    References:
      Schoenholz et al. 2017 (ICLR), sec. 3 (depth scales, phase diagram); Poole et al. 2016;
      docs/theory-mean-field.md (check values for tanh).
    """
    return _mean_field(_act(activation), _scale("sigma_w", sigma_w), _scale("sigma_b", sigma_b))


@functools.lru_cache(maxsize=256)
def _mean_field(act: Activation, sw: float, sb: float) -> MeanField:
    """:func:`mean_field` on checked arguments, cached: a pure function of (phi, sigma_w,
    sigma_b) that an analysis asks for once per profile depth (the chaotic-phase c* solve of a
    kinked phi costs seconds)."""
    q = fixed_point(act, sw, sb)
    x1 = chi1(act, sw, q)
    if abs(x1 - 1.0) <= CRITICAL_TOL:
        phase = "critical"
    elif x1 < 1.0:
        phase = "ordered"
    else:
        phase = "chaotic"
    xi_q = _depth_scale(length_map_slope(act, sw, q))
    if phase == "chaotic":
        c_star = correlation_fixed_point(act, sw, sb, q)
        xi_c = _depth_scale(correlation_slope(act, sw, q, c_star))
    else:
        c_star = 1.0
        xi_c = math.inf if phase == "critical" else _depth_scale(x1)
    return MeanField(sw, sw * sw, sb, sb * sb, q, x1, c_star, xi_q, xi_c, phase)


# ---------------------------------------------------------------------------------------------
# Trajectories
# ---------------------------------------------------------------------------------------------


def q_trajectory(
    activation: str | Activation,
    sigma_w: float,
    sigma_b: float,
    q0: float,
    depth: int,
    family: str = "plain",
    alpha: float = 1.0,
) -> np.ndarray:
    """Pre-activation variances ``q^1..q^depth`` of a wide stack fed an input of mean square q0.

    The input x^0 has ``|x^0|^2/N = q0`` and zero mean over units.  In both families
    ``h^l = W^l x^{l-1} + b^l`` with W zero-mean, so given x^{l-1} the h^l_i are i.i.d. Gaussian
    with variance ``q^l = sigma_w^2 Q^{l-1} + sigma_b^2``, ``Q^l = |x^l|^2/N`` (only the mean
    square of x matters, not its mean).

    Plain (``x^l = phi(h^l)``): ``Q^l = E[phi(sqrt(q^l) z)^2]``, hence ``q^1 = sigma_w^2 q0 + sigma_b^2``
    and ``q^{l+1} = V(q^l)``.

    Residual (``x^l = x^{l-1} + alpha phi(h^l)``): expand
    ``Q^l = Q^{l-1} + 2 alpha <x^{l-1}, phi(h^l)>/N + alpha^2 |phi(h^l)|^2/N``.  The last term tends
    to ``nu^l = E[phi(sqrt(q^l) z)^2]``.  In the cross term each h^l_i depends on x^{l-1} only
    through the fresh row W_i (its dependence on any single x_j is O(N^{-1/2}) and averages out),
    so ``<x^{l-1}, phi(h^l)>/N -> m^{l-1} mu^l`` with ``mu^l = E[phi(sqrt(q^l) z)]`` and
    ``m^l = mean_i x^l_i`` the mean mode.  The mean mode itself accumulates
    ``m^l = m^{l-1} + alpha mu^l``, m^0 = 0.  Altogether::

        q^l = sigma_w^2 Q^{l-1} + sigma_b^2
        Q^l = Q^{l-1} + 2 alpha m^{l-1} mu^l + alpha^2 nu^l
        m^l = m^{l-1} + alpha mu^l

    equivalently ``Q^l = (m^l)^2 + q0 + alpha^2 sum_{k<=l} Var[phi(h^k)]``.  For phi with
    E[phi] != 0 (ReLU, GELU, SELU) the common offset m^l grows linearly in depth and Q^l
    quadratically; dropping it (``Q^l = Q^{l-1} + alpha^2 nu^l``) underestimates q^l badly.

    Args:
      activation: registry name or Activation.
      sigma_w, sigma_b: weight and bias scales.
      q0: input mean square ``|x^0|^2/N`` >= 0.
      depth: number of weight layers L >= 1.
      family: ``"plain"`` or ``"residual"``.
      alpha: residual branch scale (ignored for ``"plain"``).

    Returns:
      float64 array of shape ``(depth,)``: ``[q^1, ..., q^L]``.

    Raises:
      InputError: unknown family, depth < 1, negative q0, non-finite alpha.

    References:
      Poole et al. 2016 (NeurIPS), sec. 2 (plain); residual stacks as in Tarnowski et al. 2019
      (AISTATS), eqs. 1-2, with the mean-mode recursion derived in-house (docs/theory-mean-field.md).
    """
    act = _act(activation)
    sw, sb, q0 = _scale("sigma_w", sigma_w), _scale("sigma_b", sigma_b), _variance(q0, "q0")
    if isinstance(depth, bool) or not isinstance(depth, (int, np.integer)) or depth < 1:
        raise InputError(
            f"depth = {depth!r} is invalid",
            expected="an integer >= 1",
            hint="depth counts weight layers",
        )
    if family not in ("plain", "residual"):
        raise InputError(
            f"family = {family!r} is not supported by q_trajectory",
            expected="'plain' or 'residual'",
            hint="convolution stacks with delta-orthogonal kernels follow 'plain'",
        )
    try:
        a = float(alpha)
    except (TypeError, ValueError):
        a = math.nan
    if not math.isfinite(a):
        raise InputError(
            f"alpha = {alpha!r} is invalid",
            expected="a finite real branch scale",
            hint="use alpha = 1.0 for the default residual block",
        )
    sw2, sb2 = sw * sw, sb * sb
    fn = _integrand(act)
    if family == "plain" and sb2 == 0.0 and _homogeneous(act):
        return _geometric_trajectory(act, fn, sw, sw2 * q0, int(depth))
    out = np.empty(int(depth))
    big_q, m = q0, 0.0
    for layer in range(int(depth)):
        q = sw2 * big_q + sb2
        out[layer] = q
        if not math.isfinite(q):
            raise SolverError(
                f"variance overflowed at layer {layer + 1} of {depth} "
                f"({act.name}, sigma_w = {sw:g}, sigma_b = {sb:g}); "
                "lower sigma_w or the depth"
            )
        if q == 0.0:
            mu = _phi0(act)
            nu = mu * mu
        else:
            h, w = _rule(fn, q)
            p = fn.phi(h)
            mu, nu = float(np.dot(w, p)), float(np.dot(w, p * p))
        if family == "plain":
            big_q = nu
        else:
            big_q = big_q + 2.0 * a * m * mu + a * a * nu
            m = m + a * mu
    return out


def _geometric_trajectory(
    act: Activation, fn: _Integrand, sw: float, q1: float, depth: int
) -> np.ndarray:
    """``q^l = q^1 f^{l-1}`` for a positively homogeneous phi without bias: ``E[phi(sqrt(q) z)^2]
    = q E[phi(z)^2]``, so the length map is linear, ``V(q) = f q`` with ``f = sigma_w^2
    E[phi(z)^2]`` (ReLU: sigma_w^2/2), and the trajectory is geometric (one quadrature, not one
    per layer).  Raises SolverError where it overflows, as the layer-by-layer recursion does."""
    h, w = _rule(fn, 1.0)
    p = fn.phi(h)
    f = sw * sw * float(np.dot(w, p * p))
    with np.errstate(over="ignore", under="ignore"):
        out = q1 * np.power(f, np.arange(depth, dtype=float))
    bad = np.flatnonzero(~np.isfinite(out))
    if bad.size:
        raise SolverError(
            f"variance overflowed at layer {int(bad[0]) + 1} of {depth} "
            f"({act.name}, sigma_w = {sw:g}, sigma_b = 0); lower sigma_w or the depth"
        )
    return out


# ---------------------------------------------------------------------------------------------
# Criticality
# ---------------------------------------------------------------------------------------------


def _line_point(act: Activation, q: float, slope: bool = True) -> tuple[float, float, float]:
    """(sigma_w^2, sigma_b^2, V'(q)) of the critical-line point at fixed point q.

    V'(q) is nan unless ``slope`` (the q = 0 slope of a phi with phi(0) != 0 costs a jax.grad).
    """
    if q == 0.0:
        mu1, e2 = _dphi_sq(act, 0.0), _phi0(act) ** 2
        ratio = _slope_ratio(act, 0.0) if slope else math.nan
    else:
        fn = _integrand(act)
        h, w = _rule(fn, q)
        p, d = fn.phi(h), fn.dphi(h)
        mu1, e2 = float(np.dot(w, d * d)), float(np.dot(w, p * p))
        ratio = float(np.dot(w, h * p * d)) / q
    if mu1 <= 0.0:
        return math.inf, -math.inf, math.inf
    sw2 = 1.0 / mu1
    return sw2, q - sw2 * e2, sw2 * ratio


def _homogeneous_point(act: Activation) -> tuple[float, float]:
    """For phi(t h) = t phi(h): chi_1 = sigma_w^2 k with k = E[phi'^2] (any q); returns (sw2, k)."""
    k = _dphi_sq(act, 1.0)
    return 1.0 / k, k


def critical_point(activation: str | Activation, sigma_b: float) -> CriticalPoint:
    """The weight scale with ``chi_1(sigma_w, q*(sigma_w, sigma_b)) = 1`` at a given bias scale.

    Solved along the critical line: a fixed point q with chi_1 = 1 has
    ``sigma_w^2 = 1/E[phi'(sqrt(q) z)^2]`` and ``sigma_b^2 = q - sigma_w^2 E[phi(sqrt(q) z)^2]``, so
    the unknown is the single number q: scan q geometrically from 1e-14 to ``Q_MAX`` for sign
    changes of ``sigma_b^2(q) - sigma_b^2`` (q = 0 itself when it is a root) and refine each with
    Brent's method.  A candidate is accepted only if q is *the* stable fixed point at its
    sigma_w (``V'(q) <= 1`` and :func:`fixed_point` returns q); the first accepted candidate (the
    smallest q*) is returned.

    Positively homogeneous phi (linear, ReLU, leaky ReLU) have chi_1 independent of q: the line
    degenerates to one point, ``sigma_w^2 = 1/E[phi'^2]`` (ReLU 2, linear 1) with sigma_b = 0,
    where every q is preserved; q_star is reported as 0.0, the convention of :func:`fixed_point`.

    What happens for the other registered activations (measured): tanh, erf, hard-tanh, centred
    sigmoid and SELU have one critical point for every sigma_b >= 0 (at sigma_b = 0 it sits at
    q* = 0).  The logistic sigmoid has one too, but far out: chi_1 <= sigma_w^2/16 forces
    sigma_w^2 >= 16, and at sigma_b = 0 the solution is sigma_w^2 = 103.0, q* = 45.6 (deep
    saturation).  GELU and SiLU reach chi_1 = 1 at small sigma_b only on unstable fixed points
    (V'(q*) > 1); stable critical points start near sigma_b^2 = 0.18 (GELU) and 0.56 (SiLU), and
    smaller sigma_b raise TheoryError.

    Args:
      activation: registry name or Activation.
      sigma_b: bias scale >= 0.

    Returns:
      :class:`CriticalPoint`.

    Raises:
      TheoryError: no stable fixed point with chi_1 = 1 exists at this sigma_b (the message says
        why: homogeneous phi with sigma_b > 0, only unstable solutions, or none at all).

    References:
      Schoenholz et al. 2017 (ICLR), sec. 3 and fig. 1 (critical line of tanh); He et al. 2015
      (ReLU, sigma_w^2 = 2); docs/theory-mean-field.md (check values).
    """
    act = _act(activation)
    sb = _scale("sigma_b", sigma_b)
    sb2 = sb * sb
    if _homogeneous(act):
        sw2, k = _homogeneous_point(act)
        if sb2 == 0.0:
            return CriticalPoint(math.sqrt(sw2), sw2, 0.0, 0.0, 0.0)
        raise TheoryError(
            f"{act.name} has no critical point at sigma_b = {sb:g}: phi is positively homogeneous, so "
            f"chi_1 = sigma_w^2 E[phi'^2] = {k:.6g} sigma_w^2 whatever q is, chi_1 = 1 forces "
            f"sigma_w^2 = {sw2:.6g}, and there V(q) = q + sigma_b^2 > q: the variance grows without "
            f"bound. Use sigma_b = 0 (sigma_w^2 = {sw2:.6g}), or a bounded activation (tanh, erf) "
            "if a bias is needed"
        )

    def f(q: float) -> float:
        return _line_point(act, q, slope=False)[1] - sb2

    rejected: list[str] = []
    f0 = f(0.0)
    candidates = []
    if f0 == 0.0:
        candidates.append(0.0)
    q_prev, f_prev = 0.0, f0
    q = 1e-14
    while q <= Q_MAX:
        fq = f(q)
        if f_prev != 0.0 and fq != 0.0 and (fq > 0.0) != (f_prev > 0.0):
            candidates.append(_brent(f, q_prev, q))
        elif fq == 0.0:
            candidates.append(q)
        while candidates:
            cand = candidates.pop(0)
            point = _accept(act, cand, sb, rejected)
            if point is not None:
                return point
        q_prev, f_prev = q, fq
        q *= 2.0
    if rejected:
        raise TheoryError(
            f"{act.name} has no stable critical point at sigma_b = {sb:g}: chi_1 = 1 is reached only "
            f"at {'; '.join(rejected)}. A network initialised there does not stay at that q*. Try a "
            "larger sigma_b (see critical_line for the stable part of the line)"
        )
    lo_sb2 = _line_min_sb2(act)
    raise TheoryError(
        f"{act.name} has no critical point at sigma_b = {sb:g}: no fixed point q* in "
        f"[0, {Q_MAX:g}] has chi_1 = 1 and sigma_b^2 = {sb2:g} (the smallest sigma_b^2 on the "
        f"critical line for q* in [1e-6, 1e4] is {lo_sb2:.6g}). Choose another sigma_b or "
        "activation"
    )


def _accept(act: Activation, q: float, sb: float, rejected: list[str]) -> CriticalPoint | None:
    sw2, _, slope = _line_point(act, q)
    sw = math.sqrt(sw2)
    if slope > 1.0 + PHASE_TOL:
        rejected.append(
            f"q* = {q:.6g}, sigma_w^2 = {sw2:.6g}, an unstable fixed point "
            f"(V'(q*) = {slope:.6g} > 1)"
        )
        return None
    try:
        q_found = fixed_point(act, sw, sb)
    except TheoryError:
        rejected.append(
            f"q* = {q:.6g}, sigma_w^2 = {sw2:.6g}, where the variance runs away "
            "from every fixed point"
        )
        return None
    if abs(q_found - q) > 1e-7 * max(q, 1e-300) + 1e-14:
        rejected.append(
            f"q* = {q:.6g}, sigma_w^2 = {sw2:.6g}, a fixed point not reached from small "
            f"variances (the stable one there is q* = {q_found:.6g})"
        )
        return None
    return CriticalPoint(sw, sw2, sb, sb * sb, q)


def _reached(act: Activation, sw2: float, sb2: float, q: float) -> bool:
    try:
        found = fixed_point(act, math.sqrt(sw2), math.sqrt(max(sb2, 0.0)))
    except TheoryError:
        return False
    return abs(found - q) <= 1e-7 * q + 1e-14


def _line_min_sb2(act: Activation) -> float:
    qs = np.geomspace(1e-6, 1e4, 61)
    return float(min(_line_point(act, float(q), slope=False)[1] for q in qs))


def critical_line(
    activation: str | Activation, q_max: float | None = None, points: int = 200
) -> CriticalLine:
    """The critical line chi_1 = 1 in the (sigma_w^2, sigma_b^2) plane, parametrised by q*.

    For each q* >= 0: ``sigma_w^2 = 1/E[phi'(sqrt(q*) z)^2]``,
    ``sigma_b^2 = q* - sigma_w^2 E[phi(sqrt(q*) z)^2]`` (the fixed-point equation solved for the
    bias).  q* runs evenly over ``[q_lo, q_max]``, with q_lo the smallest q* >= 0 where
    ``sigma_b^2 >= 0`` (0 for odd phi); points with sigma_b^2 < 0 or an unstable fixed point
    (``V'(q*) > 1 + PHASE_TOL``, GELU/SiLU at small q*) are dropped, and so are marginal points
    (``|V'(q*) - 1| <= PHASE_TOL``) that :func:`fixed_point` does not reach (GELU/SiLU at q* = 0,
    which repels from above).  The default q_max is the q* where sigma_b^2 reaches 1.
    Positively homogeneous phi (linear, ReLU, leaky ReLU) return their
    single critical point (``(1, 0)``, ``(2, 0)``, ...) with q* = 0.

    Args:
      activation: registry name or Activation.
      q_max: largest q* (default: where sigma_b^2 = 1).
      points: number of q* values before filtering, >= 2.

    Returns:
      :class:`CriticalLine` of float64 arrays.

    Raises:
      TheoryError: no point of the line has sigma_b^2 >= 0 and a stable fixed point up to q_max.

    References:
      Schoenholz et al. 2017 (ICLR), fig. 1 (phase diagram); docs/theory-mean-field.md (erf closed form).
    """
    act = _act(activation)
    if isinstance(points, bool) or not isinstance(points, (int, np.integer)) or points < 2:
        raise InputError(
            f"points = {points!r} is invalid", expected="an integer >= 2", hint="the default is 200"
        )
    if _homogeneous(act):
        sw2, _ = _homogeneous_point(act)
        return CriticalLine(np.array([sw2]), np.array([0.0]), np.array([0.0]))

    def sb2_of(q: float) -> float:
        return _line_point(act, q, slope=False)[1]

    q_lo = 0.0 if sb2_of(0.0) >= 0.0 else _first_crossing(sb2_of, 0.0)
    if q_lo is None:
        raise TheoryError(
            f"the critical line of {act.name} has sigma_b^2 < 0 for every "
            f"q* <= {Q_MAX:g}: no (sigma_w, sigma_b) is critical"
        )
    if q_max is None:
        q_hi = _first_crossing(sb2_of, _CRITICAL_SB2_SPAN, start=max(q_lo, 1e-14))
        if q_hi is None:
            q_hi = Q_MAX
    else:
        q_hi = _variance(q_max, "q_max")
        if q_hi <= q_lo:
            raise TheoryError(
                f"the critical line of {act.name} has sigma_b^2 < 0 for q* <= q_max "
                f"= {q_hi:g}; it starts at q* = {q_lo:.6g}: pass a larger q_max"
            )
    qs = np.linspace(q_lo, q_hi, int(points))
    rows = np.array([_line_point(act, float(q)) for q in qs])
    if abs(rows[0, 1]) <= 1e-12 * max(1.0, q_lo):
        rows[0, 1] = 0.0  # sigma_b^2 = 0 at q_lo, up to the root finder's rounding
    keep = (rows[:, 1] >= 0.0) & (rows[:, 2] <= 1.0 + PHASE_TOL)
    for i in np.flatnonzero(keep & (np.abs(rows[:, 2] - 1.0) <= PHASE_TOL)):
        # marginal (V'(q*) = 1, e.g. q* = 0 for GELU/SiLU): keep only if q* is actually reached
        keep[i] = _reached(act, float(rows[i, 0]), float(rows[i, 1]), float(qs[i]))
    if not keep.any():
        raise TheoryError(
            f"no point of the critical line of {act.name} with q* in [{q_lo:.6g}, "
            f"{q_hi:.6g}] has sigma_b^2 >= 0 and a stable fixed point; "
            "pass a larger q_max"
        )
    return CriticalLine(rows[keep, 0].copy(), rows[keep, 1].copy(), qs[keep].copy())


def _first_crossing(
    f: Callable[[float], float], level: float, start: float = 1e-14
) -> float | None:
    """Smallest q >= start (geometric scan, then Brent) where f(q) rises through level."""
    q_prev = None
    q = max(start, 1e-14)
    while q <= Q_MAX:
        fq = f(q) - level
        if fq >= 0.0:
            if q_prev is None or fq == 0.0:
                return q
            return _brent(lambda t: f(t) - level, q_prev, q)
        q_prev = q
        q *= 2.0
    return None
