"""What a run of ``analyze`` will cost, estimated before anything is allocated.

Memory (bytes), with ``b`` the bytes of one number of the dtype (8 for float64, 4 for
float32), N the width, L the depth and D the number of draws:

* parameters ``P = b (L N^2 + L N + 1)``: the stacked weights ``W: (L, N, N)``, biases
  ``b: (L, N)`` and the branch scale ``alpha`` (equal to the ``nbytes`` of ``network.init``);
* two sets of parameters live at once (the first draw is kept for the depth profile) plus the
  sampling transient of the next draw: the unit draw ``Z: (L, N, N)`` and its scaled copy, and
  for orthogonal weights also the factor ``R`` of its QR (Mezzadri 2007, sec. 5):
  ``2 P + 2 P`` (Gaussian, uniform) or ``2 P + 3 P`` (orthogonal).  Measured on this design
  (width 128, depth 4000, 2 draws, float64, P = 528 MB): peak resident memory 1.98 GB above
  the process's start for Gaussian weights (formula 2.11 GB), 1.96 GB for orthogonal ones
  (formula 2.64 GB);
* the Jacobian by forward mode: ``N`` tangents of length ``N`` pushed through each layer of the
  scan, about four ``N x N`` arrays live at once (carry, ``W`` times carry, the ``phi'``
  scaling, the result ``J``): ``4 b N^2``;
* the SVD without vectors: a copy of J and LAPACK's workspace, ``2 b N^2``;
* the depth profile: up to 8 partial products ``J_l ... J_1``, ``8 b N^2``;
* the pooled singular values kept in float64, their sorted copy, ``ln s`` and the zero mask:
  ``(3 * 8 + 1) D N``;
* the Python, NumPy and JAX runtime itself, 300 MB (measured: 204 MB resident after
  ``import isoscope``, plus the compiled functions).

The deep route keeps a frame U, the factor T and the layer's product (about ``6 b N^2``,
counted as the dense Jacobian's ``4 + 2``).  The matrix-free route forms no N x N matrix: its
Lanczos basis holds ``(steps + 2) N`` numbers per probe, and the weights are sampled and kept
once (``P`` plus one layer's transient, as :func:`isoscope.initializers` samples them layer by
layer).  A convolution stack's parameters are its kernels, ``L k^d C^2`` numbers, and its
"width" N is channels x positions.  A user's factory's parameters are not known before it runs:
they are not counted (the estimate covers the Jacobian side only).

Time (seconds) counts floating-point operations over a rate measured on the spot (one
matrix product in NumPy): per draw, the forward-mode Jacobian ``2 L N^3`` (L products of
N x N matrices), the SVD about ``(8/3) N^3`` (Golub & Van Loan, *Matrix Computations*, 4th ed.,
sec. 8.6, bidiagonalisation), and for orthogonal weights the QR of each layer about
``(4/3) N^3 + (4/3) N^3`` (Householder QR and forming Q, ibid. sec. 5.2).  It is a lower
bound (theory, the depth profile, compilation and batched QR run far below the matrix-product
rate: the orthogonal design above took minutes against an estimate of a second), shown in the
refusal message as "at least", never used as a limit.

The comparison is with the memory the kernel reports available (``MemAvailable`` of
``/proc/meminfo``; ``os.sysconf`` pages elsewhere): a run whose estimate exceeds it is refused
before it starts, because XLA would otherwise die midway asking for the memory.
"""

from __future__ import annotations

import os
import time
from typing import NamedTuple

from isoscope.errors import InputError

__all__ = ["Budget", "estimate", "available_memory", "check"]

_BYTES = {"float64": 8, "float32": 4}
_PROFILE_POINTS = 8
_RUNTIME_BYTES = 300 * 10**6


class Budget(NamedTuple):
    """Estimated cost of one analysis.

    Attributes:
      params_bytes: one set of parameters (weights, biases, alpha).
      jacobian_bytes: one Jacobian ``N x N``.
      singular_values_bytes: the pooled singular values ``D x N`` in float64.
      peak_bytes: the estimated peak (the module formula).
      flops: floating-point operations of the measurement.
      seconds: ``flops`` over the measured matrix-product rate (a lower bound).
    """

    params_bytes: int
    jacobian_bytes: int
    singular_values_bytes: int
    peak_bytes: int
    flops: float
    seconds: float


