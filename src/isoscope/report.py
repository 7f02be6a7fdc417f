"""Results as files: versioned JSON, figures, a self-contained HTML page, a terminal table.

Output folders are written crash-safe (:mod:`isoscope.folders`): everything goes into a
version folder beside the target, and the target, a link, is switched to it in one atomic
rename only when it is complete.  An existing folder is replaced only if isoscope wrote it;
any other non-empty folder is left alone and the run stops with an error, so nothing a user
saved is overwritten.
"""

from __future__ import annotations

import json
import math
import platform
from pathlib import Path
from typing import Any

import numpy as np

from isoscope.analysis import Analysis
from isoscope.errors import InputError, TheoryError
from isoscope.folders import Reservation, reserve, safe_folder_name

__all__ = [
    "SCHEMA",
    "COMPARISON_SCHEMA",
    "RECOMMENDATION_SCHEMA",
    "GLOSSARY",
    "result_dict",
    "prediction_dict",
    "comparison_dict",
    "recommendation_dict",
    "candidate_dict",
    "depth_limit_dict",
    "to_json",
    "verdict_sentence",
    "analysis_page",
    "write_analysis_folder",
    "write_compare_folder",
    "write_recommend_folder",
    "summary_table",
    "comparison_table",
    "recommendation_text",
    "output_folder",
    "show_table_text",
    "show_matrix_text",
    "show_verdict",
    "check_new_file",
    "write_csv",
    "write_show_folder",
]

SCHEMA = "isoscope.result/1"

GLOSSARY = {
    "measured.route": "how the singular values were obtained: dense, deep (stabilised product) or matrix-free",
    "measured.route_reason": 'why that route (set in the spec, or chosen by route = "auto")',
    "measured.log_s.values": "ln s of every draw, draw after draw (listed up to 100,000 values; on the matrix-free route the quantiles of the quadrature measure)",
    "measured.quadrature": "matrix-free route: per draw the Lanczos quadrature's moments of lambda with standard errors across probes and the extreme Ritz values",
    "measured.draws": "independent (parameter, input) draws pooled in the spectrum",
    "measured.singular_values_per_draw": "singular values of each Jacobian (its smaller dimension)",
    "measured.lambda_moments.mK": "K-th moment of lambda = s^2 over all draws, E[lambda^K], zeros included",
    "measured.lambda_m1_draw_spread": "standard deviation of m1 across draws (sampling noise of m1)",
    "measured.log_s.mean": "mean of ln s over the non-zero singular values",
    "measured.log_s.std": "standard deviation of ln s over the non-zero singular values",
    "measured.log_s.min, .max": "smallest and largest ln s over the non-zero singular values",
    "measured.zero_fraction": "fraction of singular values at or below zero_threshold * s_max of their draw",
    "measured.zero_threshold": "relative threshold for a numerically zero singular value: n * eps(dtype) on the dense route, 1 / lanczos_steps (the Lanczos resolution) on the matrix-free route, 0 on the deep route (where only exact zeros and directions below some layer's numerical rank count)",
    "measured.log10_condition": "log10(s_max / s_min) with s_min the smallest non-zero singular value",
    "measured.s_quantiles.qP": "P-th percentile of the pooled singular values s (zeros included)",
    "score.isometry": "E[min(lambda, 1/lambda)] in [0, 1]; 1 only for a perfect isometry",
    "score.shape_score": "the isometry score after dividing lambda by m1 (gain corrected)",
    "score.gain": "m1 = E[lambda], mean squared singular value",
    "score.log10_gain": "log10 of m1",
    "score.gain_per_layer": "m1^(1/L): the average factor per layer on the squared norm",
    "score.normalised_variance": "m2/m1^2 - 1: variance of lambda/m1 (0 only if all lambda are equal)",
    "score.log_s_std": "standard deviation of ln s (non-zero s), the spread on a log scale",
    "score.verdict": "isometric | mis-scaled | spread | vanishing | exploding | non-finite (see score.reason)",
    "predicted": "infinite-width prediction (mean field + free probability); predicted.regime says what it assumes",
    "predicted.q_star, chi, xi_q, xi_c, c_star": "mean field of a plain stack: fixed point q*, chi_1, depth scales, correlation fixed point (null for residual stacks)",
    "predicted.design": "when present: the design whose law is drawn (a convolution stack's plain-stack law, a factory's equivalent built-in design)",
    "predicted.tau": "residual stacks: sum over blocks of alpha^2 sigma_w^2 E[phi'(h^l)^2]",
    "predicted.lambda_moments.mK": "K-th moment of lambda at infinite width",
    "predicted.density": "continuous part of the law of lambda: x (lambda grid), rho (density in lambda), log_x, rho_log (density of ln lambda); atoms listed separately",
    "predicted.atom_at_zero": "share of lambda exactly 0 (phi'(h) = 0 with positive probability, e.g. ReLU 1/2)",
    "predicted.length_mode_s": "plain stacks: singular value of the input-length direction, V'(q*)^L = exp(-L/xi_q); one isolated value per draw at finite width, outside the bulk law",
    "agreement.ks": "Kolmogorov-Smirnov distance between measured and predicted laws of lambda, above agreement.floor",
    "agreement.floor": "lambda below which the SVD cannot resolve values; both laws count everything below as one lump",
    "agreement.m1_rel_error, m2_rel_error": "measured / predicted - 1",
    "agreement.log_s_mean, log_s_std": "[predicted, measured] mean and std of ln s above the floor",
    "agreement.outliers": "singular values per draw set apart from the bulk (mean mode, input-length direction), with measured and predicted s; they are not scored",
    "agreement.tail_share": "[m1, m2]: share of the predicted moment carried by the top 1/N of the law; above 5% the moment cannot be estimated from N values per draw",
    "agreement.m1_reliable, m2_reliable": "whether the moment can be estimated at this width (tail_share <= 0.05); an unreliable moment is not compared",
    "agreement.disagree, cause": "whether measurement and theory disagree (KS > 0.05 or a reliable m1 off by > 10%) and the most likely cause",
    "agreement.atom_tolerance": "distance in ln lambda within which a measured value counts as sitting on a predicted atom (SVD and rounding resolution)",
    "score.gain_basis": "which m1 the verdict judged the gain by: the measured one, or the predicted one when the measured m1 cannot be estimated and the mean of ln s agrees with theory",
    "score.scored": "which singular values were scored: all, or the bulk without the outliers",
    "profile": "where along the stack the design stops being isometric: per layer, and the partial Jacobians J_l ... J_1 at up to 8 depths, measured against the prediction",
    "profile.depths": "the profile depths l at which the partial Jacobian J_l ... J_1 is kept (log-spaced, ending at L)",
    "profile.measured_log_s_std, predicted_log_s_std": "std of ln s of J_l ... J_1 (first draw, above the SVD floor) and of the predicted law at depth l",
    "profile.measured_log_m1, predicted_log_m1": "ln E[lambda] of J_l ... J_1 (first draw) and of the predicted law at depth l",
    "profile.measured_isometry, predicted_isometry": "isometry score E[min(lambda, 1/lambda)] of J_l ... J_1 (first draw, outliers set apart) and of the predicted law at depth l",
    "profile.isometric_until, predicted_isometric_until": "largest profile depth up to which every partial product scores >= 0.8 (null if the first does not)",
    "profile.layers": "layer numbers 1..L of the per-layer arrays",
    "profile.measured_q, measured_q_draw_std": "q^l = |h^l|^2/N, pre-activation mean square of layer l: mean over draws, and its standard deviation across draws",
    "profile.predicted_q": "mean-field q^l, iterated from the input mean square (q* at every layer for steady-state inputs)",
    "profile.measured_layer_gain": "g^l = ||J_l||_F^2/N, mean squared singular value of layer l's own Jacobian, mean over draws",
    "profile.predicted_layer_gain": "mean field: sigma_w^2 E[phi'(h)^2] at q^l (plain; chi_1 at q*), 1 + alpha^2 sigma_w^2 E[phi'(h)^2] (residual)",
    "inputs.variance": "q* for steady-state inputs (h ~ N(0, q*)), the variance for Gaussian ones",
    "seconds": "wall-clock seconds per stage on this machine",
}


