"""One orthogonal layer with smooth phi: the law of ``sigma_w^2 phi'(h)^2`` by change of variables.

For ``L = 1`` and ``W = sigma_w Q`` (Q Haar orthogonal), ``J J^T = sigma_w^2 D^2`` exactly, so
the spectrum is the law of ``sigma_w^2 d`` itself; the master equation is not needed.  Its
density in ``t = ln d`` is::

    p(t) = sum over roots h of ln d(h) = t of  phi_q(h) / |d ln d/dh|,   phi_q = N(0, q) density

with ``ln d`` the registry's tail-accurate ``ln phi'^2`` and its slope by ``jax.grad``
(docs/theory-free-probability.md sec. 6).  Pieces where phi' is constant (a linear piece of
phi) are atoms, not density.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from isoscope.activations import Activation
from isoscope.theory.free_probability._float64 import _EPS
from isoscope.theory.free_probability.density import ATOM_FLOOR
from isoscope.theory.free_probability.derivative import DerivativeLaw


@functools.cache
def _log_d_slope(act: Activation):
    """NumPy callable ``d/dh ln phi'(h)^2 = 2 phi''/phi'`` by ``jax.grad`` of the registry's
    tail-accurate ``ln phi'^2`` (finite where phi' itself underflows)."""
    import jax
    import jax.numpy as jnp

    slope = jax.jit(jax.vmap(jax.grad(lambda t: act.log_dphi_sq(t))))
    return lambda h: np.asarray(slope(jnp.asarray(h, dtype=jnp.float64)))


class _Pushforward:
    """Density of ``ln(sigma_w^2 phi'(h)^2)``, h ~ N(0, q): one orthogonal layer, smooth phi.

    With ``J J^T = sigma_w^2 D^2`` exactly, the spectrum is the law of ``sigma_w^2 d``; its
    density in ``t = ln d`` is ``sum over roots h of ln d(h) = t of phi_q(h) / |d ln d / dh|``.
    ``ln d`` (the registry's tail-accurate ``ln phi'^2``, with its slope by ``jax.grad``) is
    sampled on a fine grid of h and cut into monotone pieces at its turning points (zeros of
    the slope, refined by Brent's method so that the extreme values -- the support edges -- are
    exact), at the kinks and at zeros of phi'.  Neighbouring pieces share their
    turning point, so no sliver of h is lost there (at a maximum of d the density has an
    integrable ``1/sqrt`` singularity and the mass near it is not small).  A root is found by
    Newton's method safeguarded by bisection inside its sample cell.  Pieces where d is
    constant (a linear piece of phi) are atoms, not density.
    """

    def __init__(self, act: Activation, q: float, sigma: float):
        from scipy import optimize

        _, dphi = act.numpy_pair()
        self.logd = act.numpy_log_dphi_sq()
        self.slope = _log_d_slope(act)
        self.q, self.log_s2 = q, 2.0 * math.log(sigma)
        sq = math.sqrt(q)
        kinks = [k for k in act.kinks if abs(k) < 12.0 * sq]
        h = np.union1d(np.linspace(-12.0 * sq, 12.0 * sq, 6001), kinks)
        p1 = dphi(h)
        with np.errstate(invalid="ignore"):
            p2 = self.slope(h)
        p2 = np.where(np.isfinite(p2), p2, 0.0)
        # turning points of ln d: its slope 2 phi''/phi' changes sign (phi' keeping its sign)
        breaks = [h[0], h[-1], *kinks]
        for i in np.flatnonzero(p2 == 0.0):
            if p1[i] != 0.0:
                breaks.append(float(h[i]))
        change = np.flatnonzero((p2[1:] * p2[:-1] < 0) & (p1[1:] * p1[:-1] > 0))
        for i in change:
            if h[i] in kinks or h[i + 1] in kinks:
                continue
            breaks.append(
                optimize.brentq(
                    lambda x: float(self.slope(np.array([x]))[0]),
                    h[i],
                    h[i + 1],
                    xtol=1e-15,
                    rtol=4 * _EPS,
                )
            )
        # zeros of phi' (ln d -> -inf) also separate monotone pieces
        for i in np.flatnonzero(p1[1:] * p1[:-1] < 0):
            breaks.append(0.5 * (h[i] + h[i + 1]))
        cuts = np.unique(breaks)
        h = np.union1d(h, cuts)
        logd = self.logd(h)
        self.pieces, self.constant_logd = [], []
        for a, b in zip(cuts[:-1], cuts[1:]):
            m = (h >= a) & (h <= b) & np.isfinite(logd)
            hh, ll = h[m], logd[m]
            if hh.size < 2:
                continue
            if np.ptp(ll) < 1e-12:
                self.constant_logd.append(float(ll[0]))
                continue
            if ll[-1] < ll[0]:
                hh, ll = hh[::-1], ll[::-1]
            # rounding can leave ties next to a turning point: keep ll strictly increasing
            keep = np.concatenate([[True], np.diff(ll) > 0])
            self.pieces.append((hh[keep], ll[keep]))
        self.log_top = max(p[1][-1] for p in self.pieces) + self.log_s2

    def __call__(self, ell: np.ndarray) -> np.ndarray:
        target = ell - self.log_s2
        out = np.zeros(ell.shape)
        for hh, ll in self.pieces:
            inside = (target > ll[0]) & (target < ll[-1])
            if not inside.any():
                continue
            t = target[inside]
            k = np.clip(np.searchsorted(ll, t), 1, ll.size - 1)
            lo, hi = hh[k - 1], hh[k]  # ln d(lo) <= t <= ln d(hi), lo < hi or not
            x = np.interp(t, ll, hh)
            for _ in range(60):
                g = self.logd(x) - t
                # keep the bracket: g < 0 on the lo side
                below = g < 0
                lo, hi = np.where(below, x, lo), np.where(below, hi, x)
                slope = self.slope(x)
                with np.errstate(divide="ignore", invalid="ignore"):
                    step = x - g / slope
                bad = ~np.isfinite(step) | ((step - lo) * (step - hi) > 0)
                new = np.where(bad, 0.5 * (lo + hi), step)
                if np.all(np.abs(new - x) <= 4 * _EPS * np.maximum(np.abs(x), 1e-300)):
                    x = new
                    break
                x = new
            slope = np.abs(self.slope(x))
            dens = np.exp(-0.5 * x * x / self.q) / math.sqrt(2.0 * math.pi * self.q)
            with np.errstate(divide="ignore"):
                out[inside] += dens / slope
        return out


def _pushforward_atoms(law: DerivativeLaw, push: _Pushforward, sigma: float):
    """Atoms of one orthogonal layer with smooth phi: zero, and the values of d on pieces where
    phi' is constant (law values that merged many quadrature nodes)."""
    atoms = [(-math.inf, law.zero_weight)] if law.zero_weight > ATOM_FLOOR else []
    for value, weight in zip(law.values, law.weights):
        if any(abs(math.log(value) - c) < 1e-9 for c in push.constant_logd):
            atoms.append((2.0 * math.log(sigma) + math.log(value), float(weight)))
    return atoms
