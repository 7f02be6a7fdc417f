"""The grid of ``ln lambda`` on which a density is tabulated, its support, and the mass check.

:func:`_tabulate` (docs/theory-free-probability.md sec. 5): scan below the top edge (extending
down while the density there is not negligible), split into support intervals where
``rho_log > max(THRESHOLD * peak, FLOOR)``, refine the edges by multisection, then place the
nodes at Chebyshev points of a monitor: 10 % length in ``ln lambda`` and 90 % the cube root of
``sum_k |f_k''| / int f_k`` over ``f_k = rho_log e^{k ell}``, k = 0, 1, 2 (mass, m1, m2).  The
trapezoid error of a cell of width h is ``h^3 |f''|/12``, so spacing ``h ~ |f''|^{-1/3}``
spreads the error evenly over the cells (equidistribution, de Boor 1973).
:func:`_tabulate_checked` then requires the tabulated mass to match the expected one within
``MASS_RTOL`` = 1 %, doubling the nodes before it gives up.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from isoscope.errors import SolverError
from isoscope.theory.free_probability.solver import ETA

__all__ = ["THRESHOLD", "FLOOR", "MASS_RTOL"]


# Densities below max(THRESHOLD * max(rho_log), FLOOR) count as outside the support when the
# solver looks for the support.  FLOOR sits 30 times above the smearing by ETA: below a
# spectrum, rho_log(lambda(1 + i ETA)) ~ (ETA/pi) lambda E[1/t] <= ETA/pi ~ 3e-10, which a
# purely relative threshold mistakes for density when rho_log is broad and low (its peak
# ~ 1e-3 at depth 1000).
THRESHOLD = 1e-8
FLOOR = 30.0 * ETA / math.pi

_LENGTH_SHARE = 0.1


def _chebyshev(n: int) -> np.ndarray:
    """n points in (0, 1), gathered at both ends (Chebyshev points of the first kind)."""
    return 0.5 * (1.0 - np.cos((np.arange(n) + 0.5) * math.pi / n))


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Index ranges [i, j] (inclusive) of consecutive True values."""
    edges = np.diff(np.concatenate([[0], mask.astype(int), [0]]))
    return list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))


def _curvature(e: np.ndarray, f: np.ndarray) -> np.ndarray:
    """``|f''|`` at sorted points e from three-point divided differences.

    The value at each point is the largest of its own and its neighbours' estimates, so that a
    zero crossing of f'' (an inflexion) does not leave a cell without points.
    """
    if e.size < 3:
        return np.zeros(e.shape)
    h = np.diff(e)
    slope = np.diff(f) / h
    second = np.abs(2.0 * np.diff(slope) / (h[1:] + h[:-1]))
    c = np.concatenate([[second[0]], second, [second[-1]]])
    return np.maximum(
        c, np.maximum(np.concatenate([[0.0], c[:-1]]), np.concatenate([c[1:], [0.0]]))
    )


def _monitor_cdf(e: np.ndarray, curv: np.ndarray, norm: float, width: float) -> np.ndarray:
    """Cumulative monitor on sorted points e: a share _LENGTH_SHARE (10 %) of length in
    ``ln lambda``, the rest error.

    The trapezoid error of a cell of width h is ``h^3 |f''|/12``; the error part is
    ``(sum_k |f_k''| / int f_k)^{1/3}`` over the integrands of the mass, first and second
    moment (``f_k = rho_log e^{k ell}``, curv holds the sum), so that spacing
    ``h ~ curv^{-1/3}`` spreads the sum of the relative errors evenly over the cells
    (equidistribution, de Boor 1973).  Near an edge where the density behaves like a power,
    the grid becomes nearly geometric.  ``norm`` is the integral of ``curv^{1/3}``.
    """
    m = _LENGTH_SHARE / max(width, 1e-300) + (1.0 - _LENGTH_SHARE) * np.cbrt(curv) / norm
    return np.concatenate([[0.0], np.cumsum(0.5 * (m[1:] + m[:-1]) * np.diff(e))])