def _clean(v: Any) -> Any:
    """Plain JSON data: NaN and infinities become null, numpy scalars become Python numbers."""
    if isinstance(v, dict):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if isinstance(v, (np.floating, float)):
        f = float(v)
        return f if math.isfinite(f) else None
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.ndarray):
        return _clean(v.tolist())
    return v


def _environment(analysis: Analysis) -> dict[str, Any]:
    import jax
    import jaxlib
    import scipy

    return {
        "isoscope": __import__("isoscope").__version__,
        "jax": jax.__version__,
        "jaxlib": jaxlib.__version__,
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "python": platform.python_version(),
        "machine": platform.machine(),
        "device": jax.devices()[0].platform,
        "dtype": analysis.spec.analysis.dtype,
        "jax_enable_x64": bool(jax.config.read("jax_enable_x64")),
    }


def _measured(analysis: Analysis) -> dict[str, Any] | None:
    s = analysis.spectrum
    if s is None:
        return None
    lo, hi = s.log_s_range
    values = s.log_s.ravel()
    return {
        "route": analysis.route,
        "route_reason": analysis.route_reason,
        "method": _METHODS.get(s.method, s.method),
        "draws": s.draws,
        "singular_values_per_draw": s.size,
        "lambda_moments": s.lambda_moments,
        "lambda_m1_draw_spread": float(np.std(s.lambda_moment_draws(1))) if s.draws > 1 else None,
        "log_s": {
            "mean": s.log_s_mean,
            "std": s.log_s_std,
            "min": lo,
            "max": hi,
            **({"values": values} if values.size <= MAX_LISTED_VALUES else {}),
        },
        "zero_fraction": s.zero_fraction,
        "zero_threshold": s.threshold,
        "log10_condition": s.log10_condition,
        "s_quantiles": s.s_quantiles,
        **({} if analysis.quadrature is None else {"quadrature": _quadrature(analysis.quadrature)}),
    }


# ln s of every draw is listed in result.json up to this many values (a 100,000-value list is
# about 2 MB of JSON)
MAX_LISTED_VALUES = 100_000

_METHODS = {
    "svd": "dense Jacobian by jax.jacfwd, singular values by SVD",
    "udt": "stabilised product U D T by pivoted QR at every layer, ln s from the graded factor",
    "slq": (
        "stochastic Lanczos quadrature of J^T J from jax.jvp/jax.vjp products; ln s are the "
        "quantiles of the quadrature measure"
    ),
}


def _quadrature(draws: tuple[dict, ...]) -> dict[str, Any]:
    """The matrix-free route's per-draw quadrature summaries and their pooled values: moments
    averaged over the draws with standard error ``sqrt(sum se_i^2) / draws`` (independent
    draws), the largest ``lambda_max`` and the smallest ``lambda_min`` with the residual of
    each Ritz pair (moments from the quadrature rule itself, not from the quantile values)."""
    n = len(draws)
    pooled: dict[str, Any] = {k: draws[0][k] for k in ("probes", "steps", "dim")}
    for k in ("m1", "m2", "m3", "m4"):
        pooled[k] = float(np.mean([d[k] for d in draws]))
        pooled[f"{k}_se"] = float(np.sqrt(np.sum([d[f"{k}_se"] ** 2 for d in draws])) / n)
    top = max(draws, key=lambda d: d["lambda_max"])
    low = min(draws, key=lambda d: d["lambda_min"])
    pooled.update(
        lambda_max=top["lambda_max"],
        lambda_max_residual=top["lambda_max_residual"],
        lambda_min=low["lambda_min"],
        lambda_min_residual=low["lambda_min_residual"],
    )
    return {"draws": list(draws), "pooled": pooled}


def prediction_dict(p) -> dict[str, Any]:
    """A :class:`~isoscope.theory.predict.Prediction` as plain data (also ``predict --json``).

    Scales are given with their squares (``sigma_w`` and ``sigma_w2``); the mean-field numbers
    sit at the top level (``q_star, chi, xi_q, xi_c, c_star``; null for residual stacks).
    ``lambda_moments`` holds m1..m4 (null outside float64) and ``log_lambda_moments`` their
    natural logs ``log_m1..log_m4`` (finite whenever the moment is positive);
    ``log_support`` and the atoms' ``log_lambda`` are the log forms of ``support`` and the
    atoms' ``lambda``.  ``weights`` is the ensemble asked for, ``ensemble`` the one the theory
    used (uniform is predicted as Gaussian); ``leaky_slope`` is present for leaky ReLU.
    """
    mf, d = p.mean_field, p.density
    extra = {"leaky_slope": p.slope} if p.slope is not None else {}
    return {
        "family": p.family,
        "activation": p.activation,
        **extra,
        "weights": p.weights,
        "ensemble": p.ensemble,
        "sigma_w": p.sigma_w,
        "sigma_w2": _square(p.sigma_w),
        "sigma_b": p.sigma_b,
        "sigma_b2": _square(p.sigma_b),
        "depth": p.depth,
        "alpha": p.alpha if p.family == "residual" else None,
        "regime": p.regime,
        "q_star": mf.q_star if mf else None,
        "chi": mf.chi1 if mf else None,
        "xi_q": mf.xi_q if mf else None,
        "xi_c": mf.xi_c if mf else None,
        "c_star": mf.c_star if mf else None,
        "phase": mf.phase if mf else None,
        "q_law": p.q_law,
        "tau": p.tau,
        "q_layers": p.q_layers,
        "lambda_moments": {f"m{k}": v for k, v in enumerate(p.moments[:4], 1)},
        "log_lambda_moments": {f"log_m{k}": v for k, v in enumerate(p.moments.logs, 1)},
        "log_s": {"mean": p.log_s_mean, "std": p.log_s_std},
        "atom_at_zero": d.atom_at_zero,
        "atoms": [
            {"lambda": a, "log_lambda": la, "weight": w}
            for (a, w), (la, _) in zip(d.atoms, d.log_atoms)
        ],
        "support": list(d.support),
        "log_support": list(d.log_support),
        "in_float_range": d.in_float_range,
        "length_mode_s": p.length_mode_s,
        "log_length_mode_s": p.log_length_mode_s,
        "length_factor": p.length_factor,
        "mean_mode": p.mean_mode,
        "density": {"x": d.x, "rho": d.rho, "log_x": d.log_x, "rho_log": d.rho_log},
        "notes": list(p.notes),
    }


def _agreement_dict(g) -> dict[str, Any] | None:
    if g is None:
        return None
    out = g._asdict()
    for key in ("log_s_mean", "log_s_std", "zero_fraction", "tail_share"):
        out[key] = list(out[key])
    out["outliers"] = [o._asdict() for o in g.outliers]
    return out


