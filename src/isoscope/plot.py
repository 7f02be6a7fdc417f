"""All figures.  Matplotlib is imported lazily (``import isoscope`` stays light).

Colour code (isoscope's own): measured data in slate teal, predictions in burnt orange, the
isometry reference (s = 1) as a dashed charcoal line; designs in a comparison take the
``DESIGN_COLOURS`` cycle.  Every axis says whether it shows s or lambda = s^2.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from isoscope.spectrum import Spectrum

__all__ = ["log_s_figure", "lambda_figure", "comparison_figure", "depth_figure", "critical_figure",
           "predicted_log10_s_curve", "save"]

MEASURED = "#2f6f73"
PREDICTED = "#c4512b"
REFERENCE = "#333333"
DESIGN_COLOURS = ("#2f6f73", "#c4512b", "#6b5b95", "#b8860b", "#3b7d3b", "#8c564b")


def _pyplot():
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    return plt


def _log10_s(spectrum: Spectrum) -> np.ndarray:
    return spectrum.log_s_nonzero / math.log(10.0)


def _bins(values: np.ndarray, count: int = 60) -> np.ndarray:
    lo, hi = float(values.min()), float(values.max())
    if hi - lo < 1e-6:
        lo, hi = lo - 0.05, hi + 0.05
    pad = 0.02 * (hi - lo)
    return np.linspace(lo - pad, hi + pad, count + 1)


def log_s_figure(spectrum: Spectrum, title: str, predicted: tuple[np.ndarray, np.ndarray] | None = None,
                 floor_log10_s: float | None = None, length_mode_log10_s: float | None = None):
    """Histogram of log10 s (all draws pooled), density per unit log10 s.

    Args:
      spectrum: the measurement.
      title: figure title (the design name).
      predicted: optional ``(log10_s, density)`` curve drawn over the histogram; a density
        rho(lambda) transforms as ``p(log10 s) = 2 ln(10) s^2 rho(s^2)``.
      floor_log10_s: optional SVD floor (log10 s) drawn as a dotted line: below it the
        measurement cannot resolve singular values.
      length_mode_log10_s: optional predicted singular value of the input-length direction
        (``V'(q*)^L``, one value per draw), drawn as a dash-dot line when given.

    Numerically zero singular values cannot be placed on a log axis; their fraction is
    written in the corner.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.0, 4.0), layout="constrained")
    v = _log10_s(spectrum)
    if v.size:
        ax.hist(v, bins=_bins(v), density=True, color=MEASURED, alpha=0.75,
                label=f"measured ({spectrum.draws} draws x {spectrum.size})")
        # density=True normalises over the non-zero part; rescale so the area is its share
        for patch in ax.patches:
            patch.set_height(patch.get_height() * (1.0 - spectrum.zero_fraction))
        ax.relim()
        ax.autoscale_view()
    if predicted is not None:
        ax.plot(predicted[0], predicted[1], color=PREDICTED, lw=2.0, label="predicted (N -> infinity)")
    ax.axvline(0.0, color=REFERENCE, ls="--", lw=1.0, label="s = 1 (isometry)")
    if floor_log10_s is not None and (predicted is not None and predicted[0].size
                                      and predicted[0][0] < floor_log10_s or spectrum.zero_fraction > 0):
        ax.axvline(floor_log10_s, color=REFERENCE, ls=":", lw=1.0, label="SVD floor (unresolved below)")
    if length_mode_log10_s is not None:
        ax.axvline(length_mode_log10_s, color=PREDICTED, ls="-.", lw=1.0,
                   label=f"input-length direction, 1 per draw (s = {10 ** length_mode_log10_s:.3g})")
    if spectrum.zero_fraction > 0:
        ax.text(0.02, 0.95, f"{100 * spectrum.zero_fraction:.1f}% numerically zero\n(not shown)",
                transform=ax.transAxes, va="top", fontsize=9)
    ax.set_xlabel("log10 s   (s: singular value of the input-output Jacobian)")
    ax.set_ylabel("density per unit log10 s")
    ax.set_title(title)
    ax.legend(loc="best", fontsize=8, frameon=False)
    return fig


