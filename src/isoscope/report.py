"""Results as files: versioned JSON, figures, a self-contained HTML page, a terminal table.

Output folders are written crash-safe (:mod:`isoscope.folders`): everything goes into a
version folder beside the target, and the target, a link, is switched to it in one atomic
rename only when it is complete.  An existing folder is replaced only if isoscope wrote it;
any other non-empty folder is left alone and the run stops with an error, so nothing a user
saved is overwritten.
"""

from __future__ import annotations

import base64
import html
import json
import math
import platform
from pathlib import Path
from typing import Any

import numpy as np

from isoscope.analysis import Analysis
from isoscope.errors import TheoryError
from isoscope.folders import Reservation, reserve, safe_folder_name

__all__ = ["SCHEMA", "GLOSSARY", "result_dict", "prediction_dict", "to_json", "write_analysis_folder",
           "write_comparison_folder", "summary_table", "output_folder"]

SCHEMA = "isoscope.result/1"

GLOSSARY = {
    "measured.draws": "independent (parameter, input) draws pooled in the spectrum",
    "measured.singular_values_per_draw": "singular values of each Jacobian (its smaller dimension)",
    "measured.lambda_moments.mK": "K-th moment of lambda = s^2 over all draws, E[lambda^K], zeros included",
    "measured.lambda_m1_draw_spread": "standard deviation of m1 across draws (sampling noise of m1)",
    "measured.log_s.mean": "mean of ln s over the non-zero singular values",
    "measured.log_s.std": "standard deviation of ln s over the non-zero singular values",
    "measured.log_s.min, .max": "smallest and largest ln s over the non-zero singular values",
    "measured.zero_fraction": "fraction of singular values at or below zero_threshold * s_max of their draw",
    "measured.zero_threshold": "relative threshold n * eps(dtype) for a numerically zero singular value",
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
    return {"isoscope": __import__("isoscope").__version__, "jax": jax.__version__,
            "numpy": np.__version__, "python": platform.python_version(),
            "machine": platform.machine(), "device": jax.devices()[0].platform,
            "dtype": analysis.spec.analysis.dtype,
            "jax_enable_x64": bool(jax.config.read("jax_enable_x64"))}


def _measured(analysis: Analysis) -> dict[str, Any] | None:
    s = analysis.spectrum
    if s is None:
        return None
    lo, hi = s.log_s_range
    return {
        "method": "dense Jacobian by jax.jacfwd, singular values by SVD" if s.method == "svd" else s.method,
        "draws": s.draws,
        "singular_values_per_draw": s.size,
        "lambda_moments": s.lambda_moments,
        "lambda_m1_draw_spread": float(np.std(s.lambda_moment_draws(1))) if s.draws > 1 else None,
        "log_s": {"mean": s.log_s_mean, "std": s.log_s_std, "min": lo, "max": hi},
        "zero_fraction": s.zero_fraction,
        "zero_threshold": s.threshold,
        "log10_condition": s.log10_condition,
        "s_quantiles": s.s_quantiles,
    }


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
        "family": p.family, "activation": p.activation, **extra, "weights": p.weights,
        "ensemble": p.ensemble,
        "sigma_w": p.sigma_w, "sigma_w2": _square(p.sigma_w), "sigma_b": p.sigma_b,
        "sigma_b2": _square(p.sigma_b), "depth": p.depth,
        "alpha": p.alpha if p.family == "residual" else None,
        "regime": p.regime,
        "q_star": mf.q_star if mf else None, "chi": mf.chi1 if mf else None,
        "xi_q": mf.xi_q if mf else None, "xi_c": mf.xi_c if mf else None,
        "c_star": mf.c_star if mf else None, "phase": mf.phase if mf else None,
        "q_law": p.q_law, "tau": p.tau, "q_layers": p.q_layers,
        "lambda_moments": {f"m{k}": v for k, v in enumerate(p.moments[:4], 1)},
        "log_lambda_moments": {f"log_m{k}": v for k, v in enumerate(p.moments.logs, 1)},
        "log_s": {"mean": p.log_s_mean, "std": p.log_s_std},
        "atom_at_zero": d.atom_at_zero,
        "atoms": [{"lambda": a, "log_lambda": la, "weight": w}
                  for (a, w), (la, _) in zip(d.atoms, d.log_atoms)],
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
    return {"depths": p.depths, "measured_log_s_std": p.measured_log_s_std,
            "predicted_log_s_std": p.predicted_log_s_std, "measured_log_m1": p.measured_log_m1,
            "predicted_log_m1": p.predicted_log_m1, "measured_isometry": p.measured_isometry,
            "predicted_isometry": p.predicted_isometry, "isometric_until": p.isometric_until,
            "predicted_isometric_until": p.predicted_isometric_until, "layers": p.layers,
            "measured_q": p.measured_q, "measured_q_draw_std": p.measured_q_draw_std,
            "predicted_q": p.predicted_q, "measured_layer_gain": p.measured_layer_gain,
            "predicted_layer_gain": p.predicted_layer_gain}


def result_dict(analysis: Analysis) -> dict[str, Any]:
    """The result of one analysis as plain JSON-ready data (schema ``isoscope.result/1``)."""
    f = analysis.fault
    return _clean({
        "schema": SCHEMA,
        "name": analysis.spec.name,
        "spec": analysis.spec.to_dict(),
        "environment": _environment(analysis),
        "inputs": {"kind": analysis.inputs.kind, "variance": analysis.inputs.variance,
                   "detail": analysis.inputs.detail},
        "measured": _measured(analysis),
        "fault": None if f is None else {"stage": f.stage, "layer": f.layer, "detail": f.detail},
        "score": analysis.score._asdict(),
        "predicted": None if analysis.predicted is None else prediction_dict(analysis.predicted),
        "agreement": _agreement_dict(analysis.agreement),
        "profile": _profile_dict(analysis.profile),
        "warnings": list(analysis.warnings),
        "seconds": analysis.seconds,
        "glossary": GLOSSARY,
    })


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

    def __init__(self, target: "str | Path | Reservation"):
        self.reservation = target if isinstance(target, Reservation) else None
        self.target = target.target if isinstance(target, Reservation) else target

    def __enter__(self) -> Path:
        if self.reservation is None:
            self.reservation = reserve(self.target)
        return self.reservation.folder

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is not None:
            self.reservation.abort()
            return False
        try:
            self.reservation.commit()
        except BaseException:
            self.reservation.abort()
            raise
        return False


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


def _figures(analysis: Analysis, folder: Path, prefix: str = "") -> dict[str, Path]:
    from isoscope import plot
    from isoscope.theory import mean_field
    if analysis.spectrum is None:
        return {}
    name, p = analysis.spec.name, analysis.predicted
    out = {}
    law = None if p is None else plot.PredictedLaw.from_density(p.density)
    g = analysis.agreement
    floor = None if g is None or g.floor <= 0 else 0.5 * math.log10(g.floor)
    fig = plot.log_s_figure(analysis.spectrum, f"{name}: singular values s of J (log axis)", law, floor,
                            _separate_length_mode(p))
    out["log_s"] = plot.save(fig, folder / f"{prefix}spectrum-log-s")[0]
    fig = plot.lambda_figure(analysis.spectrum, f"{name}: eigenvalues lambda = s^2 of J J^T", law, floor)
    out["lambda"] = plot.save(fig, folder / f"{prefix}spectrum-lambda")[0]
    if analysis.profile is not None:
        pr = analysis.profile
        fig = plot.depth_figure(pr, f"{name}: where the stack stops being isometric, layer by layer",
                                analysis.spectrum.size)
        out["depth"] = plot.save(fig, folder / f"{prefix}spread-by-depth")[0]
    n, i = analysis.spec.network, analysis.spec.init
    if n.family == "plain":
        try:
            line = mean_field.critical_line(n.activation)
        except TheoryError:  # no critical line for this activation: nothing to draw
            line = None
        point = (_square(i.sigma_w), _square(i.sigma_b))
        if line is not None and all(map(math.isfinite, point)):  # a point beyond the float range has no place
            fig = plot.critical_figure(line.sigma_w2, line.sigma_b2, point,
                                       f"{name}: {n.activation} phase diagram")
            out["critical"] = plot.save(fig, folder / f"{prefix}critical-line")[0]
    return out


def _img(path: Path, alt: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _fmt(v: Any) -> str:
    if v is None:
        return "—"
    if isinstance(v, float):
        if not math.isfinite(v):
            return "—"
        return f"{v:.4g}"
    return html.escape(str(v))


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
    ("predicted m1 (N -> infinity)", lambda r: (r["predicted"] or {}).get("lambda_moments", {}).get("m1")),
    ("predicted std ln s", lambda r: (r["predicted"] or {}).get("log_s", {}).get("std")),
    ("q* (mean field)", lambda r: (r["predicted"] or {}).get("q_star")),
    ("chi_1 (mean field)", lambda r: (r["predicted"] or {}).get("chi")),
    ("KS distance measured vs predicted", lambda r: (r["agreement"] or {}).get("ks")),
    ("m1 error measured/predicted - 1", lambda r: (r["agreement"] or {}).get("m1_rel_error")),
)


def _design_line(r: dict[str, Any]) -> str:
    n, i, a = r["spec"]["network"], r["spec"]["init"], r["spec"]["analysis"]
    extra = f", alpha = {n['alpha']:g}" if n["family"] == "residual" else ""
    return (f"{n['family']} stack, width {n['width']}, depth {n['depth']}, {n['activation']}; "
            f"{i['weights']} weights, sigma_w = {i['sigma_w']:g} (sigma_w^2 = {_square(i['sigma_w']):.4g}), "
            f"sigma_b = {i['sigma_b']:g}{extra}; {a['inputs']} draws, seed {a['seed']}, {a['dtype']}")


_CSS = """body{font-family:system-ui,sans-serif;max-width:64rem;margin:2rem auto;color:#222;padding:0 1rem}
table{border-collapse:collapse;margin:1rem 0}td,th{border-bottom:1px solid #ccc;padding:.3rem .7rem;text-align:right}
th:first-child,td:first-child{text-align:left}.warn{background:#fff4e0;border-left:4px solid #c4512b;padding:.5rem 1rem}
img{max-width:100%}h2{margin-top:2.5rem;border-top:2px solid #2f6f73;padding-top:1rem}.small{color:#555;font-size:.9rem}"""


def _html_page(title: str, intro: str, results: list[dict[str, Any]], sections: list[str]) -> str:
    head = "".join(f"<th>{html.escape(r['name'])}</th>" for r in results)
    body = "".join(f"<tr><td>{html.escape(label)}</td>" + "".join(f"<td>{_fmt(get(r))}</td>" for r in results)
                   + "</tr>" for label, get in _ROWS)
    return (f"<!doctype html><html><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
            f"<style>{_CSS}</style></head><body><h1>{html.escape(title)}</h1>{intro}"
            f"<table><tr><th></th>{head}</tr>{body}</table>"
            "<p class='small'>s: singular values of the input-output Jacobian J; lambda = s^2: "
            "eigenvalues of J J^T. Isometry score = E[min(lambda, 1/lambda)]. "
            "Verdict thresholds: gain outside [0.1, 10] is vanishing/exploding, score >= 0.8 is isometric "
            "(isoscope's conventions).</p>"
            + "".join(sections) + "</body></html>\n")


def _section_html(r: dict[str, Any], figures: dict[str, Path]) -> str:
    warn = "".join(f"<p class='warn'>{html.escape(w)}</p>" for w in r["warnings"])
    figs = "".join(_img(p, k) for k, p in figures.items())
    desc = f"<p>{html.escape(r['spec']['description'])}</p>" if r["spec"]["description"] else ""
    return (f"<h2>{html.escape(r['name'])}</h2>{desc}<p class='small'>{html.escape(_design_line(r))}. "
            f"Inputs: {html.escape(r['inputs']['detail'])}.</p>{warn}"
            f"<p><b>{html.escape(r['score']['verdict'])}</b>: {html.escape(r['score']['reason'])}</p>{figs}")


def write_analysis_folder(analysis: Analysis, out: "str | Path | Reservation") -> Path:
    """Write ``result.json``, the figures (PNG and SVG) and ``report.html`` for one analysis.

    ``out`` is the folder, or a :func:`~isoscope.folders.reserve` of it taken before computing.
    """
    result = result_dict(analysis)
    with output_folder(out) as tmp:
        figures = _figures(analysis, tmp)
        (tmp / "result.json").write_text(to_json(result))
        page = _html_page(f"isoscope: {analysis.spec.name}", "", [result], [_section_html(result, figures)])
        (tmp / "report.html").write_text(page)
    return Path(out.target if isinstance(out, Reservation) else out)


def write_comparison_folder(analyses: list[Analysis], out: "str | Path | Reservation", title: str,
                            intro_html: str, spec_texts: dict[str, str] | None = None) -> Path:
    """Write a folder comparing several designs: one sub-folder per design (named by
    :func:`~isoscope.folders.safe_folder_name` of its label), a summary, a page."""
    from isoscope import plot
    results = [result_dict(a) for a in analyses]
    with output_folder(out) as tmp:
        sections = []
        for a, r in zip(analyses, results):
            sub = tmp / safe_folder_name(a.spec.name)
            sub.mkdir()
            (sub / "result.json").write_text(to_json(r))
            sections.append(_section_html(r, _figures(a, sub)))
        spectra = {a.spec.name: a.spectrum for a in analyses if a.spectrum is not None}
        fig_html = ""
        if spectra:
            path = plot.save(plot.comparison_figure(spectra, "singular values s of J, all designs"),
                             tmp / "comparison-log-s")[0]
            fig_html = _img(path, "comparison")
        if spec_texts:
            (tmp / "specs").mkdir()
            for name, text in spec_texts.items():
                (tmp / "specs" / f"{safe_folder_name(name)}.toml").write_text(text)
        (tmp / "summary.json").write_text(to_json({"schema": SCHEMA, "title": title, "results": results}))
        page = _html_page(title, intro_html + fig_html, results, sections)
        (tmp / "report.html").write_text(page)
    return Path(out.target if isinstance(out, Reservation) else out)


def _cell(v: float, spec: str) -> str:
    """A number for the terminal as JSON would give it: finite, or "—" where JSON has null."""
    return format(v, spec) if isinstance(v, (int, float)) and math.isfinite(v) else "—"


def summary_table(analyses: list[Analysis]) -> str:
    """A short fixed-width table for the terminal, one row per design."""
    cols = ("design", "verdict", "isometry", "gain m1", "m2/m1^2-1", "std ln s", "zero s",
            "KS vs theory")
    rows = []
    for a in analyses:
        sc, sp = a.score, a.spectrum
        rows.append((a.spec.name, sc.verdict, _cell(sc.isometry, ".3f"), _cell(sc.gain, ".4g"),
                     _cell(sc.normalised_variance, ".3g"), _cell(sc.log_s_std, ".3f"),
                     f"{100 * sp.zero_fraction:.1f}%" if sp is not None else "—",
                     _cell(a.agreement.ks, ".3f") if a.agreement is not None else "—"))
    widths = [max(len(c), *(len(r[i]) for r in rows)) for i, c in enumerate(cols)]
    line = lambda r: "  ".join(v.ljust(w) if i < 2 else v.rjust(w) for i, (v, w) in enumerate(zip(r, widths)))
    out = [line(cols), "  ".join("-" * w for w in widths)] + [line(r) for r in rows]
    for a in analyses:
        out += [f"! {a.spec.name}: {w}" for w in a.warnings]
    return "\n".join(out)
