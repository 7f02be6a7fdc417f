"""Moments ``m1..m4`` of ``J J^T`` by Lagrange inversion on power series truncated at z^4.

Conventions of Pennington, Schoenholz, Ganguli 2017 (NeurIPS, sec. 2.3):
``M(z) = sum_k m_k z^{-k}``, ``S(z) = (1 + z)/(z M^{-1}(z))``; free factors multiply their
S-transforms, and (docs/theory-free-probability.md sec. 2)::

    S_{JJ^T} = S_W^L S_{D^2}^L,   S_W = 1/(sigma_w^2 (1 + z)) (Gaussian) or 1/sigma_w^2 (orthogonal)
    S_{D^2}(z) = (1 + z) psi^{-1}(z)/z,   psi(z) = sum_k mu_k z^k
    m_k = (1/k) [z^{k-1}] ((1 + z)/S_{JJ^T}(z))^k

The factor ``chi_1^{kL}`` is kept in the logarithm, so :class:`LambdaMoments` carries
``ln m_k`` however far outside float64 ``m_k`` lies.  Closed forms this reproduces
(docs/derivations.md sec. 3): ``m1 = chi_1^L``, ``m2 = m1^2 (1 + L t1)`` with
``t1 = mu_2/mu_1^2 - 1``, and for linear Gaussian layers with sigma_w = 1 the Fuss-Catalan
numbers ``binom((L+1)k, k)/(Lk+1)``.  The residual law reuses :func:`_lagrange_moments`
(:mod:`.residual`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from isoscope.theory.free_probability._float64 import _LOG_HUGE, _LOG_TINY
from isoscope.theory.free_probability.derivative import DerivativeLaw, _check_stack

__all__ = ["LambdaMoments", "moments_from_logs", "plain_moments"]


class LambdaMoments(NamedTuple):
    """Moments ``m_k = tr (J J^T)^k`` (N -> infinity), k = 1..4, and their natural logarithms.

    The theory is carried in logs: ``log_mk = ln m_k`` is finite whenever m_k > 0, however far
    outside float64 the moment itself lies (tanh at sigma_w = 0.3 and depth 1000 has
    ``ln m1 = -2430``).  ``m_k`` is the float when ``ln m_k`` lies in the normal float64 range
    [-708.39, 709.78], else ``None`` (JSON null; :func:`unrepresentable` names them); a law
    with no positive part has ``m_k = 0.0`` and ``log_mk = -inf``.
    """

    m1: float | None
    m2: float | None
    m3: float | None
    m4: float | None
    log_m1: float
    log_m2: float
    log_m3: float
    log_m4: float

    @property
    def logs(self) -> tuple[float, float, float, float]:
        """``(ln m1, ln m2, ln m3, ln m4)``."""
        return self.log_m1, self.log_m2, self.log_m3, self.log_m4

    def unrepresentable(self) -> tuple[str, ...]:
        """Names of the moments that are ``None`` (outside the float64 range)."""
        return tuple(f"m{k}" for k, m in enumerate(self[:4], 1) if m is None)


def moments_from_logs(logs: Sequence[float]) -> LambdaMoments:
    """:class:`LambdaMoments` from ``ln m1 .. ln m4`` (``-inf`` for a zero moment)."""
    logs = [float(x) for x in logs]
    vals = [
        0.0 if x == -math.inf else (math.exp(x) if _LOG_TINY <= x <= _LOG_HUGE else None)
        for x in logs
    ]
    # _make: the first four fields are float | None, the last four float
    return LambdaMoments._make([*vals, *logs])


_ORDER = 5  # series kept to z^4: enough for m_4


def _smul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.convolve(a, b)[:_ORDER]


def _sinv(a: np.ndarray) -> np.ndarray:
    """1/a for a series with a[0] != 0."""
    out = np.zeros(_ORDER)
    out[0] = 1.0 / a[0]
    for n in range(1, _ORDER):
        out[n] = -np.dot(a[1 : n + 1], out[n - 1 :: -1][:n]) / a[0]
    return out


def _slog(a: np.ndarray) -> np.ndarray:
    """log(a) - log(a[0]) for a series with a[0] > 0 (via (log a)' = a'/a)."""
    da = np.arange(1, _ORDER) * a[1:]
    ratio = _smul(np.append(da, 0.0), _sinv(a))
    out = np.zeros(_ORDER)
    out[1:] = ratio[: _ORDER - 1] / np.arange(1, _ORDER)
    return out


def _sexp(a: np.ndarray) -> np.ndarray:
    """exp(a) for a series with a[0] = 0 (via e' = a' e)."""
    out = np.zeros(_ORDER)
    out[0] = 1.0
    da = np.arange(1, _ORDER) * a[1:]
    for n in range(1, _ORDER):
        out[n] = np.dot(da[:n], out[n - 1 :: -1][:n]) / n
    return out


def _srevert(a: np.ndarray) -> np.ndarray:
    """Compositional inverse of ``a(z) = a1 z + a2 z^2 + ...`` (a[0] = 0, a[1] != 0)."""
    b = np.zeros(_ORDER)
    b[1] = 1.0 / a[1]
    for n in range(2, _ORDER):
        # coefficient n of a(b(z)) must vanish; b[n] enters linearly through a1 * b[n]
        comp, power = np.zeros(_ORDER), np.zeros(_ORDER)
        power[0] = 1.0
        for k in range(1, _ORDER):
            power = _smul(power, b)
            comp += a[k] * power
        b[n] = -comp[n] / a[1]
    return b


def _inverse_s_series(law: DerivativeLaw, kind: str) -> tuple[float, np.ndarray]:
    """``1/(S_W S_{D^2}) = sigma_w^2 mu_1 * T(z)`` without sigma_w: returns ``(log mu1, T)``.

    ``S_{D^2}(z) = (1+z) chi(z)/z`` with chi the compositional inverse of
    ``psi(z) = sum_k mu_k z^k``; the Gaussian factor contributes ``(1 + z)``.
    """
    # psi(z/mu1) = sum_k (mu_k/mu_1^k) z^k, so that its inverse starts at z; the ratios are
    # formed in logs (E[exp(k (ln d - ln mu1))]), so a tiny mu1 (saturated phi) cannot overflow
    log_mu1 = law.log_mu1
    psi = np.zeros(_ORDER)
    psi[1:] = [
        float(np.dot(law.weights, np.exp(k * (law.log_values - log_mu1)))) for k in (1, 2, 3, 4)
    ]
    chi = _srevert(psi)  # chi(z) = mu1 * psi^{-1}(z)
    chi_over_z = chi[1:]  # starts with 1
    inv_s = _sinv(np.append(chi_over_z, 0.0))  # z/chi(z), normalised
    inv_s = _smul(inv_s, _sinv(np.array([1.0, 1.0, 0, 0, 0])))  # / (1 + z)
    if kind == "gaussian":
        inv_s = _smul(inv_s, np.array([1.0, 1.0, 0, 0, 0]))
    return log_mu1, inv_s


def _lagrange_moments(log_scale: float, log_t: np.ndarray) -> LambdaMoments:
    """``m_k = (1/k)[z^{k-1}] ((1+z)/S(z))^k`` for ``1/S = exp(log_scale + log_t(z))``.

    Computed as ``e^{k log_scale} (1/k)[z^{k-1}] (1+z)^k exp(k log_t)`` (``log_t(0) = 0``),
    so that ``chi_1^{kL}`` is formed only in the logarithm.
    """
    out = []
    one_plus = np.array([1.0, 1.0, 0, 0, 0])
    for k in (1, 2, 3, 4):
        series = _sexp(k * log_t)
        for _ in range(k):
            series = _smul(series, one_plus)
        out.append(k * log_scale + math.log(series[k - 1] / k))
    return moments_from_logs(out)


def plain_moments(law: DerivativeLaw, weights: str, sigma_w: float, depth: int) -> LambdaMoments:
    """Moments m1..m4 of ``J J^T`` for a plain stack at a fixed variance q (every layer).

    Lagrange inversion: ``m_k = (1/k) [z^{k-1}] ((1+z)/S_{JJ^T}(z))^k`` with
    ``S_{JJ^T} = S_W^L S_{D^2}^L``.  ``S_{D^2}`` comes from the moments ``mu_k`` by series
    reversion of ``psi(z) = sum_k mu_k z^k`` (``S = (1+z) psi^{-1}(z)/z``).  Closed forms that
    this reproduces (docs/theory-free-probability.md): ``m1 = chi_1^L``, ``m2 = m1^2 (1 + L t1)``,
    ``m3 = m1^3 [1 + 3 L t1 + L t2 + L(3L-1) t1^2/2]``; for linear Gaussian layers with
    sigma_w = 1 the Fuss-Catalan numbers ``binom((L+1)k, k)/(Lk+1)``.

    Args:
      law: :func:`derivative_law` at the variance q.
      weights: ``"gaussian"`` or ``"orthogonal"``.
      sigma_w: weight scale (not squared).
      depth: number of layers L >= 1.

    Returns:
      :class:`LambdaMoments`: ``log_m1 = L ln chi_1`` exactly, the other logs from the series;
      ``m_k`` is ``None`` where it lies outside float64.

    References:
      Pennington, Schoenholz, Ganguli 2017 (NeurIPS), sec. 2.3 (moments by Lagrange
      inversion); docs/theory-free-probability.md.
    """
    kind, sigma, depth = _check_stack(law, weights, sigma_w, depth)
    if law.positive_weight <= 0:
        return moments_from_logs([-math.inf] * 4)
    log_mu1, t = _inverse_s_series(law, kind)
    log_chi1 = 2.0 * math.log(sigma) + log_mu1
    return _lagrange_moments(depth * log_chi1, depth * _slog(t))
