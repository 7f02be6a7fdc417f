"""Activation registry.

Each activation is one :class:`Activation` row in ``_REGISTRY``.  A row carries the pure
JAX function phi, the points where phi is not differentiable (its *kinks*, used to split
Gaussian quadrature), and, where phi' takes only finitely many values, those values (used by
the free-probability code for the atoms of the law of phi'(h)^2).  phi' is obtained by
``jax.grad``; the theory's ``phi'(h)^2`` comes from :meth:`Activation.log_dphi_sq`, which
keeps its relative accuracy in the tails (``jax.grad`` of ``tanh`` is exactly 0 for
``|h| > 19`` in float64 although ``tanh'`` never vanishes): a smooth row declares a closed
form of ``ln phi'(h)^2`` that neither underflows nor cancels, checked against mpmath.

The leaky-ReLU row is parametrised by its slope: ``get_activation("leaky-relu", slope=0.2)``
(or ``Activation.with_slope``) returns one cached :class:`Activation` per slope, so every
cache keyed on the activation object (compiled NumPy callables, network forward functions)
distinguishes slopes.

Adding an activation is adding one row; ``tests/test_activations.py`` then checks it against
finite differences, its declared kinks and symmetry, and jit compilation.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable

import jax
import jax.numpy as jnp
import jax.scipy.special as jsp
import numpy as np

from isoscope.errors import InputError, did_you_mean, hints

__all__ = [
    "Activation",
    "get_activation",
    "activation_names",
    "SELU_ALPHA",
    "SELU_LAMBDA",
    "LEAKY_SLOPE",
]

# Klambauer, Unterthiner, Mayr, Hochreiter 2017, "Self-normalizing neural networks", eq. (14).
SELU_ALPHA = 1.6732632423543772848170429917
SELU_LAMBDA = 1.0507009873554804934193349853
LEAKY_SLOPE = 0.01  # common practice (the default slope of most frameworks), no source


@dataclasses.dataclass(frozen=True)
class Activation:
    """An elementwise nonlinearity phi with what the theory needs to know about it.

    Attributes:
      name: registry name (lower case, hyphenated).
      fn: pure JAX function phi, applied elementwise.
      kinks: points h where phi' jumps (empty for smooth phi).  Quadrature splits there.
      derivative_values: for phi' piecewise constant, the finite set of values phi' takes
        (for example ``(0.0, 1.0)`` for ReLU); ``None`` for phi' that varies continuously.
      odd: whether phi(-h) = -phi(h).  Odd phi with phi'(0) = 1 admit q* = 0 at sigma_b = 0.
      description: one line for listings.
      log_dphi_sq_fn: JAX function ``h -> ln phi'(h)^2`` in a form that keeps its relative
        accuracy for large |h| (``None``: ``2 ln|phi'|`` from ``jax.grad``, exact for
        piecewise-constant phi').
      slope: the negative-side slope a of leaky ReLU (``max(h, a h)``), else ``None``.
    """

    name: str
    fn: Callable[[jax.Array], jax.Array]
    kinks: tuple[float, ...] = ()
    derivative_values: tuple[float, ...] | None = None
    odd: bool = False
    description: str = ""
    log_dphi_sq_fn: Callable[[jax.Array], jax.Array] | None = None
    slope: float | None = None

    def __call__(self, h: jax.Array) -> jax.Array:
        return self.fn(h)

    @property
    def label(self) -> str:
        """The name, with the slope for leaky ReLU (``"leaky-relu (slope 0.2)"``)."""
        return self.name if self.slope is None else f"{self.name} (slope {self.slope:g})"

    def with_slope(self, slope: float) -> Activation:
        """The leaky ReLU ``max(h, a h)`` with slope ``a = slope`` (one cached object per slope).

        Raises:
          InputError: for an activation other than leaky ReLU, or a slope that is not finite.
        """
        if self.name != "leaky-relu":
            raise InputError(
                f"a slope was given for activation {self.name!r}",
                expected="a slope only with activation 'leaky-relu'",
                hint='remove the slope, or use activation = "leaky-relu"',
                key="network.leaky_slope",
            )
        try:
            a = float(slope)
        except (TypeError, ValueError):
            a = math.nan
        if isinstance(slope, bool) or not math.isfinite(a):
            raise InputError(
                f"leaky-ReLU slope {slope!r} is not a finite number",
                expected=f"a finite real slope a of max(h, a h) (default {LEAKY_SLOPE})",
                key="network.leaky_slope",
            )
        return _leaky_row(a)

    def log_dphi_sq(self, h: jax.Array) -> jax.Array:
        """``ln phi'(h)^2`` elementwise (``-inf`` where phi' = 0), accurate in the tails.

        Smooth rows use their closed form (for example ``tanh'^2 = sech^4``:
        ``4 (ln 2 - |h| - log1p(exp(-2|h|)))``), which stays finite and relatively exact where
        ``phi'(h)^2`` itself underflows; the others take ``2 ln|phi'(h)|`` from ``jax.grad``.
        """
        if self.log_dphi_sq_fn is not None:
            return self.log_dphi_sq_fn(jnp.asarray(h))
        return 2.0 * jnp.log(jnp.abs(self.derivative(h)))

    @property
    def law_free_of_q(self) -> bool:
        """True when the law of ``phi'(h)^2``, ``h ~ N(0, q)``, is the same for every q > 0:
        phi' piecewise constant with its only kink at 0 (linear, ReLU, leaky ReLU).  With
        ``phi(0) = 0`` such a phi is positively homogeneous, ``phi(t h) = t phi(h)`` for t > 0,
        so the Jacobian of a stack without biases does not depend on the input's scale."""
        return self.derivative_values is not None and all(k == 0.0 for k in self.kinks)

    @property
    def piecewise_linear(self) -> bool:
        """True when phi' is piecewise constant (phi'(h)^2 is then a discrete law)."""
        return self.derivative_values is not None

    def derivative(self, h: jax.Array) -> jax.Array:
        """phi'(h) elementwise, by ``jax.grad`` of the scalar function."""
        return _elementwise_grad(self.fn)(h)

    def numpy_pair(
        self,
    ) -> tuple[Callable[[np.ndarray], np.ndarray], Callable[[np.ndarray], np.ndarray]]:
        """float64 NumPy callables ``(phi, phi')`` for quadrature (jit-compiled once per activation)."""
        return _numpy_callables(self)[:2]

    def numpy_log_dphi_sq(self) -> Callable[[np.ndarray], np.ndarray]:
        """float64 NumPy callable of :meth:`log_dphi_sq` (jit-compiled once per activation)."""
        return _numpy_callables(self)[2]

    def numpy_dphi_sq(self) -> Callable[[np.ndarray], np.ndarray]:
        """float64 NumPy callable ``phi'(h)^2 = exp(ln phi'(h)^2)``: relatively accurate in the
        tails, 0 only where phi' vanishes or ``phi'^2`` is below the float64 range (1e-308)."""
        log_d = self.numpy_log_dphi_sq()
        return lambda h: np.exp(log_d(h))


