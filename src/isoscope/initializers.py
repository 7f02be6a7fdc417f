"""Weight and bias initializers: ``(key, shape, dtype) -> Array`` factories.

Shapes follow ``h = W x``: a weight matrix has shape ``(..., fan_out, fan_in)``; leading axes
are a stack of independent matrices (one per layer).  Each factory takes the *scale*
(sigma_w or sigma_b, a standard deviation times sqrt(fan_in) for weights), never its square.

The unit samplers are jit-compiled once per shape and dtype; the scale multiplies outside the
compiled function, so sampling at a new sigma does not recompile anything.  Inside
:func:`reused_draws` the unit draws themselves are kept (keyed by sampler, PRNG key, shape and
dtype), so designs that differ only in their scales, such as the points of a sigma_w x sigma_b
sweep at one seed, sample each matrix once; the scaled arrays are bit-identical to fresh ones.
"""

from __future__ import annotations

import contextlib
import functools
import math
from collections import OrderedDict
from collections.abc import Callable, Iterator
from typing import Protocol

import jax
import jax.numpy as jnp
import numpy as np

from isoscope.errors import InputError, did_you_mean, hints

__all__ = [
    "Initializer",
    "gaussian",
    "orthogonal",
    "uniform",
    "gaussian_bias",
    "delta_orthogonal",
    "conv_kernel",
    "get_initializer",
    "initializer_names",
    "reused_draws",
]


class Initializer(Protocol):
    """``(key, shape, dtype) -> Array``: draws one array of the given shape."""

    def __call__(self, key: jax.Array, shape: tuple[int, ...], dtype=jnp.float64) -> jax.Array: ...


def _fans(shape: tuple[int, ...]) -> tuple[int, int]:
    if len(shape) < 2:
        raise InputError(
            f"weight shape {shape} has fewer than 2 axes", expected="(..., fan_out, fan_in)"
        )
    return int(shape[-2]), int(shape[-1])


@functools.partial(jax.jit, static_argnums=(1, 2))
def _unit_normal(key, shape, dtype):
    return jax.random.normal(key, shape, dtype)


@functools.partial(jax.jit, static_argnums=(1, 2))
def _unit_uniform(key, shape, dtype):
    return jax.random.uniform(key, shape, dtype, minval=-1.0, maxval=1.0)


class _DrawCache:
    """Least-recently-used store of unit draws, bounded in bytes."""

    def __init__(self, max_bytes: int):
        self.max_bytes, self.bytes = max_bytes, 0
        self.items: OrderedDict[tuple, jax.Array] = OrderedDict()
        self.hits = self.misses = 0

    def get(self, kind: str, sampler: Callable, key, shape: tuple[int, ...], dtype) -> jax.Array:
        data = (
            jax.random.key_data(key)
            if jax.dtypes.issubdtype(key.dtype, jax.dtypes.prng_key)
            else key
        )
        try:
            raw = np.asarray(data).tobytes()
        except jax.errors.TracerArrayConversionError:  # inside a trace: no concrete key
            return sampler(key, shape, dtype)
        ident = (kind, raw, shape, np.dtype(dtype).str)
        if ident in self.items:
            self.hits += 1
            self.items.move_to_end(ident)
            return self.items[ident]
        self.misses += 1
        value = sampler(key, shape, dtype)
        size = value.size * value.dtype.itemsize
        if size <= self.max_bytes:
            self.items[ident] = value
            self.bytes += size
            while self.bytes > self.max_bytes:
                _, old = self.items.popitem(last=False)
                self.bytes -= old.size * old.dtype.itemsize
        return value


_CACHE: list[_DrawCache] = []  # the innermost active cache, if any


def _unit(kind: str, sampler: Callable, key, shape: tuple[int, ...], dtype) -> jax.Array:
    """``sampler(key, shape, dtype)``, through the active :func:`reused_draws` cache if any."""
    if _CACHE:
        return _CACHE[-1].get(kind, sampler, key, shape, dtype)
    return sampler(key, shape, dtype)


