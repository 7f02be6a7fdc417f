"""Figures: what they show (axis limits, scales, panels, legends), not their pixels.

Every check here reads the matplotlib objects a figure function returns, or the figures that
``report._figures`` draws for a real analysis (``plot.save`` is wrapped to keep them open).
"""

import math
import warnings

import numpy as np
import pytest
from matplotlib.patches import Rectangle

from isoscope import plot, report
from isoscope.analysis import analyze
from isoscope.spec import parse_spec
from isoscope.spectrum import from_singular_values


def _spec(name, width, depth, activation, weights, sigma_w, sigma_b=0.0, inputs=2, route="auto"):
    return parse_spec(
        {
            "name": name,
            "network": {"width": width, "depth": depth, "activation": activation},
            "init": {"weights": weights, "sigma_w": sigma_w, "sigma_b": sigma_b},
            "analysis": {"inputs": inputs, "seed": 5, "route": route},
        }
    )


# Spread: tanh, Gaussian weights, sigma_w = 3 (chaotic, chi_1 > 1) at depth 64: the singular
# values span far more than the 13 decades a float64 SVD resolves.  The dense route is pinned
# (auto would take the deep route here): these figures must show the SVD floor, its atom of
# numerically zero values and a prediction reaching far below it.
SPREAD = _spec("tanh-gaussian-3", 48, 64, "tanh", "gaussian", 3.0, route="dense")
# ReLU with orthogonal weights at its only critical point sigma_w^2 = 2 (He et al. 2015):
# half the units are off, the rest spread like a product of Bernoulli masks.
RELU = _spec("relu-orthogonal", 48, 16, "relu", "orthogonal", math.sqrt(2.0))
# A linear stack of orthogonal matrices is orthogonal: every s = 1 up to rounding.
LINEAR = _spec("linear-orthogonal", 32, 8, "linear", "orthogonal", 1.0)


@pytest.fixture(scope="module")
def drawn():
    """``{design: {figure key: Figure}}`` for the three designs, drawn with warnings as errors."""
    out = {}
    kept = {}
    original = plot.save

    def keep(fig, stem, formats=("png", "svg")):
        kept[stem.name] = fig
        return original(fig, stem, formats=("png",))

    import pathlib
    import tempfile

    plot.save = keep
    try:
        for spec in (SPREAD, RELU, LINEAR):
            a = analyze(spec)
            kept.clear()
            with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
                warnings.simplefilter("error")  # numpy's overflow RuntimeWarnings included
                report._figures(a, pathlib.Path(tmp))
            out[spec.name] = (a, dict(kept))
    finally:
        plot.save = original
    return out


def _bars(ax):
    return [p for p in ax.patches if isinstance(p, Rectangle) and p.get_height() > 0]


def _check_bars_inside(ax):
    """Every bar lies inside the axes' limits, and the tallest one uses a fair part of the height."""
    bars = _bars(ax)
    assert bars, "no histogram bars"
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    for b in bars:
        assert x0 <= b.get_x() and b.get_x() + b.get_width() <= x1
        assert b.get_height() <= y1 * (1 + 1e-9)
    top = max(b.get_height() for b in bars)
    assert top >= 0.25 * (y1 - y0), f"tallest bar {top} is lost in a y axis reaching {y1}"
    # visible: the bars together are wider than 1% of the axis
    assert sum(b.get_width() for b in bars) >= 0.01 * (x1 - x0)


def _legend_outside(fig, ax):
    """The legend, when there is one, does not overlap the plotting area."""
    fig.canvas.draw()
    legend = ax.get_legend() or (fig.legends[0] if fig.legends else None)
    if legend is None:
        return
    box, area = legend.get_window_extent(), ax.get_window_extent()
    assert not box.overlaps(area), "the legend covers the plotting area"


def test_lambda_figure_of_a_spread_spectrum_uses_a_log_axis_and_is_not_empty(drawn):
    a, figs = drawn["tanh-gaussian-3"]
    ax = figs["spectrum-lambda"].axes[0]
    assert a.spectrum.log10_condition > 1.5
    assert ax.get_xlabel().startswith("log10 lambda")
    _check_bars_inside(ax)
    # the y axis stays on the scale of the bars (the linear figure reached 1e306)
    assert ax.get_ylim()[1] < 100
    _legend_outside(figs["spectrum-lambda"], ax)


