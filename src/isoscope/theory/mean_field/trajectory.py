"""The variances ``q^1..q^L`` of a wide plain or residual stack fed inputs of mean square q0.

In both families ``h^l = W^l x^{l-1} + b^l`` with W zero-mean, so given x^{l-1} the h^l_i are
i.i.d. Gaussian with variance ``q^l = sigma_w^2 Q^{l-1} + sigma_b^2``, ``Q^l = |x^l|^2/N``.
Plain stacks (``x^l = phi(h^l)``) follow the length map, ``q^{l+1} = V(q^l)`` (Poole et al. 2016,
NeurIPS, sec. 2).  Residual stacks (``x^l = x^{l-1} + alpha phi(h^l)``, the form of Tarnowski et
al. 2019, AISTATS, eqs. 1-2) carry the mean mode ``m^l = mean_i x^l_i`` as well (derived
in-house, ``docs/theory-mean-field.md``)::

    q^l = sigma_w^2 Q^{l-1} + sigma_b^2
    Q^l = Q^{l-1} + 2 alpha m^{l-1} mu^l + alpha^2 nu^l,   mu^l = E[phi(h^l)], nu^l = E[phi(h^l)^2]
    m^l = m^{l-1} + alpha mu^l

A positively homogeneous phi without bias has a linear length map, ``V(q) = f q``, and its
trajectory is geometric (one quadrature instead of one per layer).
"""

from __future__ import annotations

import math

import numpy as np

from isoscope.activations import Activation
from isoscope.errors import InputError, SolverError
from isoscope.theory.mean_field._checks import _act, _scale, _variance
from isoscope.theory.mean_field.expectations import (
    _homogeneous,
    _Integrand,
    _integrand,
    _phi0,
    _rule,
)

__all__ = ["q_trajectory"]


