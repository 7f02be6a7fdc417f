"""The mean-field summary of a plain stack: q*, chi_1, c*, the depth scales and the phase.

One call gathers what the other modules compute at one (sigma_w, sigma_b) (Schoenholz et al.
2017, ICLR, sec. 3; Poole et al. 2016, NeurIPS)::

    q*    = fixed point of the length map             (:mod:`.length`)
    chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2]           (:mod:`.chi`)
    phase = ordered (chi_1 < 1), critical (|chi_1 - 1| <= CRITICAL_TOL), chaotic (chi_1 > 1)
    c*    = 1, or the root of C(c) = c in [0, 1) when chaotic   (:mod:`.correlation`)
    1/xi_q = -ln V'(q*),   1/xi_c = -ln C'(c*)        (inf within PHASE_TOL of slope 1)

The result is cached per (phi, sigma_w, sigma_b): an analysis asks for it once per profile
depth, and the chaotic-phase c* solve of a kinked phi costs seconds.
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

from isoscope.activations import Activation
from isoscope.errors import SolverError
from isoscope.theory.mean_field._checks import _act, _scale
from isoscope.theory.mean_field.chi import chi1
from isoscope.theory.mean_field.correlation import correlation_fixed_point, correlation_slope
from isoscope.theory.mean_field.length import fixed_point, length_map_slope
from isoscope.theory.mean_field.tolerances import CRITICAL_TOL, PHASE_TOL

__all__ = ["MeanField", "mean_field"]


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
