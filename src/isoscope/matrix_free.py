"""The matrix-free route: the spectrum of ``J^T J`` without forming J.

J is never built.  ``jax.linearize`` of ``apply(params, .)`` at x gives ``v -> J v`` (the
forward pass is run once and its residuals kept), ``jax.linear_transpose`` of that gives
``u -> J^T u``; each product costs about one forward pass, and memory is the parameters, the
forward residuals (a few vectors per layer) and the Lanczos basis.

Stochastic Lanczos quadrature (Golub & Meurant 2010, ch. 7; Ubaru, Chen & Saad 2017, SIAM J.
Matrix Anal. Appl. 38, 1075, eqs. 2.3-2.5): for a unit probe ``q_1 = z / |z|`` with
Rademacher z, m steps of Lanczos on ``A = J^T J`` give the tridiagonal ``T_m`` with
eigenpairs ``(theta_i, y_i)``; the Gauss rule ``sum_i tau_i delta(theta_i)``,
``tau_i = (e_1^T y_i)^2``, integrates polynomials of degree ``<= 2m - 1`` against the measure
``q_1^T delta(A - theta) q_1`` exactly, and its average over probes estimates the spectral
measure ``(1/N) sum_k delta(lambda_k)`` (unbiased for Rademacher probes, since
``E[z z^T] = I`` and ``|z|^2 = N``).  The measure the route reports is the Gauss-Radau rule
with one node fixed at lambda = 0 (see :func:`_gauss_rule`), so that an atom at zero (ReLU
stacks) is not smeared onto the lowest Ritz value; moments and extreme values come from the
Gauss rule itself.

The basis is fully reorthogonalised (classical Gram-Schmidt, applied twice, Giraud et al.
2005): without it the finite-precision recurrence loses orthogonality once a Ritz value
converges and repeats it ("ghost" eigenvalues, Paige 1976), which would double-count the
extreme singular values.  The Ritz residual ``beta_m |e_m^T y_i|`` bounds the distance from
``theta_i`` to the nearest eigenvalue of A (Parlett 1998, thm. 13.1.1 with exact
orthogonality), so the extreme Ritz values come with certified error bars.

Written here rather than taken from a library: a few dozen lines of ``lax.fori_loop``, and
the route needs each probe's full rule (nodes, weights and residuals, not just a trace
estimate), compiled once per network function with the probes batched by ``jax.vmap``.
"""

from __future__ import annotations

import functools
import math
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from isoscope.errors import InputError
from isoscope.network import Network

__all__ = [
    "QuadratureRule",
    "lanczos_quadrature",
    "lanczos_tridiagonal",
    "quadrature_summary",
    "rademacher_probes",
]


class QuadratureRule(NamedTuple):
    """Per probe, the Gauss-Radau rule of the Lanczos tridiagonal matrix and its Ritz pairs.

    Attributes:
      nodes: ``(P, m + 1)`` nodes of the Gauss-Radau rule with one node fixed at lambda = 0,
        estimates of lambda = s^2 standing for the spectral measure.
      weights: ``(P, m + 1)`` their weights; each row sums to 1.
      ritz: ``(P, m)`` Ritz values theta (eigenvalues of ``T_m``, the Gauss rule's nodes).
      ritz_weights: ``(P, m)`` the Gauss rule's weights ``tau``.
      residuals: ``(P, m)`` Ritz residual bounds ``beta_m |e_m^T y_i|``.
      dim: N, the dimension of the operator (the input size).
    """

    nodes: jax.Array
    weights: jax.Array
    ritz: jax.Array
    ritz_weights: jax.Array
    residuals: jax.Array
    dim: int


def rademacher_probes(key: jax.Array, count: int, dim: int, dtype) -> jax.Array:
    """``(count, dim)`` independent Rademacher (+-1) probe vectors (Hutchinson 1990)."""
    return jax.random.rademacher(key, (count, dim), dtype=dtype)


