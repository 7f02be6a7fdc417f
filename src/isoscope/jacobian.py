"""Input-output Jacobians of networks: exact dense route, per-layer routes.

Routes (each a pure function of ``(network, params, x)``):

* :func:`dense_jacobian` -- ``J = dy/dx`` by ``jax.jacfwd``, jit-compiled once per
  ``(apply, shapes, dtype)``.  Forward mode pushes N tangents through every layer, so a stack
  of L square layers costs about ``2 L N^3`` flops: the price of L matrix products.
* :func:`layer_product` -- the same J as an explicit product of per-layer Jacobians
  ``J_l = d x^l / d x^{l-1}`` (each by ``jax.jacfwd`` of one layer).  An independent route for
  tests, and the diagnostic that finds the first layer where J stops being finite.
* :func:`qr_log_singular_values` -- log singular values of very deep products by QR
  accumulation (Benettin et al. 1980): ``Q_t R_t = qr(J_t Q_{t-1})``, ``ln s ~ sum_t ln|diag R_t|``,
  which never forms J and so never over- or underflows.

The compiled functions are cached on the network's ``apply``/``layer`` objects, which the
built-in families share across networks of one family and activation.
"""

from __future__ import annotations

import functools
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from isoscope.network import Network

__all__ = ["dense_jacobian", "layer_product", "qr_log_singular_values", "forward_fault",
           "jacobian_fault", "Fault", "trace_count", "partial_singular_values"]

_TRACES = {"count": 0}


def trace_count() -> int:
    """How many times a Jacobian function has been traced (compiled) in this process."""
    return _TRACES["count"]


def _counted(fn):
    @functools.wraps(fn)
    def wrapper(*args):
        _TRACES["count"] += 1  # runs at trace time only: counts compilations
        return fn(*args)
    return wrapper


@functools.lru_cache(maxsize=None)
def _compiled_jacfwd(apply):
    return jax.jit(_counted(jax.jacfwd(apply, argnums=1)))


def dense_jacobian(network: Network, params, x: jax.Array) -> jax.Array:
    """The exact Jacobian ``J_ij = d y_i / d x_j`` at ``x``, by forward-mode autodiff.

    Args:
      network: the network.
      params: its parameters (the dtype of params and x sets the computation's dtype).
      x: one input, shape ``(width,)``.

    Returns:
      ``J`` of shape ``(out_dim, width)``.
    """
    return _compiled_jacfwd(network.apply)(params, x)


class Fault(NamedTuple):
    """Where a computation stopped being finite.

    Attributes:
      stage: ``"forward"`` (a pre-activation overflowed) or ``"jacobian"``.
      layer: first layer (1-based) with a non-finite value.
      detail: one sentence for the user.
    """

    stage: str
    layer: int
    detail: str


@functools.lru_cache(maxsize=None)
def _compiled_trace(trace):
    return jax.jit(trace)


def forward_fault(network: Network, params, x: jax.Array) -> Fault | None:
    """The first layer whose pre-activations are not finite, or ``None``.

    For a black-box network only the output can be checked (layer = 0 means "somewhere").
    """
    if network.trace is None:
        y = network.apply(params, x)
        if not bool(jnp.all(jnp.isfinite(y))):
            return Fault("forward", 0, "the network's output is not finite")
        return None
    _, hs = _compiled_trace(network.trace)(params, x)
    bad = ~np.all(np.isfinite(np.asarray(hs)), axis=-1)
    if bad.any():
        layer = int(np.argmax(bad)) + 1
        return Fault("forward", layer, f"pre-activations overflow at layer {layer} of {network.depth}")
    return None


@functools.lru_cache(maxsize=None)
def _compiled_layer_product(layer):
    layer_jac = jax.jacfwd(layer, argnums=1)

    def run(slices, x):
        def step(carry, p):
            x, t = carry
            t = layer_jac(p, x) @ t
            return (layer(p, x), t), jnp.all(jnp.isfinite(t))
        n = x.shape[0]
        (y, t), finite = jax.lax.scan(step, (x, jnp.eye(n, dtype=x.dtype)), slices)
        return t, finite

    return jax.jit(_counted(run))