def _profile_dict(p) -> dict[str, Any] | None:
    if p is None:
        return None
    return {
        "depths": p.depths,
        "measured_log_s_std": p.measured_log_s_std,
        "predicted_log_s_std": p.predicted_log_s_std,
        "measured_log_m1": p.measured_log_m1,
        "predicted_log_m1": p.predicted_log_m1,
        "measured_isometry": p.measured_isometry,
        "predicted_isometry": p.predicted_isometry,
        "isometric_until": p.isometric_until,
        "predicted_isometric_until": p.predicted_isometric_until,
        "layers": p.layers,
        "measured_q": p.measured_q,
        "measured_q_draw_std": p.measured_q_draw_std,
        "predicted_q": p.predicted_q,
        "measured_layer_gain": p.measured_layer_gain,
        "predicted_layer_gain": p.predicted_layer_gain,
    }


def result_dict(analysis: Analysis) -> dict[str, Any]:
    """The result of one analysis as plain JSON-ready data (schema ``isoscope.result/1``)."""
    f = analysis.fault
    return _clean(
        {
            "schema": SCHEMA,
            "name": analysis.spec.name,
            "spec": analysis.spec.to_dict(),
            "environment": _environment(analysis),
            "inputs": {
                "kind": analysis.inputs.kind,
                "variance": analysis.inputs.variance,
                "detail": analysis.inputs.detail,
            },
            "measured": _measured(analysis),
            "fault": None
            if f is None
            else {"stage": f.stage, "layer": f.layer, "detail": f.detail, "route": analysis.route},
            "score": analysis.score._asdict(),
            "predicted": None
            if analysis.predicted is None
            else {
                **prediction_dict(analysis.predicted),
                **({"design": analysis.theory_label} if analysis.theory_label else {}),
            },
            "agreement": _agreement_dict(analysis.agreement),
            "profile": _profile_dict(analysis.profile),
            "warnings": list(analysis.warnings),
            "seconds": analysis.seconds,
            "glossary": GLOSSARY,
        }
    )


def to_json(data: Any) -> str:
    """Strict JSON text (no NaN), indented."""
    return json.dumps(_clean(data), indent=2, allow_nan=False) + "\n"


# ----------------------------------------------------------------------------- folders
class output_folder:
    """Context manager: a version folder that replaces ``target`` only on success.

    ``with output_folder(path) as tmp: ...write into tmp...``.  ``target`` is a path, or a
    :class:`~isoscope.folders.Reservation` taken before the computation (which checks the
    destination early).  On an exception the version folder is removed and ``target`` is
    untouched; on success ``target`` is switched to it atomically (see :mod:`isoscope.folders`).
    """

    def __init__(self, target: str | Path | Reservation):
        self.reservation = target if isinstance(target, Reservation) else None
        self.target = target.target if isinstance(target, Reservation) else target

    def __enter__(self) -> Path:
        if self.reservation is None:
            self.reservation = reserve(self.target)
        return self.reservation.folder

    def __exit__(self, exc_type, exc, tb) -> None:
        assert self.reservation is not None, "__exit__ runs after __enter__"
        if exc_type is not None:
            self.reservation.abort()
            return
        try:
            self.reservation.commit()
        except BaseException:
            self.reservation.abort()
            raise


def _square(v: float) -> float:
    """``v * v`` (inf beyond the float range; ``v ** 2`` would raise OverflowError)."""
    return v * v


def _separate_length_mode(p) -> float | None:
    """log10 of the predicted input-length singular value when it lies outside the predicted
    bulk (:func:`isoscope.score.length_mode_side`; inside, it is one value among N)."""
    from isoscope.score import length_mode_side

    if p is None or length_mode_side(p) is None:
        return None
    return p.log_length_mode_s / math.log(10.0)


def _short(name: str, limit: int = 40) -> str:
    """A design name short enough for a figure title (the page shows it in full)."""
    return name if len(name) <= limit else name[: limit - 1] + "\u2026"


def _figures(analysis: Analysis, folder: Path, prefix: str = "") -> dict[str, Path]:
    from isoscope import plot
    from isoscope.theory import mean_field

    if analysis.spectrum is None:
        return {}
    name, p = _short(analysis.spec.name), analysis.predicted
    out = {}
    law = None if p is None else plot.PredictedLaw.from_density(p.density)
    g = analysis.agreement
    floor = None if g is None or g.floor <= 0 else 0.5 * math.log10(g.floor)
    fig = plot.log_s_figure(
        analysis.spectrum,
        f"{name}: singular values s of J (log axis)",
        law,
        floor,
        _separate_length_mode(p),
    )
    out["log_s"] = plot.save(fig, folder / f"{prefix}spectrum-log-s")[0]
    fig = plot.lambda_figure(
        analysis.spectrum, f"{name}: eigenvalues lambda = s^2 of J J^T", law, floor
    )
    out["lambda"] = plot.save(fig, folder / f"{prefix}spectrum-lambda")[0]
    if analysis.profile is not None:
        pr = analysis.profile
        fig = plot.depth_figure(
            pr,
            f"{name}: where the stack stops being isometric, layer by layer",
            analysis.spectrum.size,
        )
        out["depth"] = plot.save(fig, folder / f"{prefix}spread-by-depth")[0]
    n, i = analysis.spec.network, analysis.spec.init
    if n.family in ("plain", "conv1d", "conv2d") and n.activation is not None:
        try:
            line = mean_field.critical_line(n.activation)
        except TheoryError:  # no critical line for this activation: nothing to draw
            line = None
        point = (_square(i.sigma_w), _square(i.sigma_b))
        if line is not None and all(
            map(math.isfinite, point)
        ):  # a point beyond the float range has no place
            fig = plot.critical_figure(
                line.sigma_w2, line.sigma_b2, point, f"{name}: {n.activation} phase diagram"
            )
            out["critical"] = plot.save(fig, folder / f"{prefix}critical-line")[0]
    return out


_ROWS = (
    ("verdict", lambda r: r["score"]["verdict"]),
    ("isometry score", lambda r: r["score"]["isometry"]),
    ("shape score (gain corrected)", lambda r: r["score"]["shape_score"]),
    ("gain m1 = E[lambda]", lambda r: r["score"]["gain"]),
    ("gain per layer m1^(1/L)", lambda r: r["score"]["gain_per_layer"]),
    ("m2/m1^2 - 1", lambda r: r["score"]["normalised_variance"]),
    ("mean ln s", lambda r: (r["measured"] or {}).get("log_s", {}).get("mean")),
    ("std ln s", lambda r: (r["measured"] or {}).get("log_s", {}).get("std")),
    ("numerically zero s", lambda r: (r["measured"] or {}).get("zero_fraction")),
    ("log10 s_max/s_min", lambda r: (r["measured"] or {}).get("log10_condition")),
    (
        "predicted m1 (N -> infinity)",
        lambda r: (r["predicted"] or {}).get("lambda_moments", {}).get("m1"),
    ),
    ("predicted std ln s", lambda r: (r["predicted"] or {}).get("log_s", {}).get("std")),
    ("q* (mean field)", lambda r: (r["predicted"] or {}).get("q_star")),
    ("chi_1 (mean field)", lambda r: (r["predicted"] or {}).get("chi")),
    ("KS distance measured vs predicted", lambda r: (r["agreement"] or {}).get("ks")),
    ("m1 error measured/predicted - 1", lambda r: (r["agreement"] or {}).get("m1_rel_error")),
)

