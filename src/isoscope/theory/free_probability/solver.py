"""The continuation solver of the master equation ``z M S(M) = 1 + M`` along ``z = lambda + i y``.

With ``G(z) = int rho(t)/(z - t) dt`` and ``M = z G - 1`` (Pennington, Schoenholz, Ganguli 2017,
NeurIPS, sec. 2.3) the density is ``rho = -Im G(lambda + i0)/pi``.  For each lambda the solution
is followed from ``y = START max(lambda_+, lambda)`` (far outside the spectrum, ``M ~ m1/z``)
down to ``y = ETA lambda``: an Euler predictor applied to ``log u``, a damped Newton corrector
on the logarithmic form of the equation, every point with its own step in ``ln y``, all points
advancing together.  The path is taken in ``ell = ln lambda`` and ``s = ln y``, so spectra far
outside float64 stay representable, and each logarithm is taken in its known half-plane (z, w
upper; M, 1 + M lower), so the branch is the one continuous from z = infinity.

A *problem* supplies the equation: ``evaluate`` (residual, derivative, auxiliary values and the
rounding floor), ``valid`` (the half-plane of the unknown), ``relative_change``, ``initial`` and
``lambda_g`` -- :class:`~isoscope.theory.free_probability.plain._PlainProblem` (unknown w,
``M = M_{D^2}(w)``) and :class:`~isoscope.theory.free_probability.residual._ExponentialProblem`
(unknown M).  :func:`_solved` turns the solution into ``rho_log = -Im(lambda G)/pi`` with the
nonzero atoms subtracted.  The method is ours; docs/theory-free-probability.md secs. 3-4
describes it and the pitfalls it avoids.
"""

from __future__ import annotations

import math

import numpy as np

from isoscope.errors import SolverError

__all__ = ["ETA", "START", "ATOM_NOISE", "MAX_CHANGE", "MAX_LOG_STEP"]


# Relative imaginary part of the last point of the path, z = lambda (1 + i ETA).  Relative, so
# the zero atom is not smeared over small lambda (an absolute epsilon would be).
ETA = 1e-9
# Start of the path: y0 = START * max(scale, lambda), far outside the spectrum (M ~ m1/z there).
START = 1e3

# Relative accuracy of the solved lambda G next to an atom (final Newton tolerance 1e-12,
# times a margin for the conditioning): see _solved.
ATOM_NOISE = 1e-9
# Largest relative change of M, 1 + M or the unknown allowed in one continuation step.
MAX_CHANGE = 1.0
# Largest change of a logarithm in one step even on a pure power law (keeps exp() finite).
MAX_LOG_STEP = 100.0


def _log_upper(x: np.ndarray) -> np.ndarray:
    """log of a number in the closed upper half-plane (argument held in [0, pi])."""
    return np.log(np.abs(x)) + 1j * np.arctan2(np.maximum(x.imag, 0.0), x.real)


def _log_lower(x: np.ndarray) -> np.ndarray:
    """log of a number in the closed lower half-plane (argument held in [-pi, 0])."""
    return np.log(np.abs(x)) - 1j * np.arctan2(np.maximum(-x.imag, 0.0), x.real)


def _log_z(ell: np.ndarray, s: np.ndarray) -> np.ndarray:
    """``log(lambda + i y)`` from ``ell = ln lambda`` and ``s = ln y``, without forming z."""
    r = s - ell
    small = r <= 0
    out = np.empty(ell.shape, dtype=complex)
    e = np.exp(np.where(small, r, -r))
    out[small] = ell[small] + np.log(1.0 + 1j * e[small])
    out[~small] = s[~small] + np.log(e[~small] + 1j)
    return out


def _take(aux, idx):
    return tuple(a[idx] for a in aux)


def _newton(problem, u, log_z, max_iter=40, tol=1e-12, state=None):
    """Damped Newton on the log-form master equation, vectorised over points.

    A step is halved until the residual decreases and the iterate stays in its half-plane.

    Returns:
      ``(u, (f, df, aux), converged)``, the residual state at the returned u.
    """
    u = u.copy()
    f, df, aux = problem.evaluate(u, log_z) if state is None else state
    f, df, aux = f.copy(), df.copy(), tuple(a.copy() for a in aux)
    done = np.zeros(u.shape, dtype=bool)
    tol = np.broadcast_to(np.asarray(tol, dtype=float), u.shape)
    for _ in range(max_iter):
        idx = np.flatnonzero(~done)
        if idx.size == 0:
            break
        step = -f[idx] / df[idx]
        change = np.max(np.abs(problem.relative_change(u[idx], step, _take(aux, idx))), axis=0)
        small = (change < tol[idx]) | (np.abs(f[idx]) <= 4.0 * aux[-1][idx])
        t = np.ones(idx.size)
        pending = np.arange(idx.size)
        for _ in range(30):
            pi = idx[pending]
            trial = u[pi] + t[pending] * step[pending]
            ft, dft, auxt = problem.evaluate(trial, log_z[pi])
            ok = (
                problem.valid(trial)
                & np.isfinite(ft)
                & ((np.abs(ft) <= (1.0 - 0.25 * t[pending]) * np.abs(f[pi])) | small[pending])
            )
            gi = pi[ok]
            u[gi], f[gi], df[gi] = trial[ok], ft[ok], dft[ok]
            for a, at in zip(aux, auxt):
                a[gi] = at[ok]
            pending = pending[~ok]
            if pending.size == 0:
                break
            t[pending] *= 0.5
        done[idx[small]] = True
        if pending.size:  # no decrease even for tiny steps: those points stop here
            break
    return u, (f, df, aux), done