def layer_product(network: Network, params, x: jax.Array) -> tuple[jax.Array, np.ndarray]:
    """``J = J_L ... J_1`` from per-layer Jacobians, and whether the partial product is finite.

    Returns:
      ``(J, finite)`` with ``finite[l-1]`` true when ``J_l ... J_1`` has only finite entries.
    """
    t, finite = _compiled_layer_product(network.layer)(network.layer_slices(params), x)
    return t, np.asarray(finite)


def jacobian_fault(network: Network, params, x: jax.Array) -> Fault | None:
    """The first layer at which the partial Jacobian product overflows (built-in stacks)."""
    if network.layer is None:
        return Fault("jacobian", 0, "the Jacobian is not finite")
    _, finite = layer_product(network, params, x)
    if finite.all():
        return None
    layer = int(np.argmax(~finite)) + 1
    return Fault("jacobian", layer,
                 f"the Jacobian product overflows at layer {layer} of {network.depth}"
                 f" in {jnp.asarray(x).dtype}")


@functools.lru_cache(maxsize=None)
def _compiled_partial_spectra(layer):
    layer_jac = jax.jacfwd(layer, argnums=1)

    def run(slices, x, keep):
        n = x.shape[0]

        def step(carry, inputs):
            p, wanted = inputs
            x, t = carry
            t = layer_jac(p, x) @ t
            s = jax.lax.cond(wanted, lambda m: jnp.linalg.svd(m, compute_uv=False),
                             lambda m: jnp.zeros(n, m.dtype), t)
            return (layer(p, x), t), s

        _, s = jax.lax.scan(step, (x, jnp.eye(n, dtype=x.dtype)), (slices, keep))
        return s

    return jax.jit(_counted(run))


def partial_singular_values(network: Network, params, x: jax.Array,
                            depths: np.ndarray) -> np.ndarray:
    """Singular values of the partial Jacobians ``J_l ... J_1`` at the requested depths l.

    One pass over the layers (the per-layer product of :func:`layer_product`), with an SVD
    at each requested depth; compiled once per (width, depth, dtype).

    Args:
      network: a built-in stack (with per-layer structure).
      params, x: parameters and input.
      depths: increasing layer counts in ``1..network.depth``.

    Returns:
      ``(len(depths), N)`` singular values, each row decreasing.
    """
    if network.layer is None:
        raise ValueError("partial_singular_values needs a built-in stack with per-layer structure")
    depths = np.asarray(depths, dtype=int)
    keep = np.zeros(network.depth, dtype=bool)
    keep[depths - 1] = True
    s = _compiled_partial_spectra(network.layer)(network.layer_slices(params), x, jnp.asarray(keep))
    return np.asarray(s)[depths - 1]


@functools.lru_cache(maxsize=None)
def _compiled_qr(layer):
    layer_jac = jax.jacfwd(layer, argnums=1)

    def run(slices, x):
        def step(carry, p):
            x, q, logs = carry
            a = layer_jac(p, x) @ q
            q, r = jnp.linalg.qr(a)
            d = jnp.diagonal(r)
            signs = jnp.where(d < 0, -1.0, 1.0).astype(q.dtype)
            return (layer(p, x), q * signs[None, :], logs + jnp.log(jnp.abs(d))), None
        n = x.shape[0]
        init = (x, jnp.eye(n, dtype=x.dtype), jnp.zeros(n, dtype=x.dtype))
        (y, q, logs), _ = jax.lax.scan(step, init, slices)
        return logs

    return jax.jit(_counted(run))


def qr_log_singular_values(network: Network, params, x: jax.Array) -> np.ndarray:
    """Estimates of ``ln s_i`` of the Jacobian by QR accumulation, in decreasing order.

    ``Q_0 = I``; for each layer ``Q_t R_t = qr(J_t Q_{t-1})`` and ``ln s_i ~ sum_t ln |(R_t)_ii|``.
    For long products ``(1/L) sum_t ln|(R_t)_ii|`` converges to the Lyapunov exponents
    (Benettin, Galgani, Giorgilli, Strelcyn 1980); for products of Gaussian matrices each
    factor's ``ln|R_ii|`` is an independent draw with mean ``mu_i`` of Newman 1986 (THEORY.md
    sec. 6).  Exact for the largest-volume directions, a good approximation of ``ln s`` when
    the spectrum is spread over many orders of magnitude, which is where the dense SVD fails.
    """
    logs = _compiled_qr(network.layer)(network.layer_slices(params), x)
    return np.sort(np.asarray(logs))[::-1]