_PHRASES = {
    "isometric": "is close to an isometry",
    "mis-scaled": "is isometric up to its gain",
    "spread": "spreads its singular values",
    "vanishing": "shrinks gradients",
    "exploding": "amplifies gradients",
    "non-finite": "overflowed",
}


def verdict_sentence(r: dict[str, Any]) -> str:
    """One sentence for the top of a report from a ``result.json`` mapping: the design, its
    verdict in words, the isometry score, gain and spread, and the verdict's reason."""
    sc = r["score"]
    v = sc["verdict"]
    if v == "non-finite":
        return (
            f"{r['name']} overflowed at initialization: no spectrum was measured ({sc['reason']})."
        )
    return (
        f"{r['name']} {_PHRASES.get(v, 'is ' + v)} at initialization (verdict {v}): isometry "
        f"score {_cell(sc['isometry'], '.3g')}, gain m1 = {_cell(sc['gain'], '.4g')}, std ln s = "
        f"{_cell(sc['log_s_std'], '.3g')}; {sc['reason']}."
    )


def _design_line(r: dict[str, Any]) -> str:
    n, a = r["spec"]["network"], r["spec"]["analysis"]
    i = r["spec"].get("init")
    route = (r.get("measured") or {}).get("route") or (r.get("fault") or {}).get("route")
    tail = f"; {a['inputs']} draws, seed {a['seed']}, {a['dtype']}" + (
        f", {route} route" if route else ""
    )
    if n["family"] == "python":
        return f"the user's network {n['factory']}, input width {n['width']}{tail}"
    if n["family"] in ("conv1d", "conv2d"):
        size = n["size"] if isinstance(n["size"], int) else " x ".join(map(str, n["size"]))
        shape = (
            f"{n['family']} stack, {n['channels']} channels x {size} positions, kernel "
            f"{n['kernel']}, circular padding, depth {n['depth']}, {n['activation']}"
        )
    else:
        extra = f", alpha = {n['alpha']:g}" if n["family"] == "residual" else ""
        shape = (
            f"{n['family']} stack, width {n['width']}, depth {n['depth']}, {n['activation']}{extra}"
        )
    return (
        f"{shape}; {i['weights']} weights, sigma_w = {i['sigma_w']:g} (sigma_w^2 = "
        f"{_square(i['sigma_w']):.4g}), sigma_b = {i['sigma_b']:g}{tail}"
    )


_CAPTIONS = {
    "log_s": "singular values s of J on a log axis: measured histogram, predicted density (N -> infinity), SVD floor",
    "lambda": "eigenvalues lambda = s^2 of J J^T: measured histogram and predicted density",
    "depth": "layer by layer: pre-activation variance q^l, each layer's gain, and the spread of the partial Jacobians J_l ... J_1, against mean field and free probability",
    "critical": "the critical line chi_1 = 1 in the (sigma_w^2, sigma_b^2) plane and this design",
}

_NOTATION = (
    "s: singular values of the input-output Jacobian J; lambda = s^2: eigenvalues of "
    "J J^T. Isometry score = E[min(lambda, 1/lambda)]. Verdicts: gain outside [0.1, 10] "
    "is vanishing/exploding, score >= 0.8 is isometric (isoscope's conventions, "
    "docs/score.md)."
)


def _agreement_rows(r: dict[str, Any]) -> list[tuple[str, Any, Any]]:
    g = r["agreement"]
    if not g:
        return []
    return [
        ("KS distance (above the floor)", g["ks"], None),
        ("mean ln s [predicted, measured]", g["log_s_mean"][0], g["log_s_mean"][1]),
        ("std ln s [predicted, measured]", g["log_s_std"][0], g["log_s_std"][1]),
        ("zero share [predicted, measured]", g["zero_fraction"][0], g["zero_fraction"][1]),
        ("m1 error measured/predicted - 1", g["m1_rel_error"], None),
        ("m2 error measured/predicted - 1", g["m2_rel_error"], None),
        ("tail share of m1, m2", g["tail_share"][0], g["tail_share"][1]),
        ("disagree (cause)", g["disagree"], g["cause"]),
    ]


def _design_section(doc, r: dict[str, Any], figures: dict[str, Path], heading: bool) -> None:
    """One design's part of a page: its line, figures, tables and warnings."""
    if heading:
        doc.heading(r["name"])
        doc.paragraph(verdict_sentence(r))
    if r["spec"]["description"]:
        doc.paragraph(r["spec"]["description"])
    reason = (r.get("measured") or {}).get("route_reason")
    doc.paragraph(
        f"{_design_line(r)}. Inputs: {r['inputs']['detail']}."
        + (f" Route: {reason}." if reason else ""),
        small=True,
    )
    for key, path in figures.items():
        doc.figure(path, f"{r['name']}: {_CAPTIONS.get(key, key)}")
    doc.table(
        ["quantity", r["name"]],
        [(label, get(r)) for label, get in _ROWS],
        caption="measured and predicted spectrum",
    )
    rows = _agreement_rows(r)
    if rows:
        doc.table(
            ["agreement with theory", "value", "second value"],
            rows,
            caption="measurement against the infinite-width prediction",
        )
        outs = r["agreement"]["outliers"]
        if outs:
            doc.table(
                ["outlier", "side", "measured s (median)", "predicted s"],
                [(o["kind"], o["side"], o["measured_s"], o["predicted_s"]) for o in outs],
                caption="singular values set apart from the bulk (not scored)",
            )
    doc.warnings(r["warnings"])


def _facts(env: dict[str, Any], extra: dict[str, Any]) -> dict[str, Any]:
    keys = ("isoscope", "jax", "jaxlib", "numpy", "scipy", "python", "machine", "device")
    return {**{k: env.get(k) for k in keys}, **extra}


def _spec_text(spec) -> str:
    from isoscope.spec import spec_toml

    return spec_toml(spec)


def analysis_page(analysis: Analysis, result: dict[str, Any], figures: dict[str, Path]) -> str:
    """The report of one analysis: the verdict sentence, the figures, the tables, the warnings,
    the spec as TOML, the software versions, dtype and seed."""
    from isoscope.document import Document

    doc = Document(f"isoscope: {result['name']}", verdict_sentence(result))
    _design_section(doc, result, figures, heading=False)
    doc.paragraph(_NOTATION, small=True)
    doc.code("spec (resolved, every default filled in)", _spec_text(analysis.spec))
    a = result["spec"]["analysis"]
    doc.facts(
        "software and settings",
        _facts(
            result["environment"],
            {
                "dtype": a["dtype"],
                "seed": a["seed"],
                "draws": a["inputs"],
                "seconds": (result.get("seconds") or {}).get("total"),
            },
        ),
    )
    return doc.render()


def write_analysis_folder(analysis: Analysis, out: str | Path | Reservation) -> Path:
    """Write ``result.json``, the figures (PNG and SVG) and ``report.html`` for one analysis.

    ``out`` is the folder, or a :func:`~isoscope.folders.reserve` of it taken before computing.
    """
    result = result_dict(analysis)
    with output_folder(out) as tmp:
        figures = _figures(analysis, tmp)
        (tmp / "result.json").write_text(to_json(result), encoding="utf-8")
        (tmp / "report.html").write_text(analysis_page(analysis, result, figures), encoding="utf-8")
    return Path(out.target if isinstance(out, Reservation) else out)


