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

__all__ = ["log_s_figure", "lambda_figure", "comparison_figure", "save"]

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


def log_s_figure(spectrum: Spectrum, title: str, predicted: tuple[np.ndarray, np.ndarray] | None = None):
    """Histogram of log10 s (all draws pooled), density per unit log10 s.

    Args:
      spectrum: the measurement.
      title: figure title (the design name).
      predicted: optional ``(log10_s, density)`` curve drawn over the histogram; a density
        rho(lambda) transforms as ``p(log10 s) = 2 ln(10) s^2 rho(s^2)``.

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