def _elementwise_grad(fn: Callable[[jax.Array], jax.Array]) -> Callable[[jax.Array], jax.Array]:
    scalar_grad = jax.grad(lambda t: fn(t))

    def dphi(h: jax.Array) -> jax.Array:
        h = jnp.asarray(h)
        flat = jax.vmap(scalar_grad)(h.reshape(-1))
        return flat.reshape(h.shape)

    return dphi


def _hard_tanh(h):
    # where() rather than clip(): clip's gradient at h = +-1 is 1/2, outside phi' in {0, 1}
    return jnp.where(jnp.abs(h) < 1.0, h, jnp.sign(h))


def _relu(h):
    # jnp.maximum's gradient at 0 is 0.5; where(h > 0) gives phi'(0) = 0, a measure-zero choice
    # that keeps phi' in {0, 1} exactly.
    return jnp.where(h > 0, h, 0.0 * h)


def _log_sech_sq(h):
    """``ln sech(h)^2 = 2 (ln 2 - |h| - log1p(exp(-2|h|)))``: no overflow, no cancellation."""
    a = jnp.abs(h)
    return 2.0 * (jnp.log(2.0).astype(a.dtype) - a - jnp.log1p(jnp.exp(-2.0 * a)))


def _log_tanh_dsq(h):
    # tanh' = sech^2, so tanh'^2 = sech^4
    return 2.0 * _log_sech_sq(h)