def _cell(v: Any, spec: str) -> str:
    """A number for the terminal as JSON would give it: finite, or "—" where JSON has null."""
    return format(v, spec) if isinstance(v, (int, float)) and math.isfinite(v) else "—"


def summary_table(analyses: list[Analysis]) -> str:
    """A short fixed-width table for the terminal, one row per design."""
    cols = (
        "design",
        "verdict",
        "isometry",
        "gain m1",
        "m2/m1^2-1",
        "std ln s",
        "zero s",
        "KS vs theory",
    )
    rows = []
    for a in analyses:
        sc, sp = a.score, a.spectrum
        rows.append(
            (
                a.spec.name,
                sc.verdict,
                _cell(sc.isometry, ".3f"),
                _cell(sc.gain, ".4g"),
                _cell(sc.normalised_variance, ".3g"),
                _cell(sc.log_s_std, ".3f"),
                f"{100 * sp.zero_fraction:.1f}%" if sp is not None else "—",
                _cell(a.agreement.ks, ".3f") if a.agreement is not None else "—",
            )
        )
    widths = [max(len(c), *(len(r[i]) for r in rows)) for i, c in enumerate(cols)]
    line = lambda r: "  ".join(
        v.ljust(w) if i < 2 else v.rjust(w) for i, (v, w) in enumerate(zip(r, widths))
    )
    out = [line(cols), "  ".join("-" * w for w in widths)] + [line(r) for r in rows]
    for a in analyses:
        out += [f"! {a.spec.name}: {w}" for w in a.warnings]
    return "\n".join(out)


# ----------------------------------------------------------------------------- decisions
COMPARISON_SCHEMA = "isoscope.comparison/1"
RECOMMENDATION_SCHEMA = "isoscope.recommendation/1"

CRITERIA = {
    "isometry": "highest measured isometry score E[min(lambda, 1/lambda)] (the ranking's key)",
    "gain": "measured gain m1 closest to 1 on a log scale (smallest |log10 m1|)",
    "spread": "smallest measured std of ln s",
    "agreement": "smallest Kolmogorov-Smirnov distance between measurement and theory",
    "trainable_depth": "deepest trainable-depth estimate (trainable_depth.depth)",
}


def depth_limit_dict(d) -> dict[str, Any]:
    """A :class:`~isoscope.recommend.DepthLimit` as plain data (infinite depths become null,
    with ``beyond`` saying how deep the search looked)."""
    from isoscope.recommend import MAX_DEPTH, SIGNAL_MULTIPLE

    return {
        "depth": d.depth,
        "spread_depth": d.spread_depth,
        "signal_depth": d.signal_depth,
        "xi_c": d.xi_c,
        "spread_limit": d.limit,
        "signal_multiple": SIGNAL_MULTIPLE,
        "binding": d.binding,
        "reason": d.reason,
        "searched_to": MAX_DEPTH,
    }


def comparison_dict(
    analyses: list[Analysis], limits: list, ranking, seed_policy: str
) -> dict[str, Any]:
    """Several designs side by side (schema ``isoscope.comparison/1``): ``ranking`` (names, best
    first), ``winners`` (criterion -> names), ``criteria`` (what each criterion means), and
    ``designs`` in rank order, each with its ``rank``, its whole ``result`` (the result.json of
    ``analyze`` on the same spec, :func:`result_dict`) and its ``trainable_depth``."""
    designs = [
        {
            "rank": k,
            "name": analyses[i].spec.name,
            "result": result_dict(analyses[i]),
            "trainable_depth": depth_limit_dict(limits[i]),
        }
        for k, i in enumerate(ranking.order, 1)
    ]
    return _clean(
        {
            "schema": COMPARISON_SCHEMA,
            "seed_policy": seed_policy,
            "ranking": [analyses[i].spec.name for i in ranking.order],
            "winners": ranking.winners,
            "criteria": CRITERIA,
            "designs": designs,
            "environment": _environment(analyses[0]),
        }
    )


def _depth_cell(d) -> str:
    if d.depth == math.inf:
        from isoscope.recommend import MAX_DEPTH

        return f">{MAX_DEPTH}"
    return f"{d.depth:.0f} ({d.binding})"


def comparison_table(analyses: list[Analysis], limits: list, ranking) -> str:
    """The terminal form of a comparison: one row per design in rank order, then the winners
    per criterion and every design's warnings."""
    cols = (
        "#",
        "design",
        "verdict",
        "isometry",
        "gain m1",
        "std ln s",
        "outliers/draw",
        "KS vs theory",
        "trainable depth",
    )
    rows = []
    for k, i in enumerate(ranking.order, 1):
        a = analyses[i]
        sc, g = a.score, a.agreement
        outliers = "—" if g is None else str(len(g.outliers))
        rows.append(
            (
                str(k),
                a.spec.name,
                sc.verdict,
                _cell(sc.isometry, ".3f"),
                _cell(sc.gain, ".4g"),
                _cell(sc.log_s_std, ".3f"),
                outliers,
                _cell(g.ks, ".3f") if g is not None else "—",
                _depth_cell(limits[i]),
            )
        )
    widths = [max(len(c), *(len(r[j]) for r in rows)) for j, c in enumerate(cols)]
    line = lambda r: "  ".join(
        v.ljust(w) if j in (1, 2) else v.rjust(w) for j, (v, w) in enumerate(zip(r, widths))
    )
    out = [line(cols), "  ".join("-" * w for w in widths)] + [line(r) for r in rows]
    out.append("")
    for criterion, names in ranking.winners.items():
        out.append(f"best {criterion}: {', '.join(names) if names else '—'}")
    for i in ranking.order:
        a = analyses[i]
        out += [f"! {a.spec.name}: {w}" for w in a.warnings]
    return "\n".join(out)


def candidate_dict(c, why: str | None = None) -> dict[str, Any]:
    """One candidate of a recommendation: its full ``spec`` (``analyze`` accepts it), the
    initialization (``weights, sigma_w, sigma_b, alpha``; alpha null for plain stacks), the
    ``predicted`` and ``measured`` spread side by side, and ``why`` it lost (alternatives)."""
    a, n, i = c.analysis, c.spec.network, c.spec.init
    p = a.predicted if a is not None else None
    mf = p.mean_field if p is not None else None
    sc = a.score if a is not None else None
    measured = (
        None
        if a is None or sc is None
        else {
            "log_s_std": sc.log_s_std,
            "log_s_mean": a.spectrum.log_s_mean if a.spectrum else None,
            "isometry": sc.isometry,
            "gain": sc.gain,
            "verdict": sc.verdict,
            "draws": a.spectrum.draws if a.spectrum else 0,
            "warnings": list(a.warnings),
        }
    )
    return _clean(
        {
            "name": c.spec.name,
            "role": c.role,
            "spec": c.spec.to_dict(),
            "weights": i.weights,
            "sigma_w": i.sigma_w,
            "sigma_w2": _square(i.sigma_w),
            "sigma_b": i.sigma_b,
            "sigma_b2": _square(i.sigma_b),
            "alpha": n.alpha if n.family == "residual" else None,
            "meets_target": c.meets_target,
            "predicted": {
                "log_s_std": c.predicted_spread,
                "log_s_mean": p.log_s_mean if p is not None else None,
                "log_m1": p.moments.log_m1 if p is not None else None,
                "q_star": mf.q_star if mf else None,
                "chi": mf.chi1 if mf else None,
                "tau": p.tau if p is not None else None,
            },
            "measured": measured,
            **({} if why is None else {"why": why}),
        }
    )


