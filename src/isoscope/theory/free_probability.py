"""Free probability for the Jacobian spectrum of deep networks at infinite width.

The model (docs/theory-free-probability.md sec. 1, 3): ``J = D^L W^L ... D^1 W^1`` with ``D^l = diag(phi'(h^l))``,
``h^l ~ N(0, q)`` and W Gaussian (``W_ij ~ N(0, sigma_w^2/N)``) or scaled Haar orthogonal
(``W = sigma_w Q``).  lambda = s^2 is an eigenvalue of ``J J^T``.  As N -> infinity the
factors are asymptotically free, their S-transforms multiply, and the spectrum of ``J J^T``
follows from the law of ``d = phi'(h)^2`` alone:

  ``S_{JJ^T}(z) = S_{W^T W}(z)^L S_{D^2}(z)^L``,
  ``S_{W^T W} = 1 / (sigma_w^2 (1 + z))`` (Gaussian) or ``1 / sigma_w^2`` (orthogonal).

Conventions (Pennington, Schoenholz, Ganguli 2017, sec. 2.3): ``G(z) = int rho(t)/(z - t) dt``,
``M(z) = z G(z) - 1 = sum_k m_k z^{-k}``, ``S(z) = (1 + z)/(z M^{-1}(z))``; the master
equation ``z M S(M) = 1 + M`` determines M, hence G and ``rho = -Im G(x + i0)/pi``.

What is here:

* :func:`derivative_law` -- the law of d (exact atoms for piecewise-constant phi', quadrature
  nodes for smooth phi);
* :func:`plain_moments` -- m1..m4 of ``J J^T`` by Lagrange inversion with truncated power series;
* :func:`plain_density` -- the density by a continuation solver of the master equation
  (the method is described in ``docs/theory-free-probability.md``);
* :func:`residual_tau`, :func:`residual_moments`, :func:`residual_edges`,
  :func:`residual_density` -- the universal law of deep residual stacks,
  ``S(z) = exp(-tau (1 + 2 z))`` (Tarnowski et al. 2019; docs/theory-free-probability.md sec. 7);
* :func:`plain_limit_edges` -- the support of the large-depth orthogonal law ``S = exp(-c z)``.

The solver works in ``ell = ln(lambda)`` and in the relative imaginary part ``y/lambda``, so
spectra spanning thousands of decades (Gaussian stacks at depth 1000) stay representable:
:class:`Density` carries ``log_x`` and ``rho_log`` (the density of ``ln lambda``) next to x, rho.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Sequence
from typing import NamedTuple

import numpy as np
from scipy import special

from isoscope.activations import Activation, get_activation
from isoscope.errors import SolverError, TheoryError
from isoscope.theory import mean_field as mf
from isoscope.theory.mean_field import _SOFT_BREAKS
from isoscope.theory.quadrature import normal_rule

__all__ = [
    "WEIGHT_KINDS",
    "DerivativeLaw",
    "derivative_law",
    "LambdaMoments",
    "moments_from_logs",
    "plain_moments",
    "NARROW_SPREAD",
    "Density",
    "plain_density",
    "residual_tau",
    "derivative_means",
    "residual_moments",
    "residual_edges",
    "residual_density",
    "plain_limit_edges",
]

WEIGHT_KINDS = ("gaussian", "orthogonal")

# Relative imaginary part of the last point of the path, z = lambda (1 + i ETA).  Relative, so
# the zero atom is not smeared over small lambda (an absolute epsilon would be).
ETA = 1e-9
# Start of the path: y0 = START * max(scale, lambda), far outside the spectrum (M ~ m1/z there).
START = 1e3
# Densities below max(THRESHOLD * max(rho_log), FLOOR) count as outside the support when the
# solver looks for the support.  FLOOR sits 30 times above the smearing by ETA: below a
# spectrum, rho_log(lambda(1 + i ETA)) ~ (ETA/pi) lambda E[1/t] <= ETA/pi ~ 3e-10, which a
# purely relative threshold mistakes for density when rho_log is broad and low (its peak
# ~ 1e-3 at depth 1000).
THRESHOLD = 1e-8
FLOOR = 30.0 * ETA / math.pi
# Atoms lighter than this are dropped (1 - L(1 - p) = 0 exactly at L(1 - p) = 1).
ATOM_FLOOR = 1e-12
# Relative accuracy of the solved lambda G next to an atom (final Newton tolerance 1e-12,
# times a margin for the conditioning): see _solved.
ATOM_NOISE = 1e-9
# Largest relative change of M, 1 + M or the unknown allowed in one continuation step.
MAX_CHANGE = 1.0
# Largest change of a logarithm in one step even on a pure power law (keeps exp() finite).
MAX_LOG_STEP = 100.0
_EPS = float(np.finfo(float).eps)
_LOG_TINY = math.log(float(np.finfo(float).tiny))  # ln of the smallest normal float64, -708.4
_LOG_HUGE = math.log(float(np.finfo(float).max))  # 709.78
# Near-isometric limit: when the predicted relative spread of lambda, r = sqrt(m2/m1^2 - 1), is
# below NARROW_SPREAD, plain_density returns the semicircle of the predicted m1, m2 (see
# _narrow_density).  Why 1e-3: the continuation stops at y = ETA lambda, which leaves a smeared
# density ~ ETA/(pi delta^2) at a distance delta below the law; for r below about 1e-2 that
# exceeds the support threshold and the solved lower edge comes out several times too low
# (measured: tanh orthogonal, L = 1000, r = 1.7e-3: ln lambda_- = -0.0134 against -0.0035), and
# below r ~ 1e-6 the mass check fails.  The semicircle's error is of relative order r: at r =
# 1.7e-3 its edges are within 5e-6 of those of the large-depth law S = exp(-c z) (0.07 % of the
# width), the check value of tests/test_free_probability.py.
NARROW_SPREAD = 1e-3
_LENGTH_SHARE = 0.1


# ----------------------------------------------------------------------------------------
# The law of d = phi'(h)^2
# ----------------------------------------------------------------------------------------


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
        return tuple(self.moment(k) for k in (1, 2, 3, 4))

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


# ----------------------------------------------------------------------------------------
# Argument checks (one place; every public function goes through these)
# ----------------------------------------------------------------------------------------


def _real(name: str, value, *, positive: bool, what: str) -> float:
    """A finite float, > 0 (positive) or >= 0, else TheoryError naming what it should be."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise TheoryError(f"{name} must be a number, received {value!r}; {what}") from None
    if not math.isfinite(x) or (x <= 0 if positive else x < 0):
        raise TheoryError(
            f"{name} must be finite and {'> 0' if positive else '>= 0'}, received {value!r}; {what}"
        )
    return x