def q_trajectory(
    activation: str | Activation,
    sigma_w: float,
    sigma_b: float,
    q0: float,
    depth: int,
    family: str = "plain",
    alpha: float = 1.0,
) -> np.ndarray:
    """Pre-activation variances ``q^1..q^depth`` of a wide stack fed an input of mean square q0.

    The input x^0 has ``|x^0|^2/N = q0`` and zero mean over units.  In both families
    ``h^l = W^l x^{l-1} + b^l`` with W zero-mean, so given x^{l-1} the h^l_i are i.i.d. Gaussian
    with variance ``q^l = sigma_w^2 Q^{l-1} + sigma_b^2``, ``Q^l = |x^l|^2/N`` (only the mean
    square of x matters, not its mean).

    Plain (``x^l = phi(h^l)``): ``Q^l = E[phi(sqrt(q^l) z)^2]``, hence ``q^1 = sigma_w^2 q0 + sigma_b^2``
    and ``q^{l+1} = V(q^l)``.

    Residual (``x^l = x^{l-1} + alpha phi(h^l)``): expand
    ``Q^l = Q^{l-1} + 2 alpha <x^{l-1}, phi(h^l)>/N + alpha^2 |phi(h^l)|^2/N``.  The last term tends
    to ``nu^l = E[phi(sqrt(q^l) z)^2]``.  In the cross term each h^l_i depends on x^{l-1} only
    through the fresh row W_i (its dependence on any single x_j is O(N^{-1/2}) and averages out),
    so ``<x^{l-1}, phi(h^l)>/N -> m^{l-1} mu^l`` with ``mu^l = E[phi(sqrt(q^l) z)]`` and
    ``m^l = mean_i x^l_i`` the mean mode.  The mean mode itself accumulates
    ``m^l = m^{l-1} + alpha mu^l``, m^0 = 0.  Altogether::

        q^l = sigma_w^2 Q^{l-1} + sigma_b^2
        Q^l = Q^{l-1} + 2 alpha m^{l-1} mu^l + alpha^2 nu^l
        m^l = m^{l-1} + alpha mu^l

    equivalently ``Q^l = (m^l)^2 + q0 + alpha^2 sum_{k<=l} Var[phi(h^k)]``.  For phi with
    E[phi] != 0 (ReLU, GELU, SELU) the common offset m^l grows linearly in depth and Q^l
    quadratically; dropping it (``Q^l = Q^{l-1} + alpha^2 nu^l``) underestimates q^l badly.

    Args:
      activation: registry name or Activation.
      sigma_w, sigma_b: weight and bias scales.
      q0: input mean square ``|x^0|^2/N`` >= 0.
      depth: number of weight layers L >= 1.
      family: ``"plain"`` or ``"residual"``.
      alpha: residual branch scale (ignored for ``"plain"``).

    Returns:
      float64 array of shape ``(depth,)``: ``[q^1, ..., q^L]``.

    Raises:
      InputError: unknown family, depth < 1, negative q0, non-finite alpha.

    References:
      Poole et al. 2016 (NeurIPS), sec. 2 (plain); residual stacks as in Tarnowski et al. 2019
      (AISTATS), eqs. 1-2, with the mean-mode recursion derived in-house (docs/theory-mean-field.md).
    """
    act = _act(activation)
    sw, sb, q0 = _scale("sigma_w", sigma_w), _scale("sigma_b", sigma_b), _variance(q0, "q0")
    if isinstance(depth, bool) or not isinstance(depth, (int, np.integer)) or depth < 1:
        raise InputError(
            f"depth = {depth!r} is invalid",
            expected="an integer >= 1",
            hint="depth counts weight layers",
        )
    if family not in ("plain", "residual"):
        raise InputError(
            f"family = {family!r} is not supported by q_trajectory",
            expected="'plain' or 'residual'",
            hint="convolution stacks with delta-orthogonal kernels follow 'plain'",
        )
    try:
        a = float(alpha)
    except (TypeError, ValueError):
        a = math.nan
    if not math.isfinite(a):
        raise InputError(
            f"alpha = {alpha!r} is invalid",
            expected="a finite real branch scale",
            hint="use alpha = 1.0 for the default residual block",
        )
    sw2, sb2 = sw * sw, sb * sb
    fn = _integrand(act)
    if family == "plain" and sb2 == 0.0 and _homogeneous(act):
        return _geometric_trajectory(act, fn, sw, sw2 * q0, int(depth))
    out = np.empty(int(depth))
    big_q, m = q0, 0.0
    for layer in range(int(depth)):
        q = sw2 * big_q + sb2
        out[layer] = q
        if not math.isfinite(q):
            raise SolverError(
                f"variance overflowed at layer {layer + 1} of {depth} "
                f"({act.name}, sigma_w = {sw:g}, sigma_b = {sb:g}); "
                "lower sigma_w or the depth"
            )
        if q == 0.0:
            mu = _phi0(act)
            nu = mu * mu
        else:
            h, w = _rule(fn, q)
            p = fn.phi(h)
            mu, nu = float(np.dot(w, p)), float(np.dot(w, p * p))
        if family == "plain":
            big_q = nu
        else:
            big_q = big_q + 2.0 * a * m * mu + a * a * nu
            m = m + a * mu
    return out


def _geometric_trajectory(
    act: Activation, fn: _Integrand, sw: float, q1: float, depth: int
) -> np.ndarray:
    """``q^l = q^1 f^{l-1}`` for a positively homogeneous phi without bias: ``E[phi(sqrt(q) z)^2]
    = q E[phi(z)^2]``, so the length map is linear, ``V(q) = f q`` with ``f = sigma_w^2
    E[phi(z)^2]`` (ReLU: sigma_w^2/2), and the trajectory is geometric (one quadrature, not one
    per layer).  Raises SolverError where it overflows, as the layer-by-layer recursion does."""
    h, w = _rule(fn, 1.0)
    p = fn.phi(h)
    f = sw * sw * float(np.dot(w, p * p))
    with np.errstate(over="ignore", under="ignore"):
        out = q1 * np.power(f, np.arange(depth, dtype=float))
    bad = np.flatnonzero(~np.isfinite(out))
    if bad.size:
        raise SolverError(
            f"variance overflowed at layer {int(bad[0]) + 1} of {depth} "
            f"({act.name}, sigma_w = {sw:g}, sigma_b = 0); lower sigma_w or the depth"
        )
    return out