def lambda_figure(spectrum: Spectrum, title: str, predicted: tuple[np.ndarray, np.ndarray] | None = None):
    """Histogram of lambda = s^2 on a linear axis up to its 99th percentile.

    The share of lambda beyond the axis is written in the corner; use the log-s figure for
    spectra that span decades.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.0, 4.0), layout="constrained")
    lam = spectrum.lam
    lam = lam[np.isfinite(lam)]
    top = float(np.quantile(lam, 0.99)) if lam.size else 1.0
    top = max(top, 1e-300)
    shown = lam[lam <= top]
    ax.hist(shown, bins=np.linspace(0.0, top * 1.02, 61), color=MEASURED, alpha=0.75,
            weights=np.full(shown.size, 1.0 / max(lam.size, 1) / (top * 1.02 / 60)),
            label="measured")
    if predicted is not None:
        keep = predicted[0] <= top * 1.02
        ax.plot(predicted[0][keep], predicted[1][keep], color=PREDICTED, lw=2.0,
                label="predicted (N -> infinity)")
    if top * 1.02 >= 1.0:
        ax.axvline(1.0, color=REFERENCE, ls="--", lw=1.0, label="lambda = 1")
    beyond = 1.0 - shown.size / max(lam.size, 1)
    ax.text(0.98, 0.70, f"{100 * beyond:.1f}% beyond the axis", transform=ax.transAxes,
            ha="right", fontsize=9)
    ax.set_xlabel("lambda = s^2   (eigenvalue of J J^T)")
    ax.set_ylabel("density")
    ax.set_title(title)
    ax.legend(loc="best", fontsize=8, frameon=False)
    return fig


def comparison_figure(spectra: dict[str, Spectrum], title: str):
    """Outlined histograms of log10 s for several designs on one axis."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.5, 4.2), layout="constrained")
    values = [(_log10_s(s), s) for s in spectra.values()]
    allv = np.concatenate([v for v, _ in values if v.size]) if values else np.zeros(1)
    bins = _bins(allv, 80)
    for (name, _), (v, s), colour in zip(spectra.items(), values, DESIGN_COLOURS * 4):
        if v.size:
            w = np.full(v.size, (1.0 - s.zero_fraction) / v.size / (bins[1] - bins[0]))
            ax.hist(v, bins=bins, weights=w, histtype="step", lw=1.8, color=colour, label=name)
    ax.axvline(0.0, color=REFERENCE, ls="--", lw=1.0, label="s = 1")
    ax.set_xlabel("log10 s   (s: singular value of the input-output Jacobian)")
    ax.set_ylabel("density per unit log10 s")
    ax.set_title(title)
    ax.legend(fontsize=8, frameon=False)
    return fig


def predicted_log10_s_curve(log_x: np.ndarray, rho_log: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A predicted law of lambda as a density per unit log10 s.

    With ``ell = ln lambda = 2 ln(10) log10 s`` and ``rho_log = lambda rho(lambda)`` the density of
    ell, ``p(log10 s) = 2 ln(10) s^2 rho(s^2) = 2 ln(10) rho_log``.
    """
    return np.asarray(log_x) / (2.0 * math.log(10.0)), 2.0 * math.log(10.0) * np.asarray(rho_log)


def depth_figure(depths: np.ndarray, measured: np.ndarray, predicted: np.ndarray, title: str,
                 width: int):
    """Spread (std of ln s) against depth: measured partial Jacobians and the prediction."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.0, 4.0), layout="constrained")
    ax.plot(depths, predicted, color=PREDICTED, lw=2.0, label="predicted (N -> infinity)")
    ax.plot(depths, measured, "o", color=MEASURED, ms=6, label=f"measured (width {width}, one draw)")
    ax.set_xscale("log")
    if np.nanmax(np.concatenate([measured, predicted])) > 20 * max(np.nanmin(measured), 1e-12):
        ax.set_yscale("log")
    ax.set_xlabel("depth l (layers in the partial Jacobian J_l ... J_1)")
    ax.set_ylabel("std of ln s above the SVD floor")
    ax.set_title(title)
    ax.legend(fontsize=8, frameon=False)
    return fig


def critical_figure(sigma_w2: np.ndarray, sigma_b2: np.ndarray, point: tuple[float, float],
                    title: str, label: str = "this design"):
    """The critical line chi_1 = 1 in the (sigma_w^2, sigma_b^2) plane with one design marked.

    Below/right of the line (larger sigma_w^2 at fixed sigma_b^2) is the chaotic phase, above/left
    the ordered one.  A single-point line (homogeneous phi: linear, ReLU) is drawn as a point.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6.0, 4.2), layout="constrained")
    if sigma_w2.size > 1:
        ax.plot(sigma_w2, sigma_b2, color=PREDICTED, lw=2.0, label="critical line chi_1 = 1")
    else:
        ax.plot(sigma_w2, sigma_b2, "s", color=PREDICTED, ms=8, label="critical point chi_1 = 1")
    ax.plot([point[0]], [point[1]], "D", color=MEASURED, ms=8, label=label)
    xs = np.concatenate([sigma_w2, [point[0]]])
    ys = np.concatenate([sigma_b2, [point[1]]])
    ax.set_xlim(0.0, 1.15 * float(xs.max()) + 0.1)
    ax.set_ylim(-0.02 * max(float(ys.max()), 0.05), 1.1 * max(float(ys.max()), 0.05))
    ax.text(0.97, 0.05, "chaotic (chi_1 > 1)", transform=ax.transAxes, ha="right", fontsize=9)
    ax.text(0.03, 0.90, "ordered (chi_1 < 1)", transform=ax.transAxes, ha="left", fontsize=9)
    ax.set_xlabel("sigma_w^2  (weight variance x fan-in)")
    ax.set_ylabel("sigma_b^2  (bias variance)")
    ax.set_title(title)
    ax.legend(fontsize=8, frameon=False, loc="center left")
    return fig


def save(fig, stem: Path, formats: tuple[str, ...] = ("png", "svg")) -> list[Path]:
    """Write a figure as ``stem.png`` / ``stem.svg`` and close it; returns the paths."""
    plt = _pyplot()
    paths = []
    for fmt in formats:
        path = stem.with_suffix(f".{fmt}")
        fig.savefig(path, dpi=130)
        paths.append(path)
    plt.close(fig)
    return paths
