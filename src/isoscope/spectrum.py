"""Singular-value spectra of Jacobians, pooled over independent draws.

A :class:`Spectrum` holds ``ln s`` (not s), so that it can carry spectra from QR accumulation
whose singular values do not fit in floating point.  Everything else (lambda = s^2 moments,
quantiles, log statistics, the numerically-zero fraction) is derived from ``ln s`` in float64;
moments go through log-sum-exp, so they are finite whenever the moment itself is.
"""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
from scipy.special import logsumexp

__all__ = [
    "Spectrum",
    "from_singular_values",
    "from_log_singular_values",
    "quadrature_log_s",
    "zero_threshold",
]

QUANTILES = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)


def zero_threshold(size: int, dtype) -> float:
    """Relative threshold below which a singular value counts as numerically zero.

    ``s_i <= s_max * n * eps(dtype)``: the rank tolerance of ``numpy.linalg.matrix_rank``
    (and of Golub & Van Loan, "Matrix Computations", sec. 5.4.1): an SVD cannot resolve
    singular values below it relative to the largest.
    """
    return float(size * np.finfo(np.dtype(dtype)).eps)


@dataclasses.dataclass(frozen=True)
class Spectrum:
    """Pooled singular values of several Jacobian draws.

    Attributes:
      log_s: ``(draws, n)`` natural logs of the singular values, each row in decreasing order;
        ``-inf`` marks an exact zero.
      zero_mask: ``(draws, n)`` true where ``s`` is numerically zero (see ``threshold``).
      threshold: the relative zero threshold used (``s <= threshold * s_max`` of its draw).
      dtype: the dtype the Jacobian was computed in.
      method: how ``log_s`` was obtained: ``"svd"`` (dense SVD), ``"udt"`` (the deep route's
        stabilised product) or ``"slq"`` (the matrix-free route: each row is the N quantiles of
        a draw's stochastic-Lanczos-quadrature measure, :func:`quadrature_log_s`, not N
        singular values).
    """

    log_s: np.ndarray
    zero_mask: np.ndarray
    threshold: float
    dtype: str
    method: str = "svd"

    @property
    def draws(self) -> int:
        return int(self.log_s.shape[0])

    @property
    def size(self) -> int:
        """Singular values per draw."""
        return int(self.log_s.shape[1])

    @property
    def s(self) -> np.ndarray:
        """Pooled singular values (may overflow to inf for very spread spectra)."""
        with np.errstate(over="ignore"):
            return np.exp(self.log_s).ravel()

    @property
    def lam(self) -> np.ndarray:
        """Pooled eigenvalues lambda = s^2 of J J^T."""
        with np.errstate(over="ignore"):
            return np.exp(2.0 * self.log_s).ravel()

    @property
    def zero_fraction(self) -> float:
        """Fraction of pooled singular values that are numerically zero."""
        return float(self.zero_mask.mean())

    @functools.cached_property
    def log_s_nonzero(self) -> np.ndarray:
        """Pooled ``ln s`` of the singular values that are not numerically zero."""
        return self.log_s[~self.zero_mask]

    def log_lambda_moment(self, k: int) -> float:
        """``ln m_k``, by log-sum-exp: finite whenever some s > 0, even when ``m_k`` itself
        under- or overflows float64 (``-inf`` when every s is zero)."""
        flat = self.log_s.ravel()
        return float(logsumexp(2.0 * k * flat) - math.log(flat.size))

    def lambda_moment(self, k: int) -> float:
        """``m_k = (1/(draws n)) sum s^(2k)``, zeros included (they contribute 0); ``inf`` or
        ``0.0`` where it leaves the float64 range (see :meth:`log_lambda_moment`)."""
        with np.errstate(over="ignore"):
            return float(np.exp(self.log_lambda_moment(k)))

    def lambda_moment_draws(self, k: int) -> np.ndarray:
        """``m_k`` of each draw separately (for a sampling error across draws)."""
        return np.exp(logsumexp(2.0 * k * self.log_s, axis=1) - math.log(self.size))

    @property
    def lambda_moments(self) -> dict[str, float]:
        """``{"m1": ..., "m4": ...}``, moments of lambda = s^2."""
        return {f"m{k}": self.lambda_moment(k) for k in range(1, 5)}

    @property
    def log_s_mean(self) -> float:
        """Mean of ``ln s`` over the non-zero singular values (NaN when there are none)."""
        v = self.log_s_nonzero
        return float(v.mean()) if v.size else math.nan

    @property
    def log_s_std(self) -> float:
        """Standard deviation of ``ln s`` over the non-zero singular values (NaN when there
        are none: a spread is not defined on an empty set)."""
        v = self.log_s_nonzero
        return float(v.std()) if v.size else math.nan

    @property
    def log_s_range(self) -> tuple[float, float]:
        """``(min, max)`` of ``ln s`` over the non-zero singular values."""
        v = self.log_s_nonzero
        return (float(v.min()), float(v.max())) if v.size else (-math.inf, -math.inf)

    @property
    def log10_condition(self) -> float:
        """``log10(s_max / s_min)``, s_min the smallest non-zero singular value (pooled)."""
        lo, hi = self.log_s_range
        return (hi - lo) / math.log(10.0)

    def trimmed(self, top: int = 0, bottom: int = 0) -> Spectrum:
        """The same spectrum without the ``top`` largest and ``bottom`` smallest singular
        values of every draw (to set apart outliers that the bulk law does not describe: a
        residual stack's mean mode, a plain stack's input-length direction)."""
        if top < 0 or bottom < 0 or top + bottom >= self.size:
            raise ValueError(
                f"cannot trim {top} + {bottom} of {self.size} singular values per draw"
            )
        end = self.size - bottom
        return dataclasses.replace(
            self, log_s=self.log_s[:, top:end], zero_mask=self.zero_mask[:, top:end]
        )

    @property
    def s_quantiles(self) -> dict[str, float]:
        """Quantiles of the pooled singular values s (zeros included), keyed ``"q05"`` etc."""
        qs = np.quantile(self.s, QUANTILES)
        return {f"q{int(round(100 * p)):02d}": float(v) for p, v in zip(QUANTILES, qs)}


