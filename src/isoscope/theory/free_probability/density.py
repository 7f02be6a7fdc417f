"""The predicted spectral law of ``J J^T``: the :class:`Density` result and its construction.

A law is a continuous part plus atoms.  The continuous part is tabulated as ``rho_log``, the
density of ``ln lambda`` (``rho_log = lambda rho(lambda)``), on a grid of ``ell = ln lambda``;
atoms are ``(ln location, weight)``, ``-inf`` for the atom at zero.  That log form is the
faithful one (deep Gaussian stacks reach below 1e-308); x, rho, support and atoms in lambda are
derived from it by :func:`_make_density` (NaN where an edge leaves float64, never a silent 0 or
inf).  Moments and the CDF are the trapezoid rule in ``ln lambda``:
``E[lambda^k] = sum_atoms w a^k + int rho_log e^{k ell} d ell``.  ``rho`` itself is
``-Im G(lambda + i0)/pi`` (Pennington, Schoenholz, Ganguli 2017, NeurIPS, sec. 2.3);
docs/theory-free-probability.md secs. 3-5.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from isoscope.errors import TheoryError
from isoscope.theory.free_probability._float64 import _LOG_HUGE, _LOG_TINY

__all__ = ["ATOM_FLOOR", "Density"]


# Atoms lighter than this are dropped (1 - L(1 - p) = 0 exactly at L(1 - p) = 1).
ATOM_FLOOR = 1e-12


@dataclasses.dataclass(frozen=True, eq=False)
class Density:
    """The predicted spectral law of ``J J^T`` (infinite width): continuous part plus atoms.

    The continuous part is tabulated on a grid chosen by the solver: log-spaced, with points
    gathered where the mass, the first and the second moment sit and at the support edges.
    ``log_x`` and ``rho_log`` are the faithful representation (they stay finite for spectra
    reaching below 1e-308, as deep Gaussian stacks do); x and rho are derived from them and
    underflow to 0 (x) or overflow to inf (rho) there.

    Attributes:
      x: grid of lambda, increasing (shape ``(n,)``; empty when there is no continuous part).
      rho: density of the continuous part in lambda, ``rho = rho_log / x``; it integrates to
        ``1 - sum(weight for _, weight in atoms)``.
      log_x: ``ln x``.
      rho_log: density of ``ln lambda``, ``lambda rho(lambda)``.
      atom_at_zero: weight of the atom at lambda = 0 (``P(phi'(h) = 0)``).
      atoms: every atom as ``(location, weight)``, the zero atom included.
      support: ``(lo, hi)`` of the continuous part; ``lo`` is either a true edge or the point
        below which the continuous part holds less than about 1e-9 of the mass (soft tails, e.g.
        ReLU and Gaussian stacks, whose density reaches down to 0).  For a law without a
        continuous part, the hull of its nonzero atoms.
      intervals: the support intervals ``((lo, hi), ...)`` of the continuous part.
      regime: the assumptions under which the law holds.
      log_support: ``(ln lo, ln hi)`` of ``support``, finite where lambda itself leaves the
        float64 range (``support`` then holds NaN there, JSON null: read ``log_support``).
      log_atoms: the atoms as ``(ln location, weight)``, ``-inf`` for the atom at zero
        (``atoms`` holds ``exp`` of these, which is 0.0 or inf outside float64).

    Everything in lambda (x, rho, support, intervals, atoms) is derived from the log form;
    :attr:`in_float_range` says whether it is faithful.
    """

    x: np.ndarray
    rho: np.ndarray
    log_x: np.ndarray
    rho_log: np.ndarray
    atom_at_zero: float
    atoms: tuple[tuple[float, float], ...]
    support: tuple[float, float]
    intervals: tuple[tuple[float, float], ...]
    regime: str
    log_support: tuple[float, float] | None = None
    log_atoms: tuple[tuple[float, float], ...] | None = None

    def __post_init__(self):
        if self.log_support is None:
            with np.errstate(divide="ignore"):
                object.__setattr__(
                    self,
                    "log_support",
                    tuple(math.log(v) if v > 0 else -math.inf for v in self.support),
                )
        if self.log_atoms is None:
            object.__setattr__(
                self,
                "log_atoms",
                tuple((math.log(a) if a > 0 else -math.inf, w) for a, w in self.atoms),
            )

    def _log_form(self) -> tuple[tuple[float, float], tuple[tuple[float, float], ...]]:
        """``(log_support, log_atoms)``, both set by ``__post_init__`` (so never ``None`` here)."""
        if self.log_support is None or self.log_atoms is None:
            raise TheoryError(
                "this Density has log_support or log_atoms = None; a Density fills both in "
                "__post_init__ from support and atoms: build it with Density(...), not by "
                "replacing its fields"
            )
        return self.log_support, self.log_atoms

    @property
    def in_float_range(self) -> bool:
        """True when every grid point, support edge and non-zero atom of lambda (and rho on the
        grid) is a normal float64: the lambda-form fields are then faithful."""
        log_support, log_atoms = self._log_form()
        logs = [*log_support, *(la for la, _ in log_atoms)]
        logs = [v for v in logs if v == v]
        logs = [v for v in logs if v != -math.inf]
        if self.log_x.size:
            logs += [float(self.log_x.min()), float(self.log_x.max())]
        ok = all(_LOG_TINY <= v <= _LOG_HUGE for v in logs)
        return ok and bool(np.all(np.isfinite(self.rho)))

    @property
    def continuous_mass(self) -> float:
        """``int rho dlambda`` on the grid (trapezoid in ln lambda)."""
        if self.log_x.size < 2:
            return 0.0
        return float(np.trapezoid(self.rho_log, self.log_x))

    def moment(self, k: int) -> float:
        """``E[lambda^k]`` (atoms included), trapezoid in ``ln lambda`` on the grid."""
        atoms = sum(w * a**k for a, w in self.atoms if a > 0 or k == 0)
        if self.log_x.size < 2:
            return float(atoms)
        top = float(np.max(k * self.log_x))
        with np.errstate(over="ignore"):
            part = np.trapezoid(self.rho_log * np.exp(k * self.log_x - top), self.log_x)
            return float(atoms + part * math.exp(top)) if top < 709 else math.inf

    def cdf(self, lam) -> np.ndarray:
        """``P(lambda' <= lam)`` (atoms included), from the grid by the trapezoid rule."""
        lam = np.asarray(lam, dtype=float)
        out = np.zeros(lam.shape)
        for a, w in self.atoms:
            out += w * (lam >= a)
        if self.log_x.size >= 2:
            cum = np.concatenate(
                [
                    [0.0],
                    np.cumsum(0.5 * (self.rho_log[1:] + self.rho_log[:-1]) * np.diff(self.log_x)),
                ]
            )
            with np.errstate(divide="ignore"):
                out += np.interp(
                    np.log(np.maximum(lam, 0.0)), self.log_x, cum, left=0.0, right=cum[-1]
                )
        return out


def _exp(v: float) -> float:
    """``exp(v)`` as a float: 0.0 below and inf above the float64 range (never an exception)."""
    return 0.0 if v < -745.2 else (math.inf if v > _LOG_HUGE else math.exp(v))


def _make_density(ell, rl, atoms, intervals, regime) -> Density:
    """A :class:`Density` from its log form: grid ``ell`` with ``rho_log``, atoms as
    ``(ln location or -inf, weight)``, intervals in ``ln lambda``."""
    ell = np.asarray(ell, dtype=float)
    rl = np.asarray(rl, dtype=float)
    with np.errstate(over="ignore", divide="ignore", under="ignore"):
        x = np.exp(ell)
        rho = np.where(rl > 0, np.exp(np.log(np.where(rl > 0, rl, 1.0)) - ell), 0.0)
    for a in (x, rho, ell, rl):
        a.setflags(write=False)
    log_atoms = tuple((float(la), float(w)) for la, w in atoms)
    atom_list = tuple((_exp(la), w) for la, w in log_atoms)
    iv = tuple((_exp(lo), _exp(hi)) for lo, hi in intervals)
    zero = sum(w for la, w in log_atoms if la == -math.inf)
    if intervals:
        log_support = (float(intervals[0][0]), float(intervals[-1][1]))
    else:
        nonzero = [la for la, _ in log_atoms if la > -math.inf]
        log_support = (min(nonzero), max(nonzero)) if nonzero else (-math.inf, -math.inf)
    # an edge outside the normal float64 range has no faithful lambda form: NaN (JSON null),
    # never a silent 0.0 or inf; log_support holds it
    lo_edge, hi_edge = (
        0.0 if v == -math.inf else (math.exp(v) if _LOG_TINY <= v <= _LOG_HUGE else math.nan)
        for v in log_support
    )
    support = (lo_edge, hi_edge)
    return Density(
        x, rho, ell, rl, float(zero), atom_list, support, iv, regime, log_support, log_atoms
    )
