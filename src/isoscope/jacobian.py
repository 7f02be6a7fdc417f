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
* :func:`stable_log_singular_values` -- the deep route: ``ln s`` of J to full accuracy by a
  stabilised product ``U D T`` updated with pivoted QR at every layer, and
  :func:`graded_log_singular_values`, the final recovery by one-sided Jacobi.

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

__all__ = [
    "dense_jacobian",
    "layer_product",
    "qr_log_singular_values",
    "forward_fault",
    "jacobian_fault",
    "Fault",
    "trace_count",
    "ProfiledJacobian",
    "profiled_jacobian",
    "PartialSpectra",
    "partial_spectra",
    "LayerStatistics",
    "layer_statistics",
    "StableProduct",
    "stable_log_singular_values",
    "graded_log_singular_values",
]

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


@functools.cache
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


@functools.cache
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
        return Fault(
            "forward", layer, f"pre-activations overflow at layer {layer} of {network.depth}"
        )
    return None


@functools.cache
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
    return Fault(
        "jacobian",
        layer,
        f"the Jacobian product overflows at layer {layer} of {network.depth}"
        f" in {jnp.asarray(x).dtype}",
    )


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


@functools.cache
def _compiled_profiled(layer):
    def run(slices, x, slot, count):
        n, dtype = x.shape[0], x.dtype

        def step(carry, inputs):
            p, where = inputs
            x, t, k, buf, exps = carry
            y, t = jax.vmap(
                lambda v: jax.jvp(lambda u: layer(p, u), (x,), (v,)), in_axes=1, out_axes=(None, 1)
            )(t)
            t, dk = _power_of_two_split(t, dtype)
            k = k + dk
            buf = jax.lax.dynamic_update_index_in_dim(buf, t, where, 0)
            exps = jax.lax.dynamic_update_index_in_dim(exps, k, where, 0)
            return (y, t, k, buf, exps), None

        init = (
            x,
            jnp.eye(n, dtype=dtype),
            jnp.zeros((), jnp.int32),
            jnp.zeros((count + 1, n, n), dtype),
            jnp.zeros(count + 1, jnp.int32),
        )
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
    if (
        depths.size == 0
        or np.any(np.diff(depths) <= 0)
        or depths[0] < 1
        or depths[-1] > network.depth
    ):
        raise ValueError(f"depths must increase within 1..{network.depth}, got {depths.tolist()}")
    assert network.depth is not None, "a stack with layers has a depth"
    slot = np.full(network.depth, depths.size, dtype=np.int32)  # unkept layers write a scratch slot
    slot[depths - 1] = np.arange(depths.size, dtype=np.int32)
    j, m, e = _compiled_profiled(network.layer)(
        network.layer_slices(params), x, jnp.asarray(slot), int(depths.size)
    )
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


@functools.cache
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


