"""Gaussian expectations of phi and phi' at one pre-activation variance q, and their q -> 0+ limits.

Every mean-field quantity is an expectation over ``h = sqrt(q) z``, ``z ~ N(0, 1)``: the length
map needs ``E[phi(h)^2]``, chi_1 needs ``E[phi'(h)^2]`` and the slope of the length map
``E[h phi(h) phi'(h)]/q`` (differentiate ``E[phi(sqrt(q) z)^2]`` under the integral: the form
needs only phi', so kinked phi are fine).  This module holds those one-dimensional
expectations and the plumbing they share with the correlation map: NumPy integrands of the
registry's activations (jit-compiled once and fed in chunks of one fixed length), the 1-D
rule, and the linearisation used at q = 0 (Poole et al. 2016, NeurIPS, sec. 2; Schoenholz et
al. 2017, ICLR, sec. 3; ``docs/theory-mean-field.md``).

Every Gaussian expectation goes through :mod:`isoscope.theory.quadrature` (composite
Gauss-Legendre split at the activation's kinks); Gauss-Hermite is never used.

Numerical conventions (see ``docs/theory-mean-field.md``):

* ``q = 0`` is a legitimate fixed point (phi(0) = 0 with ``sigma_b = 0``: tanh, erf below
  criticality; ReLU below sigma_w^2 = 2).  Quantities built from phi' (chi_1, mu_k, V'(0), C'(c))
  and the normalised correlation map are then the limits ``q -> 0+``.  They are computed exactly
  as expectations of the linearisation ``psi(h) = phi'(0+) h`` (h > 0), ``phi'(0-) h`` (h < 0) at
  q = 1 (ReLU: ``E[phi'^2] -> 1/2``, not ``phi'(0)^2 = 0``), never by evaluating phi at tiny h,
  where an activation written as ``4 sigmoid(h) - 2`` has no relative accuracy left.
* 1-D rules get extra panel breaks at h = 0, +-0.5, +-2, +-8, +-32 besides the kinks: at large q
  a saturating or ReLU-like phi switches over a z-interval of width ~1/sqrt(q), which the
  unsplit rule does not resolve (measured against mpmath: tanh at q = 1e4, 3e-6 relative error
  without the breaks, 1e-15 with them; GELU, SiLU and the sigmoid are similar).  2-D rules use the
  kinks only (cost grows with the square of the panel count; the correlation map is needed at
  q = q* = O(1)).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from isoscope.activations import Activation
from isoscope.theory.quadrature import normal_rule

_SOFT_BREAKS = (0.0, -0.5, 0.5, -2.0, 2.0, -8.0, 8.0, -32.0, 32.0)  # see _rule and the module doc

_CHUNK = 8192  # evaluation chunk (see _padded): a 1-D rule fits in one, a 2-D rule in ~25


def _padded(fn: Callable[[np.ndarray], np.ndarray]) -> Callable[[np.ndarray], np.ndarray]:
    """Call a jit-compiled elementwise ``fn`` in zero-padded chunks of one fixed length.

    The activations' NumPy callables are compiled once per input length, and quadrature rules
    split at kinks change length with q and rho.  Feeding every call through chunks of
    ``_CHUNK`` points means one compilation per function (about 0.1 s) instead of one per length.
    """

    def call(x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        flat = x.ravel()
        n = flat.size
        chunks = max(1, -(-n // _CHUNK))
        buf = np.zeros(chunks * _CHUNK)
        buf[:n] = flat
        out = np.concatenate([np.asarray(fn(part)) for part in buf.reshape(chunks, _CHUNK)])
        return out[:n].reshape(x.shape)

    return call


class _Integrand(NamedTuple):
    """What a Gaussian expectation needs of phi: NumPy phi, phi', phi'^2 and the kinks of phi'.

    ``dphi_sq`` is the registry's tail-accurate ``exp(ln phi'^2)``
    (:meth:`~isoscope.activations.Activation.numpy_dphi_sq`), the same function the
    free-probability law of ``phi'(h)^2`` uses, so chi_1 and the law's first moment agree.
    """

    phi: Callable[[np.ndarray], np.ndarray]
    dphi: Callable[[np.ndarray], np.ndarray]
    kinks: tuple[float, ...]
    dphi_sq: Callable[[np.ndarray], np.ndarray]


_INTEGRANDS: dict[Activation, _Integrand] = {}
_LIMITS: dict[Activation, _Integrand] = {}


def _integrand(act: Activation) -> _Integrand:
    if act not in _INTEGRANDS:
        phi, dphi = act.numpy_pair()
        _INTEGRANDS[act] = _Integrand(
            _padded(phi), _padded(dphi), tuple(act.kinks), _padded(act.numpy_dphi_sq())
        )
    return _INTEGRANDS[act]


def _one_sided_slopes(act: Activation) -> tuple[float, float]:
    """``(phi'(0+), phi'(0-))`` from the registry's derivative just either side of 0."""
    d = _integrand(act).dphi(np.array([1e-300, -1e-300]))
    return float(d[0]), float(d[1])


