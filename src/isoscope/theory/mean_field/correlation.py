"""The correlation map ``C(c)``, its slope ``C'(c)`` and its stable fixed point ``c*``.

Two inputs' pre-activations at one layer stay jointly Gaussian at infinite width, each with
variance q and with correlation c: ``u1 = sqrt(q) z1``, ``u2 = sqrt(q) (c z1 + sqrt(1 - c^2) z2)``,
z1, z2 independent N(0, 1).  The next layer's correlation is (Poole et al. 2016, NeurIPS, sec. 2;
Schoenholz et al. 2017, ICLR, sec. 3)::

    C(c)  = (sigma_w^2 E[phi(u1) phi(u2)] + sigma_b^2)/q
          = 1 - sigma_w^2 E[(phi(u1) - phi(u2))^2]/(2q)      at a fixed point V(q) = q
    C'(c) = sigma_w^2 E[phi'(u1) phi'(u2)]                   (Price's theorem), C'(1) = chi_1

The fixed-point form keeps ``1 - C(c)`` accurate near c = 1 and has a finite limit at q -> 0+.
``c* = 1`` unless the phase is chaotic; there C is convex on [0, 1] (its Mehler series
``E[phi(u1) phi(u2)] = sum_k b_k^2 c^k`` has non-negative coefficients) and c* is the root in
[0, 1) of ``(C(c) - c)/(1 - c)``, seeded by the series and finished by safeguarded Newton steps.
At the fixed point ``1/xi_c = -ln C'(c*)`` (:mod:`.phase`).  The expectations are
two-dimensional Gauss-Legendre rules (:func:`isoscope.theory.quadrature.expect_bivariate`) split
at the kinks, with extra breaks near ``|c| = 1`` for kinked phi (``docs/theory-mean-field.md``).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from scipy import optimize

from isoscope.activations import Activation
from isoscope.errors import InputError, SolverError
from isoscope.theory.mean_field._checks import _act, _correlation, _scale, _variance
from isoscope.theory.mean_field.expectations import (
    _at,
    _dphi_sq,
    _Integrand,
    _integrand,
    _mean_square,
    _rule,
)
from isoscope.theory.mean_field.tolerances import PHASE_TOL
from isoscope.theory.quadrature import expect_bivariate

__all__ = ["correlation_map", "correlation_slope", "correlation_fixed_point"]


_FIXED_POINT_RTOL = 1e-6  # how close q must be to V(q) to be accepted as "the fixed point"
_HERMITE_TERMS = 48  # Mehler-series terms used only to seed the c* solve

_NEAR_ONE_PERP = 0.2  # sqrt(1 - c^2) below which kinked 2-D rules get extra breaks (_bivariate)
_NEAR_ONE_STEPS = (-8.0, -2.0, -0.5, 0.5, 2.0, 8.0)


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
