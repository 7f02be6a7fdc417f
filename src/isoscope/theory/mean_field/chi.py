"""Moments of ``phi'(h)^2`` and ``chi_1``, the mean squared singular value of one layer's Jacobian.

``mu_k = E[phi'(sqrt(q) z)^{2k}]``, z ~ N(0, 1), and ``chi_1 = sigma_w^2 mu_1`` (Poole et al.
2016, NeurIPS, sec. 3; Schoenholz et al. 2017, ICLR, sec. 3).  At the fixed point q = q*,
``chi_1 < 1`` is the ordered phase (gradients vanish with depth), ``chi_1 > 1`` the chaotic one
(they explode), ``chi_1 = 1`` critical; chi_1 is also ``C'(1)``, the slope of the correlation
map at c = 1.  The mu_k are the moments of the law of ``D^2 = phi'(h)^2`` that the
free-probability S-transform needs (``t1 = mu_2/mu_1^2 - 1``; Pennington, Schoenholz, Ganguli
2017, NeurIPS, sec. 2.3; ``docs/theory-free-probability.md``).  At q = 0 both are the limits
q -> 0+ (ReLU: every mu_k = 1/2; :mod:`.expectations`).
"""

from __future__ import annotations

import numpy as np

from isoscope.activations import Activation
from isoscope.errors import InputError
from isoscope.theory.mean_field._checks import _act, _scale, _variance
from isoscope.theory.mean_field.expectations import _at, _dphi_sq, _rule

__all__ = ["derivative_moments", "chi1"]


def derivative_moments(activation: str | Activation, q: float, kmax: int = 4) -> np.ndarray:
    """Moments of the squared derivative, ``mu_k = E[phi'(sqrt(q) z)^{2k}]`` for k = 1..kmax.

    These are the moments of the law of ``D^2 = phi'(h)^2`` entering the free-probability
    S-transform (docs/theory-free-probability.md: ``t1 = mu_2/mu_1^2 - 1`` etc.).  At q = 0 the limit q -> 0+ is
    returned (ReLU: every mu_k = 1/2).

    Args:
      activation: registry name or Activation.
      q: pre-activation variance >= 0 (usually q*).
      kmax: number of moments, >= 1.

    Returns:
      float64 array of shape ``(kmax,)``: ``[mu_1, ..., mu_kmax]``.

    References:
      Pennington, Schoenholz, Ganguli 2017 (NeurIPS), sec. 2.3; docs/theory-free-probability.md (moments).
    """
    act = _act(activation)
    q = _variance(q)
    if isinstance(kmax, bool) or not isinstance(kmax, (int, np.integer)) or kmax < 1:
        raise InputError(
            f"kmax = {kmax!r} is invalid",
            expected="an integer >= 1",
            hint="ask for at least the first moment, e.g. kmax=4",
        )
    fn, qe = _at(act, q)
    h, w = _rule(fn, qe)
    d2 = fn.dphi_sq(h)
    powers = d2[None, :] ** np.arange(1, int(kmax) + 1)[:, None]
    return powers @ w


def chi1(activation: str | Activation, sigma_w: float, q: float) -> float:
    """``chi_1 = sigma_w^2 E[phi'(sqrt(q) z)^2]``: mean squared singular value of one layer's Jacobian.

    Evaluated at the fixed point q = q*, chi_1 < 1 is the ordered phase (gradients vanish),
    chi_1 > 1 chaotic (they explode), chi_1 = 1 critical.  It is also ``C'(1)``, the slope of the
    correlation map at c = 1.  At q = 0 the limit q -> 0+ is used.

    Args:
      activation: registry name or Activation.
      sigma_w: weight scale.
      q: pre-activation variance >= 0.

    Returns:
      chi_1 as a float.

    References:
      Poole et al. 2016 (NeurIPS), sec. 3; Schoenholz et al. 2017 (ICLR), sec. 3; docs/theory-mean-field.md.
    """
    act = _act(activation)
    sw, q = _scale("sigma_w", sigma_w), _variance(q)
    return sw * sw * _dphi_sq(act, q)
