"""Networks as pure JAX functions.

A :class:`Network` is a pair of pure functions ``init(key) -> params`` and
``apply(params, x) -> y`` plus, for the built-in families, the per-layer structure that the
Jacobian module needs (one layer's function, a trace of pre-activations).

Built-in stacks keep their parameters stacked along a leading layer axis
(``W: (L, N, N)``, ``b: (L, N)``) and run the layers through ``jax.lax.scan``, so compile
time does not grow with depth.  The forward functions are cached per (family, activation object; a leaky ReLU per slope):
two networks of the same family and activation share one function object, and so one
compiled Jacobian per input shape; new parameters or new sigma values never recompile.
The residual branch scale alpha is a parameter leaf for the same reason.

Model (see docs/architecture.md):
  plain:     h^l = W^l x^{l-1} + b^l,  x^l = phi(h^l)
  residual:  h^l = W^l x^{l-1} + b^l,  x^l = x^{l-1} + alpha * phi(h^l)
  conv1d/2d: h^l = K^l * x^{l-1} + b^l, x^l = phi(h^l), with * a circular convolution over
             the positions (kernels ``K: (L, *taps, C, C)``, biases ``b: (L, C)``); x is
             held flat, channel-last, ``x[p * C + c]``, so the Jacobian is over
             channels x positions.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp

from isoscope.activations import Activation, get_activation
from isoscope.errors import InputError
from isoscope.initializers import conv_kernel, gaussian_bias, get_initializer

__all__ = ["Network", "plain_stack", "residual_stack", "conv_stack", "custom_network", "FAMILIES"]

Params = Any  # a pytree of arrays
FAMILIES = ("plain", "residual", "conv1d", "conv2d", "python")


@dataclasses.dataclass(frozen=True)
class Network:
    """A network at initialization, as pure functions.

    Attributes:
      init: ``init(key, dtype) -> params``.
      apply: ``apply(params, x) -> y`` for one input ``x`` of shape ``(width,)``.
      width: input dimension N (built-in stacks: also every hidden width).
      depth: number of weight layers L (``None`` when unknown: a user's black box).
      family: ``"plain"``, ``"residual"`` or ``"python"``.
      activation: the activation of built-in stacks (``None`` for a black box).
      layer: ``layer(layer_params, x) -> x'`` for built-in stacks; ``layer_params`` is one
        slice of the stacked parameters (see :func:`layer_slices`).
      trace: ``trace(params, x) -> (y, h)`` with the pre-activations ``h: (L, N)``.
      weights, sigma_w, sigma_b, alpha: the initialization the stack was built with.
      channels, size, kernel: a convolution stack's channels, spatial size (a tuple) and
        kernel size (``None`` for dense stacks).
    """

    init: Callable[[jax.Array, Any], Params]
    apply: Callable[[Params, jax.Array], jax.Array]
    width: int
    depth: int | None
    family: str
    activation: Activation | None = None
    layer: Callable[[Params, jax.Array], jax.Array] | None = None
    trace: Callable[[Params, jax.Array], tuple[jax.Array, jax.Array]] | None = None
    weights: str | None = None
    sigma_w: float | None = None
    sigma_b: float | None = None
    alpha: float | None = None
    channels: int | None = None
    size: tuple[int, ...] | None = None
    kernel: int | None = None

    def layer_slices(self, params: Params) -> Params:
        """Per-layer parameters as a pytree with a leading layer axis (for ``lax.scan``)."""
        if self.layer is None:
            raise InputError(
                "this network has no per-layer structure (a user's black box)",
                expected="a built-in family (plain, residual, conv1d, conv2d)",
                hint="use the dense Jacobian route for black-box networks",
            )
        return _slices(params)


def _slices(params: Params) -> Params:
    if "K" in params:
        return {"K": params["K"], "b": params["b"]}
    return {
        "W": params["W"],
        "b": params["b"],
        "alpha": jnp.broadcast_to(params["alpha"], params["b"].shape[:1]),
    }


def _check_size(name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
        raise InputError(
            f"{name} = {value!r} is not a positive whole number",
            expected=f"an integer {name} >= 1",
            key=name,
        )
    return value


def _check_scale(name: str, value: Any) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} = {value!r} is not a number", expected="a number >= 0", key=name
        ) from None
    if not v >= 0 or v == float("inf"):
        raise InputError(
            f"{name} = {value!r} is negative or not finite",
            expected="a finite number >= 0 (a scale: standard deviation times sqrt(fan_in))",
            key=name,
        )
    return v


# ----------------------------------------------------------------------------- forward passes
def _layer_fns(family: str, phi: Callable) -> tuple[Callable, Callable]:
    """``(layer(p, x), output(p, x, h))``: one layer, and its output given ``h = W x + b``."""
    if family == "plain":

        def output(p, x, h):
            return phi(h)
    else:

        def output(p, x, h):
            return x + p["alpha"] * phi(h)

    def layer(p, x):
        return output(p, x, p["W"] @ x + p["b"])

    return layer, output


@functools.cache
def _forward(family: str, activation: Activation):
    """Cached ``(layer, apply, trace)`` for a family and activation (one object per key; the
    registry returns one Activation per leaky slope, so slopes never share a function)."""
    phi = activation.fn
    layer, output = _layer_fns(family, phi)

    def step(x, p):
        h = p["W"] @ x + p["b"]
        return output(p, x, h), h

    def trace(params, x):
        y, hs = jax.lax.scan(step, x, _slices(params))
        return y, hs

    def apply(params, x):
        return trace(params, x)[0]

    return layer, apply, trace


def _stack(
    family: str,
    width: int,
    depth: int,
    activation: str | Activation,
    weights: str,
    sigma_w: float,
    sigma_b: float,
    alpha: float,
) -> Network:
    width, depth = _check_size("width", width), _check_size("depth", depth)
    sigma_w, sigma_b = _check_scale("sigma_w", sigma_w), _check_scale("sigma_b", sigma_b)
    alpha = float(alpha)
    act = get_activation(activation)
    w_init = get_initializer(weights, sigma_w)
    b_init = gaussian_bias(sigma_b)
    layer, apply, trace = _forward(family, act)

    def init(key: jax.Array, dtype=jnp.float64) -> Params:
        kw, kb = jax.random.split(key)
        return {
            "W": w_init(kw, (depth, width, width), dtype),
            "b": b_init(kb, (depth, width), dtype),
            "alpha": jnp.asarray(alpha, dtype),
        }

    return Network(
        init=init,
        apply=apply,
        width=width,
        depth=depth,
        family=family,
        activation=act,
        layer=layer,
        trace=trace,
        weights=str(weights).lower(),
        sigma_w=sigma_w,
        sigma_b=sigma_b,
        alpha=alpha if family == "residual" else None,
    )


def plain_stack(
    width: int,
    depth: int,
    activation: str | Activation = "tanh",
    *,
    weights: str = "orthogonal",
    sigma_w: float = 1.0,
    sigma_b: float = 0.0,
) -> Network:
    """A plain stack ``x^l = phi(W^l x^{l-1} + b^l)``, l = 1..depth, of constant width.

    Args:
      width: N, the width of every layer (and of the input).
      depth: L, the number of weight layers.
      activation: a registry name or an :class:`~isoscope.activations.Activation`.
      weights: ``"orthogonal"`` (``W = sigma_w Q``), ``"gaussian"`` (``N(0, sigma_w^2/N)``)
        or ``"uniform"``.
      sigma_w, sigma_b: weight and bias scales.

    Returns:
      A :class:`Network`; its Jacobian is ``prod_{l=L..1} diag(phi'(h^l)) W^l``
      (Pennington, Schoenholz & Ganguli 2017, sec. 2).
    """
    return _stack("plain", width, depth, activation, weights, sigma_w, sigma_b, 0.0)


def residual_stack(
    width: int,
    depth: int,
    activation: str | Activation = "relu",
    *,
    weights: str = "gaussian",
    sigma_w: float = 1.0,
    sigma_b: float = 0.0,
    alpha: float = 1.0,
) -> Network:
    """A residual stack ``x^l = x^{l-1} + alpha * phi(W^l x^{l-1} + b^l)``.

    Its Jacobian is ``prod_l (I + alpha diag(phi'(h^l)) W^l)`` (Tarnowski et al. 2019, eqs. 1-2);
    keeping it near an isometry needs ``alpha^2 sigma_w^2`` of order 1/L.
    """
    return _stack("residual", width, depth, activation, weights, sigma_w, sigma_b, alpha)


@functools.cache
def _conv_forward(size: tuple[int, ...], activation: Activation):
    """Cached ``(layer, apply, trace)`` of a circular convolution stack on ``size`` positions.

    One layer pads the positions periodically by ``(k - 1) / 2`` on each side
    (``jnp.pad(mode="wrap")``) and correlates with ``lax.conv_general_dilated`` at VALID
    padding, so ``h[p, o] = sum_{t, i} x[(p + t - c) mod size, i] K[t, i, o] + b[o]``.
    """
    phi, dims = activation.fn, len(size)
    numbers = ("NWC", "WIO", "NWC") if dims == 1 else ("NHWC", "HWIO", "NHWC")

    def pre(p, x):
        k = p["K"]
        image = x.reshape((1, *size, k.shape[-1]))
        pad = [(0, 0)] + [((t - 1) // 2, (t - 1) // 2) for t in k.shape[:-2]] + [(0, 0)]
        out = jax.lax.conv_general_dilated(
            jnp.pad(image, pad, mode="wrap"),
            k,
            window_strides=(1,) * dims,
            padding="VALID",
            dimension_numbers=numbers,
        )
        return (out + p["b"]).reshape(-1)

    def layer(p, x):
        return phi(pre(p, x))

    def step(x, p):
        h = pre(p, x)
        return phi(h), h

    def trace(params, x):
        return jax.lax.scan(step, x, _slices(params))

    def apply(params, x):
        return trace(params, x)[0]

    return layer, apply, trace


def conv_stack(
    dims: int,
    channels: int,
    size,
    kernel: int,
    depth: int,
    activation: str | Activation = "tanh",
    *,
    weights: str = "delta-orthogonal",
    sigma_w: float = 1.0,
    sigma_b: float = 0.0,
) -> Network:
    """A stack of circular convolutions ``x^l = phi(K^l * x^{l-1} + b^l)`` over 1 or 2
    spatial dimensions, ``channels`` in and out at every layer.

    Args:
      dims: 1 (conv1d) or 2 (conv2d).
      channels: C.
      size: positions (an int, square for 2-d, or a tuple of ``dims`` ints).
      kernel: the odd kernel size k (k taps per spatial axis), at most every size.
      depth: L.
      activation: a registry name or an Activation.
      weights: ``"delta-orthogonal"``, ``"gaussian"`` or ``"uniform"``
        (:func:`~isoscope.initializers.conv_kernel`).
      sigma_w, sigma_b: weight and bias scales (bias per channel, shared by the positions).

    Returns:
      A :class:`Network` of width ``C * prod(size)``; its Jacobian is
      ``prod_l D^l K^l`` with ``K^l`` the block-circulant operator of layer l's kernel
      (Xiao et al. 2018, ICML, sec. 2).
    """
    if dims not in (1, 2):
        raise InputError(f"dims = {dims!r}", expected="1 (conv1d) or 2 (conv2d)")
    size = (size,) * dims if isinstance(size, int) and not isinstance(size, bool) else tuple(size)
    if len(size) != dims:
        raise InputError(f"size = {size!r} has {len(size)} axes", expected=f"{dims} spatial sizes")
    size = tuple(_check_size("size", s) for s in size)
    channels, depth = _check_size("channels", channels), _check_size("depth", depth)
    kernel = _check_size("kernel", kernel)
    if kernel % 2 == 0 or kernel > min(size):
        raise InputError(
            f"kernel = {kernel} with size {size}",
            expected="an odd kernel size no larger than every spatial size",
            key="kernel",
        )
    sigma_w, sigma_b = _check_scale("sigma_w", sigma_w), _check_scale("sigma_b", sigma_b)
    act = get_activation(activation)
    k_init = conv_kernel(weights, sigma_w)
    b_init = gaussian_bias(sigma_b)
    layer, apply, trace = _conv_forward(size, act)
    shape = (depth, *(kernel,) * dims, channels, channels)

    def init(key: jax.Array, dtype=jnp.float64) -> Params:
        kk, kb = jax.random.split(key)
        return {"K": k_init(kk, shape, dtype), "b": b_init(kb, (depth, channels), dtype)}

    width = channels * math.prod(size)
    return Network(
        init=init,
        apply=apply,
        width=width,
        depth=depth,
        family="conv1d" if dims == 1 else "conv2d",
        activation=act,
        layer=layer,
        trace=trace,
        weights=str(weights).lower(),
        sigma_w=sigma_w,
        sigma_b=sigma_b,
        channels=channels,
        size=size,
        kernel=kernel,
    )


def custom_network(
    init: Callable[[jax.Array, Any], Params],
    apply: Callable[[Params, jax.Array], jax.Array],
    width: int,
    depth: int | None = None,
) -> Network:
    """Wrap a user's pure ``(init, apply)`` pair as a black-box :class:`Network`.

    ``init(key, dtype)`` returns the parameters in that dtype, ``apply(params, x)`` maps one
    input of shape ``(width,)`` to one output vector.  The dense and matrix-free routes apply
    (there is no per-layer structure for the deep route).  Pass the same ``apply`` object for
    every draw so that the Jacobian compiles once.
    """
    if not callable(init) or not callable(apply):
        raise InputError(
            "init and apply must be callables", expected="init(key, dtype) and apply(params, x)"
        )
    return Network(
        init=init, apply=apply, width=_check_size("width", width), depth=depth, family="python"
    )