def test_lambda_figure_of_a_narrow_spectrum_stays_linear_and_shows_the_atom(drawn):
    a, figs = drawn["linear-orthogonal"]
    fig = figs["spectrum-lambda"]
    ax = fig.axes[0]
    # every s = 1 to rounding (a product of orthogonal matrices is orthogonal)
    assert np.allclose(a.spectrum.s, 1.0, atol=1e-12)
    assert ax.get_xlabel().startswith("lambda")
    _check_bars_inside(ax)
    x0, x1 = ax.get_xlim()
    assert x0 <= 1.0 <= x1
    # the predicted law is the point mass at sigma_w^(2L) = 1: drawn and named in the legend
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("atom" in t and "lambda = 1" in t for t in labels), labels
    _legend_outside(fig, ax)


def test_log_s_figure_keeps_the_measured_bars_in_view(drawn):
    for name in ("tanh-gaussian-3", "relu-orthogonal", "linear-orthogonal"):
        a, figs = drawn[name]
        fig = figs["spectrum-log-s"]
        ax = fig.axes[0]
        _check_bars_inside(ax)
        # the axis spans the measured values with context, not the predicted tail far below the
        # SVD floor (tanh-gaussian-3 predicts values down to s ~ 1e-300)
        lo, hi = a.spectrum.log_s_range
        data = (hi - lo) / math.log(10.0)
        x0, x1 = ax.get_xlim()
        assert x1 - x0 <= 4.5 * max(data, 0.1) + 1e-9
        _legend_outside(fig, ax)


def test_share_of_the_prediction_outside_the_axis_is_written(drawn):
    a, figs = drawn["tanh-gaussian-3"]
    ax = figs["spectrum-log-s"].axes[0]
    labels = " ".join(t.get_text() for t in ax.get_legend().get_texts())
    assert "numerically zero" in labels and "predicted" in labels and "left of the axis" in labels


def test_every_figure_has_its_legend_outside(drawn):
    for _, figs in drawn.values():
        for fig in figs.values():
            for ax in fig.axes:
                _legend_outside(fig, ax)