@contextlib.contextmanager
def reused_draws(max_bytes: int = 2**30) -> Iterator[_DrawCache]:
    """Keep unit draws (Haar matrices, unit normals and uniforms, before scaling) for the block.

    Every initializer multiplies a unit draw by its scale outside the sampler, so two designs
    that differ only in sigma_w, sigma_b or alpha draw the same unit arrays from the same key;
    inside this block the second takes them from memory, and its parameters are bit-identical
    to sampling afresh.  Entries are evicted least-recently-used beyond ``max_bytes``
    (default 1 GiB); an array larger than that is never kept.  Used by the sweep workers
    (:mod:`isoscope.sweep.execute`), whose points of one shape share a seed.

    Yields:
      the cache (``hits``, ``misses`` and ``bytes`` for diagnostics).
    """
    cache = _DrawCache(int(max_bytes))
    _CACHE.append(cache)
    try:
        yield cache
    finally:
        _CACHE.remove(cache)


def _haar(key, shape, dtype):
    """Haar-distributed matrices with orthonormal rows or columns, from Householder vectors.

    The law is that of ``Q diag(sign(diag R))`` for the QR factorisation ``Z = Q R`` of a
    matrix Z with i.i.d. N(0, 1) entries (Mezzadri 2007, sec. 5), built without factorising Z.
    Householder QR of Z (LAPACK geqrf) computes, for column k, a reflector from the working
    vector ``a_k = (H_{k-1} ... H_1 Z)[k:, k]``.  Since ``H_{k-1} ... H_1`` is orthogonal and
    independent of column k of Z, ``a_k`` is i.i.d. N(0, 1) of length ``m - k + 1`` and
    independent of the earlier reflectors (Stewart 1980, SIAM J. Numer. Anal. 17, sec. 3).  So
    drawing ``a_k`` directly (the lower triangle of a Gaussian matrix), forming the reflector
    exactly as LAPACK's dlarfg does::

        beta_k = -sign(alpha) sqrt(alpha^2 + |x|^2),  tau_k = (beta_k - alpha) / beta_k,
        v_k = (1, x / (alpha - beta_k)),               (tau_k = 0, beta_k = alpha if x = 0)

    for ``a_k = (alpha, x)``, and multiplying the reflectors out (LAPACK orgqr,
    ``jax.lax.linalg.householder_product``) gives Q with the same joint law, then
    ``Q diag(sign(beta))`` is Haar.  It skips the factorisation (geqrf): about half the flops
    of a QR and no change in the distribution.
    """
    fan_out, fan_in = shape[-2], shape[-1]
    tall = fan_out >= fan_in
    rows, cols = (fan_out, fan_in) if tall else (fan_in, fan_out)
    # z in its own compiled call: compiled together, XLA fuses the generator into each consumer
    # and draws the numbers more than once (measured at 64 x 512^2: 1.20 s in one, 0.81 s in two)
    q = _haar_from_normal(_unit_normal(key, (*shape[:-2], rows, cols), dtype))
    return q if tall else jnp.swapaxes(q, -1, -2)


def _unit_haar(key, shape, dtype):
    return _haar(key, shape, dtype)


@jax.jit
def _haar_from_normal(z):
    """The Householder construction of :func:`_haar` from the Gaussian matrix z."""
    dtype = z.dtype
    below = jnp.tril(z, -1)  # x_k = z[k+1:, k]
    alpha = jnp.diagonal(z, axis1=-2, axis2=-1)  # first entry of a_k
    x_norm = jnp.sqrt(jnp.sum(below * below, axis=-2))
    nonzero = x_norm > 0  # false only for a length-1 a_k
    positive = alpha >= 0
    beta = jnp.where(positive, -1.0, 1.0).astype(dtype) * jnp.hypot(alpha, x_norm)
    tau = jnp.where(nonzero, (beta - alpha) / beta, 0.0).astype(dtype)
    v = below / jnp.where(nonzero, alpha - beta, 1.0).astype(dtype)[..., None, :]
    signs = jnp.where(nonzero, jnp.where(positive, -1.0, 1.0), jnp.where(positive, 1.0, -1.0))
    return jax.lax.linalg.householder_product(v, tau) * signs.astype(dtype)[..., None, :]


