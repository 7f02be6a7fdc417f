"""Criticality: the critical point at a given sigma_b and the critical line ``chi_1 = 1``.

A fixed point q with ``chi_1 = 1`` has (solve ``chi_1 = 1`` and ``V(q) = q`` for the scales)::

    sigma_w^2 = 1/E[phi'(sqrt(q) z)^2],   sigma_b^2 = q - sigma_w^2 E[phi(sqrt(q) z)^2]

so the critical line in the (sigma_w^2, sigma_b^2) plane is parametrised by q* alone
(Schoenholz et al. 2017, ICLR, sec. 3 and fig. 1).  A point of it counts only where q is *the*
stable fixed point at its sigma_w (``V'(q*) <= 1 + PHASE_TOL`` and :func:`.length.fixed_point`
returns q).  :func:`critical_point` scans q geometrically for ``sigma_b^2(q) = sigma_b^2`` and
refines by Brent's method; :func:`critical_line` samples q* evenly.  Positively homogeneous phi
(linear, ReLU, leaky ReLU) have chi_1 independent of q, so the line is one point,
``sigma_w^2 = 1/E[phi'^2]`` with sigma_b = 0 (ReLU: sigma_w^2 = 2, He et al. 2015).  Check
values: ``docs/theory-mean-field.md``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import NamedTuple

import numpy as np

from isoscope.activations import Activation
from isoscope.errors import InputError, TheoryError
from isoscope.theory.mean_field._checks import _act, _scale, _variance
from isoscope.theory.mean_field.expectations import (
    _dphi_sq,
    _homogeneous,
    _integrand,
    _phi0,
    _rule,
    _slope_ratio,
)
from isoscope.theory.mean_field.length import _brent, fixed_point
from isoscope.theory.mean_field.tolerances import PHASE_TOL, Q_MAX

__all__ = ["CriticalPoint", "CriticalLine", "critical_point", "critical_line"]


_CRITICAL_SB2_SPAN = 1.0  # default critical line: up to sigma_b^2 = 1


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
