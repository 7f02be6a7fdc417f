"""Measurement routes: how the singular values of one draw's Jacobian are obtained.

A spec chooses one with ``[analysis] route``:

* ``"dense"`` -- J by forward mode (``jax.jacfwd`` as one scan over the layers), then its SVD
  (:mod:`isoscope.jacobian`).  Exact while the singular values span fewer decades than an SVD
  in the dtype resolves (about 13 in float64) and J fits in memory (N^2 numbers, L N^3 flops).
* ``"deep"`` -- the stabilised product ``U D T`` updated by pivoted QR at every layer
  (:func:`isoscope.jacobian.stable_log_singular_values`, Loh & Gubernatis 1992; Bai, Lee, Li &
  Xu 2011): ln s to full accuracy however far the singular values spread, for stacks with
  per-layer structure (plain, residual, convolution).
* ``"matrix-free"`` -- J never formed: products J v and J^T u by ``jax.jvp``/``jax.vjp``,
  the spectral measure of ``J^T J`` by stochastic Lanczos quadrature
  (:mod:`isoscope.matrix_free`; Ubaru, Chen & Saad 2017), memory the weights plus a few
  vectors.
* ``"auto"`` (default) -- :func:`choose_route` picks by size, and a dense measurement whose
  spectrum leaves what the dense route resolves is measured again on the deep route
  (:func:`needs_deep`).

Every route gives, per draw, one row of ``ln s`` for :class:`~isoscope.spectrum.Spectrum`.
"""

from __future__ import annotations

import functools
import time
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from isoscope import jacobian as jac
from isoscope import matrix_free
from isoscope.network import Network
from isoscope.spec import MATRIX_FREE_WIDTH, Spec
from isoscope.spectrum import Spectrum, quadrature_log_s

__all__ = [
    "DEEP_DEPTH",
    "MATRIX_FREE_WIDTH",
    "RELIABLE_DIGITS",
    "Draw",
    "choose_route",
    "measure_draw",
    "needs_deep",
    "PartialLogSpectra",
]

# Beyond this depth "auto" takes the deep route for a stack with per-layer structure: the
# singular values of most designs then span more decades than a float64 SVD resolves, and
# the deep route costs a small multiple of the dense pass (benchmarks/scale.py).  Common
# practice of this project, no source: the dense route is kept where it is exact and cheaper.
DEEP_DEPTH = 256

# Relative accuracy of an SVD is about n * eps * s_max: below 10^-(digits) of the largest,
# small singular values are noise.  Digits usable per dtype (common practice, no source:
# a few digits short of the dtype's, to leave room for the n factor).
RELIABLE_DIGITS = {"float64": 13.0, "float32": 5.0}


def choose_route(spec: Spec, has_layers: bool) -> tuple[str, str]:
    """``(route, reason)`` for a spec; ``has_layers`` says whether the network exposes its
    per-layer structure (built-in stacks do, a user's factory does not).

    A route set in the spec is kept.  ``"auto"``: matrix-free when the width exceeds
    ``MATRIX_FREE_WIDTH`` (the dense Jacobian is N^2 numbers and its SVD N^3 flops), deep when
    a stack with per-layer structure is deeper than ``DEEP_DEPTH``, dense otherwise.
    """
    a, n = spec.analysis, spec.network
    if a.route != "auto":
        return a.route, "set in the spec (analysis.route)"
    if n.width > MATRIX_FREE_WIDTH:
        return "matrix-free", (
            f"auto: width {n.width} > {MATRIX_FREE_WIDTH}, where the dense "
            "Jacobian (N^2 numbers) and its SVD (N^3) cost more than Lanczos "
            "quadrature with J v and J^T u products"
        )
    if has_layers and n.depth is not None and n.depth > DEEP_DEPTH:
        return "deep", (
            f"auto: depth {n.depth} > {DEEP_DEPTH}, where singular values usually "
            "span more decades than a dense SVD resolves; the stabilised product "
            "keeps every ln s exact"
        )
    return "dense", "auto: the dense Jacobian fits and its SVD resolves the spectrum"


def needs_deep(spectrum: Spectrum | None, fault: jac.Fault | None) -> str | None:
    """Why a dense measurement should be repeated on the deep route (``None`` when it need
    not): the Jacobian overflowed the dtype, or its singular values span more decades than an
    SVD in the dtype resolves (:data:`RELIABLE_DIGITS`)."""
    if fault is not None and fault.stage == "jacobian":
        return f"the dense Jacobian overflowed ({fault.detail})"
    if spectrum is not None:
        digits = RELIABLE_DIGITS.get(spectrum.dtype, 13.0)
        if spectrum.log10_condition > digits:
            return (
                f"the dense spectrum spans {spectrum.log10_condition:.1f} decades, more than "
                f"the {digits:.0f} an SVD in {spectrum.dtype} resolves"
            )
    return None


class PartialLogSpectra(NamedTuple):
    """``ln s`` of the partial products ``J_l ... J_1`` at the profile depths (deep route).

    Attributes:
      depths: the depths l.
      log_s: ``(len(depths), N)`` float64, rows decreasing.
    """

    depths: np.ndarray
    log_s: np.ndarray