def from_singular_values(s: np.ndarray, dtype, method: str = "svd") -> Spectrum:
    """Build a :class:`Spectrum` from singular values ``s`` of shape ``(draws, n)`` or ``(n,)``.

    A value ``s <= n * eps(dtype) * max(s)`` of its draw is marked numerically zero
    (:func:`zero_threshold`).
    """
    s = np.atleast_2d(np.asarray(s, dtype=np.float64))
    s = -np.sort(-s, axis=1)
    thr = zero_threshold(s.shape[1], dtype)
    zero = s <= thr * s[:, :1]
    with np.errstate(divide="ignore"):
        log_s = np.log(s)
    return Spectrum(
        log_s=log_s, zero_mask=zero, threshold=thr, dtype=str(np.dtype(dtype)), method=method
    )


def from_log_singular_values(
    log_s: np.ndarray, dtype, method: str, threshold: float | None = None
) -> Spectrum:
    """Build a :class:`Spectrum` from ``ln s`` of shape ``(draws, n)`` or ``(n,)``, for
    routes whose singular values need not fit in floating point (the deep route).

    A value with ``ln s <= ln(threshold) + ln s_max`` of its draw is marked numerically zero.
    ``threshold`` defaults to that of the dtype (:func:`zero_threshold`); the deep route passes
    0 (only ``-inf``, an exact zero or a direction below some layer's numerical rank, is zero:
    every finite value is resolved), the matrix-free route its Lanczos resolution.
    """
    log_s = np.atleast_2d(np.asarray(log_s, dtype=np.float64))
    log_s = -np.sort(-log_s, axis=1)
    thr = zero_threshold(log_s.shape[1], dtype) if threshold is None else float(threshold)
    zero = (log_s <= math.log(thr) + log_s[:, :1]) if thr > 0 else ~np.isfinite(log_s)
    return Spectrum(
        log_s=log_s, zero_mask=zero, threshold=thr, dtype=str(np.dtype(dtype)), method=method
    )


def quadrature_log_s(nodes: np.ndarray, weights: np.ndarray, n: int) -> np.ndarray:
    """``n`` equally weighted values of ``ln s`` standing for a quadrature measure of lambda.

    A stochastic Lanczos quadrature rule is the discrete measure
    ``mu = sum_j w_j delta(theta_j)`` (weights summing to 1) estimating the spectral measure of
    ``J^T J`` (Ubaru, Chen & Saad 2017, SIAM J. Matrix Anal. Appl. 38, eq. 2.5).  Its quantile
    function at ``(i - 1/2)/n``, ``i = 1..n``, gives n values whose empirical CDF differs from
    mu's by at most ``1/(2n)`` everywhere (a quantile rounding of the CDF's jumps), so every
    statistic the dense route reads from N singular values (histograms, KS distance to a
    predicted law, quantiles, moments to that accuracy) is read from these in the same way.
    Returned as ``(1/2) ln theta``, decreasing; a node at zero (or below, from rounding) gives
    ``-inf``.
    """
    nodes = np.asarray(nodes, dtype=np.float64).ravel()
    weights = np.asarray(weights, dtype=np.float64).ravel()
    order = np.argsort(nodes)
    cdf = np.cumsum(weights[order])
    cdf /= cdf[-1]
    at = np.searchsorted(cdf, (np.arange(n) + 0.5) / n, side="left")
    theta = nodes[order][np.minimum(at, nodes.size - 1)]
    with np.errstate(divide="ignore", invalid="ignore"):
        log_s = np.where(theta > 0, 0.5 * np.log(np.where(theta > 0, theta, 1.0)), -np.inf)
    return log_s[::-1].copy()