def gaussian(scale: float = 1.0) -> Initializer:
    """Gaussian weights, ``W_ij ~ N(0, scale^2 / fan_in)``.

    With ``scale = sqrt(2)`` and ReLU this is He et al. 2015 (sec. 2.2); with ``scale = 1``,
    LeCun's fan-in variance.
    """
    scale = float(scale)

    def init(key, shape, dtype=jnp.float64):
        _, fan_in = _fans(shape)
        return _unit("normal", _unit_normal, key, tuple(shape), dtype) * jnp.asarray(
            scale / fan_in**0.5, dtype
        )

    return init


def orthogonal(scale: float = 1.0) -> Initializer:
    """Scaled Haar-orthogonal weights, ``W = scale * Q``.

    Q is Haar on the orthogonal group for square shapes, with orthonormal columns
    (fan_out > fan_in) or rows (fan_out < fan_in) otherwise.  Its singular values all equal
    ``scale``; its mean squared entry is ``scale^2 / max(fan_in, fan_out)``.

    References: Mezzadri 2007, "How to generate random matrices from the classical compact
    groups", Notices AMS 54, sec. 5 (QR with the sign fix); Stewart 1980, "The efficient
    generation of random orthogonal matrices with an application to condition estimators",
    SIAM J. Numer. Anal. 17 (the same law from Householder reflectors, no factorisation).
    """
    scale = float(scale)

    def init(key, shape, dtype=jnp.float64):
        _fans(shape)
        return _unit("haar", _unit_haar, key, tuple(shape), dtype) * jnp.asarray(scale, dtype)

    return init


def uniform(scale: float = 1.0) -> Initializer:
    """Uniform weights on ``[-a, a]`` with the fan-based bound ``a = scale * sqrt(6 / (fan_in + fan_out))``.

    The variance is ``scale^2 * 2 / (fan_in + fan_out)`` (Glorot & Bengio 2010, eq. 16 with a
    gain); for square layers it equals the Gaussian ``scale^2 / fan_in``, so sigma_w keeps its
    meaning across initializers.
    """
    scale = float(scale)

    def init(key, shape, dtype=jnp.float64):
        fan_out, fan_in = _fans(shape)
        bound = scale * (6.0 / (fan_in + fan_out)) ** 0.5
        return _unit("uniform", _unit_uniform, key, tuple(shape), dtype) * jnp.asarray(bound, dtype)

    return init


def gaussian_bias(scale: float = 0.0) -> Initializer:
    """Biases ``b_i ~ N(0, scale^2)`` (scale is sigma_b; zero gives exact zeros)."""
    scale = float(scale)

    def init(key, shape, dtype=jnp.float64):
        return _unit("normal", _unit_normal, key, tuple(shape), dtype) * jnp.asarray(scale, dtype)

    return init


_WEIGHT_INITIALIZERS: dict[str, Callable[[float], Initializer]] = {
    "gaussian": gaussian,
    "orthogonal": orthogonal,
    "uniform": uniform,
}


def initializer_names() -> tuple[str, ...]:
    """Every weight initializer name: the dense ones of :func:`get_initializer` and the
    convolution kernels' ``"delta-orthogonal"`` (:func:`conv_kernel`)."""
    return (*_WEIGHT_INITIALIZERS, "delta-orthogonal")


# ----------------------------------------------------------------------------- convolutions
# A kernel stack has shape (L, *taps, C_in, C_out) (lax.conv_general_dilated's "WIO"/"HWIO"
# layout with a leading layer axis): h[p, o] = sum_{t, i} x[p + t - c, i] K[t, i, o].


def _kernel_fans(shape: tuple[int, ...]) -> tuple[int, int, int]:
    """``(fan_in, fan_out, taps)`` of a kernel stack ``(L, *taps, C_in, C_out)``."""
    if len(shape) < 4:
        raise InputError(
            f"kernel shape {shape} has fewer than 4 axes",
            expected="(layers, *taps, channels_in, channels_out)",
        )
    taps = math.prod(shape[1:-2])
    return int(shape[-2]) * taps, int(shape[-1]) * taps, taps