def _log_erf_dsq(h):
    # erf'(h) = (2/sqrt(pi)) exp(-h^2)
    return jnp.log(4.0 / math.pi).astype(jnp.asarray(h).dtype) - 2.0 * h * h


def _log_sigmoid_d(h):
    """``ln sigmoid'(h) = -|h| - 2 log1p(exp(-|h|))`` (sigmoid' = e^{-|h|}/(1 + e^{-|h|})^2)."""
    a = jnp.abs(h)
    return -a - 2.0 * jnp.log1p(jnp.exp(-a))


def _log_centred_sigmoid_dsq(h):
    # (4 sigmoid - 2)' = 4 sigmoid'
    return 2.0 * (jnp.log(4.0).astype(jnp.asarray(h).dtype) + _log_sigmoid_d(h))


def _log_selu_dsq(h):
    # h > 0: lambda; h < 0: lambda alpha e^h
    neg = 2.0 * (math.log(SELU_LAMBDA * SELU_ALPHA) + jnp.minimum(h, 0.0))
    return jnp.where(h > 0, 2.0 * math.log(SELU_LAMBDA), neg)


def _log_gelu_dsq(h):
    """``ln (Phi(h) + h phi(h))^2``, phi, Phi the normal density and CDF.

    For h > -5 the sum is formed directly (no underflow: phi(h) > 1e-6 there, and its relative
    accuracy is that of the sum, which vanishes only near its root h = -0.7518); for h <= -5 it
    is ``phi(h) (Phi(h)/phi(h) + h)`` with ``Phi/phi`` from ``log_ndtr`` (about 1/|h|, so
    ``Phi/phi + h`` has no cancellation).
    """
    h = jnp.asarray(h)
    log_pdf = -0.5 * h * h - 0.5 * math.log(2.0 * math.pi)
    direct = jsp.ndtr(h) + h * jnp.exp(log_pdf)
    far = jnp.minimum(h, -5.0)
    ratio = jnp.exp(jsp.log_ndtr(far) + 0.5 * far * far + 0.5 * math.log(2.0 * math.pi))
    tail = 2.0 * (-0.5 * far * far - 0.5 * math.log(2.0 * math.pi) + jnp.log(jnp.abs(ratio + far)))
    return jnp.where(h > -5.0, 2.0 * jnp.log(jnp.abs(direct)), tail)


def _log_silu_dsq(h):
    """``ln (sigmoid(h) (1 + h sigmoid(-h)))^2``; ``ln sigmoid(h) = -softplus(-h)``."""
    return 2.0 * (-jax.nn.softplus(-h) + jnp.log(jnp.abs(1.0 + h * jax.nn.sigmoid(-h))))


def _selu(h):
    return SELU_LAMBDA * jnp.where(h > 0, h, SELU_ALPHA * jnp.expm1(jnp.minimum(h, 0.0)))


def _gelu(h):
    # exact form h * Phi(h), Phi the standard normal CDF (Hendrycks & Gimpel 2016, sec. 2)
    return 0.5 * h * (1.0 + jsp.erf(h / jnp.sqrt(2.0).astype(h.dtype)))


def _silu(h):
    return h * jax.nn.sigmoid(h)


