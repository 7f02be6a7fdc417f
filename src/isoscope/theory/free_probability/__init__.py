"""Free probability for the Jacobian spectrum of deep networks at infinite width.

The model (docs/theory-free-probability.md sec. 1, 3): ``J = D^L W^L ... D^1 W^1`` with ``D^l = diag(phi'(h^l))``,
``h^l ~ N(0, q)`` and W Gaussian (``W_ij ~ N(0, sigma_w^2/N)``) or scaled Haar orthogonal
(``W = sigma_w Q``).  lambda = s^2 is an eigenvalue of ``J J^T``.  As N -> infinity the
factors are asymptotically free, their S-transforms multiply, and the spectrum of ``J J^T``
follows from the law of ``d = phi'(h)^2`` alone:

  ``S_{JJ^T}(z) = S_{W^T W}(z)^L S_{D^2}(z)^L``,
  ``S_{W^T W} = 1 / (sigma_w^2 (1 + z))`` (Gaussian) or ``1 / sigma_w^2`` (orthogonal).

Conventions (Pennington, Schoenholz, Ganguli 2017, sec. 2.3): ``G(z) = int rho(t)/(z - t) dt``,
``M(z) = z G(z) - 1 = sum_k m_k z^{-k}``, ``S(z) = (1 + z)/(z M^{-1}(z))``; the master
equation ``z M S(M) = 1 + M`` determines M, hence G and ``rho = -Im G(x + i0)/pi``.

Which file owns what (each module's docstring gives its formulas and references):

* :mod:`.derivative` -- :func:`derivative_law`, the law of d (exact atoms for piecewise-constant
  phi', quadrature nodes for smooth phi), :class:`DerivativeLaw`, :func:`derivative_means`
  (``E[phi'(h^l)^2]`` along a trajectory), ``WEIGHT_KINDS``;
* :mod:`.series` -- :func:`plain_moments`, m1..m4 of ``J J^T`` by Lagrange inversion with
  truncated power series; :class:`LambdaMoments`, :func:`moments_from_logs`;
* :mod:`.solver` -- the continuation solver of the master equation along ``z = lambda + i y``
  (damped Newton, step control, ``ETA``, ``START``);
* :mod:`.density` -- :class:`Density`, the result type of every density (log form first);
* :mod:`.grid` -- the grid of ``ln lambda``, the support intervals and the mass check;
* :mod:`.plain` -- :func:`plain_density`, the density of a plain stack (master equation in the
  auxiliary variable w, atoms, upper edge, the near-isometric semicircle ``NARROW_SPREAD``);
* :mod:`.pushforward` -- one orthogonal layer of a smooth phi, by change of variables;
* :mod:`.residual` -- :func:`residual_tau`, :func:`residual_moments`, :func:`residual_edges`,
  :func:`residual_density`: the universal law of deep residual stacks,
  ``S(z) = exp(-tau (1 + 2 z))`` (Tarnowski et al. 2019; docs/theory-free-probability.md
  sec. 7), and :func:`plain_limit_edges`, the support of the large-depth orthogonal law
  ``S = exp(-c z)``;
* :mod:`._checks` (argument checks, one place for the messages), :mod:`._float64` (the float64
  range the log forms are measured against).

Imports run one way: ``_float64``, ``_checks`` -> ``derivative`` -> ``series``; ``solver`` ->
``density``, ``grid`` -> ``pushforward`` -> ``plain``; ``residual`` last.  The law of d uses
the mean-field quadrature breaks (:mod:`isoscope.theory.mean_field.expectations`), so that
``sigma_w^2 E[d]`` is chi_1 to rounding.

The solver works in ``ell = ln(lambda)`` and in the relative imaginary part ``y/lambda``, so
spectra spanning thousands of decades (Gaussian stacks at depth 1000) stay representable:
:class:`Density` carries ``log_x`` and ``rho_log`` (the density of ``ln lambda``) next to x, rho.
"""

from __future__ import annotations

from isoscope.theory.free_probability._float64 import _LOG_HUGE as _LOG_HUGE
from isoscope.theory.free_probability.density import ATOM_FLOOR as ATOM_FLOOR
from isoscope.theory.free_probability.density import Density
from isoscope.theory.free_probability.derivative import (
    WEIGHT_KINDS,
    DerivativeLaw,
    derivative_law,
    derivative_means,
)
from isoscope.theory.free_probability.grid import FLOOR as FLOOR
from isoscope.theory.free_probability.grid import MASS_RTOL as MASS_RTOL
from isoscope.theory.free_probability.grid import THRESHOLD as THRESHOLD
from isoscope.theory.free_probability.plain import NARROW_SPREAD, plain_density
from isoscope.theory.free_probability.residual import (
    plain_limit_edges,
    residual_density,
    residual_edges,
    residual_moments,
    residual_tau,
)
from isoscope.theory.free_probability.series import (
    LambdaMoments,
    moments_from_logs,
    plain_moments,
)
from isoscope.theory.free_probability.solver import ATOM_NOISE as ATOM_NOISE
from isoscope.theory.free_probability.solver import ETA as ETA
from isoscope.theory.free_probability.solver import MAX_CHANGE as MAX_CHANGE
from isoscope.theory.free_probability.solver import MAX_LOG_STEP as MAX_LOG_STEP
from isoscope.theory.free_probability.solver import START as START

__all__ = [
    "WEIGHT_KINDS",
    "DerivativeLaw",
    "derivative_law",
    "LambdaMoments",
    "moments_from_logs",
    "plain_moments",
    "NARROW_SPREAD",
    "Density",
    "plain_density",
    "residual_tau",
    "derivative_means",
    "residual_moments",
    "residual_edges",
    "residual_density",
    "plain_limit_edges",
]