def _integer(name: str, value, minimum: int, what: str) -> int:
    """An integer >= minimum (bools refused), else TheoryError."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise TheoryError(f"{name} must be an integer >= {minimum} ({what}), received {value!r}")
    return int(value)


def _check_q(q) -> float:
    return _real(
        "variance q", q, positive=False, what="pass the mean-field fixed point q* (a variance)"
    )


def _check_tau(tau) -> float:
    return _real(
        "tau", tau, positive=False, what="it is a sum of alpha^2 sigma_w^2 E[phi'^2] over layers"
    )


def _check_sigma(sigma_w) -> float:
    return _real("sigma_w", sigma_w, positive=True, what="the weight scale, not its square")


def _check_points(points) -> int:
    return _integer("points", points, 32, "grid size of the density")


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


# ----------------------------------------------------------------------------------------
# Moments by Lagrange inversion (truncated power series)
# ----------------------------------------------------------------------------------------


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
    return LambdaMoments(*vals, *logs)


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


# ----------------------------------------------------------------------------------------
# The continuation solver
# ----------------------------------------------------------------------------------------


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


class _PlainProblem:
    """Master equation of a plain stack in the auxiliary variable w, ``M = M_{D^2}(w)``.

    Orthogonal: ``log z + (1-L)(log M - log(1+M)) - L log sigma_w^2 - L log w = 0``;
    Gaussian:   ``log z + (1-L) log M - log(1+M) - L log sigma_w^2 - L log w = 0``
    (logarithms of ``z M (1+M)^{L-1} = (sigma_w^2 M w)^L`` and ``z M = (1+M)(sigma_w^2 M w)^L``,
    docs/theory-free-probability.md).  Each logarithm is taken of a number in a known half-plane (z, w up;
    M, 1+M down), so the branch is the one continuous from z = infinity.
    """

    def __init__(self, law: DerivativeLaw, kind: str, sigma: float, depth: int):
        self.law, self.kind, self.depth = law, kind, depth
        self.log_s2 = 2.0 * math.log(sigma)
        mu1, mu2 = law.moment(1), law.moment(2)
        self.mu1, self.mu2 = mu1, mu2
        self.log_m1 = depth * (self.log_s2 + math.log(mu1))

    def evaluate(self, w, log_z):
        m, one_m, dm = self.law._eval(w)
        L = self.depth
        lm, l1m, lw = _log_lower(m), _log_lower(one_m), _log_upper(w)
        if self.kind == "orthogonal":
            f = log_z + (1 - L) * (lm - l1m) - L * (self.log_s2 + lw)
            df = (1 - L) * (dm / m - dm / one_m) - L / w
        else:
            f = log_z + (1 - L) * lm - l1m - L * (self.log_s2 + lw)
            df = (1 - L) * dm / m - dm / one_m - L / w
        # rounding floor of f: a sum of terms as large as L |log|
        floor = _EPS * (
            np.abs(log_z) + L * (np.abs(lm) + np.abs(l1m) + np.abs(lw) + abs(self.log_s2) + 1.0)
        )
        return f, df, (m, one_m, dm, floor)

    @staticmethod
    def valid(w):
        return w.imag > 0

    @staticmethod
    def relative_change(w, dw, aux):
        """Changes of ``ln w``, ``ln M`` and ``ln(1 + M)`` for a step dw (shape ``(3, n)``)."""
        m, one_m, dm, _ = aux
        d_m = dm * dw
        return np.stack([dw / w, d_m / m, d_m / one_m])

    def initial(self, log_z):
        # far from the spectrum M ~ m1/z, and M_{D^2}(w) = mu1/w + mu2/w^2 + ... inverts to
        # w ~ mu1/M + mu2/mu1
        m0 = np.exp(self.log_m1 - log_z)
        w = self.mu1 / m0 + self.mu2 / self.mu1
        return np.where(w.imag > 0, w, w.real + 1e-300j)

    def lambda_g(self, w, eta):
        """``lambda G(lambda(1 + i eta))`` without the zero atom: ``w G_+(w)/(1 + i eta)``."""
        y = w.imag[:, None]
        x = w.real[:, None] - self.law.values
        den = 1.0 / (x * x + y * y)
        g = (x * den) @ self.law.weights - 1j * w.imag * (den @ self.law.weights)
        return w * g / (1.0 + 1j * eta)


class _ExponentialProblem:
    """Master equation for ``S(z) = exp(a - c z)``: ``log z + log M + a - c M - log(1+M) = 0``.

    Covers the residual law (``a = -tau``, ``c = 2 tau``, docs/theory-free-probability.md sec. 7) and the
    large-depth orthogonal law ``S = exp(-c z)`` (a = 0).  Unknown: M itself.
    """

    def __init__(self, a: float, c: float):
        self.a, self.c = a, c
        self.log_m1 = -a

    def evaluate(self, m, log_z):
        one_m = 1.0 + m
        lm, l1m = _log_lower(m), _log_lower(one_m)
        f = log_z + lm + self.a - self.c * m - l1m
        df = 1.0 / m - self.c - 1.0 / one_m
        floor = _EPS * (
            np.abs(log_z) + np.abs(lm) + np.abs(l1m) + abs(self.a) + self.c * np.abs(m) + 1.0
        )
        return f, df, (m, one_m, floor)

    @staticmethod
    def valid(m):
        return m.imag < 0

    @staticmethod
    def relative_change(m, dm, aux):
        """Changes of ``ln M`` and ``ln(1 + M)`` for a step dm (shape ``(2, n)``)."""
        return np.stack([dm / m, dm / aux[1]])

    def initial(self, log_z):
        m = np.exp(self.log_m1 - log_z)
        return np.where(m.imag < 0, m, m.real - 1e-300j)

    @staticmethod
    def lambda_g(m, eta):
        return (1.0 + m) / (1.0 + 1j * eta)


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


# ----------------------------------------------------------------------------------------
# Densities: the result type, the grid, the plain-stack pieces
# ----------------------------------------------------------------------------------------


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

    @property
    def in_float_range(self) -> bool:
        """True when every grid point, support edge and non-zero atom of lambda (and rho on the
        grid) is a normal float64: the lambda-form fields are then faithful."""
        logs = [*self.log_support, *(la for la, _ in self.log_atoms)]
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


def _plain_atoms(law: DerivativeLaw, kind: str, sigma: float, depth: int):
    """Atoms of ``J J^T``: ``(log location or -inf, weight)`` (docs/theory-free-probability.md, *derived*).

    Zero: weight ``P(d = 0)`` in both ensembles.  Orthogonal weights: an atom of d at a with
    weight p_a > 1 - 1/L gives an atom at ``(sigma_w^2 a)^L`` of weight ``1 - L(1 - p_a)``
    (the L-fold free multiplicative convolution of the law of ``sigma_w^2 d``).
    """
    atoms = []
    if law.zero_weight > ATOM_FLOOR:
        atoms.append((-math.inf, law.zero_weight))
    if kind == "orthogonal":
        for a, p in zip(law.values, law.weights):
            w = 1.0 - depth * (1.0 - p)
            if w > ATOM_FLOOR:
                atoms.append((depth * (2.0 * math.log(sigma) + math.log(a)), w))
    return atoms


def _plain_log_z_real(law, kind, sigma, depth, w):
    """``ln z(w)`` and ``d ln z / dw`` on the real axis, w > max(d) (the inverse map)."""
    m, one_m, dm = (a.real for a in law._eval(np.asarray(w, dtype=complex)))
    L = depth
    base = L * (2.0 * math.log(sigma) + np.log(w))
    if kind == "orthogonal":
        return base + (L - 1) * (np.log(m) - np.log(one_m)), L / w + (L - 1) * dm / (m * one_m)
    return base + (L - 1) * np.log(m) + np.log(one_m), L / w + (L - 1) * dm / m + dm / one_m


def _plain_upper_edge(law, kind, sigma, depth) -> tuple[float, bool]:
    """``(ln lambda_+, exact)``: the first critical point of the inverse map met from infinity.

    Along the real axis above the spectrum, ``z(w)`` decreases with w from infinity; the edge is
    the largest w > max(d) with ``dz/dw = 0``.  Without one the spectrum ends where w reaches
    max d: ``(sigma_w^2 max d)^L`` for orthogonal weights (a heavy top atom of d), ``z(max d+)``
    for Gaussian weights (a law of d that thins out at its top); ``exact = False`` then.
    """
    from scipy import optimize

    top = float(law.values[-1])
    t = np.linspace(30.0, -36.0, 331)  # w = top (1 + e^t)
    lz_scan, g = _plain_log_z_real(law, kind, sigma, depth, top * (1.0 + np.exp(t)))
    neg = np.flatnonzero(g < 0)
    if neg.size == 0 or neg[0] == 0:
        if kind == "gaussian":
            # z(w) is monotone down to w = top: M_{D^2} stays bounded there (the law of d thins
            # out at its top, as the quadrature nodes of a smooth phi' do when the maximum of
            # phi'^2 lies beyond the nodes that carry weight: GELU at small q*), so the
            # spectrum ends at z(top+), the last point of the scan
            return float(lz_scan[-1]), False
        return depth * (2.0 * math.log(sigma) + math.log(top)), False
    a, b = t[neg[0]], t[neg[0] - 1]

    def dlog(tt):
        return float(_plain_log_z_real(law, kind, sigma, depth, top * (1.0 + np.exp([tt])))[1][0])

    tc = optimize.brentq(dlog, a, b, xtol=1e-13, rtol=1e-14)
    lz, _ = _plain_log_z_real(law, kind, sigma, depth, top * (1.0 + np.exp([tc])))
    return float(lz[0]), True


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
        breaks = np.unique(breaks)
        h = np.union1d(h, breaks)
        logd = self.logd(h)
        self.pieces, self.constant_logd = [], []
        for a, b in zip(breaks[:-1], breaks[1:]):
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
    intervals, brackets = [], []
    for i, j in _runs(pos):
        lo = ell_bottom if (i == 0 and ell_bottom is not None) else (ell[i] if i == 0 else None)
        hi = ell_top if j == ell.size - 1 else None
        intervals.append([lo, hi])
        if lo is None:
            brackets.append((len(intervals) - 1, 0, ell[i - 1], ell[i]))
        if hi is None:
            brackets.append((len(intervals) - 1, 1, ell[j], ell[j + 1]))
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
            intervals[k][side] = a if side == 0 else b
    # drop intervals too narrow to matter (isolated spikes far in a tail)
    intervals = [(lo, hi) for lo, hi in intervals if hi > lo]

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
    support = tuple(
        0.0 if v == -math.inf else (math.exp(v) if _LOG_TINY <= v <= _LOG_HUGE else math.nan)
        for v in log_support
    )
    return Density(
        x, rho, ell, rl, float(zero), atom_list, support, iv, regime, log_support, log_atoms
    )


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


def plain_density(
    law: DerivativeLaw, weights: str, sigma_w: float, depth: int, points: int = 400
) -> Density:
    """Spectral density of ``J J^T`` for a plain stack with every layer at variance q.

    Solves the master equation ``z M S_{JJ^T}(M) = 1 + M`` (``G = (1 + M)/z``,
    ``rho = -Im G/pi``) with the auxiliary variable w, ``M = M_{D^2}(w)``:
    orthogonal ``z M (1+M)^{L-1} = (sigma_w^2 M w)^L``, Gaussian
    ``z M = (1+M)(sigma_w^2 M w)^L`` (docs/theory-free-probability.md, *derived*).  For each lambda the solution
    is followed along ``z = lambda + i y`` from ``y = 1e3 max(lambda_+, lambda)`` down to
    ``y = 1e-9 lambda`` (damped Newton on the logarithmic form, all points advancing together);
    the atoms are subtracted from G before taking the imaginary part.  The upper edge is the
    critical point of the real inverse map; other edges are found on the solved density.
    One orthogonal layer of a smooth phi is the law of ``sigma_w^2 phi'(h)^2`` itself and is
    computed by change of variables.  See ``docs/theory-free-probability.md``.

    Args:
      law: :func:`derivative_law` at the variance q (q* for a stack at its fixed point).
      weights: ``"gaussian"`` or ``"orthogonal"``.
      sigma_w: weight scale (not squared).
      depth: number of layers L >= 1.
      points: size of the grid of the continuous part (>= 32).

    Returns:
      :class:`Density`.

    Raises:
      TheoryError: for invalid arguments or when the solve does not converge.

    References:
      Pennington, Schoenholz, Ganguli 2017 (NeurIPS), sec. 2.3 and 2018 (AISTATS); the solver
      is described in docs/theory-free-probability.md.
    """
    kind, sigma, depth = _check_stack(law, weights, sigma_w, depth)
    points = _check_points(points)
    atoms = _plain_atoms(law, kind, sigma, depth)
    if kind == "orthogonal" and depth == 1 and not law.exact:
        atoms = [a for a in atoms if not math.isfinite(a[0])]  # nodes are not atoms
    mass = 1.0 - sum(w for _, w in atoms)
    regime = (
        f"N -> infinity, q^l = q = {law.q:.6g} for every layer (the fixed point q*), "
        f"{kind} weights, sigma_w = {sigma:.6g}, L = {depth}"
    )
    if mass <= 1e-10 or law.positive_weight <= 0:
        return _make_density([], [], atoms, [], regime)
    spread = law.relative_variance()
    if kind == "orthogonal" and not atoms and depth * spread < NARROW_SPREAD**2:
        return _narrow_density(
            depth * 2.0 * math.log(sigma) + depth * law.log_mu1, depth * spread, points, regime
        )
    if kind == "gaussian" or law.zero_weight > 0:
        # the density reaches down to lambda = 0 like a power: ln lambda spreads ~ 16 L
        span = 40.0 + 20.0 * depth * (spread + (1.0 if kind == "gaussian" else 0.0))
    else:
        # orthogonal, no zero atom: a lower edge near -(c + ln c + 1), c = L * spread
        c = depth * spread
        span = 40.0 + 3.0 * (c + math.log1p(c))
    if kind == "orthogonal" and depth == 1:
        push = _Pushforward(get_activation(law.activation), law.q, sigma)
        atoms = _pushforward_atoms(law, push, sigma)
        mass = 1.0 - sum(w for _, w in atoms)
        if mass <= 1e-10:
            return _make_density([], [], atoms, [], regime)
        ell_top = push.log_top

        def evaluate(ell, strict):
            return push(np.asarray(ell, dtype=float))
    else:
        problem = _PlainProblem(law, kind, sigma, depth)
        ell_top, _ = _plain_upper_edge(law, kind, sigma, depth)

        def evaluate(ell, strict):
            ell = np.asarray(ell, dtype=float)
            s_top = math.log(START) + np.maximum(ell, ell_top)
            return _solved(problem, ell, s_top, atoms, "plain-stack", strict)

    ell, rl, intervals = _tabulate_checked(evaluate, ell_top, mass, span, points, "plain-stack")
    return _make_density(ell, rl, atoms, intervals, regime)


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


def _narrow_density(log_m1: float, rel_var: float, points: int, regime: str) -> Density:
    """The near-isometric limit: a semicircle in lambda of mean m1 and variance ``m1^2 rel_var``.

    Used when the predicted relative spread ``sqrt(m2/m1^2 - 1) = sqrt(L Var(d)/E[d]^2)``
    (orthogonal weights, docs/theory-free-probability.md: ``m2 = m1^2 (1 + L t1)``) is below
    ``NARROW_SPREAD`` = 1e-3: the law is then narrower than the continuation solver resolves.
    ``J J^T`` is a free product of L factors ``sigma_w^2 D_l^2`` each within a relative
    ``sqrt(Var(d))/E[d]`` of a multiple of the identity, so to leading order ``lambda/m1 - 1`` is
    a free sum of L small free variables and, by the free central limit theorem (Voiculescu 1985;
    Nica and Speicher 2006, the free central limit theorem), semicircular: density
    ``2 sqrt(R^2 - (u - 1)^2)/(pi R^2)`` in ``u = lambda/m1`` with ``R = 2 sqrt(rel_var)``.  Its
    first two moments are exact (m1 and m2 of the Lagrange series); the skewness it drops is of
    relative order ``sqrt(rel_var)`` < 1e-3.  Built in logs: ``ln lambda = ln m1 + log1p(R cos t)``.
    """
    r = 2.0 * math.sqrt(max(rel_var, 0.0))
    regime = (
        f"{regime}; near-isometric limit: predicted relative spread "
        f"sqrt(m2/m1^2 - 1) = {math.sqrt(max(rel_var, 0.0)):.3g} < {NARROW_SPREAD:g}, below "
        "what the density solver resolves: semicircle with the predicted m1 and m2 "
        "(free central limit)"
    )
    if r == 0.0:
        return _make_density([], [], [(log_m1, 1.0)], [], regime)
    t = np.pi * (points - 0.5 - np.arange(points)) / points  # from pi to 0: lambda increasing
    u = np.cos(t)
    ell = log_m1 + np.log1p(r * u)
    # rho_log d ell = rho_u du, du = lambda/m1 d ell: rho_log = (1 + r u) rho_u
    rho_u = 2.0 * np.sqrt(np.maximum(1.0 - u * u, 0.0)) / (math.pi * r)
    rl = (1.0 + r * u) * rho_u
    lo, hi = log_m1 + math.log1p(-r), log_m1 + math.log1p(r)
    ell = np.concatenate([[lo], ell, [hi]])
    rl = np.concatenate([[0.0], rl, [0.0]])
    return _make_density(ell, rl, [], [(lo, hi)], regime)


# ----------------------------------------------------------------------------------------
# Residual stacks and the large-depth orthogonal law
# ----------------------------------------------------------------------------------------


def residual_tau(
    activation: str | Activation, sigma_w: float, q_trajectory: Sequence[float], alpha: float = 1.0
) -> float:
    """``tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2]``, ``h^l ~ N(0, q^l)``, of a residual stack.

    The residual block is ``x' = x + alpha phi(W x + b)``; tau is accumulated along the actual
    trajectory q^l (q grows with depth in residual stacks).  ReLU with sigma_b = 0 gives
    ``tau = L alpha^2 sigma_w^2 / 2`` exactly, linear ``L alpha^2 sigma_w^2``.

    Args:
      activation: registry name or :class:`Activation`.
      sigma_w: weight scale of the branch (not squared).
      q_trajectory: pre-activation variances ``q^1 .. q^L`` (one per block, each > 0).
      alpha: branch scale.

    Returns:
      tau (float).

    References:
      Tarnowski, Warchol, Jastrzebski, Tabor, Nowak 2019 (AISTATS); docs/theory-free-probability.md sec. 7.
    """
    act = get_activation(activation)
    sigma = _check_sigma(sigma_w)
    try:
        qs = np.asarray(q_trajectory, dtype=float).reshape(-1)
        alpha = float(alpha)
    except (TypeError, ValueError):
        raise TheoryError(
            f"q_trajectory must be a sequence of variances and alpha a number, "
            f"received {q_trajectory!r}, {alpha!r}"
        ) from None
    if qs.size == 0 or not np.all(np.isfinite(qs)) or np.any(qs <= 0):
        raise TheoryError(
            f"q_trajectory must hold one positive finite variance per block, "
            f"received {qs.size} values with min {qs.min() if qs.size else None}"
        )
    if not math.isfinite(alpha):
        raise TheoryError(f"alpha must be finite, received {alpha!r}")
    return float(alpha * alpha * sigma * sigma * np.sum(derivative_means(act, qs)))


def derivative_means(activation: str | Activation, q_trajectory: Sequence[float]) -> np.ndarray:
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


def residual_moments(tau: float) -> LambdaMoments:
    """Moments of the universal residual law ``S(z) = exp(-tau (1 + 2 z))``.

    Lagrange inversion ``m_k = (1/k)[z^{k-1}] (1+z)^k exp(k tau (1 + 2z))`` gives
    ``m1 = e^tau``, ``m2 = e^{2 tau}(1 + 2 tau)`` and m3, m4 from the same series.

    Args:
      tau: ``sum_l s_l`` (see :func:`residual_tau`), >= 0.

    Returns:
      :class:`LambdaMoments`.

    References:
      Tarnowski et al. 2019 (AISTATS); docs/derivations.md sec. 6 (law derived in-house).
    """
    tau = _check_tau(tau)
    log_t = np.zeros(_ORDER)
    log_t[1] = 2.0 * tau
    return _lagrange_moments(tau, log_t)


def _exp_law_edges(c: float) -> tuple[float, float]:
    """``ln lambda_-, ln lambda_+`` of the law ``S(z) = exp(-c z)`` (critical points of
    ``z(M) = (1 + M) e^{c M}/M``: ``c M (1 + M) = 1``)."""
    root = math.sqrt(c * c + 4.0 * c)
    out = []
    for m in ((-c - root) / (2.0 * c), (-c + root) / (2.0 * c)):
        out.append(math.log(abs(1.0 + m)) + c * m - math.log(abs(m)))
    return out[0], out[1]


def residual_edges(tau: float) -> tuple[float, float]:
    """Support ``(lambda_-, lambda_+)`` of the universal residual law.

    ``lambda_+- = ((1 + p)/p) exp(tau (1 + 2p))``, ``p = (-1 +- sqrt(1 + 2/tau))/2``;
    ``lambda_+ lambda_- = 1``.  At tau = 0 the law is a point mass at 1.

    Args:
      tau: >= 0.

    Returns:
      ``(lo, hi)``.

    References:
      Tarnowski et al. 2019 (AISTATS); docs/derivations.md.
    """
    tau = _check_tau(tau)
    if tau == 0.0:
        return 1.0, 1.0
    lo, hi = _exp_law_edges(2.0 * tau)  # S = e^{-tau} exp(-2 tau z): shift ln lambda by tau
    return math.exp(lo + tau), math.exp(min(hi + tau, 709.78))


def plain_limit_edges(c: float) -> tuple[float, float]:
    """Support of the large-depth orthogonal law ``S(z) = exp(-c z)`` (smooth phi, chi_1 = 1).

    ``lambda_+- = (1 + m) e^{c m}/m`` at ``m_+- = (-c +- sqrt(c^2 + 4c))/(2c)``, with
    ``c = L (mu_2/mu_1^2 - 1)`` held fixed as L -> infinity.  Finite stacks approach it slowly
    (relative differences of order sqrt(8/L)).

    Args:
      c: > 0 (c = 0 is the point mass at 1).

    Returns:
      ``(lo, hi)``.

    References:
      Pennington, Schoenholz, Ganguli 2018 (AISTATS); docs/derivations.md.
    """
    c = _real("c", c, positive=False, what="c = L (mu_2/mu_1^2 - 1)")
    if c == 0.0:
        return 1.0, 1.0
    lo, hi = _exp_law_edges(c)
    return math.exp(lo), math.exp(min(hi, 709.78))


def residual_density(tau: float, points: int = 400) -> Density:
    """Density of the universal residual law ``S(z) = exp(-tau (1 + 2 z))``.

    Solves ``z M exp(-tau (1 + 2M)) = 1 + M`` on the branch ``M ~ e^tau/z`` at large |z| by the
    same continuation as :func:`plain_density` (unknown M); the support is
    :func:`residual_edges`.

    Args:
      tau: >= 0 (tau = 0: a point mass at 1).
      points: grid size (>= 32).

    Returns:
      :class:`Density`.

    References:
      Tarnowski et al. 2019 (AISTATS); docs/derivations.md.
    """
    tau = _check_tau(tau)
    points = _check_points(points)
    regime = (
        f"N -> infinity, L -> infinity with tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2] "
        f"= {tau:.6g} fixed (branch variance O(1/L) per block)"
    )
    if tau == 0.0:
        return _make_density([], [], [(0.0, 1.0)], [], regime)
    lo, hi = _exp_law_edges(2.0 * tau)
    lo, hi = lo + tau, hi + tau
    problem = _ExponentialProblem(-tau, 2.0 * tau)

    def evaluate(ell, strict):
        ell = np.asarray(ell, dtype=float)
        return _solved(problem, ell, math.log(START) + np.maximum(ell, hi), [], "residual", strict)

    ell, rl, intervals = _tabulate_checked(
        evaluate, hi, 1.0, hi - lo, points, "residual", ell_bottom=lo
    )
    return _make_density(ell, rl, [], intervals, regime)
