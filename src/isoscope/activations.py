"""Activation registry.

Each activation is one :class:`Activation` row in ``_REGISTRY``.  A row carries the pure
JAX function phi, the points where phi is not differentiable (its *kinks*, used to split
Gaussian quadrature), and, where phi' takes only finitely many values, those values (used by
the free-probability code for the atoms of the law of phi'(h)^2).  phi' is always obtained
by ``jax.grad``; nothing else in isoscope differentiates an activation by hand.

Adding an activation is adding one row; ``tests/test_activations.py`` then checks it against
finite differences, its declared kinks and symmetry, and jit compilation.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable

import jax
import jax.numpy as jnp
import jax.scipy.special as jsp
import numpy as np

from isoscope.errors import InputError

__all__ = ["Activation", "get_activation", "activation_names", "SELU_ALPHA", "SELU_LAMBDA"]

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
    """

    name: str
    fn: Callable[[jax.Array], jax.Array]
    kinks: tuple[float, ...] = ()
    derivative_values: tuple[float, ...] | None = None
    odd: bool = False
    description: str = ""

    def __call__(self, h: jax.Array) -> jax.Array:
        return self.fn(h)

    @property
    def piecewise_linear(self) -> bool:
        """True when phi' is piecewise constant (phi'(h)^2 is then a discrete law)."""
        return self.derivative_values is not None

    def derivative(self, h: jax.Array) -> jax.Array:
        """phi'(h) elementwise, by ``jax.grad`` of the scalar function."""
        return _elementwise_grad(self.fn)(h)

    def numpy_pair(self) -> tuple[Callable[[np.ndarray], np.ndarray], Callable[[np.ndarray], np.ndarray]]:
        """float64 NumPy callables ``(phi, phi')`` for quadrature (jit-compiled once per activation)."""
        return _numpy_pair(self.name)


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


def _leaky_relu(h):
    return jnp.where(h > 0, h, LEAKY_SLOPE * h)


def _selu(h):
    return SELU_LAMBDA * jnp.where(h > 0, h, SELU_ALPHA * jnp.expm1(jnp.minimum(h, 0.0)))


def _gelu(h):
    # exact form h * Phi(h), Phi the standard normal CDF (Hendrycks & Gimpel 2016, sec. 2)
    return 0.5 * h * (1.0 + jsp.erf(h / jnp.sqrt(2.0).astype(h.dtype)))


def _silu(h):
    return h * jax.nn.sigmoid(h)


_ROWS = (
    Activation("linear", lambda h: h, (), (1.0,), True, "identity, phi(h) = h"),
    Activation("tanh", jnp.tanh, (), None, True, "hyperbolic tangent"),
    Activation("hard-tanh", _hard_tanh, (-1.0, 1.0), (0.0, 1.0), True, "clip(h, -1, 1)"),
    Activation("relu", _relu, (0.0,), (0.0, 1.0), False, "max(h, 0)"),
    Activation("leaky-relu", _leaky_relu, (0.0,), (LEAKY_SLOPE, 1.0), False,
               f"max(h, {LEAKY_SLOPE} h)"),
    Activation("erf", jsp.erf, (), None, True, "error function"),
    Activation("sigmoid", jax.nn.sigmoid, (), None, False, "logistic 1/(1 + exp(-h))"),
    Activation("centred-sigmoid", lambda h: 4.0 * jax.nn.sigmoid(h) - 2.0, (), None, True,
               "4 sigmoid(h) - 2 = 2 tanh(h/2)"),
    Activation("selu", _selu, (0.0,), None, False, "scaled exponential linear unit"),
    Activation("gelu", _gelu, (), None, False, "h Phi(h), Phi the normal CDF"),
    Activation("silu", _silu, (), None, False, "h sigmoid(h) (also called swish)"),
)
_REGISTRY: dict[str, Activation] = {a.name: a for a in _ROWS}
_ALIASES = {"swish": "silu", "hardtanh": "hard-tanh", "leaky_relu": "leaky-relu",
            "hard_tanh": "hard-tanh", "identity": "linear"}


def activation_names() -> tuple[str, ...]:
    """Names accepted by :func:`get_activation` (aliases excluded)."""
    return tuple(_REGISTRY)


def get_activation(name: str | Activation) -> Activation:
    """Look up an activation by registry name (or pass an :class:`Activation` through).

    Raises:
      InputError: for an unknown name, listing the allowed names.
    """
    if isinstance(name, Activation):
        return name
    key = _ALIASES.get(str(name).lower(), str(name).lower())
    if key not in _REGISTRY:
        raise InputError(
            f"unknown activation {name!r}",
            expected=f"one of {', '.join(_REGISTRY)}",
            hint="check the spelling, or register a new Activation row in isoscope/activations.py",
        )
    return _REGISTRY[key]


@functools.lru_cache(maxsize=None)
def _numpy_pair(name: str):
    act = _REGISTRY[name]
    phi = jax.jit(lambda h: act.fn(h))
    dphi = jax.jit(act.derivative)

    def phi_np(h):
        return np.asarray(phi(jnp.asarray(h, dtype=jnp.float64)))

    def dphi_np(h):
        return np.asarray(dphi(jnp.asarray(h, dtype=jnp.float64)))

    return phi_np, dphi_np