def _tabulate(
    rho_log: Callable[..., np.ndarray],
    ell_top: float,
    mass: float,
    span: float,
    points: int,
    ell_bottom: float | None = None,
) -> tuple[np.ndarray, np.ndarray, list[tuple[float, float]]]:
    """Choose the grid of ``ln lambda`` and tabulate ``rho_log`` on it.

    1. Scan ``[ell_top - span, ell_top]``, half the points uniform, half geometric towards the
       top edge; while the density at the bottom (or the tail it implies) is not negligible,
       scan further down.  Failed points below all of the support count as outside it.
    2. Split into support intervals where ``rho_log > max(THRESHOLD * max, FLOOR)``; refine every edge not
       known exactly by multisection (15 points per round, 5 rounds).
    3. Two refinement rounds (60 then 120 points) place points at Chebyshev nodes of a monitor
       built from everything evaluated so far (:func:`_monitor_cdf`: 10 % ln-lambda length,
       90 % the cube root of the summed curvature of the mass, first and second moment
       integrands).  The final ``points`` nodes are placed the same way.

    ``rho_log(ell, strict)`` evaluates the density of ln lambda.

    Returns:
      ``(ell, rho_log, intervals)`` with intervals as pairs of ``ln lambda``.
    """

    def gathered(lo, hi, n, low_too):
        width = hi - lo
        parts = [np.linspace(lo, hi, n), hi - np.geomspace(1e-7 * max(1.0, width), width, n)]
        if low_too:
            parts.append(lo + np.geomspace(1e-7 * max(1.0, width), width, n))
        grid = np.unique(np.concatenate(parts))
        return grid[(grid > lo) & (grid < hi)]

    # 1. scan
    if ell_bottom is not None:
        ell = gathered(ell_bottom, ell_top, 50, True)
        rl = rho_log(ell, False)
    else:
        ell = gathered(ell_top - span, ell_top, 60, False)
        rl = rho_log(ell, False)
        for _ in range(8):
            peak = np.nanmax(rl) if np.any(rl > 0) else 0.0
            low, nxt = rl[0], rl[1]
            if not peak > 0 or not np.isfinite(low) or low <= max(THRESHOLD * peak, FLOOR):
                break
            decay = math.log(nxt / low) / (ell[1] - ell[0]) if nxt > low > 0 else 0.0
            if decay > 0 and low / decay < 1e-9 * mass:
                break
            new = np.linspace(ell[0] - 2.0 * span, ell[0], 41)[:-1]
            span *= 3.0
            ell = np.concatenate([new, ell])
            rl = np.concatenate([rho_log(new, False), rl])
    bad = ~np.isfinite(rl)
    positive = np.flatnonzero(rl > 0)
    if positive.size == 0:
        raise SolverError(
            "the solved density vanishes everywhere on the scanned range; the "
            "spectrum may be a point mass, or the solve is off its branch"
        )
    if bad[positive[0] :].any():
        k = np.flatnonzero(bad[positive[0] :])[0] + positive[0]
        raise SolverError(
            f"the master equation did not converge at lambda = "
            f"{math.exp(ell[k]):.6g}, inside the spectrum; try a smaller depth or "
            "a chi_1 closer to 1, and report the case if it persists"
        )
    rl = np.where(bad, 0.0, rl)
    thr = max(THRESHOLD * float(rl.max()), FLOOR)
    pos = rl > thr

    # 2. intervals and their edges
    # each run's [lo, hi]; None where the edge lies between two scan points and is refined below
    edges: list[list[float | None]] = []
    brackets = []
    for i, j in _runs(pos):
        lo = ell_bottom if (i == 0 and ell_bottom is not None) else (ell[i] if i == 0 else None)
        hi = ell_top if j == ell.size - 1 else None
        edges.append([lo, hi])
        if lo is None:
            brackets.append((len(edges) - 1, 0, ell[i - 1], ell[i]))
        if hi is None:
            brackets.append((len(edges) - 1, 1, ell[j], ell[j + 1]))
    if brackets:
        br = np.array([[b[2], b[3]] for b in brackets])
        frac = np.linspace(0.0, 1.0, 17)[1:-1]
        for _ in range(5):
            pts = br[:, :1] + (br[:, 1:] - br[:, :1]) * frac
            vals = rho_log(pts.ravel(), False).reshape(pts.shape)
            inside = np.where(np.isfinite(vals), vals, 0.0) > thr
            for k, (_, side, _, _) in enumerate(brackets):
                row = inside[k] if side == 0 else ~inside[k]
                first = np.flatnonzero(row)
                if first.size == 0:
                    br[k] = [pts[k, -1], br[k, 1]]
                elif first[0] == 0:
                    br[k] = [br[k, 0], pts[k, 0]]
                else:
                    br[k] = [pts[k, first[0] - 1], pts[k, first[0]]]
        for (k, side, _, _), (a, b) in zip(brackets, br):
            edges[k][side] = a if side == 0 else b
    intervals: list[tuple[float, float]] = []
    for lo, hi in edges:
        if lo is None or hi is None:  # pragma: no cover - every open edge had a bracket
            raise SolverError(
                "a support edge of the density was left unrefined; this is a bug of the "
                "density solver, not of the design: report the case"
            )
        # drop intervals too narrow to matter (isolated spikes far in a tail)
        if hi > lo:
            intervals.append((lo, hi))

    # 3. refinement rounds and the final nodes
    known_e, known_r = ell[pos], rl[pos]

    def place(n_total):
        e_all, r_all = known_e, known_r
        segs = []
        for lo, hi in intervals:
            m = (e_all > lo) & (e_all < hi)
            e, idx = np.unique(e_all[m], return_index=True)
            r = r_all[m][idx]
            e = np.concatenate([[lo], e, [hi]])
            r = np.concatenate([[r[0] if r.size else 0.0], r, [r[-1] if r.size else 0.0]])
            segs.append((e, r))
        width = sum(hi - lo for lo, hi in intervals)
        curv = [np.zeros(e.shape) for e, _ in segs]
        for k in (0, 1, 2):
            top = max(float(np.max(k * e + np.log(np.maximum(r, 1e-300)))) for e, r in segs)
            fk = [r * np.exp(k * e - top) for e, r in segs]
            total = max(sum(float(np.trapezoid(f, e)) for f, (e, _) in zip(fk, segs)), 1e-300)
            for j, (e, _) in enumerate(segs):
                curv[j] = curv[j] + _curvature(e, fk[j]) / total
        norm = max(sum(float(np.trapezoid(np.cbrt(c), e)) for c, (e, _) in zip(curv, segs)), 1e-300)
        cums = [_monitor_cdf(e, c, norm, width) for (e, _), c in zip(segs, curv)]
        shares = np.array([c[-1] for c in cums])
        alloc = np.maximum(12, np.floor(shares / shares.sum() * n_total)).astype(int)
        while alloc.sum() > n_total and alloc.max() > 12:
            alloc[np.argmax(alloc)] -= 1
        alloc[np.argmax(shares)] += max(0, n_total - int(alloc.sum()))
        out = [
            np.interp(_chebyshev(int(n)), c / c[-1], e) for (e, _), c, n in zip(segs, cums, alloc)
        ]
        return np.concatenate(out)

    for n_round in (60, 120):
        e_new = place(n_round)
        r_new = rho_log(e_new, True)
        known_e = np.concatenate([known_e, e_new])
        known_r = np.concatenate([known_r, r_new])
    ell_final = place(points)
    return ell_final, rho_log(ell_final, True), [(lo, hi) for lo, hi in intervals]


