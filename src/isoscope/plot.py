"""All figures.  Matplotlib is imported lazily (``import isoscope`` stays light).

Colour code (isoscope's own): measured data in slate teal, predictions in burnt orange, the
isometry reference (s = 1) as a dashed charcoal line, depths that are no longer isometric
shaded in warm grey; designs in a comparison take the
``DESIGN_COLOURS`` cycle.  Every axis says whether it shows s or lambda = s^2.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import NamedTuple

import numpy as np

from isoscope.spectrum import Spectrum

__all__ = [
    "log_s_figure",
    "lambda_figure",
    "comparison_figure",
    "cdf_overlay_figure",
    "depth_figure",
    "critical_figure",
    "phase_figure",
    "curves_figure",
    "PredictedLaw",
    "save",
    "SPREAD_DECADES",
]

MEASURED = "#2f6f73"
PREDICTED = "#c4512b"
REFERENCE = "#333333"
SHADE = "#d9d4c7"  # depths at which the measured partial product is no longer isometric
DESIGN_COLOURS = ("#2f6f73", "#c4512b", "#6b5b95", "#b8860b", "#3b7d3b", "#8c564b")


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


SPREAD_DECADES = 1.5  # lambda spanning more decades than this is drawn on a log axis (convention)
CONTEXT = 1.5  # the log axes reach at most this many data widths beyond the measured values
NOTE_SHARE = 1e-3  # shares of the prediction outside the axis below this are not mentioned

_LN10 = math.log(10.0)


class PredictedLaw(NamedTuple):
    """A predicted law of lambda as the figures use it: a continuous part and atoms.

    Attributes:
      log_lambda: grid of ``ell = ln lambda`` of the continuous part, increasing.
      rho_log: density of ``ell`` on that grid, ``lambda rho(lambda)`` (finite even where lambda
        leaves the float64 range).
      atoms: ``(lambda, weight)`` pairs, the atom at zero included.
    """

    log_lambda: np.ndarray
    rho_log: np.ndarray
    atoms: tuple[tuple[float, float], ...] = ()

    @classmethod
    def from_density(cls, density) -> PredictedLaw:
        """From a :class:`isoscope.theory.free_probability.Density` (its ``log_x``, ``rho_log``, ``atoms``)."""
        return cls(
            np.asarray(density.log_x, dtype=float),
            np.asarray(density.rho_log, dtype=float),
            tuple((float(a), float(w)) for a, w in density.atoms),
        )

    def _atom_logs(self) -> list[tuple[float, float]]:
        return [(math.log(a) if a > 0 else -math.inf, w) for a, w in self.atoms]

    def mass_below(self, ell: float) -> float:
        """``P(ln lambda < ell)``: trapezoid mass of the continuous part below ``ell`` plus atoms."""
        e, r = self.log_lambda, self.rho_log
        cont = 0.0
        if e.size >= 2:
            cum = np.concatenate([[0.0], np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(e))])
            cont = float(np.interp(ell, e, cum, left=0.0, right=float(cum[-1])))
        return cont + sum(w for la, w in self._atom_logs() if la < ell)

    def mass_above(self, ell: float) -> float:
        """``P(ln lambda > ell)``."""
        e, r = self.log_lambda, self.rho_log
        total = float(np.sum(0.5 * (r[1:] + r[:-1]) * np.diff(e))) if e.size >= 2 else 0.0
        below = self.mass_below(ell) - sum(w for la, w in self._atom_logs() if la < ell)
        return total - below + sum(w for la, w in self._atom_logs() if la > ell)

    def extent(self, relative: float = 1e-6) -> tuple[float, float] | None:
        """``(lo, hi)`` of ell where ``rho_log`` exceeds ``relative`` times its peak, or None."""
        r = self.rho_log
        if r.size == 0 or not np.any(r > 0):
            return None
        keep = r > relative * float(r.max())
        return float(self.log_lambda[keep][0]), float(self.log_lambda[keep][-1])


def _log10_s(spectrum: Spectrum) -> np.ndarray:
    return spectrum.log_s_nonzero / _LN10


def _bin_count(n: int) -> int:
    """About 2 sqrt(n) bins, between 10 and 60 (common practice, no source)."""
    return int(min(60, max(10, round(2.0 * math.sqrt(n)))))


def _bins(values: np.ndarray, count: int = 60, min_width: float = 0.0) -> np.ndarray:
    lo, hi = float(values.min()), float(values.max())
    if hi - lo < 1e-6:
        lo, hi = lo - 0.05, hi + 0.05
    pad = 0.02 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    count = max(1, min(count, int((hi - lo) / min_width))) if min_width > 0 else count
    if (hi - lo) / count < min_width:  # a narrow sample gets fewer, wider bins
        mid = 0.5 * (lo + hi)
        lo, hi = mid - 0.5 * min_width * count, mid + 0.5 * min_width * count
    return np.linspace(lo, hi, count + 1)


def _note(text: str):
    """A legend row without a symbol: notes go into the legend, which sits outside the axes."""
    from matplotlib.lines import Line2D

    return Line2D([], [], linestyle="none", marker="none", label=text)


def _legend_outside(ax, notes: Sequence[str] = ()) -> None:
    """Legend (and notes) to the right of the axes, so that it never covers bars or curves."""
    handles, labels = ax.get_legend_handles_labels()
    handles += [_note(t) for t in notes]
    labels += list(notes)
    if handles:
        ax.legend(
            handles,
            labels,
            loc="upper left",
            bbox_to_anchor=(1.02, 1.0),
            borderaxespad=0.0,
            fontsize=8,
            frameon=False,
            handlelength=2.0,
        )


def _percent(share: float) -> str:
    return f"{100 * share:.3g}%" if share < 0.1 else f"{100 * share:.1f}%"


def _axis_range(data: tuple[float, float] | None, context: list[float]) -> tuple[float, float]:
    """The x range of a log axis: the measured values, widened to take in the context points
    (reference lines, floor, the predicted law) but by at most CONTEXT data widths each side."""
    if data is None:  # nothing measured: the context decides
        pts = [c for c in context if math.isfinite(c)] or [0.0]
        lo, hi = min(pts), max(pts)
        width = max(hi - lo, 1.0)
        return lo - 0.05 * width, hi + 0.05 * width
    lo, hi = data
    if hi - lo < 0.1:  # a concentrated sample: a window 0.1 wide around it
        lo, hi = 0.5 * (lo + hi) - 0.05, 0.5 * (lo + hi) + 0.05
    width = hi - lo
    lo_cap, hi_cap = lo - CONTEXT * width, hi + CONTEXT * width
    for c in context:
        if math.isfinite(c):
            lo, hi = min(lo, max(c, lo_cap)), max(hi, min(c, hi_cap))
    pad = 0.03 * max(hi - lo, 0.1)
    return lo - pad, hi + pad


def _log_panel(
    ax,
    spectrum: Spectrum,
    unit: str,
    predicted: PredictedLaw | None,
    floor_log10_s: float | None,
    marks: list[tuple[float, str, str]],
) -> list[str]:
    """Histogram of log10 s (``unit = "s"``) or log10 lambda (``"lambda"``) with the prediction.

    The density is per unit of the axis variable, and the bars' area is the non-zero share.
    A predicted density of ell = ln lambda becomes ``p(log10 s) = 2 ln(10) rho_log`` and
    ``p(log10 lambda) = ln(10) rho_log``.  Returns the notes for the legend.
    """
    k = 1.0 if unit == "s" else 2.0  # axis value = k log10 s
    to_axis = k / (2.0 * _LN10)  # axis value per unit of ell
    ref = "s = 1 (isometry)" if unit == "s" else "lambda = 1 (isometry)"
    notes = []
    v = k * _log10_s(spectrum)
    data = (float(v.min()), float(v.max())) if v.size else None
    context = [0.0] + [x for x, _, _ in marks]
    floor = None if floor_log10_s is None else k * floor_log10_s
    if floor is not None and spectrum.zero_fraction > 0:
        context.append(floor)
    atoms = []
    if predicted is not None:
        ext = predicted.extent()
        if ext is not None:
            context += [
                to_axis * ext[1],
                max(to_axis * ext[0], floor if floor is not None else -math.inf),
            ]
        atoms = [(to_axis * math.log(a), w) for a, w in predicted.atoms if 0 < a < math.inf]
        context += [x for x, _ in atoms]
    x0, x1 = _axis_range(data, context)
    bar_top = 0.0
    if v.size:
        bins = _bins(v, _bin_count(v.size), min_width=(x1 - x0) / 200)
        ax.hist(
            v,
            bins=bins,
            color=MEASURED,
            alpha=0.75,
            weights=np.full(v.size, (1.0 - spectrum.zero_fraction) / v.size / (bins[1] - bins[0])),
            label=f"measured ({spectrum.draws} draws x {spectrum.size})",
        )
        bar_top = max(p.get_height() for p in ax.patches)
    else:
        ax.text(
            0.5,
            0.5,
            "every singular value is numerically zero\n(nothing to place on a log axis)",
            transform=ax.transAxes,
            ha="center",
            va="center",
            fontsize=10,
        )
    if spectrum.zero_fraction > 0 and v.size:
        notes.append(f"measured: {_percent(spectrum.zero_fraction)} numerically zero (not shown)")
    curve_top = 0.0
    if predicted is not None:
        xs = to_axis * predicted.log_lambda
        ys = (_LN10 * 2.0 / k) * predicted.rho_log
        keep = (xs >= x0) & (xs <= x1)
        if np.any(keep):
            ax.plot(xs[keep], ys[keep], color=PREDICTED, lw=2.0, label="predicted (N -> infinity)")
            curve_top = float(ys[keep].max())
        for x, w in atoms:
            if x0 <= x <= x1:
                ax.axvline(
                    x,
                    color=PREDICTED,
                    lw=3.0,
                    alpha=0.55,
                    label=f"predicted atom, weight {w:.3g} at {unit} = {10**x:.4g}"
                    if abs(x) < 300
                    else f"predicted atom, weight {w:.3g} at log10 {unit} = {x:.4g}",
                )
        below = predicted.mass_below(x0 / to_axis)
        above = predicted.mass_above(x1 / to_axis)
        if below > NOTE_SHARE:
            notes.append(
                f"predicted: {_percent(below)} left of the axis"
                + (
                    f" (atom at 0: {_percent(predicted.atoms[0][1])})"
                    if predicted.atoms and predicted.atoms[0][0] == 0 and predicted.atoms[0][1] > 0
                    else ""
                )
            )
        if above > NOTE_SHARE:
            notes.append(f"predicted: {_percent(above)} right of the axis")
    if x0 <= 0.0 <= x1:
        ax.axvline(0.0, color=REFERENCE, ls="--", lw=1.0, label=ref)
    else:
        notes.append(f"{ref.split(' (')[0]} is off the axis ({'right' if x1 < 0 else 'left'})")
    if (
        floor is not None
        and x0 <= floor <= x1
        and (spectrum.zero_fraction > 0 or predicted is not None)
    ):
        ax.axvline(floor, color=REFERENCE, ls=":", lw=1.0, label="SVD floor (unresolved below)")
    for x, label, style in marks:
        if x0 <= x <= x1:
            ax.axvline(x, color=PREDICTED, ls=style, lw=1.0, label=label)
    ax.set_xlim(x0, x1)
    top = bar_top if bar_top > 0 else curve_top
    if bar_top > 0 and curve_top > 0:
        top = max(bar_top, min(curve_top, 3.0 * bar_top))  # a singular edge may leave the axis
    ax.set_ylim(0.0, 1.08 * top if top > 0 else 1.0)
    return notes


def log_s_figure(
    spectrum: Spectrum,
    title: str,
    predicted: PredictedLaw | None = None,
    floor_log10_s: float | None = None,
    length_mode_log10_s: float | None = None,
):
    """Histogram of log10 s (all draws pooled), density per unit log10 s.

    Args:
      spectrum: the measurement.
      title: figure title (the design name).
      predicted: optional predicted law; its density of ``ell = ln lambda`` is drawn as
        ``p(log10 s) = 2 ln(10) rho_log`` and its atoms as vertical bands.
      floor_log10_s: optional SVD floor (log10 s) drawn as a dotted line: below it the
        measurement cannot resolve singular values.
      length_mode_log10_s: optional predicted singular value of the input-length direction
        (``V'(q*)^L``, one value per draw), drawn as a dash-dot line when given.

    The x axis spans the measured values, widened to take in s = 1, the floor and the
    prediction, but by at most ``CONTEXT`` data widths each side: a prediction reaching far
    below the floor would otherwise squeeze the bars into a line.  The legend (outside the
    axes) says how much of the predicted law lies left or right of the axis and how many
    singular values are numerically zero (they cannot be placed on a log axis).
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(9.0, 4.0), layout="constrained")
    marks = []
    if length_mode_log10_s is not None:
        marks.append(
            (
                length_mode_log10_s,
                f"input-length direction, 1 per draw (s = {10**length_mode_log10_s:.3g})",
                "-.",
            )
        )
    notes = _log_panel(ax, spectrum, "s", predicted, floor_log10_s, marks)
    ax.set_xlabel("log10 s   (s: singular value of the input-output Jacobian)")
    ax.set_ylabel("density per unit log10 s")
    ax.set_title(title)
    _legend_outside(ax, notes)
    return fig