def _continue(
    problem, ell: np.ndarray, s_top: np.ndarray, eta: float = ETA, max_rounds: int = 3000
):
    """Follow ``z = lambda + i y`` from ``y = e^{s_top}`` down to ``y = eta lambda``.

    Every point has its own step in ``ln y``: an Euler predictor applied to ``log u``, a Newton
    corrector (loose on the way, tight at the last point).  Step control: the Euler changes of
    ``ln u``, ``ln M``, ``ln(1 + M)`` and of ``log z`` itself are compared with the log-slopes
    of the last accepted step; a step whose departure from them exceeds MAX_CHANGE is
    shortened (so power-law stretches, far above or below the spectrum, are crossed in a few
    long steps, while the turn of ``log z`` where y passes lambda and the approach to the
    spectrum are taken slowly); a step whose corrector fails or jumps is cut by 4, a good step
    doubles the next one.  No logarithm may change by more than MAX_LOG_STEP in one step.

    Returns:
      ``(u, failed)``: the solution at ``y = eta lambda`` and a mask of points that failed.
    """
    ell = np.asarray(ell, dtype=float)
    n = ell.size
    s_end = ell + math.log(eta)
    s = np.maximum(s_top, s_end)
    log_z = _log_z(ell, s)
    u, (f, df, aux), ok = _newton(problem, problem.initial(log_z), log_z)
    failed = ~ok
    h = np.ones(n)
    rate = None  # d(log quantities)/d(ln y) at the start of the last accepted step
    for _ in range(max_rounds):
        idx = np.flatnonzero((s > s_end) & ~failed)
        if idx.size == 0:
            break
        s_new = np.maximum(s[idx] - h[idx], s_end[idx])
        hstep = s[idx] - s_new
        lz_new = _log_z(ell[idx], s_new)
        du = -(lz_new - log_z[idx] + f[idx]) / df[idx]
        # changes of the logarithms of u, M, 1 + M, and of log z itself (which turns from
        # -1 per unit of ln y to 0 where y passes lambda)
        inc = np.concatenate(
            [problem.relative_change(u[idx], du, _take(aux, idx)), (lz_new - log_z[idx])[None]]
        )
        if rate is None:
            rate = np.zeros((inc.shape[0], n), dtype=complex)
        # The predictor is linear in log u, exact where u, M and 1 + M follow powers of z (far
        # from the spectrum, or below it); what must stay small is the departure from the
        # last log-slopes, not the change of the logarithms itself.
        dev = np.max(np.abs(inc - rate[:, idx] * hstep), axis=0)
        rel = np.maximum(dev, np.max(np.abs(inc[:-1]), axis=0) / MAX_LOG_STEP)
        big = ~(rel <= MAX_CHANGE)
        h[idx[big]] *= np.maximum(
            0.7 * MAX_CHANGE / np.where(np.isfinite(rel[big]), rel[big], 1e300), 1e-3
        )
        go = np.flatnonzero(~big)
        if go.size:
            gi = idx[go]
            # predictor in log u: exact where u follows a power of z (far from the spectrum)
            pred = u[gi] * np.exp(du[go] / u[gi])
            pred = np.where(problem.valid(pred), pred, u[gi] + du[go])
            pred = np.where(problem.valid(pred), pred, u[gi])
            last = s_new[go] <= s_end[gi]
            tol = np.where(last, 1e-12, 1e-7)
            un, (fn, dfn, auxn), conv = _newton(problem, pred, lz_new[go], max_iter=8, tol=tol)
            # a corrector much larger than the predicted move means a jump to another branch
            jump = np.abs(un - pred) > 0.5 * np.abs(pred - u[gi]) + 1e-9 * np.abs(un)
            acc = conv & ~jump
            ga = gi[acc]
            u[ga], s[ga], log_z[ga] = un[acc], s_new[go][acc], lz_new[go][acc]
            f[ga], df[ga] = fn[acc], dfn[acc]
            for a, an in zip(aux, auxn):
                a[ga] = an[acc]
            rate[:, ga] = inc[:, go[acc]] / hstep[go[acc]]
            h[ga] = np.minimum(h[ga] * 2.0, 50.0 + 0.5 * np.abs(s[ga] - s_end[ga]))
            h[gi[~acc]] *= 0.25
        failed |= h < 1e-9
    failed |= s > s_end
    return u, failed


def _solved(
    problem, ell: np.ndarray, s_top: np.ndarray, atoms, what: str, strict: bool = True
) -> np.ndarray:
    """``rho_log`` on a grid of ``ln lambda`` by continuation, nonzero atoms subtracted.

    With ``strict=False`` points where the solve failed come back as NaN (the caller decides
    whether they matter); otherwise a failure raises :class:`TheoryError`.
    """
    ell = np.asarray(ell, dtype=float)
    with np.errstate(all="ignore"):
        u, failed = _continue(problem, ell, s_top)
        lg = problem.lambda_g(u, ETA)
        noise = np.zeros(ell.shape)
        for log_a, w in atoms:
            if math.isfinite(log_a):
                term = w / (1.0 + 1j * ETA - np.exp(log_a - ell))
                lg = lg - term
                noise = noise + ATOM_NOISE * np.abs(term)
        out = -lg.imag / math.pi
        # next to an atom, G is the difference of two large terms: what is left below the
        # solve's accuracy times the atom's term is rounding, not density
        out = np.where(out > noise, out, 0.0)
    failed |= ~np.isfinite(out)
    if failed.any() and strict:
        bad = np.exp(ell[failed])
        span = f"{bad.min():.6g}" + (f" to {bad.max():.6g}" if bad.size > 1 else "")
        raise SolverError(
            f"the {what} master equation did not converge at {int(failed.sum())} of {ell.size} "
            f"points (lambda = {span}); try a smaller depth, a variance q further from 0 or a "
            "chi_1 closer to 1, and report the case if it persists"
        )
    out[failed] = np.nan
    return out
