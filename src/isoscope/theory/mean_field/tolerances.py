"""Tolerances and limits of the mean-field solvers: ``PHASE_TOL``, ``CRITICAL_TOL``, ``Q_MAX``.

The phases are those of Schoenholz et al. 2017 (ICLR), sec. 3: at the fixed point q*, ordered
when ``chi_1 < 1``, chaotic when ``chi_1 > 1``, critical when ``chi_1 = 1``; a depth scale
``xi = -1/ln(slope)`` is infinite where the slope (``V'(q*)`` or ``C'(c*)``) is 1.  In floating
point "= 1" needs a band; the widths are ours, and these are the reasons
(``docs/theory-mean-field.md``):

* The phase is "critical" when ``|chi_1 - 1| <= CRITICAL_TOL = 1e-6``.  Why 1e-6: a sigma_w written
  with 7 significant digits (as a user copies it from ``isoscope critical`` or a paper) moves
  chi_1 by up to about 1e-6 from 1, and over L layers the mean squared singular value
  ``m1 = chi_1^L`` then differs from 1 by about ``L * 1e-6``: below 1 % for every depth up to
  10^4, beyond the depths at which a dense Jacobian is measured.  Calling such a point "chaotic"
  or "ordered" would mislead.  Inside the band ``xi_c = inf`` and ``c* = 1``.
* A numerical slope (V'(q*), C'(c*)) within ``PHASE_TOL = 1e-9`` of 1 counts as exactly 1: the
  depth scale is ``math.inf``.  1e-9 sits well above the error of chi_1 at a solved critical
  point (about 1e-13).
* ``Q_MAX = 1e16`` bounds every search for a fixed point (:mod:`.length`, :mod:`.critical`): a
  length map with ``V(q) > q`` up to there is taken to grow without bound.
"""

from __future__ import annotations

__all__ = ["PHASE_TOL", "CRITICAL_TOL", "Q_MAX"]


PHASE_TOL = 1e-9
"""A slope (V'(q*), C'(c*)) within PHASE_TOL of 1 is 1: its depth scale is infinite."""

CRITICAL_TOL = 1e-6
"""Half-width of the "critical" band in chi_1 (see the module docstring for why 1e-6)."""

Q_MAX = 1e16
"""Largest variance searched for a fixed point; beyond it q is treated as growing without bound."""