def lanczos_tridiagonal(matvec, probe: jax.Array, steps: int) -> tuple[jax.Array, jax.Array]:
    """``(alpha, beta)`` of m = ``steps`` Lanczos steps on a symmetric operator from ``probe``.

    ``A Q_m = Q_m T_m + beta_m q_{m+1} e_m^T`` with ``T_m`` tridiagonal: diagonal ``alpha``
    (length m) and off-diagonal ``beta[:m-1]``; ``beta[m-1]`` is the residual norm
    ``beta_m``.  Each new vector is orthogonalised against the whole basis twice.  When the
    Krylov space is exhausted (``beta_j`` below ``dim * eps`` times the largest entry so far)
    the recurrence stops: later vectors are zero and later ``alpha``, ``beta`` are zero, which
    adds Ritz values of weight exactly zero.
    """
    n, dtype = probe.shape[0], probe.dtype
    eps = float(jnp.finfo(dtype).eps)
    q0 = probe / jnp.linalg.norm(probe)
    basis = jnp.zeros((steps + 1, n), dtype).at[0].set(q0)
    rows = jnp.arange(steps + 1)

    def body(j, state):
        basis, alpha, beta, scale = state
        q = basis[j]
        w = matvec(q)
        a = jnp.vdot(q, w)
        keep = (rows <= j).astype(dtype)
        for _ in range(2):  # "twice is enough" (Giraud et al. 2005)
            w = w - ((basis @ w) * keep) @ basis
        b = jnp.linalg.norm(w)
        scale = jnp.maximum(scale, jnp.maximum(jnp.abs(a), b))
        alive = b > n * eps * scale
        q_next = jnp.where(alive, w / jnp.where(alive, b, 1.0), 0.0)
        b = jnp.where(alive, b, 0.0)
        return basis.at[j + 1].set(q_next), alpha.at[j].set(a), beta.at[j].set(b), scale

    init = (basis, jnp.zeros(steps, dtype), jnp.zeros(steps, dtype), jnp.zeros((), dtype))
    _, alpha, beta, _ = jax.lax.fori_loop(0, steps, body, init)
    return alpha, beta


def _gauss_rule(alpha: jax.Array, beta: jax.Array):
    """Gauss and Gauss-Radau rules of the tridiagonal ``(alpha, beta[:-1])``, residual
    ``beta[-1]``.

    Gauss: the eigenpairs ``(theta_i, y_i)`` of ``T_m``, weights ``(e_1^T y_i)^2``, Ritz
    residuals ``beta_m |e_m^T y_i|``.  Gauss-Radau with a node fixed at ``a = 0`` (the lower
    end of the spectrum of ``J^T J``): ``T_m`` bordered by ``beta_m e_m`` and the corner
    ``a + delta_m``, ``(T_m - a I) delta = beta_m^2 e_m`` (Golub 1973; Golub & Meurant 2010,
    sec. 6.2), exact for polynomials of degree <= 2m.  Its node at 0 carries the mass the
    Gauss rule would smear over its lowest node, which matters where lambda = 0 is an atom
    (ReLU) or the spectrum runs down to 0.  After an exhausted Krylov space (``beta_m = 0``)
    the extra node has weight 0.
    """
    m = alpha.shape[0]
    off = beta[:-1]
    t = jnp.diag(alpha) + jnp.diag(off, 1) + jnp.diag(off, -1)
    theta, y = jnp.linalg.eigh(t)
    b = beta[-1]
    dead = (alpha == 0) & (jnp.concatenate([off, b[None]]) == 0)  # padding after exhaustion
    safe = t + jnp.diag(dead.astype(t.dtype))
    delta = jnp.linalg.solve(safe, (b * b) * jax.nn.one_hot(m - 1, m, dtype=t.dtype))
    corner = jnp.where(b > 0, delta[-1], 0.0)
    border = jnp.zeros((m + 1, m + 1), t.dtype).at[:m, :m].set(t)
    border = border.at[m - 1, m].set(b).at[m, m - 1].set(b).at[m, m].set(corner)
    radau, z = jnp.linalg.eigh(border)
    return jnp.maximum(radau, 0.0), z[0] ** 2, theta, y[0] ** 2, jnp.abs(b * y[-1])