@functools.cache
def _compiled_statistics(trace, family: str, activation):
    def run(params, x):
        _, h = trace(params, x)
        n = h.shape[-1]
        d = activation.derivative(h)  # phi'(h^l_i), shape (L, N)
        if "K" in params:  # row (p, o) of a circular convolution: every K[taps, :, o]
            k = params["K"]
            per_channel = jnp.sum(k**2, axis=tuple(range(1, k.ndim - 1)))  # (L, C)
            rows = jnp.tile(per_channel, (1, n // k.shape[-1]))  # flat index p * C + o
        else:
            rows = jnp.sum(params["W"] ** 2, axis=-1)  # |W^l_{i,:}|^2
        branch = jnp.sum(d * d * rows, axis=-1) / n  # ||D W||_F^2 / N
        if family != "residual":
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
    * convolution, ``J_l = D^l K^l`` with ``K^l`` block-circulant: the same formula, row
      ``(p, o)`` of ``K^l`` holding every kernel entry of output channel o once, so
      ``|K^l_{(p,o),:}|^2 = sum_{taps, i} K^l[taps, i, o]^2`` (kernel no larger than the size);
    * residual, ``J_l = I + alpha D^l W^l``:
      ``g^l = (1/N) ||I + alpha D W||_F^2 = 1 + 2 alpha tr(D W)/N + alpha^2 ||D W||_F^2/N``
      with ``tr(D W) = sum_i phi'(h^l_i) W^l_{ii}``.

    ``g^l`` is the mean of ``lambda = s^2`` over layer l's own singular values
    (``||A||_F^2 = sum_i s_i^2``), the measured counterpart of ``chi^l = sigma_w^2 E[phi'(h)^2]``
    (Poole et al. 2016, sec. 3).  Computed in the working dtype, returned as float64; a layer
    whose forward pass overflowed gives non-finite entries.  Compiled once per (family,
    activation, width, depth, dtype).
    """
    if network.trace is None or network.family not in ("plain", "residual", "conv1d", "conv2d"):
        raise ValueError(
            "layer_statistics needs a built-in stack (plain, residual, conv1d, conv2d)"
        )
    q, g = _compiled_statistics(network.trace, network.family, network.activation)(params, x)
    return LayerStatistics(np.asarray(q, dtype=np.float64), np.asarray(g, dtype=np.float64))


@functools.cache
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


# ----------------------------------------------------------------------------- the deep route
class StableProduct(NamedTuple):
    """Singular values of ``J = J_L ... J_1`` from the stabilised product (the deep route).

    Attributes:
      log_s: ``(N,)`` float64, ``ln s_i(J)`` decreasing, to full accuracy however far the
        singular values spread (no under- or overflow: ``ln s`` is carried, never s).
      partial_log_s: ``(len(depths), N)`` the same for ``J_l ... J_1`` at the requested depths
        (the last row is the full depth when it is requested), or ``None``.
      depths: those depths, or ``None``.
      layer_log_stretch: ``(L, N)`` float64, ``ln |R_ll,ii|`` of each layer's pivoted QR step:
        the per-layer log-stretching of the frame (the Lyapunov view; for long products its
        column means converge to the Lyapunov exponents, Benettin et al. 1980).
      sweeps: one-sided Jacobi sweeps the final recovery took (full depth).
      rank_deficit: the largest numerical rank deficit of one layer up to the full depth (and
        ``partial_deficit`` up to each requested depth): the count of a step's ``r_kk`` at or
        below ``n eps`` times its largest.  rank(J) <= min_l rank(J_l), so that many of the
        smallest ``ln s`` are rounding noise of exact zeros; they are returned as ``-inf``.
    """

    log_s: np.ndarray
    partial_log_s: np.ndarray | None
    depths: np.ndarray | None
    layer_log_stretch: np.ndarray
    sweeps: int
    rank_deficit: int = 0
    partial_deficit: np.ndarray | None = None


def _rank_deficits(stretch: np.ndarray, dtype) -> np.ndarray:
    """Per layer, the count of ``ln r_kk <= ln(n eps) + max_k ln r_kk`` (numerical rank
    deficit of ``J_l``, Golub & Van Loan 2013, sec. 5.4.1, read from the QR diagonal)."""
    n = stretch.shape[1]
    cut = np.max(stretch, axis=1, keepdims=True) + math.log(n * float(np.finfo(dtype).eps))
    with np.errstate(invalid="ignore"):
        return np.sum(~(stretch > cut), axis=1)


def _zero_bottom(log_s: np.ndarray, count: int) -> np.ndarray:
    out = np.array(log_s, dtype=np.float64)
    if count > 0:
        out[-count:] = -np.inf
    return out


def _udt_pivoted(a, log_d, t):
    """The exact update of the graded product (the fallback of :func:`_udt_step`).

    Householder QR with column pivoting of ``M = A D`` (Businger & Golub 1965), carried out
    on the *unscaled* A so that d may leave the float range: at step k the pivot p is the
    column whose remaining part is largest in M, ``argmax_j ln||A^(k)_{k:,j}|| + ln d_j``
    (in logs), and the reflector acts on A alone.  With R the triangular factor of A (diagonal
    made positive) ``ln d_new_k = ln r_kk + ln d_p`` and the new factor has rows
    ``F_kj = (r_kj / r_kk) exp(ln d_j - ln d_p)`` over the columns j not yet chosen
    (``|F_kj| <= 1`` by the pivoting, so ``T_new = F T`` stays well-conditioned), 1 at p, 0 at
    the columns already chosen.  When every remaining column of M is exactly zero (an exactly
    rank-deficient layer) ``ln d_new_k = -inf`` and ``F_k = e_p``: an exact zero singular
    value.  Returns ``(Q, ln d_new, T_new, ln r_kk)``.
    """
    n, dtype, ldt = a.shape[0], a.dtype, log_d.dtype
    rows = jnp.arange(n)
    neg_inf = jnp.array(-jnp.inf, ldt)

    def step(k, state):
        w, chosen, vs, betas, signs, f, new_d, log_r = state
        below = (rows >= k).astype(dtype)
        norms = jnp.linalg.norm(w * below[:, None], axis=0)
        key = jnp.where(chosen, neg_inf, jnp.log(norms).astype(ldt) + log_d)
        p = jnp.argmax(key)
        x = w[:, p] * below
        alpha = norms[p]
        sign = jnp.where(x[k] < 0, -1.0, 1.0).astype(dtype)  # H x = -sign alpha e_k
        v = x.at[k].add(sign * alpha)
        vv = v @ v
        beta = jnp.where(vv > 0, 2.0 / jnp.where(vv > 0, vv, 1.0), 0.0)
        free = (~chosen).astype(dtype)
        w = w - beta * v[:, None] * (v @ w)[None, :] * free[None, :]
        r = -sign * w[k]  # row k of R, r_kk = alpha
        chosen_next = chosen.at[p].set(True)
        deg = key[p] == -jnp.inf
        lr = jnp.log(alpha).astype(ldt)
        expo = jnp.log(jnp.abs(r)).astype(ldt) - lr + log_d - jnp.where(deg, 0, log_d[p])
        row = jnp.sign(r) * jnp.exp(jnp.minimum(expo, 709.0)).astype(dtype)
        row = jnp.where(chosen_next | deg, 0, row).at[p].set(1)
        return (
            w,
            chosen_next,
            vs.at[:, k].set(v),
            betas.at[k].set(beta),
            signs.at[k].set(-sign),
            f.at[k].set(row),
            new_d.at[k].set(jnp.where(deg, neg_inf, lr + log_d[p])),
            log_r.at[k].set(lr),
        )

    def build(i, q):  # Q = H_0 ... H_(n-1), applied from the last reflector
        k = n - 1 - i
        v = vs[:, k]
        return q - betas[k] * v[:, None] * (v @ q)[None, :]

    init = (
        a,
        jnp.zeros(n, bool),
        jnp.zeros_like(a),
        jnp.zeros(n, dtype),
        jnp.zeros(n, dtype),
        jnp.zeros_like(a),
        jnp.zeros(n, ldt),
        jnp.zeros(n, ldt),
    )
    _, _, vs, betas, signs, f, new_d, log_r = jax.lax.fori_loop(0, n, step, init)
    q = jax.lax.fori_loop(0, n, build, jnp.eye(n, dtype=dtype)) * signs[None, :]
    return q, new_d, f @ t, log_r


# Largest |entry| of the new factor accepted from the pre-pivoted step before the exact
# pivoted one is taken instead.  Common practice of this project, no source: pre-pivoting keeps
# the factor's entries O(1) for full-rank layers (Bai, Lee, Li & Xu 2011, sec. 4), and a value
# far above 1 signals a (numerically) rank-deficient layer, where only true pivoting is safe.
PREPIVOT_BOUND = 1e3


def _udt_prepivoted(a, log_d, t):
    """Pre-pivoted update: columns ordered by ``ln||A_j|| + ln d_j``, then LAPACK Householder
    QR of the unscaled ``A P = Q R'`` (QR commutes with the column scaling), signs fixed so
    that ``diag R' > 0``; ``ln d_new_i = ln r'_ii + ln d_P(i)`` and the factor's entries
    ``r'_ij / r'_ii exp(ln d_P(j) - ln d_P(i))`` are formed in logs.  Returns
    ``(Q, ln d_new, T_new, ln r'_ii, largest |factor entry|)``."""
    key = jnp.log(jnp.linalg.norm(a, axis=0)).astype(log_d.dtype) + log_d
    perm = jnp.argsort(-key)
    q, r = jnp.linalg.qr(a[:, perm])
    sign = jnp.where(jnp.diagonal(r) < 0, -1.0, 1.0).astype(a.dtype)
    q, r = q * sign[None, :], r * sign[:, None]
    log_r = jnp.log(jnp.abs(jnp.diagonal(r))).astype(log_d.dtype)
    lp = log_d[perm]
    expo = jnp.log(jnp.abs(r)).astype(log_d.dtype) + lp[None, :] - lp[:, None] - log_r[:, None]
    m = jnp.triu(jnp.sign(r) * jnp.exp(jnp.minimum(expo, 709.0)).astype(a.dtype))
    m = jnp.where(jnp.isfinite(m), m, jnp.inf)
    return q, log_r + lp, m @ t[perm, :], log_r, jnp.max(jnp.abs(m))


def _udt_step(a, log_d, t):
    """One update of the graded product: the new frame ``A = J_l U`` meets ``D T``.

    The pre-pivoted step (:func:`_udt_prepivoted`, one LAPACK QR) is taken when its factor is
    bounded by :data:`PREPIVOT_BOUND` and every ``ln d`` stays finite; otherwise (a layer that
    annihilates directions, as ReLU does) the exact pivoted step :func:`_udt_pivoted`.
    Returns ``(Q, ln d_new, T_new, ln r_kk)``.
    """
    q, new_d, new_t, log_r, worst = _udt_prepivoted(a, log_d, t)
    ok = (worst <= PREPIVOT_BOUND) & jnp.all(jnp.isfinite(new_d)) & jnp.all(jnp.isfinite(new_t))
    return jax.lax.cond(ok, lambda: (q, new_d, new_t, log_r), lambda: _udt_pivoted(a, log_d, t))


@functools.cache
def _compiled_stable(layer):
    def run(slices, x, slot, count):
        n, dtype = x.shape[0], x.dtype
        ld_dtype = jnp.float64 if jax.config.read("jax_enable_x64") else dtype

        def step(carry, inputs):
            p, where = inputs
            x, u, log_d, t, t_buf, d_buf = carry
            y, a = jax.vmap(
                lambda v: jax.jvp(lambda z: layer(p, z), (x,), (v,)), in_axes=1, out_axes=(None, 1)
            )(u)
            u, log_d, t, log_r = _udt_step(a, log_d, t)
            t_buf = jax.lax.dynamic_update_index_in_dim(t_buf, t, where, 0)
            d_buf = jax.lax.dynamic_update_index_in_dim(d_buf, log_d, where, 0)
            return (y, u, log_d, t, t_buf, d_buf), log_r

        eye = jnp.eye(n, dtype=dtype)
        init = (
            x,
            eye,
            jnp.zeros(n, ld_dtype),
            eye,
            jnp.zeros((count + 1, n, n), dtype),
            jnp.zeros((count + 1, n), ld_dtype),
        )
        (_, _, _, _, t_buf, d_buf), stretch = jax.lax.scan(step, init, (slices, slot))
        return t_buf[:count], d_buf[:count], stretch

    return jax.jit(_counted(run), static_argnums=(3,))


def graded_log_singular_values(
    log_d: np.ndarray, t: np.ndarray, tol: float | None = None, max_sweeps: int = 80
) -> tuple[np.ndarray, int]:
    """``ln s`` of ``D T`` (D diagonal given as ``ln d``, T well-conditioned) to high relative
    accuracy, however far d spreads, by one-sided Jacobi on columns held as (unit vector, log
    scale).

    The columns of ``X = (D T)^T`` are ``d_k T_k,:``; Hestenes' one-sided Jacobi rotates pairs
    of columns until all are orthogonal, and the singular values are the column norms
    (Demmel & Veselic 1992, SIAM J. Matrix Anal. Appl. 13: accurate to a relative error set by
    the conditioning of T, not of D).  A column is kept as ``e^l w``, ``|w| = 1``; for a pair
    with ``delta = l_a - l_b >= 0`` and ``gamma = w_a . w_b`` the rotation
    ``zeta = (|b|^2 - |a|^2) / (2 a.b) = -sinh(delta)/gamma``, ``t = sign(zeta)/(|zeta| +
    sqrt(1 + zeta^2))`` is carried as ``kappa = t e^delta``, finite for any delta, so that
    ``a' = e^(l_a) c (w_a - kappa e^(-2 delta) w_b)`` and ``b' = e^(l_b) c (kappa w_a + w_b)``
    never form ``e^delta`` (for delta -> inf, ``b'`` is the Gram-Schmidt projection
    ``w_b - gamma w_a``).  Pairs are swept in round-robin order, N/2 disjoint pairs at once.

    Returns:
      ``(ln s decreasing, sweeps)``.
    """
    w = np.array(np.asarray(t, dtype=np.float64).T)  # columns w_k = T[k, :]
    lv = np.asarray(log_d, dtype=np.float64).copy()
    n = lv.size
    norms = np.linalg.norm(w, axis=0)
    zero = norms == 0
    w[:, zero], norms[zero] = 1.0 / np.sqrt(n), 1.0
    w /= norms
    lv += np.where(zero, -np.inf, np.log(norms))
    tol = n * np.finfo(np.float64).eps if tol is None else tol
    players = list(range(n)) + ([-1] if n % 2 else [])
    m = len(players)
    sweeps = 0
    for sweeps in range(1, max_sweeps + 1):  # noqa: B007 (the count is returned)
        worst = 0.0
        order = players[:]
        for _ in range(m - 1):
            pa = np.array([order[k] for k in range(m // 2)])
            pb = np.array([order[m - 1 - k] for k in range(m // 2)])
            keep = (pa >= 0) & (pb >= 0)
            pa, pb = pa[keep], pb[keep]
            swap = lv[pa] < lv[pb]  # a: the larger column of each pair
            pa, pb = np.where(swap, pb, pa), np.where(swap, pa, pb)
            gamma = np.einsum("ij,ij->j", w[:, pa], w[:, pb])
            gamma = np.where(np.isfinite(lv[pb]), gamma, 0.0)
            worst = max(worst, float(np.max(np.abs(gamma), initial=0.0)))
            act = (np.abs(gamma) > tol) & np.isfinite(lv[pb])  # a zero column is orthogonal
            if act.any():
                a_i, b_i, g = pa[act], pb[act], gamma[act]
                delta = lv[a_i] - lv[b_i]
                r2 = np.exp(-2.0 * delta)  # (|b| / |a|)^2 <= 1
                # |zeta| e^-delta = (1 - r2) / (2 |gamma|); kappa = t e^delta
                z = (1.0 - r2) / (2.0 * np.abs(g))
                kappa = -np.sign(g) / (z + np.sqrt(r2 + z * z))
                c = 1.0 / np.sqrt(1.0 + kappa * kappa * r2)
                wa, wb = w[:, a_i], w[:, b_i]
                new_a = c * (wa - kappa * r2 * wb)
                new_b = c * (kappa * wa + wb)
                na, nb = np.linalg.norm(new_a, axis=0), np.linalg.norm(new_b, axis=0)
                w[:, a_i], w[:, b_i] = new_a / na, new_b / nb
                lv[a_i] += np.log(na)
                lv[b_i] += np.log(nb)
            order = [order[0]] + [order[-1]] + order[1:-1]
        if worst <= tol:
            break
    return np.sort(lv)[::-1], sweeps


def stable_log_singular_values(
    network: Network, params, x: jax.Array, depths=None
) -> StableProduct:
    """``ln s`` of ``J = J_L ... J_1`` to full accuracy, by a stabilised product (the deep route).

    The partial product is kept as ``U D T`` (U orthogonal, D diagonal held as ``ln d``, T
    well-conditioned) and updated at every layer by :func:`_udt_step` (pre-pivoted QR, or
    QR with column pivoting where a layer is rank-deficient;
    the method of Loh & Gubernatis 1992 for long matrix products in determinant quantum Monte
    Carlo, whose accuracy Bai, Lee, Li & Xu 2011, Linear Algebra Appl. 435, analyse); each
    step pushes the frame U through one layer by ``jax.jvp`` (under ``jax.vmap``) inside one
    ``lax.scan``, compiled once per (layer function, width, depth, dtype, number of depths).
    ``s(J) = s(D T)`` since U is orthogonal; :func:`graded_log_singular_values` recovers it.
    ``ln d`` is accumulated in float64 whatever the dtype of the parameters.

    Args:
      network: a stack with per-layer structure (plain, residual, convolution).
      params, x: parameters and input.
      depths: increasing layer counts in ``1..L`` at which to keep ``ln s`` of the partial
        product as well (default: only the full depth).
    """
    if network.layer is None:
        raise ValueError("stable_log_singular_values needs a stack with per-layer structure")
    keep = np.asarray([network.depth] if depths is None else depths, dtype=int)
    if keep.size == 0 or np.any(np.diff(keep) <= 0) or keep[0] < 1 or keep[-1] > network.depth:
        raise ValueError(f"depths must increase within 1..{network.depth}, got {keep.tolist()}")
    assert network.depth is not None, "a stack with layers has a depth"
    slot = np.full(network.depth, keep.size, dtype=np.int32)
    slot[keep - 1] = np.arange(keep.size, dtype=np.int32)
    t_buf, d_buf, stretch = _compiled_stable(network.layer)(
        network.layer_slices(params), x, jnp.asarray(slot), int(keep.size)
    )
    t_buf, d_buf = np.asarray(t_buf), np.asarray(d_buf)
    stretch = np.asarray(stretch, dtype=np.float64)
    running = np.maximum.accumulate(_rank_deficits(stretch, np.asarray(x).dtype))
    partial = running[keep - 1]
    recovered, sweeps = [], 0
    for t, d, lost in zip(t_buf, d_buf, partial):
        log_s, sweeps = graded_log_singular_values(d, t)
        recovered.append(_zero_bottom(log_s, int(lost)))
    rows = np.stack(recovered)
    full = rows[-1] if keep[-1] == network.depth else None
    if full is None:
        full = stable_log_singular_values(network, params, x).log_s
    return StableProduct(
        full,
        None if depths is None else rows,
        None if depths is None else keep,
        stretch,
        sweeps,
        int(running[-1]),
        None if depths is None else partial,
    )
