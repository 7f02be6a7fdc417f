"""The length map ``V(q)``, its slope and its stable fixed point ``q*``.

At infinite width the pre-activations of one layer are i.i.d. ``N(0, q^l)``, and the variance
of the next layer's is (Poole et al. 2016, NeurIPS, sec. 2; Schoenholz et al. 2017, ICLR,
sec. 3)::

    V(q)  = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2,        z ~ N(0, 1)
    V'(q) = sigma_w^2 E[u phi(u) phi'(u)]/q,                   u ~ N(0, q)

The stable fixed point q* solves ``V(q) = q`` with ``V'(q*) <= 1``; where several exist it is
the one reached by iterating V from ``q -> 0+``.  It is found by root finding on
``g(q) = V(q) - q`` (bracketing by doubling, then Brent's method), never by plain iteration,
with a sign test that counts ``|g| <= 1e-11 q + 1e-13 sqrt(q)`` (quadrature noise plus phi's
own rounding) as zero, so a marginal map (ReLU at sigma_w^2 = 2 with a bias) gives no spurious
root.  At the fixed point ``1/xi_q = -ln V'(q*)`` (:mod:`.phase`).  Details, including q* = 0:
``docs/theory-mean-field.md``.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from scipy import optimize

from isoscope.activations import Activation
from isoscope.errors import SolverError, TheoryError
from isoscope.theory.mean_field._checks import _act, _scale, _variance
from isoscope.theory.mean_field.expectations import _mean_square, _slope_ratio
from isoscope.theory.mean_field.tolerances import PHASE_TOL, Q_MAX

__all__ = ["length_map", "length_map_slope", "fixed_point"]


_SIGN_RTOL = 1e-11  # |V(q) - q| <= _SIGN_RTOL q + _SIGN_ATOL sqrt(q) counts as zero: quadrature
_SIGN_ATOL = 1e-13  # noise, plus phi's own rounding (~1e-16 absolute) times |h| ~ sqrt(q)


def _residual_g(act: Activation, sw2: float, sb2: float, q: float) -> float:
    return sw2 * _mean_square(act, q) + sb2 - q


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
