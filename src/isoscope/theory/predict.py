"""One infinite-width prediction of a design's Jacobian spectrum.

``predict(...) -> Prediction`` joins the two theory modules: mean field
(:mod:`isoscope.theory.mean_field`) gives the pre-activation variance of every layer, free
probability (:mod:`isoscope.theory.free_probability`) turns it into the law of
``lambda = s^2``, eigenvalue of ``J J^T``:

* plain stacks: every layer at the stable fixed point q* of the length map
  (``V(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2``), ``S_{JJ^T} = S_W^L S_{D^2}^L``
  (Pennington, Schoenholz, Ganguli 2017, sec. 2.3; docs/theory-mean-field.md, docs/theory-free-probability.md);
* residual stacks ``x' = x + alpha phi(W x + b)``: the universal large-depth law
  ``S(z) = exp(-tau (1 + 2 z))`` with ``tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2]``
  accumulated along the q^l trajectory from the input variance (Tarnowski et al. 2019;
  docs/theory-free-probability.md sec. 7).

Nothing here samples or differentiates a network: the prediction depends on the design only.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from isoscope.activations import get_activation
from isoscope.errors import TheoryError
from isoscope.theory import free_probability as fp
from isoscope.theory import mean_field as mf

__all__ = ["Prediction", "predict", "log_lambda_stats"]

# The prediction takes every layer of a plain stack at q*; the inputs are "at q*" when no layer
# of the actual trajectory departs from it by more than this (relative).
_STEADY_RTOL = 0.05


@dataclasses.dataclass(frozen=True, eq=False)
class Prediction:
    """The infinite-width prediction for one design.

    Attributes:
      family, activation, weights: the design as asked (``weights`` "gaussian", "orthogonal" or
        "uniform"; the theory's ensemble is ``ensemble``).
      sigma_w, sigma_b: weight and bias scales (the squares are ``sigma_w**2``, ``sigma_b**2``).
      depth: number of weight layers L.
      alpha: residual branch scale (1.0 for plain stacks, where it is unused).
      mean_field: :class:`~isoscope.theory.mean_field.MeanField` at (sigma_w, sigma_b): q*, chi_1,
        c*, xi_q, xi_c, phase.  ``None`` for residual stacks (no fixed point: q grows) and for
        plain stacks whose variance grows without bound while the law of phi'^2 does not
        depend on it (linear with sigma_w > 1, ReLU with a bias at sigma_w^2 = 2, ...).
      q_layers: the variance q^l of each layer the law was built from (shape ``(L,)``).
      q_law: the variance at which the law of phi'(h)^2 was taken (plain stacks), else NaN.
      tau: ``sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2]`` (residual stacks), else NaN.
      moments: m1..m4 of lambda.
      density: the law of lambda (continuous part on a grid, atoms separate).
      log_s_mean, log_s_std: mean and standard deviation of ln s = (ln lambda)/2 over the
        non-zero part of the law (comparable with the measured statistics over non-zero s).
      length_mode_s: plain stacks: the singular value of the one direction along the input,
        which follows the length map rather than the bulk law: a relative change of |x^0|
        reaches the output multiplied by ``V'(q*)^L`` (``V'`` the slope of the length map at q*,
        Poole et al. 2016; ``= exp(-L/xi_q)``).  It is invisible at N -> infinity (one value out
        of N) but shows as an isolated value per draw at finite width.  NaN for residual stacks.
      mean_mode: True for a residual stack whose branch has ``E[phi(h)] != 0``: one singular
        value per draw (the mean mode) sits far above the bulk the law describes.
      regime: the assumptions the prediction rests on.
      notes: caveats a user must read (inputs off the fixed point, large-depth assumption,
        moments or lambda outside float64, ...).
      ensemble: the weight ensemble the theory used: "gaussian" (also for uniform weights: same
        variance, same infinite-width limit) or "orthogonal".
      slope: the leaky-ReLU slope, else ``None``.
      log_length_mode_s: ``L ln V'(q)``, the natural log of ``length_mode_s`` (finite where
        ``length_mode_s`` itself leaves float64 and is NaN).
      length_factor: plain stacks: the per-layer factor ``q^{l+1}/q^l`` of the pre-activation
        variance when the length map's fixed point is q* = 0 and phi is positively homogeneous
        (``sigma_w^2 E[phi(h)^2]/q``: ReLU ``sigma_w^2/2``), else NaN.
    """

    family: str
    activation: str
    weights: str
    sigma_w: float
    sigma_b: float
    depth: int
    alpha: float
    mean_field: mf.MeanField | None
    q_layers: np.ndarray
    q_law: float
    tau: float
    moments: fp.LambdaMoments
    density: fp.Density
    log_s_mean: float
    log_s_std: float
    length_mode_s: float
    mean_mode: bool
    regime: str
    notes: tuple[str, ...]
    ensemble: str = ""
    slope: float | None = None
    log_length_mode_s: float = math.nan
    length_factor: float = math.nan


def log_lambda_stats(density: fp.Density) -> tuple[float, float]:
    """Mean and standard deviation of ``ln lambda`` over the non-zero part of a law.

    ``E[ln lambda | lambda > 0] = (int ell rho_log d ell + sum_a w_a ln a) / (1 - w_0)``, with
    ``rho_log`` the density of ``ell = ln lambda`` (trapezoid on the solver's grid) and the
    non-zero atoms ``(a, w_a)`` (taken from ``log_atoms``, so atoms outside float64 count at
    their true place); the variance likewise.  For ln s halve both.
    """
    ell, r = density.log_x, density.rho_log
    parts = [(ell, r)] if ell.size >= 2 else []
    _, log_atoms = density._log_form()
    atoms = [(la, w) for la, w in log_atoms if la > -math.inf]
    mass = sum(float(np.trapezoid(rr, ee)) for ee, rr in parts) + sum(w for _, w in atoms)
    if mass <= 0:
        return math.nan, math.nan

    def moment(k: int) -> float:
        total = sum(float(np.trapezoid(rr * ee**k, ee)) for ee, rr in parts)
        return (total + sum(w * la**k for la, w in atoms)) / mass

    mean = moment(1)
    var = max(moment(2) - mean * mean, 0.0)
    return mean, math.sqrt(var)


def _steady_variance(
    act, sigma_w: float, sigma_b: float, q_star: float, q_layers: np.ndarray
) -> float:
    """The variance for the plain-stack law: q*, or the layers' own variance when the length
    map is marginal (V(q) = q for every q: ReLU at sigma_w^2 = 2, linear at sigma_w = 1, no
    bias), where q* = 0 says nothing about the layers (1.0 if the trajectory is 0 too)."""
    v = float(q_layers[-1]) if q_layers[-1] > 0 else 1.0
    if q_star == 0.0 and abs(mf.length_map(act, sigma_w, sigma_b, v) - v) <= 1e-12 * v:
        return v
    return float(q_star)


def predict(
    activation,
    weights: str,
    sigma_w: float,
    sigma_b: float,
    depth: int,
    family: str = "plain",
    alpha: float = 1.0,
    input_variance: float | None = None,
    points: int = 400,
) -> Prediction:
    """Predict the spectrum of ``J J^T`` at infinite width for one design.

    Plain stacks: q* and the phase from :func:`~isoscope.theory.mean_field.mean_field`; the law of
    ``d = phi'(h)^2`` at q*; moments by Lagrange inversion and the density from the master
    equation ``z M S(M) = 1 + M`` with ``S = S_W^L S_{D^2}^L`` (docs/theory-free-probability.md).  The q^l
    trajectory from the input is computed as well; when it leaves q* by more than 5 % the
    prediction still uses q* and says so in ``notes``.

    Positively homogeneous phi (linear, ReLU, leaky ReLU: ``phi(t h) = t phi(h)``, t > 0): the
    law of ``phi'(h)^2`` is the same at every q > 0, so the Jacobian spectrum does not depend on
    the input's scale.  Where the length map's fixed point is q* = 0 (``sigma_b = 0`` and
    ``sigma_w^2 E[phi(h)^2]/q < 1``, e.g. ReLU with sigma_w^2 < 2) the law is taken at the input
    variance (default 1) instead of at q* (where ``phi'(0)`` is not defined), and
    ``length_factor = sigma_w^2 E[phi(h)^2]/q`` and a note report how the length decays
    (``q^L = q^1 length_factor^{L-1}``).  ReLU, sigma_w = 1, Gaussian weights: m1 = (1/2)^L.
    The same holds where the variance grows without bound (no finite fixed point).

    Residual stacks: ``tau`` along ``q^l`` from the input variance
    (:func:`~isoscope.theory.mean_field.q_trajectory` with the mean-mode recursion), then
    :func:`~isoscope.theory.free_probability.residual_moments` and ``residual_density``.

    Moments are carried in logs (``moments.log_m1 .. log_m4``; ``m_k`` is None outside float64,
    with a note) and so is the density (``density.log_x``, ``rho_log``, ``log_support``; a note
    says when lambda itself leaves the float64 range).

    Args:
      activation: registry name or :class:`~isoscope.activations.Activation` (a leaky ReLU
        with its slope: ``get_activation("leaky-relu", slope=0.2)``).
      weights: ``"gaussian"``, ``"orthogonal"`` (``"uniform"`` is predicted as Gaussian: same
        variance, same infinite-width limit; ``Prediction.weights`` keeps "uniform").
      sigma_w, sigma_b: weight and bias scales (standard deviation times sqrt(fan_in) for W).
      depth: number of weight layers L >= 1.
      family: ``"plain"`` or ``"residual"``.
      alpha: residual branch scale.
      input_variance: plain stacks: ``None`` for steady-state inputs (every layer at q*; on a
        marginal length map, where every q is a fixed point, at q = 1), or the mean square
        ``q0 = |x^0|^2/N`` of the inputs, from which ``q^1 = sigma_w^2 q0 + sigma_b^2``.
        Residual stacks: the input mean square (default 1.0).
      points: minimum grid size of the density (the solver doubles it, up to 16 times, when
        the grid's mass is off by more than 1 %).

    Returns:
      :class:`Prediction`.

    Raises:
      TheoryError: no stable fixed point, or an unsupported weights kind.
      SolverError: a solver limit (a solve that did not converge); not bad input.

    References:
      Poole et al. 2016; Schoenholz et al. 2017; Pennington, Schoenholz, Ganguli 2017 (NeurIPS)
      and 2018 (AISTATS); Tarnowski, Warchol, Jastrzebski, Tabor, Nowak 2019 (AISTATS).
    """
    act = get_activation(activation)
    asked = str(weights).lower() if isinstance(weights, str) else weights
    kind = "gaussian" if asked == "uniform" else asked
    if kind not in fp.WEIGHT_KINDS:
        raise TheoryError(
            f"no prediction for weights = {weights!r}; theory covers "
            f"{', '.join(fp.WEIGHT_KINDS)} (and uniform, as Gaussian)"
        )
    if family == "residual":
        p = _predict_residual(
            act,
            kind,
            sigma_w,
            sigma_b,
            depth,
            alpha,
            1.0 if input_variance is None else input_variance,
            points,
        )
        return _finish(p, act, asked)
    if family != "plain":
        raise TheoryError(
            f"no prediction for family = {family!r}; theory covers plain and residual"
        )
    try:
        summary = mf.mean_field(act, sigma_w, sigma_b)
    except TheoryError:
        if not act.law_free_of_q:
            raise
        return _finish(
            _predict_unbounded(act, kind, sigma_w, sigma_b, depth, input_variance, points),
            act,
            asked,
        )
    q_star = summary.q_star
    notes: list[str] = []
    factor = math.nan
    if act.law_free_of_q and q_star == 0.0:
        # q* = 0 for a homogeneous phi: the law is q-free, take it at the input variance
        q0 = 1.0 if input_variance is None or input_variance <= 0 else float(input_variance)
        q_layers = mf.q_trajectory(act, sigma_w, sigma_b, q0, depth)
        q_law = float(q_layers[0]) if q_layers[0] > 0 else q0
        factor = mf.length_map(act, sigma_w, 0.0, q_law) / q_law
        if abs(factor - 1.0) > 1e-12:
            notes.append(_decay_note(act, factor, q_layers, q_law))
    elif input_variance is None:  # steady state: every layer at q* (or at 1.0 on a marginal map)
        q_law = _steady_variance(act, sigma_w, sigma_b, q_star, np.ones(1))
        q_layers = np.full(int(depth), q_law)
    else:
        q_layers = mf.q_trajectory(act, sigma_w, sigma_b, float(input_variance), depth)
        q_law = _steady_variance(act, sigma_w, sigma_b, q_star, q_layers)
    if not act.law_free_of_q:
        off = np.abs(q_layers - q_law) / max(q_law, 1e-300) if q_law > 0 else q_layers
        if np.max(off) > _STEADY_RTOL:
            worst = int(np.argmax(off))
            notes.append(
                f"inputs are not at the fixed point: layer {worst + 1} has q = "
                f"{q_layers[worst]:.4g} against q* = {q_law:.4g}; the prediction takes "
                "every layer at q* (feed steady-state inputs for a like-for-like "
                "comparison)"
            )
    at = (
        f"every layer at q = {q_law:.6g}"
        if q_law == q_star or factor != factor
        else f"the law of phi'(h)^2 taken at q = {q_law:.6g} (the same at every q > 0 for "
        f"{act.label}; q* = 0)"
    )
    regime = (
        f"N -> infinity with L = {depth} fixed; {at}; {_ensemble_text(asked)} free of "
        "the diagonal factors"
    )
    p = _plain_prediction(
        act,
        kind,
        sigma_w,
        sigma_b,
        depth,
        points,
        summary,
        q_layers,
        q_law,
        _log_length_mode(act, sigma_w, q_law, depth),
        regime,
        tuple(notes),
    )
    return _finish(dataclasses.replace(p, length_factor=factor), act, asked)


def _ensemble_text(asked: str) -> str:
    if asked == "uniform":
        return "uniform weights (predicted as Gaussian: same variance, same infinite-width limit)"
    return f"{asked} weights"


def _decay_note(act, factor: float, q_layers: np.ndarray, q_law: float) -> str:
    """How the length evolves when q* = 0 (or grows) for a homogeneous phi."""
    tiny = float(np.finfo(np.float64).tiny)
    text = (
        f"the length map's fixed point is q* = 0: without a bias the pre-activation "
        f"variance changes by the factor sigma_w^2 E[phi(h)^2]/q = {factor:.6g} per layer "
        f"(q^1 = {q_layers[0]:.4g}, q^L = {q_layers[-1]:.4g}); phi' of {act.label} has the "
        f"same law at every q > 0, so the Jacobian spectrum does not depend on the input's "
        f"scale and the prediction is taken at q = {q_law:.6g}"
    )
    if factor < 1.0:
        n = math.log(tiny / q_law) / math.log(factor)
        if n < q_layers.size:
            text += (
                f"; the forward pass itself falls below the float64 range after about "
                f"{n:.0f} layers (float32: {math.log(1.18e-38 / q_law) / math.log(factor):.0f}), "
                "where a measured Jacobian loses its sign pattern"
            )
    return text


# A note on the float64 range is given when more of the law than this lies outside it (a soft
# tail reaching below 1e-308 with a negligible share, as in any deep Gaussian stack, is not worth
# a note; the log representation carries it either way).
_OUTSIDE_NOTE = 1e-3


def _mass_outside_float_range(density: fp.Density) -> float:
    """``P(lambda < 1e-308 or lambda > 1e308)`` of a law (atoms included), from its log grid."""
    lo, hi = math.log(np.finfo(float).tiny), math.log(np.finfo(float).max)
    _, log_atoms = density._log_form()
    out = sum(w for la, w in log_atoms if (la < lo and la > -math.inf) or la > hi)
    e, r = density.log_x, density.rho_log
    if e.size >= 2:
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(e))])
        at = np.interp([lo, hi], e, cum, left=0.0, right=cum[-1])
        out += float(at[0] + (cum[-1] - at[1]))
    return out


def _finish(p: Prediction, act, asked: str) -> Prediction:
    """Record the asked weights, the ensemble, the slope, and the float-range notes."""
    notes = list(p.notes)
    bad = p.moments.unrepresentable()
    if bad:
        logs = ", ".join(
            f"ln {k} = {v:.6g}"
            for k, v in zip(("m1", "m2", "m3", "m4"), p.moments.logs)
            if f"{k}" in bad
        )
        notes.append(
            f"{', '.join(bad)} lie outside the float64 range and are reported as null "
            f"({logs}): read lambda_moments in logs (log_m1 .. log_m4)"
        )
    outside = _mass_outside_float_range(p.density)
    if outside > _OUTSIDE_NOTE:
        lo, hi = p.density._log_form()[0]
        notes.append(
            f"{100 * outside:.3g}% of the law of lambda lies outside the float64 range "
            f"(ln lambda from {lo:.6g} to {hi:.6g}): the density is reported in ln lambda "
            "(log_x, rho_log, log_support); its lambda form (x, rho, support) is not "
            "faithful outside 1e-308 .. 1e308"
        )
    regime = p.regime
    if asked == "uniform" and "gaussian weights" in regime:
        regime = regime.replace("gaussian weights", _ensemble_text(asked))
    return dataclasses.replace(
        p, weights=asked, ensemble=p.weights, slope=act.slope, notes=tuple(notes), regime=regime
    )


def _plain_prediction(
    act,
    kind,
    sigma_w,
    sigma_b,
    depth,
    points,
    summary,
    q_layers,
    q_law,
    log_length_mode,
    regime,
    notes,
) -> Prediction:
    """Law of phi'(h)^2 at ``q_law`` -> moments, density and ln s statistics -> Prediction."""
    law = fp.derivative_law(act, 1.0 if math.isnan(q_law) else q_law)
    moments = fp.plain_moments(law, kind, sigma_w, depth)
    density = fp.plain_density(law, kind, sigma_w, depth, points)
    mean, std = log_lambda_stats(density)
    length_mode = math.exp(log_length_mode) if abs(log_length_mode) <= fp._LOG_HUGE else math.nan
    return Prediction(
        "plain",
        act.name,
        kind,
        float(sigma_w),
        float(sigma_b),
        int(depth),
        1.0,
        summary,
        q_layers,
        q_law,
        math.nan,
        moments,
        density,
        mean / 2.0,
        std / 2.0,
        length_mode,
        False,
        regime,
        notes,
        log_length_mode_s=log_length_mode,
    )


def _predict_unbounded(act, kind, sigma_w, sigma_b, depth, input_variance, points) -> Prediction:
    """Plain stack whose variance has no finite fixed point but whose Jacobian law does not
    depend on q (see ``Activation.law_free_of_q``): the spectrum is predicted exactly as at a fixed
    point, with the law taken at q = 1 (``q_law`` NaN) and a note that the forward pass grows."""
    q0 = 1.0 if input_variance is None else float(input_variance)
    q_layers = mf.q_trajectory(act, sigma_w, sigma_b, q0, depth)
    notes = (
        f"no finite fixed point of the length map: the pre-activation variance grows "
        f"without bound, from q^1 = {q_layers[0]:.4g} to q^L = {q_layers[-1]:.4g}, but phi' of "
        f"{act.label} has the same law at every variance, so the Jacobian spectrum does not "
        "depend on it and the prediction stands; the forward pass itself may overflow in "
        "float32 at large depth",
    )
    regime = (
        f"N -> infinity with L = {depth} fixed; the law of phi'(h)^2 is the same at every "
        f"q^l; {kind} weights free of the diagonal factors"
    )
    return _plain_prediction(
        act,
        kind,
        sigma_w,
        sigma_b,
        depth,
        points,
        None,
        q_layers,
        math.nan,
        math.nan,
        regime,
        notes,
    )


def _log_length_mode(act, sigma_w: float, q: float, depth: int) -> float:
    """``L ln V'(q)``, the log gain of the input-length direction (``Prediction.length_mode_s``)."""
    slope = mf.length_map_slope(act, sigma_w, q) if q > 0 else math.nan
    return depth * math.log(slope) if slope > 0 and math.isfinite(slope) else math.nan


def _predict_residual(act, kind, sigma_w, sigma_b, depth, alpha, q0, points) -> Prediction:
    q_layers = mf.q_trajectory(act, sigma_w, sigma_b, q0, depth, family="residual", alpha=alpha)
    tau = fp.residual_tau(act, sigma_w, q_layers, alpha)
    moments = fp.residual_moments(tau)
    density = fp.residual_density(tau, points)
    mean, std = log_lambda_stats(density)
    per_block = tau / depth
    notes = []
    if per_block > 0.1:
        notes.append(
            f"each block contributes alpha^2 sigma_w^2 E[phi'^2] = {per_block:.3g} to tau; "
            "the residual law assumes O(1/L) per block (L large), so expect the measured "
            "spread to differ (scale sigma_w^2 or alpha^2 like 1/L)"
        )
    mean_phi = float(np.dot(*_mean_phi(act, q_layers[0])))
    mean_mode = abs(mean_phi) > 1e-8 * math.sqrt(q_layers[0])
    if mean_mode:
        notes.append(
            f"E[phi(h)] = {mean_phi:.3g} != 0: the stack grows a mean mode, one outlier "
            "singular value per draw far above the bulk; the law describes the bulk only"
        )
    regime = (
        f"N -> infinity and L -> infinity with tau = {tau:.6g} fixed (O(1/L) branch "
        f"variance per block); {kind} weights; q^l from input variance {q0:.6g}"
    )
    return Prediction(
        "residual",
        act.name,
        kind,
        float(sigma_w),
        float(sigma_b),
        int(depth),
        float(alpha),
        None,
        q_layers,
        math.nan,
        tau,
        moments,
        density,
        mean / 2.0,
        std / 2.0,
        math.nan,
        mean_mode,
        regime,
        tuple(notes),
    )


def _mean_phi(act, q: float) -> tuple[np.ndarray, np.ndarray]:
    """(weights, phi(sqrt(q) z)) of the normal rule, for ``E[phi(h)]``."""
    from isoscope.theory.quadrature import normal_rule

    s = math.sqrt(max(q, 0.0))
    z, w = normal_rule([k / s for k in act.kinks] if s > 0 else [])
    return w, np.asarray(act.numpy_pair()[0](s * z), dtype=float)