MASS_RTOL = 1e-2
"""Largest relative error of the tabulated continuous mass accepted by the density solvers."""


def _mass_error(ell, rl, mass) -> float:
    return abs(float(np.trapezoid(rl, ell)) - mass) / max(mass, 1e-3)


def _check_mass(ell, rl, mass, what):
    got = float(np.trapezoid(rl, ell))
    if abs(got - mass) > MASS_RTOL * max(mass, 1e-3):
        raise SolverError(
            f"solver limit: the {what} density integrates to {got:.6g} on its grid "
            f"of {np.size(ell)} points where {mass:.6g} was expected (the grid did "
            "not resolve part of the spectrum); this is a limit of the density "
            "solver, not of the design; the moments are unaffected"
        )


def _tabulate_checked(evaluate, ell_top, mass, span, points, what, ell_bottom=None):
    """:func:`_tabulate` at ``points`` nodes; while the grid's mass is off by more than
    MASS_RTOL, the final placement is repeated with twice the nodes (up to 16 times
    ``points``, at least 1920), so a caller's small ``points`` (a depth profile asks for 120)
    never turns a resolvable law into an error.  ``points`` is thus the minimum grid size."""
    n = points
    limit = max(16 * points, 1920)
    while True:
        ell, rl, intervals = _tabulate(evaluate, ell_top, mass, span, n, ell_bottom=ell_bottom)
        if _mass_error(ell, rl, mass) <= MASS_RTOL or 2 * n > limit:
            break
        n *= 2
    _check_mass(ell, rl, mass, what)
    return ell, rl, intervals