def _flop_rate() -> float:
    """Floating-point operations per second of one 256 x 256 float64 matrix product (best of 3)."""
    import numpy as np

    a = np.ones((256, 256))
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        a @ a
        best = min(best, time.perf_counter() - t)
    return 2 * 256**3 / max(best, 1e-9)


def estimate(spec, rate: float | None = None) -> Budget:
    """The cost of ``analyze(spec)`` by the formulas of the module docstring.

    Args:
      spec: a validated :class:`~isoscope.spec.Spec`.
      rate: floating-point operations per second (default: measured now).
    """
    from isoscope.routes import choose_route
    from isoscope.spec import CONV_FAMILIES

    net, d = spec.network, spec.analysis.inputs
    n, L = net.width, net.depth or 0
    b = _BYTES[spec.analysis.dtype]
    route, _ = choose_route(spec, net.family != "python")
    if net.family == "python":
        params = 0
    elif net.family in CONV_FAMILIES:
        params = b * (L * net.kernel ** len(net.size) * net.channels**2 + L * net.channels + 1)
    else:
        params = b * (L * n * n + L * n + 1)
    dense_weights = net.family in ("plain", "residual")
    transient = (
        (3 if spec.init.weights == "orthogonal" else 2) * params if dense_weights else params
    )
    jacobian = b * n * n
    singular = 8 * d * n
    if route == "matrix-free":
        layer = params // max(L, 1)
        vectors = b * (spec.analysis.lanczos_steps + 2) * n * spec.analysis.probes
        peak = params + 3 * layer + vectors + (3 * 8 + 1) * d * n + _RUNTIME_BYTES
        per_draw = (
            spec.analysis.probes
            * spec.analysis.lanczos_steps
            * (4.0 * L * n * n + 2.0 * spec.analysis.lanczos_steps * n)
        )
    else:
        peak = (
            2 * params
            + transient
            + (4 + 2 + _PROFILE_POINTS) * jacobian
            + (3 * 8 + 1) * d * n
            + _RUNTIME_BYTES
        )
        per_draw = 2.0 * L * n**3 + (8 / 3) * n**3
        if route == "deep":
            per_draw += L * (4 / 3) * n**3  # a QR of the frame at every layer
    if dense_weights and spec.init.weights == "orthogonal":
        per_draw += L * (8 / 3) * n**3
    flops = d * per_draw
    rate = _flop_rate() if rate is None else rate
    return Budget(params, jacobian, singular, peak, flops, flops / rate)


def available_memory() -> int | None:
    """Bytes the kernel reports available (``MemAvailable``), or None when unknown."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None


def _size(nbytes: float) -> str:
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if nbytes >= scale:
            return f"{nbytes / scale:.3g} {unit}"
    return f"{nbytes:.0f} B"


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.2g} s"
    if seconds < 7200:
        return f"{seconds / 60:.2g} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.2g} h"
    return f"{seconds / 86400:.3g} days"


def check(spec, available: int | None = None) -> Budget:
    """Refuse a run whose estimated peak memory exceeds the available memory.

    Args:
      spec: the design.
      available: bytes available (default :func:`available_memory`).

    Returns:
      the :class:`Budget` when the run fits.

    Raises:
      InputError: with the estimate, what is available and what to change.
    """
    bud = estimate(spec)
    avail = available_memory() if available is None else available
    if avail is not None and bud.peak_bytes > avail:
        n = spec.network
        from isoscope.routes import choose_route

        route = choose_route(spec, n.family != "python")[0]
        raise InputError(
            f"width {n.width}, depth {n.depth}, {spec.analysis.inputs} draws in {spec.analysis.dtype} "
            f"on the {route} route "
            f"needs about {_size(bud.peak_bytes)} of memory (weights {_size(bud.params_bytes)} per draw, "
            f"Jacobian {_size(bud.jacobian_bytes)}) and at least {_duration(bud.seconds)}, but "
            f"{_size(avail)} is available",
            expected=f"an estimated peak below {_size(avail)}",
            hint="lower network.width or network.depth (the weights take depth x width^2 numbers), "
            'analysis.inputs, use dtype = "float32", or route = "matrix-free" (no N x N '
            "matrix)",
        )
    return bud