def lambda_figure(
    spectrum: Spectrum,
    title: str,
    predicted: PredictedLaw | None = None,
    floor_log10_s: float | None = None,
):
    """Histogram of lambda = s^2: on a linear axis when the spectrum is narrow, else in log10 lambda.

    The non-zero lambda between their 1st and 99th percentiles span ``D`` decades.  For
    ``D <= SPREAD_DECADES`` (1.5, isoscope's convention) the axis is lambda itself, from 0 to
    the 99th percentile, with the density ``rho(lambda) = rho_log / lambda`` of the prediction
    drawn only over that range; otherwise the axis is log10 lambda, with the density per unit
    log10 lambda, ``ln(10) rho_log`` (a linear axis would show one bar at 0 and a predicted
    curve reaching 1e306).  Predicted atoms are vertical bands labelled with their weight.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(9.0, 4.0), layout="constrained")
    ax.set_title(title)
    ell = 2.0 * spectrum.log_s_nonzero
    if ell.size:
        q01, q99 = np.quantile(ell, [0.01, 0.99])
        spread = (q99 - q01) / _LN10 > SPREAD_DECADES or q99 > 700.0 or q01 < -700.0
    else:
        spread = True
    if spread:
        notes = _log_panel(ax, spectrum, "lambda", predicted, floor_log10_s, [])
        ax.set_xlabel("log10 lambda   (lambda = s^2: eigenvalue of J J^T)")
        notes.insert(0, f"log axis: lambda spans more than {SPREAD_DECADES:g} decades")
        ax.set_ylabel("density per unit log10 lambda")
        _legend_outside(ax, notes)
        return fig
    notes = []
    lam = spectrum.lam
    top = 1.02 * float(np.quantile(lam, 0.99))
    shown = lam[lam <= top]
    count = _bin_count(shown.size)
    width = top / count
    ax.hist(
        shown,
        bins=np.linspace(0.0, top, count + 1),
        color=MEASURED,
        alpha=0.75,
        weights=np.full(shown.size, 1.0 / lam.size / width),
        label=f"measured ({spectrum.draws} draws x {spectrum.size})",
    )
    bar_top = max(p.get_height() for p in ax.patches)
    curve_top = 0.0
    if predicted is not None:
        e, r = predicted.log_lambda, predicted.rho_log
        keep = (e <= math.log(top)) & (e >= math.log(top) - 40.0)  # below top e^-40: not visible
        if np.any(keep):
            rho = r[keep] * np.exp(-e[keep])
            ax.plot(
                np.exp(e[keep]), rho, color=PREDICTED, lw=2.0, label="predicted (N -> infinity)"
            )
            curve_top = float(rho.max())
        for a, w in predicted.atoms:
            if 0 <= a <= top:
                ax.axvline(
                    a,
                    color=PREDICTED,
                    lw=3.0,
                    alpha=0.55,
                    label=f"predicted atom, weight {w:.3g} at lambda = {a:.4g}",
                )
        above = predicted.mass_above(math.log(top))
        if above > NOTE_SHARE:
            notes.append(f"predicted: {_percent(above)} right of the axis")
    ax.axvline(
        1.0, color=REFERENCE, ls="--", lw=1.0, label="lambda = 1 (isometry)"
    ) if top >= 1.0 else notes.append("lambda = 1 is off the axis (right)")
    beyond = 1.0 - shown.size / lam.size
    if beyond > 0:
        notes.append(f"measured: {_percent(beyond)} right of the axis")
    ax.set_xlim(0.0, top)
    ax.set_ylim(0.0, 1.08 * max(bar_top, min(curve_top, 3.0 * bar_top)))
    ax.set_xlabel("lambda = s^2   (eigenvalue of J J^T)")
    ax.set_ylabel("density")
    _legend_outside(ax, notes)
    return fig


def comparison_figure(spectra: dict[str, Spectrum], title: str):
    """Small multiples: one panel per design, histograms of log10 s on one shared x axis.

    Each panel has its own y scale (density per unit log10 s, area = the design's non-zero
    share), so a design spread over ten decades stays as visible as one concentrated at
    s = 1.  Bins are at least 1/150 of the shared axis wide, so a narrow spectrum still shows
    as bars.  The design name is the panel's title, its share of numerically zero singular
    values the right-hand title; nothing is drawn over the bars.
    """
    plt = _pyplot()
    names = list(spectra)
    n = max(len(names), 1)
    fig, axes = plt.subplots(
        n, 1, figsize=(8.0, 1.25 * n + 1.3), sharex=True, layout="constrained", squeeze=False
    )
    axes = axes[:, 0]
    values = {name: _log10_s(s) for name, s in spectra.items()}
    pooled = [v for v in values.values() if v.size]
    if pooled:
        lo = min(float(v.min()) for v in pooled)
        hi = max(float(v.max()) for v in pooled)
        x0, x1 = _axis_range((lo, hi), [0.0])
    else:
        x0, x1 = -1.0, 1.0
    for ax, name, colour in zip(axes, names, DESIGN_COLOURS * (1 + n // len(DESIGN_COLOURS))):
        s, v = spectra[name], values[name]
        if v.size:
            bins = _bins(v, _bin_count(v.size), min_width=(x1 - x0) / 150)
            ax.hist(
                v,
                bins=bins,
                color=colour,
                alpha=0.85,
                weights=np.full(v.size, (1.0 - s.zero_fraction) / v.size / (bins[1] - bins[0])),
            )
            ax.set_ylim(0.0, 1.1 * max(p.get_height() for p in ax.patches))
        else:
            ax.text(
                0.5,
                0.5,
                "every singular value is numerically zero",
                transform=ax.transAxes,
                ha="center",
                va="center",
                fontsize=9,
            )
            ax.set_yticks([])
        ax.axvline(0.0, color=REFERENCE, ls="--", lw=1.0)
        ax.set_title(name, loc="left", fontsize=9, color=colour, fontweight="bold")
        if s.zero_fraction > 0:
            ax.set_title(
                f"{_percent(s.zero_fraction)} numerically zero (not shown)", loc="right", fontsize=8
            )
        ax.tick_params(labelsize=8)
    axes[0].set_xlim(x0, x1)
    axes[-1].set_xlabel("log10 s   (s: singular value of the input-output Jacobian; dashed: s = 1)")
    fig.supylabel("density per unit log10 s", fontsize=9)
    fig.suptitle(title)
    return fig


def depth_figure(profile, title: str, width: int):
    """Where along the stack a design stops being isometric: three panels on one depth axis.

    (a) the pre-activation mean square ``q^l = |h^l|^2/N`` of every layer, measured (mean over
    draws, a band of one standard deviation across draws) against the mean-field trajectory;
    (b) every layer's own gain ``||J_l||_F^2/N`` against its mean-field value (``chi^l`` for a
    plain stack, ``1 + alpha^2 sigma_w^2 E[phi'^2]`` for a residual one), with the line at 1;
    (c) the cumulative spread, std of ln s of ``J_l ... J_1`` at the profile depths, measured
    (first draw) against predicted.  From the first profile depth whose measured partial
    product scores below ``score.ISOMETRIC_SCORE`` on, every panel is shaded; the predicted
    counterpart is a dotted line (a design that is not isometric even at the first depth gets
    a note instead).  The depth axis is logarithmic, ticked at the profile depths; a y axis is
    logarithmic where its values span more than a factor of 20, and a linear one spans at
    least 10% of its level (a gain flat at 1 to 1e-4 is not blown up into noise).  Legends
    and notes sit outside the axes.

    Args:
      profile: an :class:`isoscope.analysis.DepthProfile`.
      title: the figure's title.
      width: N, for the legend.
    """
    from isoscope.score import ISOMETRIC_SCORE

    plt = _pyplot()
    fig, axes = plt.subplots(3, 1, figsize=(9.5, 8.6), sharex=True, layout="constrained")
    depth = int(profile.layers[-1])
    stop = _first_failing(profile.depths, profile.isometric_until)
    predicted_stop = _first_failing(profile.depths, profile.predicted_isometric_until)
    for ax in axes:
        if stop is not None and stop > profile.depths[0]:
            ax.axvspan(stop, depth * 1.25, color=SHADE, alpha=0.5, lw=0)
        if predicted_stop is not None and predicted_stop > profile.depths[0]:
            ax.axvline(predicted_stop, color=PREDICTED, ls=":", lw=1.5)
    _q_panel(axes[0], profile)
    _gain_panel(axes[1], profile)
    _spread_panel(axes[2], profile, width, stop, predicted_stop, ISOMETRIC_SCORE)
    axes[-1].set_xscale("log")
    axes[-1].set_xticks([int(d) for d in profile.depths], [str(int(d)) for d in profile.depths])
    axes[-1].minorticks_off()
    axes[-1].set_xlim(0.8, depth * 1.25)
    axes[-1].set_xlabel(
        "layer l   (panel c: the partial Jacobian J_l ... J_1 of the first l layers)"
    )
    fig.suptitle(title)
    return fig


def _first_failing(depths: np.ndarray, until: int | None) -> int | None:
    """The first profile depth past ``until`` (the first depth when ``until`` is None; None
    when every profiled depth is isometric)."""
    if until is None:
        return int(depths[0])
    later = [int(d) for d in depths if d > until]
    return later[0] if later else None


def _log_if_spread(ax, values: np.ndarray, factor: float = 20.0) -> bool:
    """A logarithmic y axis when the positive finite ``values`` span more than ``factor``."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v) & (v > 0)]
    if v.size and v.max() > factor * v.min():
        ax.set_yscale("log")
        return True
    return False


def _at_least_span(ax, share: float = 0.1) -> None:
    """Widen a linear y axis to at least ``share`` of its level around its centre."""
    if ax.get_yscale() != "linear":
        return
    lo, hi = ax.get_ylim()
    mid = 0.5 * (lo + hi)
    if hi - lo < share * abs(mid):
        ax.set_ylim(mid - 0.5 * share * abs(mid), mid + 0.5 * share * abs(mid))
    ax.ticklabel_format(axis="y", useOffset=False)


def _layer_style(count: int) -> dict:
    """Measured per-layer values: a line, with small markers while layers can be told apart."""
    return {"marker": "o", "ms": 3} if count <= 100 else {}


def _q_panel(ax, profile) -> None:
    layers, q, spread = profile.layers, profile.measured_q, profile.measured_q_draw_std
    log = _log_if_spread(ax, np.concatenate([q, profile.predicted_q]))
    notes = []
    if np.isfinite(spread).any():
        lo, hi = q - spread, q + spread
        if log:  # a band reaching 0 or below is cut at the axis' lower edge
            lo = np.where(lo > 0, lo, np.nan)
        ax.fill_between(
            layers, lo, hi, color=MEASURED, alpha=0.2, lw=0, label="measured, +-1 std across draws"
        )
    else:
        notes.append("one draw: no spread across draws")
    ax.plot(
        layers,
        q,
        color=MEASURED,
        lw=1.5,
        label="measured |h^l|^2 / N, mean of draws",
        **_layer_style(layers.size),
    )
    ax.plot(
        layers,
        profile.predicted_q,
        color=PREDICTED,
        lw=2.0,
        ls="--",
        label="mean field q^l (N -> infinity)",
    )
    _at_least_span(ax)
    ax.set_ylabel("q^l")
    ax.set_title("(a) pre-activation mean square of each layer", loc="left", fontsize=10)
    _legend_outside(ax, notes)


def _gain_panel(ax, profile) -> None:
    layers, g = profile.layers, profile.measured_layer_gain
    _log_if_spread(ax, np.concatenate([g, profile.predicted_layer_gain, [1.0]]))
    ax.plot(
        layers,
        g,
        color=MEASURED,
        lw=1.5,
        label="measured ||J_l||_F^2 / N, mean of draws",
        **_layer_style(layers.size),
    )
    ax.plot(
        layers,
        profile.predicted_layer_gain,
        color=PREDICTED,
        lw=2.0,
        ls="--",
        label="mean field (N -> infinity)",
    )
    ax.axhline(1.0, color=REFERENCE, ls="--", lw=1.0, label="1 (the layer keeps lengths)")
    _at_least_span(ax)
    ax.set_ylabel("mean s^2 of J_l")
    ax.set_title("(b) gain of each layer on its own", loc="left", fontsize=10)
    _legend_outside(ax)


def _spread_panel(
    ax, profile, width: int, stop: int | None, predicted_stop: int | None, threshold: float
) -> None:
    depths, measured, predicted = (
        profile.depths,
        profile.measured_log_s_std,
        profile.predicted_log_s_std,
    )
    _log_if_spread(ax, np.concatenate([measured, predicted]))
    ax.plot(depths, predicted, color=PREDICTED, lw=2.0, label="predicted (N -> infinity)")
    ax.plot(
        depths, measured, "o", color=MEASURED, ms=6, label=f"measured (width {width}, first draw)"
    )
    if not np.isfinite(measured).any():
        ax.text(
            0.5,
            0.5,
            "no measured spread: every partial product is numerically zero\n"
            "or has fewer than two values above the SVD floor",
            transform=ax.transAxes,
            ha="center",
            va="center",
            fontsize=9,
        )
    first = int(depths[0])
    if stop is not None and stop > first:
        ax.fill_between(
            [],
            [],
            color=SHADE,
            alpha=0.5,
            label=f"measured isometry score < {threshold:g} from l = {stop}",
        )
    if predicted_stop is not None and predicted_stop > first:
        ax.plot(
            [],
            [],
            color=PREDICTED,
            ls=":",
            lw=1.5,
            label=f"predicted score < {threshold:g} from l = {predicted_stop}",
        )
    notes = []
    for who, until, scores in (
        ("measured", profile.isometric_until, profile.measured_isometry),
        ("predicted", profile.predicted_isometric_until, profile.predicted_isometry),
    ):
        if until == int(depths[-1]):
            notes.append(f"{who}: isometric (score >= {threshold:g}) at every profiled depth")
        elif until is None:
            notes.append(
                f"{who}: not isometric even at l = {first} (score {_score_text(scores[0])})"
            )
    notes.append(
        f"score of J_L ... J_1: measured {_score_text(profile.measured_isometry[-1])}, "
        f"predicted {_score_text(profile.predicted_isometry[-1])}"
    )
    ax.set_ylabel("std of ln s of J_l ... J_1")
    ax.set_title("(c) spread of the first l layers together", loc="left", fontsize=10)
    _legend_outside(ax, notes)


def _score_text(v: float) -> str:
    return f"{v:.3f}" if math.isfinite(v) else "none"


def critical_figure(
    sigma_w2: np.ndarray,
    sigma_b2: np.ndarray,
    point: tuple[float, float],
    title: str,
    label: str = "this design",
):
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
    _legend_outside(ax)
    return fig


def cdf_overlay_figure(spectra: dict[str, Spectrum], title: str):
    """All designs on one axis: the empirical CDF of log10 s, one step line per design.

    The fraction of singular values at or below s, zeros included: a design with a share of
    numerically zero singular values starts at that share on the left edge (the legend says so).
    A perfect isometry is a step from 0 to 1 at s = 1 (dashed); the steeper a curve and the
    closer it crosses 1/2 at s = 1, the nearer the design is to an isometry.  Colours follow
    ``DESIGN_COLOURS`` and each line also has its own dash pattern, so the figure reads in grey.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(8.0, 4.2 + 0.22 * len(spectra)), layout="constrained")
    dashes = ("-", "--", "-.", ":")
    values = {name: np.sort(_log10_s(s)) for name, s in spectra.items()}
    shown = [v for v in values.values() if v.size]
    lo = min((float(v[0]) for v in shown), default=-1.0)
    hi = max((float(v[-1]) for v in shown), default=1.0)
    x0, x1 = _axis_range((lo, hi), [0.0])
    for k, (name, s) in enumerate(spectra.items()):
        v = values[name]
        colour = DESIGN_COLOURS[k % len(DESIGN_COLOURS)]
        zero = s.zero_fraction
        label = name + (f" ({_percent(zero)} numerically zero)" if zero > 0 else "")
        if v.size:
            y = zero + (1.0 - zero) * np.arange(1, v.size + 1) / v.size
            ax.step(
                np.concatenate([[x0], v, [x1]]),
                np.concatenate([[zero], y, [1.0]]),
                where="post",
                color=colour,
                lw=1.8,
                ls=dashes[k % len(dashes)],
                label=label,
            )
        else:
            ax.plot(
                [],
                [],
                color=colour,
                ls=dashes[k % len(dashes)],
                label=f"{name} (every singular value numerically zero)",
            )
    ax.axvline(0.0, color=REFERENCE, ls="--", lw=1.0)
    ax.set_xlim(x0, x1)
    ax.set_ylim(0.0, 1.0)
    ax.set_xlabel("log10 s   (s: singular value of the input-output Jacobian; dashed: s = 1)")
    ax.set_ylabel("fraction of singular values <= s")
    ax.set_title(title)
    ax.legend(
        loc="upper center",
        bbox_to_anchor=(0.5, -0.16),
        ncol=1 if len(spectra) > 3 else len(spectra),
        fontsize=8,
        frameon=False,
        handlelength=3.0,
    )
    return fig


# ----------------------------------------------------------------------------- sweeps
# isoscope's sweep colours: the isometry score on viridis over [0, 1], the log10 gain on the
# diverging PuOr centred on 0 (purple: exploding, orange: vanishing), every other metric on
# cividis; cells without a stored number hatched in grey; the critical line white with a
# black rim (readable on all three maps).
_METRIC_STYLE = {
    "score.isometry": ("isometry score E[min(lambda, 1/lambda)]", "viridis", ".2f"),
    "score.log10_gain": ("log10 gain m1 (0: gain 1)", "PuOr", "+.1f"),
    "score.log_s_std": ("spread: std of ln s", "cividis", ".2f"),
}
MISSING_HATCH = "///"
CRITICAL_LABEL = "mean-field critical line chi_1 = 1"


def _edges(values: np.ndarray) -> np.ndarray:
    """Cell edges around sorted values: midpoints, the end cells as wide as their neighbours."""
    v = np.asarray(values, dtype=float)
    if v.size == 1:
        half = 0.5 * (abs(v[0]) if v[0] != 0 else 1.0)
        return np.array([v[0] - half, v[0] + half])
    mid = 0.5 * (v[1:] + v[:-1])
    return np.concatenate([[v[0] - (mid[0] - v[0])], mid, [v[-1] + (v[-1] - mid[-1])]])


def _axis_positions(values: tuple) -> tuple[np.ndarray, list[str] | None]:
    """Numeric values stay themselves; text values (an activation) take positions 0..n-1."""
    if all(isinstance(v, (int, float)) for v in values):
        return np.asarray(values, dtype=float), None
    return np.arange(len(values), dtype=float), [str(v) for v in values]


def _metric_norm(metric: str, matrices_values: list[np.ndarray]):
    """The colour map and normalisation of a metric over every facet (rows compare directly)."""
    from matplotlib import colors

    finite = (
        np.concatenate([v[np.isfinite(v)] for v in matrices_values])
        if matrices_values
        else np.array([])
    )
    cmap = _METRIC_STYLE.get(metric, (metric, "cividis", ".3g"))[1]
    if metric == "score.isometry":
        return cmap, colors.Normalize(0.0, 1.0)
    if metric == "score.log10_gain":
        a = float(np.max(np.abs(finite))) if finite.size else 1.0
        a = a if a > 0 else 1.0
        return cmap, colors.TwoSlopeNorm(vcenter=0.0, vmin=-a, vmax=a)
    lo = float(finite.min()) if finite.size else 0.0
    hi = float(finite.max()) if finite.size else 1.0
    if metric == "score.log_s_std":
        lo = min(lo, 0.0)
    return cmap, colors.Normalize(lo, hi if hi > lo else lo + 1.0)


def _text_colour(rgba) -> str:
    """Black on light cells, white on dark ones (relative luminance, ITU-R BT.709 weights)."""
    r, g, b = rgba[:3]
    return "black" if 0.2126 * r + 0.7152 * g + 0.0722 * b > 0.45 else "white"


def _facet_text(fixed: dict) -> str:
    return ", ".join(f"{k} = {v}" for k, v in fixed.items())


def phase_figure(matrices: list, title: str, critical=None):
    """Heat maps of sweep metrics: one column per metric, one row per facet.

    Args:
      matrices: :class:`isoscope.sweep.view.Matrix` objects over the same axes and facets, one
        per metric (``score.isometry`` on viridis in [0, 1], ``score.log10_gain`` on a diverging
        map centred on 0 and symmetric, others on cividis; one scale per column over all rows).
      title: figure title.
      critical: optional :class:`isoscope.sweep.view.CriticalCurve`, drawn over every panel in
        the axes' orientation (sigma_w against sigma_b or the other way round); a single point
        (homogeneous phi: only sigma_b = 0) is drawn as a marker.

    Cells are centred on the stored values (edges halfway between neighbours), so an uneven
    grid shows uneven cells; each cell is written with its value, and a cell without a number
    (not stored, failed, or null) is left hatched.
    """
    import matplotlib.patheffects as pe
    from matplotlib.patches import Patch, Rectangle

    plt = _pyplot()
    first = matrices[0]
    rows, cols = len(first.facets), len(matrices)
    fig, axes = plt.subplots(
        rows,
        cols,
        figsize=(4.3 * cols + 0.6, 3.4 * rows + 1.1),
        layout="constrained",
        squeeze=False,
    )
    xs, xlabels = _axis_positions(first.x)
    ys, ylabels = _axis_positions(first.y)
    xe, ye = _edges(xs), _edges(ys)
    missing = False
    outline = [pe.Stroke(linewidth=3.2, foreground="black"), pe.Normal()]
    for c, m in enumerate(matrices):
        cmap, norm = _metric_norm(m.metric, [f.values for f in m.facets])
        label, _, fmt = _METRIC_STYLE.get(m.metric, (m.metric, "cividis", ".3g"))
        for r, facet in enumerate(m.facets):
            ax = axes[r, c]
            ax.add_patch(
                Rectangle(
                    (xe[0], ye[0]),
                    xe[-1] - xe[0],
                    ye[-1] - ye[0],
                    facecolor="white",
                    edgecolor="#9a9a9a",
                    hatch=MISSING_HATCH,
                    lw=0.0,
                    zorder=0,
                )
            )
            values = np.ma.masked_invalid(facet.values)
            missing |= bool(values.mask.any()) if np.ndim(values.mask) else bool(values.mask)
            mesh = ax.pcolormesh(xe, ye, values, cmap=cmap, norm=norm, zorder=1)
            if values.size <= 144:
                for i, y in enumerate(ys):
                    for j, x in enumerate(xs):
                        v = facet.values[i, j]
                        if math.isfinite(v):
                            ax.text(
                                x,
                                y,
                                format(v, fmt),
                                ha="center",
                                va="center",
                                fontsize=7,
                                color=_text_colour(mesh.cmap(norm(v))),
                                zorder=3,
                            )
            if critical is not None:
                cx, cy = (
                    (critical.sigma_w, critical.sigma_b)
                    if m.x_key == "init.sigma_w"
                    else (critical.sigma_b, critical.sigma_w)
                )
                style = {
                    "color": "white",
                    "path_effects": outline,
                    "zorder": 4,
                    "label": CRITICAL_LABEL,
                }
                if cx.size > 1:
                    ax.plot(cx, cy, lw=1.6, **style)
                else:
                    ax.plot(cx, cy, "o", ms=7, **style)
            ax.set_xlim(xe[0], xe[-1])
            ax.set_ylim(ye[0], ye[-1])
            ax.set_xticks(xs, xlabels if xlabels else [f"{v:g}" for v in xs], fontsize=8)
            ax.set_yticks(ys, ylabels if ylabels else [f"{v:g}" for v in ys], fontsize=8)
            ax.set_xlabel(m.x_key, fontsize=9)
            ax.set_ylabel(m.y_key, fontsize=9)
            ax.set_title(
                label + (f"\n{_facet_text(facet.fixed)}" if facet.fixed else ""), fontsize=9
            )
            if r == rows - 1 or rows == 1:
                fig.colorbar(mesh, ax=axes[:, c].tolist(), shrink=0.9, aspect=30, pad=0.02)
    handles = []
    if critical is not None:
        point = critical.sigma_w.size == 1
        handles.append(
            plt.Line2D(
                [],
                [],
                color="white",
                lw=0.0 if point else 1.6,
                marker="o" if point else None,
                markeredgecolor="black",
                path_effects=None if point else outline,
                label=f"{CRITICAL_LABEL} ({critical.activation})"
                + (f": the single point sigma_b = {critical.sigma_b[0]:g}" if point else ""),
            )
        )
    if missing:
        handles.append(
            Patch(
                facecolor="white",
                edgecolor="#9a9a9a",
                hatch=MISSING_HATCH,
                label="no stored number (not run, failed or null)",
            )
        )
    if handles:
        fig.legend(
            handles=handles,
            loc="outside lower center",
            ncol=len(handles),
            fontsize=8,
            frameon=False,
        )
    fig.suptitle(title)
    return fig


def curves_figure(curves: list, along: str, metric: str, title: str):
    """A sweep metric against one setting, one line per combination of the other varied keys.

    Args:
      curves: :class:`isoscope.sweep.view.Curve` objects (their ``fixed`` values label them).
      along: the setting on the x axis (``network.depth`` for depth curves).
      metric: the metric on the y axis (the isometry score's axis spans [0, 1]).
      title: figure title.

    Lines take evenly spaced colours of viridis in the order of their settings and each its own
    marker, so neighbours differ also in grey; the x axis is logarithmic (base 2) when the
    values are positive and span a factor of 8 or more, as depths usually do.  The legend sits
    outside the axes.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(8.0, 4.2), layout="constrained")
    markers = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h", "*", "p")
    cmap = plt.get_cmap("viridis")
    n = max(len(curves), 1)
    xs_all = (
        np.concatenate([np.asarray(c.x, dtype=float) for c in curves]) if curves else np.array([])
    )
    for k, c in enumerate(curves):
        colour = cmap(0.88 * k / max(n - 1, 1))
        ax.plot(
            np.asarray(c.x, dtype=float),
            c.values,
            marker=markers[k % len(markers)],
            ms=5,
            lw=1.6,
            color=colour,
            label=_facet_text(c.fixed) or metric,
        )
    if xs_all.size and xs_all.min() > 0 and xs_all.max() / xs_all.min() >= 8:
        ax.set_xscale("log", base=2)
    ticks = np.unique(xs_all)
    if 0 < ticks.size <= 12:
        ax.set_xticks(ticks, [f"{v:g}" for v in ticks])
    if metric == "score.isometry":
        ax.set_ylim(0.0, 1.02)
    ax.set_xlabel(along)
    ax.set_ylabel(_METRIC_STYLE.get(metric, (metric,))[0])
    ax.set_title(title)
    ax.grid(True, color="#e3e3e3", lw=0.6)
    _legend_outside(ax)
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