_ROWS = (
    Activation("linear", lambda h: h, (), (1.0,), True, "identity, phi(h) = h"),
    Activation("tanh", jnp.tanh, (), None, True, "hyperbolic tangent", _log_tanh_dsq),
    Activation("hard-tanh", _hard_tanh, (-1.0, 1.0), (0.0, 1.0), True, "clip(h, -1, 1)"),
    Activation("relu", _relu, (0.0,), (0.0, 1.0), False, "max(h, 0)"),
    None,  # leaky-relu: _leaky_row(LEAKY_SLOPE), filled in below
    Activation("erf", jsp.erf, (), None, True, "error function", _log_erf_dsq),
    Activation(
        "sigmoid",
        jax.nn.sigmoid,
        (),
        None,
        False,
        "logistic 1/(1 + exp(-h))",
        lambda h: 2.0 * _log_sigmoid_d(h),
    ),
    Activation(
        "centred-sigmoid",
        lambda h: 4.0 * jax.nn.sigmoid(h) - 2.0,
        (),
        None,
        True,
        "4 sigmoid(h) - 2 = 2 tanh(h/2)",
        _log_centred_sigmoid_dsq,
    ),
    Activation("selu", _selu, (0.0,), None, False, "scaled exponential linear unit", _log_selu_dsq),
    Activation("gelu", _gelu, (), None, False, "h Phi(h), Phi the normal CDF", _log_gelu_dsq),
    Activation("silu", _silu, (), None, False, "h sigmoid(h) (also called swish)", _log_silu_dsq),
)


@functools.cache
def _leaky_row(slope: float) -> Activation:
    """The leaky-ReLU row ``max(h, a h)`` for one slope a (cached: one object per slope)."""
    a = float(slope)

    def leaky(h):
        return jnp.where(h > 0, h, a * h)

    values = tuple(sorted({a, 1.0}))
    return Activation(
        "leaky-relu",
        leaky,
        (0.0,),
        values,
        a == 1.0,
        f"max(h, {a:g} h) for h > 0 and h < 0 (slope a = {a:g})",
        None,
        a,
    )


_TABLE: tuple[Activation, ...] = tuple(_leaky_row(LEAKY_SLOPE) if a is None else a for a in _ROWS)
_REGISTRY: dict[str, Activation] = {a.name: a for a in _TABLE}
_ALIASES = {
    "swish": "silu",
    "hardtanh": "hard-tanh",
    "leaky_relu": "leaky-relu",
    "hard_tanh": "hard-tanh",
    "identity": "linear",
}


def activation_names() -> tuple[str, ...]:
    """Names accepted by :func:`get_activation` (aliases excluded)."""
    return tuple(_REGISTRY)


def get_activation(name: str | Activation, slope: float | None = None) -> Activation:
    """Look up an activation by registry name (or pass an :class:`Activation` through).

    Args:
      name: registry name or alias, or an :class:`Activation`.
      slope: leaky ReLU only: the slope a of ``max(h, a h)`` (default ``LEAKY_SLOPE`` = 0.01,
        common practice with no source).  ``get_activation("leaky-relu", slope=a)`` is
        ``get_activation("leaky-relu").with_slope(a)``.

    Raises:
      InputError: for an unknown name (listing the allowed names), or a slope given for
        another activation.
    """
    if isinstance(name, Activation):
        act = name
    else:
        key = _ALIASES.get(str(name).lower(), str(name).lower())
        if key not in _REGISTRY:
            raise InputError(
                f"unknown activation {name!r}",
                expected=f"one of {', '.join(_REGISTRY)}",
                hint=hints(
                    did_you_mean(name, [*_REGISTRY, *_ALIASES]),
                    "check the spelling, or register a new Activation row in isoscope/activations.py",
                ),
            )
        act = _REGISTRY[key]
    return act if slope is None else act.with_slope(slope)


@functools.cache
def _numpy_callables(act: Activation):
    """``(phi, phi', ln phi'^2)`` as float64 NumPy callables, compiled once per activation
    object (so once per leaky slope)."""
    phi = jax.jit(lambda h: act.fn(h))
    dphi = jax.jit(act.derivative)
    log_d = jax.jit(act.log_dphi_sq)

    def wrap(fn):
        return lambda h: np.asarray(fn(jnp.asarray(h, dtype=jnp.float64)))

    return wrap(phi), wrap(dphi), wrap(log_d)