@functools.cache
def _compiled_rule(apply, steps: int):
    """One compiled function per network function and step count: parameters, input and
    probes are traced arguments, so new draws never recompile."""

    def run(params, x, probes):
        _, jvp = jax.linearize(lambda z: apply(params, z), x)
        transpose = jax.linear_transpose(jvp, x)

        def gram(v):  # v -> J^T J v
            return transpose(jvp(v))[0]

        def one(probe):
            return _gauss_rule(*lanczos_tridiagonal(gram, probe, steps))

        return jax.vmap(one)(probes)

    return jax.jit(run)


def lanczos_quadrature(
    network: Network, params, x: jax.Array, key: jax.Array, *, probes: int = 8, steps: int = 80
) -> QuadratureRule:
    """Stochastic Lanczos quadrature of the spectral measure of ``J^T J`` at input ``x``.

    Args:
      network, params, x: the draw; J is the Jacobian of ``network.apply(params, .)`` at x.
      key: PRNG key of the Rademacher probes.
      probes: P, the number of probe vectors (the rule's variance falls as 1/P).
      steps: m, Lanczos steps per probe (capped at N, where the rule is exact).

    Returns:
      A :class:`QuadratureRule` in the dtype of ``x``.
    """
    if isinstance(probes, bool) or not isinstance(probes, int) or probes < 1:
        raise InputError(
            f"probes = {probes!r} is not a positive whole number",
            expected="an integer >= 1",
            key="analysis.probes",
        )
    if isinstance(steps, bool) or not isinstance(steps, int) or steps < 1:
        raise InputError(
            f"lanczos_steps = {steps!r} is not a positive whole number",
            expected="an integer >= 1",
            key="analysis.lanczos_steps",
        )
    dim = int(x.shape[0])
    m = min(steps, dim)
    z = rademacher_probes(key, probes, dim, x.dtype)
    nodes, weights, ritz, ritz_weights, residuals = _compiled_rule(network.apply, m)(params, x, z)
    return QuadratureRule(nodes, weights, ritz, ritz_weights, residuals, dim)


def quadrature_summary(rule: QuadratureRule) -> dict[str, Any]:
    """Moments of lambda with their standard errors, and the extreme Ritz values.

    ``m_k = mean over probes of sum_i tau_i theta_i^k`` (k = 1..4) estimates
    ``(1/N) tr (J^T J)^k`` (exact per probe for ``k <= 2m - 1``); its standard error is the
    probes' standard deviation over sqrt(P) (``nan`` for one probe).  ``lambda_max`` is the
    largest Ritz value over the probes and ``lambda_max_residual`` its residual bound: the
    largest eigenvalue is at least ``lambda_max`` (Ritz values interlace) and some eigenvalue
    lies within the residual of it; ``lambda_min`` likewise, over Ritz values of weight above
    ``1e-12`` (zero-weight values come from an exhausted Krylov space).
    """
    nodes = np.asarray(rule.ritz, np.float64)
    weights = np.asarray(rule.ritz_weights, np.float64)
    residuals = np.asarray(rule.residuals, np.float64)
    p = nodes.shape[0]
    out: dict[str, Any] = {"probes": int(p), "steps": int(nodes.shape[1]), "dim": int(rule.dim)}
    for k in range(1, 5):
        per_probe = np.sum(weights * nodes**k, axis=1)
        out[f"m{k}"] = float(per_probe.mean())
        out[f"m{k}_se"] = float(per_probe.std(ddof=1) / math.sqrt(p)) if p > 1 else float("nan")
    top = np.unravel_index(np.argmax(nodes), nodes.shape)
    live = np.where(weights > 1e-12, nodes, np.inf)
    low = np.unravel_index(np.argmin(live), nodes.shape)
    out.update(
        lambda_max=float(nodes[top]),
        lambda_max_residual=float(residuals[top]),
        lambda_min=float(nodes[low]),
        lambda_min_residual=float(residuals[low]),
    )
    return out