def recommendation_dict(rec) -> dict[str, Any]:
    """A :class:`~isoscope.recommend.Recommendation` as plain data (schema
    ``isoscope.recommendation/1``): ``recommended`` and ``alternatives`` (same fields, see
    :func:`candidate_dict`), the recommended candidate's ``predicted`` and ``measured`` spread
    repeated at the top level, ``reason`` (sentences) and ``advice`` (its limits)."""
    from isoscope.recommend import ADVICE

    best = candidate_dict(rec.recommended)
    return _clean(
        {
            "schema": RECOMMENDATION_SCHEMA,
            "advice": ADVICE,
            "question": rec.question,
            "plain_isometric": rec.plain_isometric,
            "recommended": best,
            "predicted": {"log_s_std": best["predicted"]["log_s_std"]},
            "measured": {
                "log_s_std": (best["measured"] or {}).get("log_s_std"),
                "draws": (best["measured"] or {}).get("draws"),
            },
            "alternatives": [candidate_dict(c, w) for c, w in zip(rec.alternatives, rec.why)],
            "reason": list(rec.reason),
            "environment": _environment(rec.recommended.analysis),
        }
    )


def _init_text(c) -> str:
    n, i = c.spec.network, c.spec.init
    alpha = f", alpha = {n.alpha:.6g}" if n.family == "residual" else ""
    return (
        f"{n.family}, {i.weights} weights, sigma_w = {i.sigma_w:.10g} (sigma_w^2 = "
        f"{_square(i.sigma_w):.6g}), sigma_b = {i.sigma_b:.6g}{alpha}"
    )


def recommendation_text(rec) -> str:
    """The terminal form of a recommendation: the advice's limits first, the recommended design
    with prediction and measurement side by side, the alternatives and why they lost."""
    from isoscope.recommend import ADVICE

    q = rec.question
    best = rec.recommended
    lines = [
        f"! {ADVICE}",
        f"question: {q['activation']}, {q['family']} stack, depth {q['depth']}, width {q['width']}"
        f"; target std ln s {q['target_spread']:.4g}; each candidate measured with "
        f"{q['draws']} draw(s) at seed {q['seed']} (a small number of draws: the measured "
        "spread is indicative)",
        "",
        f"recommended: {_init_text(best)}",
    ]
    cols = ("candidate", "predicted std ln s", "measured std ln s", "isometry", "verdict")
    rows = []
    for c in (best, *rec.alternatives):
        sc = c.analysis.score
        rows.append(
            (
                c.role,
                _cell(c.predicted_spread, ".4g"),
                _cell(sc.log_s_std, ".4g"),
                _cell(sc.isometry, ".3f"),
                sc.verdict,
            )
        )
    widths = [max(len(h), *(len(r[j]) for r in rows)) for j, h in enumerate(cols)]
    line = lambda r: "  ".join(
        v.ljust(w) if j in (0, 4) else v.rjust(w) for j, (v, w) in enumerate(zip(r, widths))
    )
    lines += ["", line(cols), "  ".join("-" * w for w in widths)] + [line(r) for r in rows]
    lines += ["", "why:"] + [f"  {s}" for s in rec.reason]
    if rec.alternatives:
        lines += ["alternatives:"] + [
            f"  {_init_text(c)}: {w}" for c, w in zip(rec.alternatives, rec.why)
        ]
    lines += [f"! {best.spec.name}: {w}" for w in best.analysis.warnings]
    return "\n".join(lines)


def _design_folders(
    analyses: list[Analysis], tmp: Path
) -> list[tuple[dict[str, Any], dict[str, Path]]]:
    """One sub-folder per design (its result.json and figures); returns (result, figures)."""
    out = []
    for a in analyses:
        sub = tmp / safe_folder_name(a.spec.name)
        sub.mkdir()
        r = result_dict(a)
        (sub / "result.json").write_text(to_json(r), encoding="utf-8")
        out.append((r, _figures(a, sub)))
    return out


def _overlay_figures(analyses: list[Analysis], tmp: Path) -> dict[str, Path]:
    from isoscope import plot

    spectra = {a.spec.name: a.spectrum for a in analyses if a.spectrum is not None}
    if not spectra:
        return {}
    return {
        "cdf": plot.save(
            plot.cdf_overlay_figure(spectra, "all designs: fraction of singular values <= s"),
            tmp / "compare-cdf",
        )[0],
        "histograms": plot.save(
            plot.comparison_figure(spectra, "singular values s of J, all designs"),
            tmp / "compare-histograms",
        )[0],
    }


def write_compare_folder(
    analyses: list[Analysis],
    limits: list,
    ranking,
    seed_policy: str,
    out: str | Path | Reservation,
    spec_texts: dict[str, str] | None = None,
    title: str = "isoscope comparison",
    intro: str = "",
) -> Path:
    """Write a comparison: ``comparison.json``, one sub-folder per design (named by
    :func:`~isoscope.folders.safe_folder_name`, holding the design's result.json and figures),
    the overlay figures, the specs as given (``specs/``) and ``report.html``."""
    data = comparison_dict(analyses, limits, ranking, seed_policy)
    with output_folder(out) as tmp:
        per_design = _design_folders(analyses, tmp)
        overlays = _overlay_figures([analyses[i] for i in ranking.order], tmp)
        if spec_texts:
            (tmp / "specs").mkdir()
            for name, text in spec_texts.items():
                (tmp / "specs" / f"{safe_folder_name(name)}.toml").write_text(
                    text, encoding="utf-8"
                )
        (tmp / "comparison.json").write_text(to_json(data), encoding="utf-8")
        (tmp / "report.html").write_text(
            _compare_page(data, per_design, overlays, ranking, analyses, title, intro),
            encoding="utf-8",
        )
    return Path(out.target if isinstance(out, Reservation) else out)


def write_recommend_folder(rec, out: str | Path | Reservation) -> Path:
    """Write a recommendation: ``recommendation.json``, ``recommended.toml`` (a spec ``analyze``
    accepts), one sub-folder per candidate (result.json and figures) and ``report.html``."""
    data = recommendation_dict(rec)
    cands = [rec.recommended, *rec.alternatives]
    with output_folder(out) as tmp:
        per_design = _design_folders([c.analysis for c in cands], tmp)
        overlays = _overlay_figures([c.analysis for c in cands], tmp)
        (tmp / "recommendation.json").write_text(to_json(data), encoding="utf-8")
        (tmp / "recommended.toml").write_text(_spec_text(rec.recommended.spec), encoding="utf-8")
        (tmp / "report.html").write_text(
            _recommend_page(data, rec, per_design, overlays), encoding="utf-8"
        )
    return Path(out.target if isinstance(out, Reservation) else out)


def compare_verdict(data: dict[str, Any]) -> str:
    """One sentence for the top of a comparison: who ranks first, by how much, and why."""
    d = data["designs"]
    first = d[0]["result"]["score"]
    text = (
        f"{d[0]['name']} ranks first of {len(d)} designs: isometry score "
        f"{_cell(first['isometry'], '.3g')} (verdict {first['verdict']}), std ln s "
        f"{_cell(first['log_s_std'], '.3g')}"
    )
    if len(d) > 1:
        second = d[1]["result"]["score"]
        text += (
            f"; next is {d[1]['name']} with {_cell(second['isometry'], '.3g')} "
            f"({second['verdict']})"
        )
    return text + "."


