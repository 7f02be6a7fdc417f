"""The law ``S(z) = exp(a - c z)``: deep residual stacks and the large-depth orthogonal limit.

Residual stacks ``x' = x + alpha phi(W x + b)`` follow the universal law (the form of Tarnowski,
Warchol, Jastrzebski, Tabor, Nowak 2019, AISTATS; *derived*, docs/derivations.md sec. 6;
docs/theory-free-probability.md sec. 7)::

    S(z) = exp(-tau (1 + 2 z)),   tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2]  (along q^l)
    m1 = e^tau,   m2 = e^{2 tau} (1 + 2 tau)
    lambda_+- = ((1 + p)/p) e^{tau (1 + 2p)},   p = (-1 +- sqrt(1 + 2/tau))/2
    lambda_+ lambda_- = 1

Moments by the Lagrange inversion of :mod:`.series`, the density by the continuation solver
(:mod:`.solver`) with M as the unknown (:class:`_ExponentialProblem`,
``log z + log M + a - c M - log(1 + M) = 0``).  The large-depth law of orthogonal stacks at
chi_1 = 1, ``S(z) = exp(-c z)`` with ``c = L (mu_2/mu_1^2 - 1)`` fixed (Pennington, Schoenholz,
Ganguli 2018, AISTATS), is the same family (a = 0): :func:`plain_limit_edges`, with
``residual_edges(tau) = e^tau plain_limit_edges(2 tau)`` (docs/derivations.md secs. 5-6).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from isoscope.activations import Activation, get_activation
from isoscope.errors import TheoryError
from isoscope.theory.free_probability._checks import (
    _check_points,
    _check_sigma,
    _check_tau,
    _real,
)
from isoscope.theory.free_probability._float64 import _EPS
from isoscope.theory.free_probability.density import Density, _make_density
from isoscope.theory.free_probability.derivative import derivative_means
from isoscope.theory.free_probability.grid import _tabulate_checked
from isoscope.theory.free_probability.series import _ORDER, LambdaMoments, _lagrange_moments
from isoscope.theory.free_probability.solver import START, _log_lower, _solved

__all__ = [
    "residual_tau",
    "residual_moments",
    "residual_edges",
    "plain_limit_edges",
    "residual_density",
]


class _ExponentialProblem:
    """Master equation for ``S(z) = exp(a - c z)``: ``log z + log M + a - c M - log(1+M) = 0``.

    Covers the residual law (``a = -tau``, ``c = 2 tau``, docs/theory-free-probability.md sec. 7) and the
    large-depth orthogonal law ``S = exp(-c z)`` (a = 0).  Unknown: M itself.
    """

    def __init__(self, a: float, c: float):
        self.a, self.c = a, c
        self.log_m1 = -a

    def evaluate(self, m, log_z):
        one_m = 1.0 + m
        lm, l1m = _log_lower(m), _log_lower(one_m)
        f = log_z + lm + self.a - self.c * m - l1m
        df = 1.0 / m - self.c - 1.0 / one_m
        floor = _EPS * (
            np.abs(log_z) + np.abs(lm) + np.abs(l1m) + abs(self.a) + self.c * np.abs(m) + 1.0
        )
        return f, df, (m, one_m, floor)

    @staticmethod
    def valid(m):
        return m.imag < 0

    @staticmethod
    def relative_change(m, dm, aux):
        """Changes of ``ln M`` and ``ln(1 + M)`` for a step dm (shape ``(2, n)``)."""
        return np.stack([dm / m, dm / aux[1]])

    def initial(self, log_z):
        m = np.exp(self.log_m1 - log_z)
        return np.where(m.imag < 0, m, m.real - 1e-300j)

    @staticmethod
    def lambda_g(m, eta):
        return (1.0 + m) / (1.0 + 1j * eta)


def residual_tau(
    activation: str | Activation,
    sigma_w: float,
    q_trajectory: Sequence[float] | np.ndarray,
    alpha: float = 1.0,
) -> float:
    """``tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2]``, ``h^l ~ N(0, q^l)``, of a residual stack.

    The residual block is ``x' = x + alpha phi(W x + b)``; tau is accumulated along the actual
    trajectory q^l (q grows with depth in residual stacks).  ReLU with sigma_b = 0 gives
    ``tau = L alpha^2 sigma_w^2 / 2`` exactly, linear ``L alpha^2 sigma_w^2``.

    Args:
      activation: registry name or :class:`Activation`.
      sigma_w: weight scale of the branch (not squared).
      q_trajectory: pre-activation variances ``q^1 .. q^L`` (one per block, each > 0).
      alpha: branch scale.

    Returns:
      tau (float).

    References:
      Tarnowski, Warchol, Jastrzebski, Tabor, Nowak 2019 (AISTATS); docs/theory-free-probability.md sec. 7.
    """
    act = get_activation(activation)
    sigma = _check_sigma(sigma_w)
    try:
        qs = np.asarray(q_trajectory, dtype=float).reshape(-1)
        alpha = float(alpha)
    except (TypeError, ValueError):
        raise TheoryError(
            f"q_trajectory must be a sequence of variances and alpha a number, "
            f"received {q_trajectory!r}, {alpha!r}"
        ) from None
    if qs.size == 0 or not np.all(np.isfinite(qs)) or np.any(qs <= 0):
        raise TheoryError(
            f"q_trajectory must hold one positive finite variance per block, "
            f"received {qs.size} values with min {qs.min() if qs.size else None}"
        )
    if not math.isfinite(alpha):
        raise TheoryError(f"alpha must be finite, received {alpha!r}")
    return float(alpha * alpha * sigma * sigma * np.sum(derivative_means(act, qs)))


def residual_moments(tau: float) -> LambdaMoments:
    """Moments of the universal residual law ``S(z) = exp(-tau (1 + 2 z))``.

    Lagrange inversion ``m_k = (1/k)[z^{k-1}] (1+z)^k exp(k tau (1 + 2z))`` gives
    ``m1 = e^tau``, ``m2 = e^{2 tau}(1 + 2 tau)`` and m3, m4 from the same series.

    Args:
      tau: ``sum_l s_l`` (see :func:`residual_tau`), >= 0.

    Returns:
      :class:`LambdaMoments`.

    References:
      Tarnowski et al. 2019 (AISTATS); docs/derivations.md sec. 6 (law derived in-house).
    """
    tau = _check_tau(tau)
    log_t = np.zeros(_ORDER)
    log_t[1] = 2.0 * tau
    return _lagrange_moments(tau, log_t)


def _exp_law_edges(c: float) -> tuple[float, float]:
    """``ln lambda_-, ln lambda_+`` of the law ``S(z) = exp(-c z)`` (critical points of
    ``z(M) = (1 + M) e^{c M}/M``: ``c M (1 + M) = 1``)."""
    root = math.sqrt(c * c + 4.0 * c)
    out = []
    for m in ((-c - root) / (2.0 * c), (-c + root) / (2.0 * c)):
        out.append(math.log(abs(1.0 + m)) + c * m - math.log(abs(m)))
    return out[0], out[1]


def residual_edges(tau: float) -> tuple[float, float]:
    """Support ``(lambda_-, lambda_+)`` of the universal residual law.

    ``lambda_+- = ((1 + p)/p) exp(tau (1 + 2p))``, ``p = (-1 +- sqrt(1 + 2/tau))/2``;
    ``lambda_+ lambda_- = 1``.  At tau = 0 the law is a point mass at 1.

    Args:
      tau: >= 0.

    Returns:
      ``(lo, hi)``.

    References:
      Tarnowski et al. 2019 (AISTATS); docs/derivations.md.
    """
    tau = _check_tau(tau)
    if tau == 0.0:
        return 1.0, 1.0
    lo, hi = _exp_law_edges(2.0 * tau)  # S = e^{-tau} exp(-2 tau z): shift ln lambda by tau
    return math.exp(lo + tau), math.exp(min(hi + tau, 709.78))


def plain_limit_edges(c: float) -> tuple[float, float]:
    """Support of the large-depth orthogonal law ``S(z) = exp(-c z)`` (smooth phi, chi_1 = 1).

    ``lambda_+- = (1 + m) e^{c m}/m`` at ``m_+- = (-c +- sqrt(c^2 + 4c))/(2c)``, with
    ``c = L (mu_2/mu_1^2 - 1)`` held fixed as L -> infinity.  Finite stacks approach it slowly
    (relative differences of order sqrt(8/L)).

    Args:
      c: > 0 (c = 0 is the point mass at 1).

    Returns:
      ``(lo, hi)``.

    References:
      Pennington, Schoenholz, Ganguli 2018 (AISTATS); docs/derivations.md.
    """
    c = _real("c", c, positive=False, what="c = L (mu_2/mu_1^2 - 1)")
    if c == 0.0:
        return 1.0, 1.0
    lo, hi = _exp_law_edges(c)
    return math.exp(lo), math.exp(min(hi, 709.78))


def residual_density(tau: float, points: int = 400) -> Density:
    """Density of the universal residual law ``S(z) = exp(-tau (1 + 2 z))``.

    Solves ``z M exp(-tau (1 + 2M)) = 1 + M`` on the branch ``M ~ e^tau/z`` at large |z| by the
    same continuation as :func:`plain_density` (unknown M); the support is
    :func:`residual_edges`.

    Args:
      tau: >= 0 (tau = 0: a point mass at 1).
      points: grid size (>= 32).

    Returns:
      :class:`Density`.

    References:
      Tarnowski et al. 2019 (AISTATS); docs/derivations.md.
    """
    tau = _check_tau(tau)
    points = _check_points(points)
    regime = (
        f"N -> infinity, L -> infinity with tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2] "
        f"= {tau:.6g} fixed (branch variance O(1/L) per block)"
    )
    if tau == 0.0:
        return _make_density([], [], [(0.0, 1.0)], [], regime)
    lo, hi = _exp_law_edges(2.0 * tau)
    lo, hi = lo + tau, hi + tau
    problem = _ExponentialProblem(-tau, 2.0 * tau)

    def evaluate(ell, strict):
        ell = np.asarray(ell, dtype=float)
        return _solved(problem, ell, math.log(START) + np.maximum(ell, hi), [], "residual", strict)

    ell, rl, intervals = _tabulate_checked(
        evaluate, hi, 1.0, hi - lo, points, "residual", ell_bottom=lo
    )
    return _make_density(ell, rl, [], intervals, regime)