def delta_orthogonal(scale: float = 1.0) -> Initializer:
    """Delta-orthogonal kernels: every tap zero except the centre, ``K[c, :, :] = scale * H``
    with H Haar-orthogonal (Xiao, Bahri, Sohl-Dickstein, Schoenholz & Pennington 2018, ICML,
    algorithm 1 for equal channel counts).

    With circular padding the layer's operator is then ``x[p, :] -> scale * x[p, :] H`` at
    every position, an orthogonal map on channels x positions times ``scale``, so a stack of
    them has the singular values of a plain orthogonal stack of width ``channels``.
    """
    scale = float(scale)

    def init(key, shape, dtype=jnp.float64):
        _kernel_fans(shape)
        layers, taps, c_in, c_out = shape[0], shape[1:-2], shape[-2], shape[-1]
        h = _unit("haar", _unit_haar, key, (layers, c_in, c_out), dtype)
        centre = tuple(t // 2 for t in taps)
        kernel = jnp.zeros(shape, dtype).at[(slice(None), *centre)].set(h)
        return kernel * jnp.asarray(scale, dtype)

    return init


def _gaussian_kernel(scale: float) -> Initializer:
    """Gaussian kernels ``K ~ N(0, scale^2 / (C_in * taps))`` (the fan-in variance of the
    convolution's rows, He et al. 2015, sec. 2.2)."""

    def init(key, shape, dtype=jnp.float64):
        fan_in, _, _ = _kernel_fans(shape)
        return _unit("normal", _unit_normal, key, tuple(shape), dtype) * jnp.asarray(
            scale / fan_in**0.5, dtype
        )

    return init


def _uniform_kernel(scale: float) -> Initializer:
    """Uniform kernels on ``[-a, a]``, ``a = scale sqrt(6 / (fan_in + fan_out))`` with
    ``fan = channels * taps`` (Glorot & Bengio 2010, eq. 16 with a gain)."""

    def init(key, shape, dtype=jnp.float64):
        fan_in, fan_out, _ = _kernel_fans(shape)
        bound = scale * (6.0 / (fan_in + fan_out)) ** 0.5
        return _unit("uniform", _unit_uniform, key, tuple(shape), dtype) * jnp.asarray(bound, dtype)

    return init


_KERNEL_INITIALIZERS: dict[str, Callable[[float], Initializer]] = {
    "delta-orthogonal": delta_orthogonal,
    "gaussian": _gaussian_kernel,
    "uniform": _uniform_kernel,
}


def conv_kernel(name: str, scale: float) -> Initializer:
    """The convolution-kernel initializer registered under ``name`` at scale sigma_w.

    ``"delta-orthogonal"`` (:func:`delta_orthogonal`), ``"gaussian"`` or ``"uniform"`` with
    the fans of a kernel (channels times taps).

    Raises:
      InputError: for a name without a kernel form (``"orthogonal"`` is a dense matrix) or a
        negative scale.
    """
    key = str(name).lower()
    if key not in _KERNEL_INITIALIZERS:
        raise InputError(
            f"weight initializer {name!r} has no convolution kernel form",
            expected=f"one of {', '.join(_KERNEL_INITIALIZERS)}",
            hint="delta-orthogonal is the orthogonal initializer of a convolution",
        )
    if not scale >= 0:
        raise InputError(
            f"weight scale sigma_w = {scale!r} is negative or not a number",
            expected="a number >= 0",
            hint="give sigma_w as a scale, not a variance",
        )
    return _KERNEL_INITIALIZERS[key](float(scale))


def get_initializer(name: str, scale: float) -> Initializer:
    """The weight initializer registered under ``name``, at the given scale sigma_w.

    Raises:
      InputError: for an unknown name (the message lists the allowed names) or a negative scale.
    """
    key = str(name).lower()
    if key == "delta-orthogonal":
        raise InputError(
            "weight initializer 'delta-orthogonal' is a convolution kernel",
            expected=f"one of {', '.join(_WEIGHT_INITIALIZERS)} for a dense layer",
            hint="use orthogonal for dense layers",
        )
    if key not in _WEIGHT_INITIALIZERS:
        raise InputError(
            f"unknown weight initializer {name!r}",
            expected=f"one of {', '.join(_WEIGHT_INITIALIZERS)}",
            hint=hints(did_you_mean(name, _WEIGHT_INITIALIZERS), "check the spelling"),
        )
    if not scale >= 0:
        raise InputError(
            f"weight scale sigma_w = {scale!r} is negative or not a number",
            expected="a number >= 0",
            hint="give sigma_w as a scale, not a variance",
        )
    return _WEIGHT_INITIALIZERS[key](scale)