def _ranking_rows(data: dict[str, Any]) -> list[tuple]:
    rows = []
    for d in data["designs"]:
        r, t = d["result"], d["trainable_depth"]
        g = r["agreement"] or {}
        rows.append(
            (
                d["rank"],
                d["name"],
                r["score"]["verdict"],
                r["score"]["isometry"],
                r["score"]["gain"],
                r["score"]["log_s_std"],
                len(g.get("outliers", [])),
                g.get("ks"),
                int(t["depth"]) if t["depth"] is not None else f">{t['searched_to']}",
                t["binding"],
            )
        )
    return rows


def _compare_page(data, per_design, overlays, ranking, analyses, title, intro) -> str:
    from isoscope.document import Document

    doc = Document(title, compare_verdict(data))
    if intro:
        doc.paragraph(intro)
    doc.paragraph(
        f"Seed policy: {data['seed_policy']}. Every design is analysed exactly as "
        "`isoscope analyze` would analyse its spec.",
        small=True,
    )
    doc.heading("ranking")
    doc.table(
        [
            "#",
            "design",
            "verdict",
            "isometry",
            "gain m1",
            "std ln s",
            "outliers/draw",
            "KS vs theory",
            "trainable depth",
            "set by",
        ],
        _ranking_rows(data),
        caption="ranked by measured isometry score; trainable depth: the smaller of the "
        "depth where the predicted std ln s reaches ln 10 and 6 xi_c (docs/decide.md)",
    )
    doc.table(
        ["criterion", "best", "meaning"],
        [(k, ", ".join(v) or None, CRITERIA[k]) for k, v in data["winners"].items()],
        caption="which design wins on what",
    )
    if "cdf" in overlays:
        doc.figure(
            overlays["cdf"],
            "every design on one axis: fraction of singular values <= s "
            "(a perfect isometry is a step at s = 1)",
        )
        doc.figure(
            overlays["histograms"], "histograms of log10 s, one panel per design, shared axis"
        )
    by_name = {r["name"]: (r, f) for r, f in per_design}
    for d in data["designs"]:
        r, figs = by_name[d["name"]]
        _design_section(doc, r, figs, heading=True)
        doc.paragraph(f"Trainable depth: {d['trainable_depth']['reason']}.", small=True)
    doc.paragraph(_NOTATION, small=True)
    doc.heading("specs")
    for a in analyses:
        doc.code(a.spec.name, _spec_text(a.spec))
    env = data["environment"]
    doc.facts(
        "software",
        _facts(
            env,
            {
                "dtype": ", ".join(sorted({a.spec.analysis.dtype for a in analyses})),
                "seeds": ", ".join(str(a.spec.analysis.seed) for a in analyses),
            },
        ),
    )
    return doc.render()


def recommend_verdict(data: dict[str, Any]) -> str:
    """One sentence for the top of a recommendation: what to initialize with, and the spread
    predicted and measured."""
    q, b = data["question"], data["recommended"]
    alpha = f", alpha = {b['alpha']:.4g}" if b["alpha"] is not None else ""
    fam = b["spec"]["network"]["family"]
    return (
        f"For {q['activation']} at depth {q['depth']} and width {q['width']}: a {fam} stack "
        f"with {b['weights']} weights, sigma_w = {b['sigma_w']:.6g}, sigma_b = "
        f"{b['sigma_b']:.4g}{alpha}; predicted std ln s {_cell(b['predicted']['log_s_std'], '.3g')}, "
        f"measured {_cell((b['measured'] or {}).get('log_s_std'), '.3g')} "
        f"({(b['measured'] or {}).get('draws')} draws)."
    )


def _recommend_page(data, rec, per_design, overlays) -> str:
    from isoscope.document import Document

    q = data["question"]
    doc = Document(
        f"isoscope recommendation: {q['activation']}, depth {q['depth']}, width {q['width']}",
        recommend_verdict(data),
    )
    doc.warnings([data["advice"]])
    doc.paragraph(
        f"Question: {q['activation']}, {q['family']} stack, depth {q['depth']}, width "
        f"{q['width']}, target std ln s {q['target_spread']:.4g}"
        + (f", sigma_b kept at {q['sigma_b']:g}" if q["sigma_b"] is not None else "")
        + f". Every candidate was measured with {q['draws']} draw(s) at seed {q['seed']}: "
        "fewer draws than a full analysis, so the measured spread is indicative."
    )
    rows = []
    for c in [data["recommended"], *data["alternatives"]]:
        m = c["measured"] or {}
        rows.append(
            (
                c["role"],
                c["weights"],
                c["sigma_w"],
                c["sigma_b"],
                c["alpha"],
                c["predicted"]["log_s_std"],
                m.get("log_s_std"),
                m.get("isometry"),
                m.get("verdict"),
            )
        )
    doc.table(
        [
            "candidate",
            "weights",
            "sigma_w",
            "sigma_b",
            "alpha",
            "predicted std ln s",
            "measured std ln s",
            "isometry",
            "verdict",
        ],
        rows,
        caption="first row: the recommendation; prediction (N -> infinity) and measurement side by side",
    )
    doc.heading("why")
    for sentence in data["reason"]:
        doc.paragraph(sentence)
    if data["alternatives"]:
        doc.heading("why the others lost", level=3)
        for c in data["alternatives"]:
            doc.paragraph(c["why"])
    if "cdf" in overlays:
        doc.figure(overlays["cdf"], "every candidate on one axis: fraction of singular values <= s")
    for (r, figs), c in zip(per_design, [rec.recommended, *rec.alternatives]):
        doc.heading(f"{c.role}: {r['name']}")
        doc.paragraph(verdict_sentence(r))
        for key in ("log_s", "depth"):
            if key in figs:
                doc.figure(figs[key], f"{r['name']}: {_CAPTIONS[key]}")
        doc.warnings(r["warnings"])
    doc.code("recommended spec (recommended.toml)", _spec_text(rec.recommended.spec))
    doc.facts(
        "software and settings",
        _facts(
            data["environment"],
            {"dtype": rec.recommended.spec.analysis.dtype, "seed": q["seed"], "draws": q["draws"]},
        ),
    )
    return doc.render()


