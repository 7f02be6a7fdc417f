"""Input-output Jacobians of networks: exact dense route, per-layer routes.

Routes (each a pure function of ``(network, params, x)``):

* :func:`dense_jacobian` -- ``J = dy/dx`` by ``jax.jacfwd``, jit-compiled once per
  ``(apply, shapes, dtype)``.  Forward mode pushes N tangents through every layer, so a stack
  of L square layers costs about ``2 L N^3`` flops: the price of L matrix products.
* :func:`layer_product` -- the same J as an explicit product of per-layer Jacobians
  ``J_l = d x^l / d x^{l-1}`` (each by ``jax.jacfwd`` of one layer).  An independent route for
  tests, and the diagnostic that finds the first layer where J stops being finite.
* :func:`profiled_jacobian` -- J by one forward-mode scan that also keeps the partial
  products ``J_l ... J_1`` at chosen depths (the depth profile at no extra pass), and
  :func:`partial_spectra`, their singular values.
* :func:`layer_statistics` -- per layer l, the mean square ``|h^l|^2/N`` of the
  pre-activations and the gain ``||J_l||_F^2 / N`` of that layer's own Jacobian, in closed form
  from one forward trace (no Jacobian is formed).
* :func:`qr_log_singular_values` -- log singular values of very deep products by QR
  accumulation (Benettin et al. 1980): ``Q_t R_t = qr(J_t Q_{t-1})``, ``ln s ~ sum_t ln|diag R_t|``,
  which never forms J and so never over- or underflows.

The compiled functions are cached on the network's ``apply``/``layer`` objects, which the
built-in families share across networks of one family and activation.
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from isoscope.network import Network

__all__ = ["dense_jacobian", "layer_product", "qr_log_singular_values", "forward_fault",
           "jacobian_fault", "Fault", "trace_count", "ProfiledJacobian", "profiled_jacobian",
           "PartialSpectra", "partial_spectra", "LayerStatistics", "layer_statistics"]

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


class ProfiledJacobian(NamedTuple):
    """The Jacobian and the partial products ``T_l = J_l ... J_1`` kept at chosen depths.

    Each kept ``T_l`` is stored as a mantissa matrix and a power of two,
    ``T_l = 2^(exponents[i]) * mantissas[i]`` with ``max |mantissas[i]| in [1/2, 1)``, so a
    partial product far outside the dtype's range (a vanishing or exploding stack) keeps its
    shape; :func:`partial_spectra` gives their singular values.

    Attributes:
      jacobian: ``J = T_L``, shape ``(N, N)`` (under- or overflows exactly where the product does).
      depths: the kept depths l, increasing, in ``1..L``.
      mantissas: ``(len(depths), N, N)``.
      exponents: ``(len(depths),)`` integers.
    """

    jacobian: jax.Array
    depths: np.ndarray
    mantissas: jax.Array
    exponents: jax.Array


def _power_of_two_split(t: jax.Array, dtype) -> tuple[jax.Array, jax.Array]:
    """``t = 2^k m`` with ``max|m|`` in ``[1/2, 1)`` (``k = 0`` for a zero or non-finite t).

    Scaling by a power of two is exact in binary floating point (no rounding unless the result
    leaves the normal range), so carrying ``(m, k)`` instead of t changes no digit of the
    product while it is representable (IEEE 754-2019, sec. 5.3.3 scaleB).
    """
    fi = jnp.finfo(dtype)
    big = jnp.max(jnp.abs(t))
    _, k = jnp.frexp(big)
    k = jnp.where(jnp.isfinite(big) & (big > 0), k, 0)
    k = jnp.clip(k, fi.minexp + 1, fi.maxexp - 1)  # 2^-k stays a normal number
    return t * jnp.ldexp(jnp.ones((), dtype), -k), k


@functools.lru_cache(maxsize=None)
def _compiled_profiled(layer):
    def run(slices, x, slot, count):
        n, dtype = x.shape[0], x.dtype

        def step(carry, inputs):
            p, where = inputs
            x, t, k, buf, exps = carry
            y, t = jax.vmap(lambda v: jax.jvp(lambda u: layer(p, u), (x,), (v,)), in_axes=1,
                            out_axes=(None, 1))(t)
            t, dk = _power_of_two_split(t, dtype)
            k = k + dk
            buf = jax.lax.dynamic_update_index_in_dim(buf, t, where, 0)
            exps = jax.lax.dynamic_update_index_in_dim(exps, k, where, 0)
            return (y, t, k, buf, exps), None

        init = (x, jnp.eye(n, dtype=dtype), jnp.zeros((), jnp.int32),
                jnp.zeros((count + 1, n, n), dtype), jnp.zeros(count + 1, jnp.int32))
        (_, t, k, buf, exps), _ = jax.lax.scan(step, init, (slices, slot))
        return jnp.ldexp(t, k), buf[:count], exps[:count]

    return jax.jit(_counted(run), static_argnums=(3,))


def profiled_jacobian(network: Network, params, x: jax.Array, depths) -> ProfiledJacobian:
    """The Jacobian by one forward-mode pass that also keeps ``T_l = J_l ... J_1`` at ``depths``.

    One ``lax.scan`` over the layers carries the forward state ``x^l`` and the tangent matrix
    ``T_l = (d x^l / d x^0)``: ``T_l = J_l T_{l-1}``, each step the forward-mode
    push of the N tangent columns through layer l (``jax.jvp`` under ``jax.vmap``, which is
    what ``jax.jacfwd`` of the whole stack does), so J costs what :func:`dense_jacobian`
    costs and the partial products come for free.  T is carried as ``2^k m`` (see
    :func:`_power_of_two_split`), which is exact while T is representable and keeps the shape
    of T when it is not.  Compiled once per (layer function, width, depth, dtype, len(depths)).

    Args:
      network: a built-in stack (with per-layer structure).
      params, x: parameters and input.
      depths: increasing layer counts in ``1..network.depth``.

    Returns:
      A :class:`ProfiledJacobian`.
    """
    if network.layer is None:
        raise ValueError("profiled_jacobian needs a built-in stack with per-layer structure")
    depths = np.asarray(depths, dtype=int)
    if depths.size == 0 or np.any(np.diff(depths) <= 0) or depths[0] < 1 or depths[-1] > network.depth:
        raise ValueError(f"depths must increase within 1..{network.depth}, got {depths.tolist()}")
    slot = np.full(network.depth, depths.size, dtype=np.int32)  # unkept layers write a scratch slot
    slot[depths - 1] = np.arange(depths.size, dtype=np.int32)
    j, m, e = _compiled_profiled(network.layer)(network.layer_slices(params), x, jnp.asarray(slot),
                                                int(depths.size))
    return ProfiledJacobian(j, depths, m, e)


class PartialSpectra(NamedTuple):
    """Singular values of the kept partial products, ``s_i(T_l) = 2^(exponents[l]) * s[l, i]``.

    Attributes:
      depths: the depths l.
      s: ``(len(depths), N)`` singular values of the mantissas, rows decreasing, in the
        working dtype.
      exponents: ``(len(depths),)`` the powers of two.
    """

    depths: np.ndarray
    s: np.ndarray
    exponents: np.ndarray

    @property
    def log_s(self) -> np.ndarray:
        """``ln s_i(T_l) = ln s[l, i] + exponents[l] ln 2`` (``-inf`` for exact zeros), in float64."""
        with np.errstate(divide="ignore"):
            return np.log(self.s.astype(np.float64)) + self.exponents[:, None] * math.log(2.0)

    def singular_values(self, row: int) -> np.ndarray:
        """``s(T_l)`` of one row in the working dtype (a power-of-two scaling: exact while in
        range, underflowing to zero as the product itself does)."""
        return np.ldexp(self.s[row], int(self.exponents[row]))


@functools.lru_cache(maxsize=None)
def _batched_svd():
    return jax.jit(lambda m: jnp.linalg.svd(m, compute_uv=False))


def partial_spectra(profiled: ProfiledJacobian) -> PartialSpectra:
    """Singular values of each kept partial product ``T_l = 2^(k_l) m_l`` of a
    :class:`ProfiledJacobian`.

    ``s_i(T_l) = 2^(k_l) s_i(m_l)``: singular values scale with the matrix, and the SVD of the
    mantissa ``m_l`` runs in range, so ``ln s`` is right even where ``T_l`` itself under- or
    overflows.  One batched SVD (LAPACK gesdd, values only).
    """
    s = np.asarray(_batched_svd()(profiled.mantissas))
    return PartialSpectra(profiled.depths, s, np.asarray(profiled.exponents, dtype=np.int64))


class LayerStatistics(NamedTuple):
    """Per-layer numbers of one draw of a built-in stack (arrays of shape ``(L,)``, float64).

    Attributes:
      q: ``q^l = |h^l|^2 / N``, the mean square of layer l's pre-activations.
      gain: ``g^l = ||J_l||_F^2 / N``, the mean squared singular value of layer l's Jacobian.
    """

    q: np.ndarray
    gain: np.ndarray


@functools.lru_cache(maxsize=None)
def _compiled_statistics(trace, family: str, activation):
    def run(params, x):
        _, h = trace(params, x)
        n = h.shape[-1]
        d = activation.derivative(h)                        # phi'(h^l_i), shape (L, N)
        rows = jnp.sum(params["W"] ** 2, axis=-1)           # |W^l_{i,:}|^2
        branch = jnp.sum(d * d * rows, axis=-1) / n         # ||D W||_F^2 / N
        if family == "plain":
            gain = branch
        else:
            a = params["alpha"]
            trace_dw = jnp.sum(d * jnp.diagonal(params["W"], axis1=-2, axis2=-1), axis=-1)
            gain = 1.0 + 2.0 * a * trace_dw / n + a * a * branch
        return jnp.sum(h * h, axis=-1) / n, gain

    return jax.jit(run)


def layer_statistics(network: Network, params, x: jax.Array) -> LayerStatistics:
    """``q^l`` and the per-layer gain ``g^l`` of a built-in stack at ``(params, x)``, exactly.

    One forward trace gives ``h^l`` (:attr:`~isoscope.network.Network.trace`); the gains follow
    without any matrix product or SVD.  With ``D^l = diag(phi'(h^l))`` (phi' by ``jax.grad``, as
    in the Jacobian itself):

    * plain, ``J_l = D^l W^l``:
      ``g^l = (1/N) ||D W||_F^2 = (1/N) sum_i phi'(h^l_i)^2 |W^l_{i,:}|^2``;
    * residual, ``J_l = I + alpha D^l W^l``:
      ``g^l = (1/N) ||I + alpha D W||_F^2 = 1 + 2 alpha tr(D W)/N + alpha^2 ||D W||_F^2/N``
      with ``tr(D W) = sum_i phi'(h^l_i) W^l_{ii}``.

    ``g^l`` is the mean of ``lambda = s^2`` over layer l's own singular values
    (``||A||_F^2 = sum_i s_i^2``), the measured counterpart of ``chi^l = sigma_w^2 E[phi'(h)^2]``
    (Poole et al. 2016, sec. 3).  Computed in the working dtype, returned as float64; a layer
    whose forward pass overflowed gives non-finite entries.  Compiled once per (family,
    activation, width, depth, dtype).
    """
    if network.trace is None or network.family not in ("plain", "residual"):
        raise ValueError("layer_statistics needs a built-in stack (plain or residual)")
    q, g = _compiled_statistics(network.trace, network.family, network.activation)(params, x)
    return LayerStatistics(np.asarray(q, dtype=np.float64), np.asarray(g, dtype=np.float64))


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
    factor's ``ln|R_ii|`` is an independent draw with mean ``mu_i`` of Newman 1986
    (Commun. Math. Phys. 103).  Exact for the largest-volume directions, a good approximation of ``ln s`` when
    the spectrum is spread over many orders of magnitude, which is where the dense SVD fails.
    """
    logs = _compiled_qr(network.layer)(network.layer_slices(params), x)
    return np.sort(np.asarray(logs))[::-1]
