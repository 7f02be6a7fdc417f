"""Mean-field signal propagation at infinite width: length map, fixed point, chi_1, correlations.

Model (docs/theory-free-probability.md sec. 1): ``h^l = W^l x^{l-1} + b^l``, ``x^l = phi(h^l)`` with
``W_ij ~ N(0, sigma_w^2/N)`` (``sigma_w`` is a *scale*, not a variance) and ``b_i ~ N(0, sigma_b^2)``;
residual stacks ``x^l = x^{l-1} + alpha phi(h^l)``.  At infinite width the pre-activations of one
layer are i.i.d. ``N(0, q^l)`` and two inputs stay jointly Gaussian with correlation ``c^l``
(docs/theory-mean-field.md; Poole et al. 2016; Schoenholz et al. 2017, sec. 3).

Which file owns what (each module's docstring gives its formulas and references):

* :mod:`.expectations` -- Gaussian expectations ``E[f(phi(h), phi'(h))]``, ``h ~ N(0, q)``, by
  quadrature split at the kinks, and their limits q -> 0+ (the NumPy integrands, the 1-D rule);
* :mod:`.length` -- the length map ``V(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2``, its
  slope, and the stable fixed point ``q*`` (root finding on ``V(q) - q``, never plain
  iteration): :func:`length_map`, :func:`length_map_slope`, :func:`fixed_point`;
* :mod:`.chi` -- ``mu_k = E[phi'(sqrt(q) z)^{2k}]`` and ``chi_1 = sigma_w^2 mu_1``:
  :func:`derivative_moments`, :func:`chi1`;
* :mod:`.correlation` -- the correlation map ``C(c)``, its slope and its stable fixed point
  ``c*``: :func:`correlation_map`, :func:`correlation_slope`, :func:`correlation_fixed_point`;
* :mod:`.phase` -- :class:`MeanField`, :func:`mean_field`: q*, chi_1, c*, the depth scales
  ``xi_q``, ``xi_c`` and the phase (ordered / critical / chaotic);
* :mod:`.trajectory` -- :func:`q_trajectory`, the variances ``q^1..q^L`` of plain and residual
  stacks;
* :mod:`.critical` -- :class:`CriticalPoint`, :class:`CriticalLine`, :func:`critical_point` (the
  critical sigma_w for a given sigma_b), :func:`critical_line`;
* :mod:`.tolerances` -- ``PHASE_TOL``, ``CRITICAL_TOL``, ``Q_MAX`` and why they have these values;
* :mod:`._checks` -- the argument checks (one :class:`~isoscope.errors.InputError` per bad value).

Imports run one way: ``_checks``, ``tolerances`` -> ``expectations`` -> ``length``, ``chi``,
``correlation``, ``trajectory`` -> ``phase``, ``critical``.  Every Gaussian expectation goes
through :mod:`isoscope.theory.quadrature` (composite Gauss-Legendre split at the activation's
kinks); Gauss-Hermite is never used.
"""

from __future__ import annotations

from isoscope.theory.mean_field._checks import _act as _act
from isoscope.theory.mean_field.chi import chi1, derivative_moments
from isoscope.theory.mean_field.correlation import (
    correlation_fixed_point,
    correlation_map,
    correlation_slope,
)
from isoscope.theory.mean_field.critical import (
    CriticalLine,
    CriticalPoint,
    critical_line,
    critical_point,
)
from isoscope.theory.mean_field.length import fixed_point, length_map, length_map_slope
from isoscope.theory.mean_field.phase import MeanField, mean_field
from isoscope.theory.mean_field.tolerances import CRITICAL_TOL, PHASE_TOL, Q_MAX
from isoscope.theory.mean_field.trajectory import q_trajectory

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