# ----------------------------------------------------------------------------- sweeps (show)
def _text(v: Any) -> str:
    """A table value for the terminal: numbers to 4 significant digits, null as an em dash."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "\u2014"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def _fixed_width(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [
        max(len(h), *(len(r[j]) for r in rows)) if rows else len(h) for j, h in enumerate(header)
    ]
    line = lambda r: "  ".join(v.rjust(w) for v, w in zip(r, widths)).rstrip()
    return [line(header), "  ".join("-" * w for w in widths)] + [line(r) for r in rows]


def show_table_text(table) -> str:
    """The terminal form of :func:`isoscope.sweep.view.points_table`: one row per point, without
    the long point names (the varied settings tell the points apart; ``--csv`` and ``--json``
    have the names) and with the error column only when some point failed (its first line)."""
    cols = list(table.columns)
    keep = [
        j
        for j, c in enumerate(cols)
        if c != "name" and (c != "error" or any(r[j] for r in table.rows))
    ]
    rows = [
        [_text(r[j]).splitlines()[0] if r[j] else _text(r[j]) for j in keep] for r in table.rows
    ]
    return "\n".join(_fixed_width([cols[j] for j in keep], rows))


def show_matrix_text(matrix) -> str:
    """A :class:`~isoscope.sweep.view.Matrix` for the terminal: one block per facet, rows
    ``y`` (as stored, ascending), columns ``x``; an em dash where no number is stored."""
    out = []
    for f in matrix.facets:
        fixed = ", ".join(f"{k} = {v}" for k, v in f.fixed.items())
        out.append(
            f"{matrix.metric}"
            + (f" at {fixed}" if fixed else "")
            + f" (rows {matrix.y_key}, columns {matrix.x_key})"
        )
        header = [f"{matrix.y_key} \\ {matrix.x_key}", *(_text(v) for v in matrix.x)]
        rows = [[_text(y), *(_text(float(v)) for v in f.values[i])] for i, y in enumerate(matrix.y)]
        out += _fixed_width(header, rows) + [""]
    return "\n".join(out).rstrip()


def check_new_file(path: str | Path, flag: str) -> Path:
    """Refuse, before any work, a file path that cannot be written: a folder, a missing or
    read-only parent folder."""
    import os

    path = Path(path)
    if path.is_dir():
        raise InputError(
            f"{flag} {str(path)!r} is a folder",
            expected="a file path",
            hint=f"e.g. {flag} {str(path / 'points.csv')!r}",
        )
    if not path.parent.is_dir():
        raise InputError(
            f"{flag} {str(path)!r}: folder {str(path.parent)!r} does not exist",
            expected="a path in an existing folder",
            hint="create the folder first",
        )
    if not os.access(path.parent, os.W_OK | os.X_OK):
        raise InputError(
            f"{flag} {str(path)!r}: folder {str(path.parent)!r} is not writable",
            expected="a path in a folder you may write",
        )
    return path


def _csv_cell(v: Any) -> Any:
    return "" if v is None or (isinstance(v, float) and not math.isfinite(v)) else v


def write_csv(table, path: str | Path) -> Path:
    """Write a :class:`~isoscope.sweep.view.Table` as CSV (header row, one row per point, empty
    cells for null) atomically: a temporary file beside ``path``, renamed over it when complete."""
    import csv
    import os
    import tempfile

    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; an ordinary new file follows the umask
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as f:
            w = csv.writer(f)
            w.writerow(table.columns)
            w.writerows([[_csv_cell(v) for v in r] for r in table.rows])
            f.flush()
            os.fsync(f.fileno())
        from isoscope.folders import interrupted

        if interrupted():
            raise KeyboardInterrupt
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    return path


def _setting_text(settings: dict[str, Any]) -> str:
    return ", ".join(f"{k} = {v}" for k, v in settings.items()) or "the only setting stored"


def show_verdict(data: dict[str, Any]) -> str:
    """One sentence for the top of a show report: the points, which one scores best, and
    whether the ridge of the isometry score follows the mean-field critical line."""
    pts = data["points"]
    failed = sum(p["status"] == "failed" for p in pts)
    text = f"{len(pts)} points ({len(pts) - failed} done, {failed} failed)"
    best = data["best"]
    if best is None:
        return text + "; no point has an isometry score."
    verdict = next(p["numbers"].get("score.verdict") for p in pts if p["name"] == best["name"])
    text += (
        f"; the best isometry score is {_cell(best['value'], '.3g')} at "
        f"{_setting_text(best['settings'])} (verdict {verdict})"
    )
    rows = data["ridge"]
    if rows:
        k = sum(r["follows"] for r in rows)
        how = (
            "follows"
            if k == len(rows)
            else "mostly follows"
            if 2 * k > len(rows)
            else "does not follow"
        )
        text += (
            f"; the ridge {how} the mean-field critical line: in {k} of {len(rows)} "
            "sigma_b rows the best sigma_w is the grid value nearest the critical one"
        )
    return text + "."


_SHOW_CAPTIONS = {
    "phase": "heat maps over the two axes, one row per combination of the other varied keys; "
    "hatched cells have no stored number",
    "curves": "the chosen metric along the x axis, one line per combination of the other varied keys",
    "depth": "the chosen metric against network.depth, one line per combination of the other varied keys",
}


def _show_figures(view, tmp: Path) -> dict[str, Path]:
    from isoscope import plot

    name = Path(view.store).name
    out = {}
    if view.matrices is not None:
        fig = plot.phase_figure(
            list(view.matrices.values()), f"{name}: {view.y} against {view.x}", view.critical
        )
        out["phase"] = plot.save(fig, tmp / "phase-diagram", formats=("png",))[0]
    if view.curves is not None:
        fig = plot.curves_figure(
            view.curves, view.x, view.metric, f"{name}: {view.metric} along {view.x}"
        )
        out["curves"] = plot.save(fig, tmp / "curves", formats=("png",))[0]
    if view.depth_curves is not None:
        fig = plot.curves_figure(
            view.depth_curves, "network.depth", view.metric, f"{name}: {view.metric} with depth"
        )
        out["depth"] = plot.save(fig, tmp / "depth-curves", formats=("png",))[0]
    return out


def _show_page(view, data: dict[str, Any], figures: dict[str, Path]) -> str:
    from isoscope.document import Document
    from isoscope.sweep.view import PHASE_METRICS, points_table

    doc = Document(f"isoscope show: {Path(view.store).name}", show_verdict(data))
    doc.paragraph(
        f"Store {view.store}; varied: {', '.join(view.varied) or 'nothing'}"
        + (f"; selected with {', '.join(view.where)}" if view.where else "")
        + f"; metric {view.metric}. Every point was measured exactly as `isoscope analyze` "
        "would measure its spec.",
        small=True,
    )
    doc.warnings(view.notes)
    for key, path in figures.items():
        doc.figure(path, _SHOW_CAPTIONS[key])
    if view.ridge:
        doc.table(
            [
                "fixed",
                "sigma_b",
                "best sigma_w",
                "critical sigma_w",
                "nearest grid sigma_w",
                "follows",
            ],
            [
                (
                    _setting_text(r.fixed) if r.fixed else None,
                    r.sigma_b,
                    r.best_sigma_w,
                    r.critical_sigma_w,
                    r.nearest_sigma_w,
                    r.follows,
                )
                for r in view.ridge
            ],
            caption="the ridge: per sigma_b row, the best-scoring sigma_w against the "
            "mean-field critical sigma_w (chi_1 = 1)",
        )
    metrics = list(dict.fromkeys((view.metric, *PHASE_METRICS, "score.verdict")))
    t = points_table(view.points, metrics)
    doc.table(list(t.columns), t.rows, caption="every point (also points.csv, with every number)")
    doc.paragraph(_NOTATION, small=True)
    doc.facts(
        "store",
        {
            "schema": data["schema"],
            "points": len(view.points),
            "isoscope": __import__("isoscope").__version__,
        },
    )
    return doc.render()


def write_show_folder(view, out: str | Path | Reservation) -> Path:
    """Write a show report: the figures (PNG), ``points.csv`` (every point, every number),
    ``show.json`` (:func:`isoscope.sweep.view.show_dict`) and ``report.html``."""
    from isoscope.sweep.view import csv_table, show_dict

    data = show_dict(view)
    with output_folder(out) as tmp:
        figures = _show_figures(view, tmp)
        write_csv(csv_table(view.points), tmp / "points.csv")
        (tmp / "show.json").write_text(to_json(data), encoding="utf-8")
        (tmp / "report.html").write_text(_show_page(view, data, figures), encoding="utf-8")
    return Path(out.target if isinstance(out, Reservation) else out)
