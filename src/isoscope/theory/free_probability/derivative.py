"""The law of ``d = phi'(h)^2``, ``h ~ N(0, q)``: all that free probability needs of phi.

With ``J = D^L W^L ... D^1 W^1``, ``D^l = diag(phi'(h^l))``, the factors are asymptotically free
as N -> infinity, so the spectrum of ``J J^T`` depends on phi only through the law of d
(Pennington, Schoenholz, Ganguli 2017, NeurIPS, sec. 2.3; docs/theory-free-probability.md
sec. 1).  :class:`DerivativeLaw` holds that law as weighted points -- the exact atoms when phi'
is piecewise constant (weights ``P(a < h < b)`` from the normal CDF), the nodes of the Gaussian
quadrature rule otherwise -- with its moments ``mu_k = E[d^k]`` and its M-transform
``M_{D^2}(w) = E[d/(w - d)]``, the inner loop of the density solver.

:func:`derivative_means` gives ``mu_1^l = E[phi'(h^l)^2]`` along a variance trajectory, the
per-layer factor of both families: ``chi^l = sigma_w^2 mu_1^l`` for a plain layer (Poole et al.
2016, sec. 3), ``alpha^2 sigma_w^2 mu_1^l`` towards tau for a residual block (Tarnowski et al.
2019).  ``WEIGHT_KINDS`` and ``_check_stack`` are the weight ensembles a law is combined with and
the check of a plain stack's (law, weights, sigma_w, depth), shared by
:func:`~isoscope.theory.free_probability.plain_moments` and
:func:`~isoscope.theory.free_probability.plain_density`.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Sequence

import numpy as np
from scipy import special

from isoscope.activations import Activation, get_activation
from isoscope.errors import TheoryError
from isoscope.theory import mean_field as mf
from isoscope.theory.free_probability._checks import _check_q, _check_sigma, _integer
from isoscope.theory.free_probability._float64 import _LOG_TINY
from isoscope.theory.mean_field.expectations import _SOFT_BREAKS
from isoscope.theory.quadrature import normal_rule

__all__ = ["WEIGHT_KINDS", "DerivativeLaw", "derivative_law", "derivative_means"]


WEIGHT_KINDS = ("gaussian", "orthogonal")


@dataclasses.dataclass(frozen=True, eq=False)
class DerivativeLaw:
    """The law of ``d = phi'(h)^2`` for ``h ~ N(0, q)``, as weighted points.

    For piecewise-constant phi' the points are the exact atoms; for smooth phi they are the
    nodes of the Gaussian quadrature rule (``d_i = phi'(sqrt(q) z_i)^2`` with weights w_i), so
    that every expectation ``E[f(d)]`` is the quadrature sum.  Exactly equal values are merged.

    Attributes:
      activation: registry name of phi.
      q: variance of the pre-activation.
      values: the positive values of d, increasing (shape ``(n,)``).
      weights: their probabilities (shape ``(n,)``).
      zero_weight: ``P(d = 0)`` (ReLU 1/2, hard-tanh ``erfc(1/sqrt(2q))``); always 0 for a
        smooth phi (only piecewise-constant phi' have atoms).
      exact: True when the points are exact atoms (phi' piecewise constant).
      log_values: ``ln d`` of the values, from the registry's tail-accurate ``ln phi'^2``.
    """

    activation: str
    q: float
    values: np.ndarray
    weights: np.ndarray
    zero_weight: float
    exact: bool
    log_values: np.ndarray

    @property
    def log_mu1(self) -> float:
        """``ln mu_1 = ln E[d]``, formed from the log values (finite for any positive law)."""
        if self.values.size == 0:
            return -math.inf
        top = float(self.log_values.max())
        return top + math.log(float(np.dot(self.weights, np.exp(self.log_values - top))))

    def relative_variance(self) -> float:
        """``Var(d)/E[d]^2 = mu_2/mu_1^2 - 1`` (over the whole law, zeros included), formed
        without the cancellation of ``mu_2/mu_1^2 - 1``: with ``e_i = d_i/mu_1 - 1`` computed
        as ``expm1(ln d_i - ln mu_1)`` and ``ln mu_1 = log1p(sum_i w_i expm1(ln d_i))``, it is
        ``sum_i w_i e_i^2 + P(d = 0)``.  Accurate even when it is below 1e-16 (a near-isometric
        law, where ``mu_2/mu_1^2`` rounds to 1)."""
        if self.values.size == 0:
            return math.nan
        pos = self.positive_weight
        log_mu1 = math.log1p(float(np.dot(self.weights, np.expm1(self.log_values))) - (1.0 - pos))
        e = np.expm1(self.log_values - log_mu1)
        return float(np.dot(self.weights, e * e)) + self.zero_weight

    @property
    def positive_weight(self) -> float:
        """``P(d > 0)``, the p of docs/theory-free-probability.md for Bernoulli laws."""
        return float(np.sum(self.weights))

    def moment(self, k: int) -> float:
        """``mu_k = E[d^k] = E[phi'(h)^{2k}]`` (k >= 0)."""
        if k < 0 or int(k) != k:
            raise TheoryError(f"moment order must be an integer >= 0, received {k!r}")
        if k == 0:
            return 1.0
        return float(np.dot(self.weights, self.values ** int(k)))

    @property
    def mu(self) -> tuple[float, float, float, float]:
        """``(mu_1, mu_2, mu_3, mu_4)``, ``mu_k = E[phi'(h)^{2k}]`` (docs/theory-free-probability.md)."""
        return self.moment(1), self.moment(2), self.moment(3), self.moment(4)

    def m_transform(self, w) -> np.ndarray:
        """``M_{D^2}(w) = E[d/(w - d)]`` for complex w (any shape; docs/theory-free-probability.md).

        Args:
          w: complex array (off the support of d).

        Returns:
          Complex array of the shape of w.
        """
        w = np.asarray(w, dtype=complex)
        r = 1.0 / (w[..., None] - self.values)
        return r @ (self.weights * self.values)

    @functools.cached_property
    def _sums(self) -> tuple[np.ndarray, np.ndarray]:
        """``([a, a d], a d)`` with a the weights and d the values: the columns of :meth:`_eval`'s sums."""
        ad = self.weights * self.values
        return np.stack([self.weights, ad], axis=1), ad

    def _eval(self, w: np.ndarray):
        """``(M, 1 + M, dM/dw)`` at w, each sum formed without cancellation.

        Written in real arithmetic (``1/(w - d) = (x - i y)/(x^2 + y^2)``, x = Re w - d,
        y = Im w): numpy's complex division is several times slower and this is the inner
        loop of the density solver.
        """
        y = w.imag[:, None]
        x = w.real[:, None] - self.values
        xx = x * x
        yy = y * y
        den = 1.0 / (xx + yy)
        xd = x * den
        both, ad = self._sums
        re1, re2 = (xd @ both).T  # Re sum a r, Re sum a d r
        im1, im2 = (den @ both).T
        im1, im2 = -w.imag * im1, -w.imag * im2  # Im sum a r, Im sum a d r
        m = re2 + 1j * im2
        g = re1 + 1j * im1
        one_m = self.zero_weight + w * g
        # r^2 = (x^2 - y^2) den^2 - 2 i x y den^2, each term formed per point before summing
        re3 = ((xx - yy) * (den * den)) @ ad  # Re sum a d r^2
        im3 = -2.0 * w.imag * ((xd * den) @ ad)  # Im sum a d r^2
        return m, one_m, -(re3 + 1j * im3)


def _check_stack(law, weights, sigma_w, depth) -> tuple[str, float, int]:
    """Checks shared by :func:`plain_moments` and :func:`plain_density`."""
    if not isinstance(law, DerivativeLaw):
        raise TheoryError(
            f"law must be a DerivativeLaw (from derivative_law(activation, q)), "
            f"received {type(law).__name__}"
        )
    kind = str(weights).lower() if isinstance(weights, str) else weights
    if kind not in WEIGHT_KINDS:
        raise TheoryError(
            f"unknown weights kind {weights!r}; expected one of "
            f"{', '.join(WEIGHT_KINDS)} (uniform weights: use 'gaussian', their "
            "spectrum has the same infinite-width limit)"
        )
    sigma = _check_sigma(sigma_w)
    depth = _integer("depth", depth, 1, "the number of weight layers")
    return kind, sigma, depth


def _piece_probability(a: float, b: float, s: float) -> float:
    """``P(a < h < b)`` for h ~ N(0, s^2), in the form that keeps relative accuracy."""
    r2 = math.sqrt(2.0) * s
    if a >= 0:
        return 0.5 * (special.erfc(a / r2) - special.erfc(b / r2))
    if b <= 0:
        return 0.5 * (special.erfc(-b / r2) - special.erfc(-a / r2))
    return 0.5 * (special.erf(b / r2) + special.erf(-a / r2))


def _grouped(
    log_values: np.ndarray, weights: np.ndarray, exact: bool, name: str, q: float
) -> DerivativeLaw:
    """Merge equal values of ``ln d`` (``-inf`` for d = 0) into one point each."""
    keep = weights > 0
    log_values, weights = log_values[keep], weights[keep]
    weights = weights / weights.sum()
    uniq, inv = np.unique(log_values, return_inverse=True)
    w = np.bincount(inv, weights=weights)
    zero = float(w[np.isneginf(uniq)].sum())
    pos = np.isfinite(uniq)
    logs, ws = uniq[pos].copy(), w[pos].copy()
    vals = np.exp(logs)
    for a in (vals, ws, logs):
        a.setflags(write=False)
    return DerivativeLaw(name, q, vals, ws, zero, exact, logs)


def derivative_law(activation: str | Activation, q: float) -> DerivativeLaw:
    """The law of ``d = phi'(h)^2``, ``h ~ N(0, q)`` (docs/theory-free-probability.md, ``M_{D^2}``).

    For phi' piecewise constant (``activation.derivative_values`` is not None) the law is
    exact: one atom per piece between kinks, of weight ``P(a < h < b)`` from the normal CDF
    (ReLU ``{0: 1/2, 1: 1/2}``; hard-tanh ``{1: erf(1/sqrt(2q)), 0: erfc(1/sqrt(2q))}``).
    For smooth phi it is represented by the quadrature nodes of
    :func:`isoscope.theory.quadrature.normal_rule` (split at the kinks), which makes every
    moment accurate to about 1e-15; exactly equal values (a linear piece, e.g. SELU for
    h > 0) merge into one atom.  At q = 0 the law is a point mass at ``phi'(0)^2``.

    ``d`` comes from the registry's ``ln phi'(h)^2``
    (:meth:`~isoscope.activations.Activation.log_dphi_sq`), which keeps its relative accuracy
    in the tails: ``jax.grad`` of tanh is exactly 0 for ``|h| > 19`` and would put a spurious
    atom at d = 0.  Only activations declared piecewise constant (``derivative_values``) have
    atoms; a smooth phi whose ``phi'^2`` falls below the float64 range (1e-308, far in the
    tails at very large q) is held at the smallest normal float there, never at 0.

    Args:
      activation: registry name or :class:`Activation`.
      q: pre-activation variance (the mean-field fixed point q*), >= 0.

    Returns:
      :class:`DerivativeLaw`.

    Raises:
      TheoryError: for a negative or non-finite q, or q = 0 when phi' jumps at 0.

    References:
      Pennington, Schoenholz, Ganguli 2017 (NeurIPS), sec. 2.3; docs/theory-free-probability.md.
    """
    act = get_activation(activation)
    q = _check_q(q)
    _, dphi = act.numpy_pair()
    log_d = act.numpy_log_dphi_sq()
    if q == 0.0:
        if any(k == 0.0 for k in act.kinks):
            raise TheoryError(
                f"q = 0 with {act.name}: phi' jumps at h = 0, so phi'(0)^2 is not "
                "defined; the law of phi'(h)^2 is that of any q > 0 when phi is "
                "positively homogeneous (linear, ReLU, leaky ReLU): take q = 1"
            )
        return _grouped(log_d(np.zeros(1)), np.array([1.0]), True, act.name, q)
    s = math.sqrt(q)
    if act.derivative_values is not None:
        cuts = [-math.inf, *sorted(act.kinks), math.inf]
        vals, ws = [], []
        for a, b in zip(cuts[:-1], cuts[1:]):
            if math.isinf(a) and math.isinf(b):
                mid = 0.5
            elif math.isinf(a):
                mid = b - 1.0
            elif math.isinf(b):
                mid = a + 1.0
            else:
                mid = 0.5 * (a + b)
            vals.append(
                2.0 * math.log(abs(float(dphi(np.array([mid]))[0])))
                if float(dphi(np.array([mid]))[0]) != 0.0
                else -math.inf
            )
            ws.append(_piece_probability(a, b, s))
        return _grouped(np.array(vals), np.array(ws), True, act.name, q)
    # the same breaks as the mean-field rules (kinks and the soft breaks in h), so that
    # sigma_w^2 E[d] is chi_1 of isoscope.theory.mean_field to rounding
    z, w = normal_rule([k / s for k in (*act.kinks, *_SOFT_BREAKS)])
    logs = np.maximum(np.asarray(log_d(s * z), dtype=float), _LOG_TINY)
    return _grouped(logs, w, False, act.name, q)


def derivative_means(
    activation: str | Activation, q_trajectory: Sequence[float] | np.ndarray
) -> np.ndarray:
    """``mu_1^l = E[phi'(h^l)^2]``, ``h^l ~ N(0, q^l)``, for every variance of a trajectory.

    The per-layer factor of both families: a plain layer's mean squared singular value is
    ``chi^l = sigma_w^2 mu_1^l`` (Poole et al. 2016, sec. 3; chi_1 at q = q*), a residual
    block's branch contributes ``s_l = alpha^2 sigma_w^2 mu_1^l`` to tau (Tarnowski et al.
    2019).  Piecewise-constant or kinked phi' take the first moment of
    :func:`derivative_law` (exact atoms, or quadrature split at the kinks); smooth phi' one
    vectorised Gauss rule over all layers.  Each distinct variance is evaluated once, and a
    variance of exactly 0 takes the limit q -> 0+ (``phi'(0)^2`` away from kinks,
    :func:`~isoscope.theory.mean_field.derivative_moments`).

    Args:
      activation: registry name or :class:`Activation`.
      q_trajectory: variances ``q^1 .. q^L`` (each finite and >= 0).

    Returns:
      float64 array of shape ``(L,)``.
    """
    act = get_activation(activation)
    qs = np.asarray(q_trajectory, dtype=float).reshape(-1)
    if not np.all(np.isfinite(qs)) or np.any(qs < 0):
        raise TheoryError(
            f"variances must be finite and >= 0, received min {qs.min()} and max {qs.max()}"
            if qs.size
            else "no variances were given"
        )
    distinct, where = np.unique(qs, return_inverse=True)
    positive = distinct[distinct > 0]
    if act.kinks or act.derivative_values is not None:
        mu1 = np.array([derivative_law(act, q).moment(1) for q in positive])
    else:
        dphi_sq = act.numpy_dphi_sq()
        z, w = normal_rule()
        mu1 = (
            np.asarray(dphi_sq((np.sqrt(positive)[:, None] * z).ravel())).reshape(
                positive.size, z.size
            )
            @ w
        )
    if distinct.size > positive.size:  # q = 0 sorts first
        mu1 = np.concatenate([[mf.derivative_moments(act, 0.0, 1)[0]], mu1])
    return np.asarray(mu1, dtype=float)[where.reshape(-1)]