def _limit_integrand(act: Activation) -> _Integrand:
    """The linearisation psi(h) = a h (h > 0), b h (h < 0), a, b = phi'(0+), phi'(0-).

    For phi(0) = 0, ``E[F(phi(sqrt(q) z)/sqrt(q), phi'(sqrt(q) z))] -> E[F(psi(z), psi'(z))]`` as
    q -> 0+, and psi is positively homogeneous, so the q -> 0+ limits of everything in this module
    are expectations of psi at q = 1: exact, with no rounding trouble at tiny h (an activation
    written as ``4 sigmoid(h) - 2`` loses all relative accuracy below h ~ 1e-16).
    """
    if act not in _LIMITS:
        a, b = _one_sided_slopes(act)

        def psi(h: np.ndarray) -> np.ndarray:
            return np.where(h > 0, a * h, b * h)

        def dpsi(h: np.ndarray) -> np.ndarray:
            return np.where(h > 0, a, b) + 0.0 * h

        _LIMITS[act] = _Integrand(psi, dpsi, (0.0,) if a != b else (), lambda h: dpsi(h) ** 2)
    return _LIMITS[act]


def _at(act: Activation, q: float) -> tuple[_Integrand, float]:
    """The integrand and variance to use: phi at q for q > 0, its linearisation at 1 for q = 0."""
    if q > 0.0:
        return _integrand(act), q
    return _limit_integrand(act), 1.0


def _phi0(act: Activation) -> float:
    return float(_integrand(act).phi(np.zeros(1))[0])


def _rule(fn: _Integrand, q: float) -> tuple[np.ndarray, np.ndarray]:
    """Nodes h ~ N(0, q) and weights of a 1-D rule, split at the kinks and the soft breaks."""
    s = math.sqrt(q)
    z, w = normal_rule([k / s for k in (*fn.kinks, *_SOFT_BREAKS)])
    return s * z, w


def _mean_square(act: Activation, q: float) -> float:
    """``E[phi(sqrt(q) z)^2]`` (continuous at q = 0, where it is phi(0)^2)."""
    if q == 0.0:
        return _phi0(act) ** 2
    fn = _integrand(act)
    h, w = _rule(fn, q)
    return float(np.dot(w, fn.phi(h) ** 2))


def _dphi_sq(act: Activation, q: float) -> float:
    """``E[phi'(sqrt(q) z)^2]`` (q -> 0+ limit at q = 0)."""
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    return float(np.dot(w, fn.dphi_sq(h)))


def _slope_ratio(act: Activation, q: float) -> float:
    """``E[u phi(u) phi'(u)]/q`` for u ~ N(0, q): (1/sigma_w^2) dV/dq; q -> 0+ limit at q = 0."""
    if q == 0.0 and _phi0(act) != 0.0:
        if 0.0 in act.kinks:
            # phi(0) != 0 with a jump of phi' at 0: E[u phi phi']/q ~ phi(0)(a - b)/sqrt(2 pi q).
            a, b = _one_sided_slopes(act)
            jump = _phi0(act) * (a - b)
            if jump != 0.0:
                return math.copysign(math.inf, jump)
        # Taylor expansion at 0: E[u phi phi']/q -> phi'(0)^2 + phi(0) phi''(0) (Stein's lemma).
        d1 = jax.grad(lambda t: act.fn(t))
        x = jnp.asarray(0.0, dtype=jnp.float64)
        return float(act.fn(x) * jax.grad(d1)(x) + d1(x) ** 2)
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    return float(np.dot(w, h * fn.phi(h) * fn.dphi(h))) / qe


def _homogeneous(act: Activation) -> bool:
    """phi piecewise linear with phi(0) = 0 and no kink away from 0: phi(t h) = t phi(h), t > 0."""
    return act.law_free_of_q and _phi0(act) == 0.0