def _demo_like_spectra():
    """Synthetic spectra shaped like the four demo designs (values of ln s drawn by numpy)."""
    rng = np.random.default_rng(11)
    n = 256
    wide = 10.0 ** rng.uniform(-12.5, 0.5, size=(4, n))
    wide[:, : n // 2] = 0.0  # half exactly zero, as ReLU gives
    return {
        "wide-with-zeros": from_singular_values(wide, "float64"),
        "wide": from_singular_values(10.0 ** rng.uniform(-12.0, 0.3, size=(4, n)), "float64"),
        "moderate": from_singular_values(10.0 ** rng.normal(0.0, 0.3, size=(4, n)), "float64"),
        "narrow": from_singular_values(10.0 ** rng.normal(0.0, 0.05, size=(4, n)), "float64"),
    }


def test_comparison_has_one_visible_panel_per_design_on_a_shared_axis():
    spectra = _demo_like_spectra()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig = plot.comparison_figure(spectra, "all designs")
        fig.canvas.draw()
    axes = [ax for ax in fig.axes if _bars(ax)]
    assert len(axes) == len(spectra)
    limits = {ax.get_xlim() for ax in axes}
    assert len(limits) == 1  # one shared x axis
    x0, x1 = limits.pop()
    for ax, (name, s) in zip(axes, spectra.items()):
        assert name in ax.get_title(loc="left")
        _check_bars_inside(ax)
        # each panel's bars are at least 3 pixels wide in total: the narrow design is visible
        px = ax.get_window_extent().width / (x1 - x0)
        assert sum(b.get_width() for b in _bars(ax)) * px >= 3.0
        if s.zero_fraction > 0:
            assert "numerically zero" in ax.get_title(loc="right")
        _legend_outside(fig, ax)
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_comparison_panel_of_an_all_zero_design_says_so():
    spectra = {
        "dead": from_singular_values(np.zeros((2, 16)), "float64"),
        "alive": from_singular_values(np.ones((2, 16)), "float64"),
    }
    fig = plot.comparison_figure(spectra, "two designs")
    texts = [t.get_text() for ax in fig.axes for t in ax.texts]
    assert any("every singular value is numerically zero" in t for t in texts)
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_log_s_figure_with_every_value_zero_is_not_empty():
    s = from_singular_values(np.zeros((2, 16)), "float64")
    fig = plot.log_s_figure(s, "dead")
    texts = [t.get_text() for t in fig.axes[0].texts]
    assert any("every singular value is numerically zero" in t for t in texts)
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_predicted_law_masses_outside_a_range():
    # a law with an atom of 1/2 at 0 and the rest uniform in ln lambda on [-2, 0]
    # (density 1/4 of ln lambda): masses by hand
    ell = np.linspace(-2.0, 0.0, 201)
    law = plot.PredictedLaw(ell, np.full(ell.size, 0.25), ((0.0, 0.5),))
    assert law.mass_below(-1.0) == pytest.approx(0.5 + 0.25, abs=1e-12)
    assert law.mass_above(-0.5) == pytest.approx(0.125, abs=1e-12)
    assert law.mass_below(-5.0) == pytest.approx(0.5, abs=1e-12)


def _hand_profile(measured_std, isometric_until, draws_std=np.nan):
    """A DepthProfile of a 16-layer stack with hand-set numbers (no analysis behind it)."""
    from isoscope.analysis import DepthProfile

    depths, layers = np.array([1, 4, 16]), np.arange(1, 17)
    return DepthProfile(
        depths,
        measured_std,
        np.array([0.1, 0.2, 0.4]),
        np.full(3, -0.1),
        np.full(3, -0.1),
        np.array([0.9, 0.85, 0.5]),
        np.array([0.9, 0.7, 0.5]),
        isometric_until,
        1,
        layers,
        np.full(16, 0.5),
        np.full(16, draws_std),
        np.full(16, 0.5),
        np.full(16, 0.98),
        np.full(16, 0.97),
    )


def test_depth_figure_with_no_measured_spread_says_so_without_warnings():
    # every partial product numerically zero (tanh, sigma_w = 1e-10): the measured spreads are
    # all NaN.  Before: numpy's "All-NaN slice" RuntimeWarning and an empty axis
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig = plot.depth_figure(_hand_profile(np.full(3, np.nan), None), "all zero", 16)
    texts = [t.get_text() for t in fig.axes[2].texts]
    assert any("no measured spread" in s for s in texts), texts
    labels = " ".join(t.get_text() for t in fig.axes[2].get_legend().get_texts())
    assert "measured: not isometric even at l = 1" in labels, labels
    # one draw: no band across draws, and the legend says why
    labels = " ".join(t.get_text() for t in fig.axes[0].get_legend().get_texts())
    assert "one draw" in labels
    plot._pyplot().close(fig)


def test_depth_figure_marks_where_the_stack_stops_being_isometric():
    # measured scores 0.9, 0.85, 0.5 at l = 1, 4, 16: isometric up to l = 4, not from 16 on;
    # predicted 0.9, 0.7, 0.5: from l = 4 on
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig = plot.depth_figure(_hand_profile(np.array([0.1, 0.2, 0.4]), 4, 0.01), "half", 16)
    labels = " ".join(t.get_text() for t in fig.axes[2].get_legend().get_texts())
    assert "measured isometry score < 0.8 from l = 16" in labels, labels
    assert "predicted score < 0.8 from l = 4" in labels, labels
    for ax in fig.axes:
        shaded = [p for p in ax.patches if p.get_x() == 16]  # axvspan from l = 16
        assert shaded, "the non-isometric depths are not shaded"
        assert ax.get_xscale() == "log" and ax.get_xlim()[0] < 1 and ax.get_xlim()[1] > 16
        _legend_outside(fig, ax)
    # panel (b): a gain flat near 1 is drawn on an axis at least 10% of its level wide
    y0, y1 = fig.axes[1].get_ylim()
    assert y1 - y0 >= 0.1 * 0.97 - 1e-12 and y0 <= 0.97 and y1 >= 1.0
    plot._pyplot().close(fig)


def test_depth_figure_of_real_designs_shows_the_per_layer_numbers(drawn):
    for name in ("tanh-gaussian-3", "relu-orthogonal", "linear-orthogonal"):
        a, figs = drawn[name]
        fig, pr = figs["spread-by-depth"], a.profile
        assert len(fig.axes) == 3
        lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
        got = lines["measured |h^l|^2 / N, mean of draws"].get_ydata()
        assert np.array_equal(got, pr.measured_q)
        lines = {ln.get_label(): ln for ln in fig.axes[1].get_lines()}
        assert np.array_equal(
            lines["mean field (N -> infinity)"].get_ydata(), pr.predicted_layer_gain
        )
        ticks = [int(t) for t in fig.axes[2].get_xticks()]
        assert ticks == [int(d) for d in pr.depths]
    # tanh at sigma_w = 3 (chaotic): the per-layer gain chi_1 is far above 1, no depth is isometric
    a, figs = drawn["tanh-gaussian-3"]
    labels = " ".join(
        t.get_text() for t in figs["spread-by-depth"].axes[2].get_legend().get_texts()
    )
    assert "not isometric even at l = 1" in labels
    # an orthogonal linear stack is isometric at every depth (every s = 1)
    a, figs = drawn["linear-orthogonal"]
    labels = " ".join(
        t.get_text() for t in figs["spread-by-depth"].axes[2].get_legend().get_texts()
    )
    assert "measured: isometric (score >= 0.8) at every profiled depth" in labels