class Draw(NamedTuple):
    """One draw measured on a route.

    Attributes:
      log_s: ``(N,)`` ln s (decreasing), or ``None`` when the measurement overflowed.
      fault: where it overflowed, if it did.
      partial: the partial products' spectra at the profile depths (first draw only; ``None``
        on the matrix-free route), with ``depths`` and ``log_s``.
      quadrature: the matrix-free route's quadrature summary (``None`` elsewhere).
      seconds: wall time of the route's stages.
    """

    log_s: np.ndarray | None
    fault: jac.Fault | None
    partial: Any
    quadrature: dict[str, Any] | None
    seconds: dict[str, float]


@functools.cache
def _svd_values():
    return jax.jit(lambda m: jnp.linalg.svd(m, compute_uv=False))


def _fault(network: Network, params, x) -> jac.Fault:
    if network.layer is None:
        return jac.forward_fault(network, params, x) or jac.Fault(
            "jacobian", 0, "the Jacobian is not finite"
        )
    return (
        jac.forward_fault(network, params, x)
        or jac.jacobian_fault(network, params, x)
        or jac.Fault("jacobian", 0, "the Jacobian is not finite")
    )


def _dense(network: Network, params, x, depths, spec: Spec, key) -> Draw:
    """J by forward mode (with the partial products at ``depths`` when given), then its SVD."""
    t = time.perf_counter()
    profiled = jac.profiled_jacobian(network, params, x, depths) if depths is not None else None
    jmat = (
        profiled.jacobian if profiled is not None else jac.dense_jacobian(network, params, x)
    ).block_until_ready()
    seconds = {"jacobian": time.perf_counter() - t}
    if not bool(jnp.all(jnp.isfinite(jmat))):
        return Draw(None, _fault(network, params, x), None, None, seconds)
    t = time.perf_counter()
    if profiled is not None:
        partial = jac.partial_spectra(profiled)
        s = partial.singular_values(-1)  # the last kept depth is the full depth
        seconds["profile"] = time.perf_counter() - t
    else:
        partial, s = None, np.asarray(_svd_values()(jmat))
        seconds["svd"] = time.perf_counter() - t
    with np.errstate(divide="ignore"):
        return Draw(np.log(np.asarray(s, dtype=np.float64)), None, partial, None, seconds)


def _deep(network: Network, params, x, depths, spec: Spec, key) -> Draw:
    """ln s by the stabilised product, and at each profile depth the same for ``J_l ... J_1``."""
    fault = jac.forward_fault(network, params, x)
    if fault is not None:
        return Draw(None, fault, None, None, {})
    t = time.perf_counter()
    if depths is None:
        log_s = np.asarray(jac.stable_log_singular_values(network, params, x).log_s)
        return Draw(log_s, None, None, None, {"jacobian": time.perf_counter() - t})
    rows = np.asarray(
        jac.stable_log_singular_values(network, params, x, depths=depths).partial_log_s
    )
    seconds = {"jacobian": time.perf_counter() - t}
    return Draw(rows[-1].copy(), None, PartialLogSpectra(np.asarray(depths), rows), None, seconds)


def _matrix_free(network: Network, params, x, depths, spec: Spec, key) -> Draw:
    """The spectral measure of ``J^T J`` by stochastic Lanczos quadrature, as N quantile
    values of ln s (:func:`~isoscope.spectrum.quadrature_log_s`)."""
    fault = jac.forward_fault(network, params, x)
    if fault is not None:
        return Draw(None, fault, None, None, {})
    t = time.perf_counter()
    a = spec.analysis
    rule = matrix_free.lanczos_quadrature(
        network, params, x, key, probes=a.probes, steps=a.lanczos_steps
    )
    nodes, weights = np.asarray(rule.nodes, np.float64), np.asarray(rule.weights, np.float64)
    if not (np.all(np.isfinite(nodes)) and np.all(np.isfinite(weights))):
        return Draw(
            None,
            jac.Fault(
                "jacobian", 0, f"the Lanczos quadrature is not finite in {np.asarray(x).dtype}"
            ),
            None,
            None,
            {"jacobian": time.perf_counter() - t},
        )
    out_dim = int(jax.eval_shape(network.apply, params, x).shape[0])
    n = min(network.width, out_dim)
    log_s = quadrature_log_s(
        nodes, weights / weights.sum(axis=1, keepdims=True) / nodes.shape[0], n
    )
    summary = matrix_free.quadrature_summary(rule)
    return Draw(log_s, None, None, summary, {"jacobian": time.perf_counter() - t})


_ROUTES = {"dense": _dense, "deep": _deep, "matrix-free": _matrix_free}


def measure_draw(route: str, network: Network, params, x, depths, spec: Spec, key) -> Draw:
    """One draw on ``route`` (``"dense"``, ``"deep"`` or ``"matrix-free"``).

    Args:
      route: the route.
      network, params, x: the draw.
      depths: profile depths to keep the partial products at (first draw of a stack with
        per-layer structure), or ``None``.
      spec: the spec (matrix-free settings ``analysis.probes`` and ``analysis.lanczos_steps``).
      key: the draw's PRNG key for the route's own randomness (Lanczos probe vectors).
    """
    return _ROUTES[route](network, params, x, depths, spec, key)
