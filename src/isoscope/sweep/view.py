"""Views of a sweep store: what varies, tables, metric matrices, curves, the critical line.

Pure functions over the :class:`~isoscope.sweep.store.StoredPoint` list that
``Store.points()`` returns; nothing here prints or touches a file (``isoscope show`` and
:func:`isoscope.report.write_show_folder` do).

* :func:`varied_keys` -- the settings whose values differ across the points;
* :func:`select` -- ``--where KEY=VALUE`` filters, each value parsed like the stored one;
* :func:`points_table` -- one row per point: name, status, error, varied settings, metrics;
* :func:`metric_matrix` -- a metric over the unique sorted values of two keys, one matrix
  (a *facet*) per combination of the other varied keys, NaN where no point was stored;
* :func:`metric_curves` -- a metric against one key, one line per combination of the others
  (the depth curves are ``metric_curves(points, "network.depth", metric)``);
* :func:`critical_curve` -- the mean-field critical line ``chi_1 = 1`` over the sigma_b range
  of a (sigma_w, sigma_b) diagram, from :func:`isoscope.theory.mean_field.critical_point`
  (Schoenholz et al. 2017, ICLR, sec. 3);
* :func:`ridge` -- along each sigma_b row, the sigma_w that scores best against the grid value
  nearest the critical sigma_w;
* :func:`build_view` -- all of the above for one ``isoscope show`` request (a :class:`View`);
* :func:`show_dict` -- a view as JSON-ready data (schema ``isoscope.show/1``).
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np

from isoscope.errors import InputError, TheoryError

__all__ = [
    "SHOW_SCHEMA",
    "DEFAULT_METRIC",
    "PHASE_METRICS",
    "MAX_FACETS",
    "MAX_LINES",
    "SIGMA_W",
    "SIGMA_B",
    "DEPTH",
    "Table",
    "Facet",
    "Matrix",
    "Curve",
    "CriticalCurve",
    "RidgeRow",
    "varied_keys",
    "setting_keys",
    "metric_names",
    "check_key",
    "check_metric",
    "select",
    "default_axes",
    "points_table",
    "metric_matrix",
    "metric_curves",
    "critical_curve",
    "ridge",
    "best_point",
    "View",
    "build_view",
    "csv_table",
    "show_dict",
]

SHOW_SCHEMA = "isoscope.show/1"
DEFAULT_METRIC = "score.isometry"
PHASE_METRICS = ("score.isometry", "score.log10_gain", "score.log_s_std")
MAX_FACETS = 6  # rows of a phase diagram before it stops being readable (convention)
MAX_LINES = 12  # lines on one curve figure (convention)
SIGMA_W, SIGMA_B, DEPTH = "init.sigma_w", "init.sigma_b", "network.depth"
CRITICAL_SAMPLES = 25  # sigma_b values at which the critical line is solved

_LABELS = ("name", "description")  # settings that label a point without changing a number


class Table(NamedTuple):
    """One row per point: ``columns`` (name, status, error, varied keys, metrics) and ``rows``."""

    columns: tuple[str, ...]
    rows: tuple[tuple[Any, ...], ...]


class Facet(NamedTuple):
    """One matrix of a metric: ``fixed`` (the other varied keys' values), ``values`` shaped
    ``(len(y), len(x))`` (NaN where no done point has a number), ``names`` the point names
    (``None`` where absent)."""

    fixed: dict[str, Any]
    values: np.ndarray
    names: tuple[tuple[str | None, ...], ...]


class Matrix(NamedTuple):
    """A metric over two keys: the unique sorted ``x`` and ``y`` values and one facet per
    combination of the other varied keys."""

    x_key: str
    y_key: str
    metric: str
    x: tuple
    y: tuple
    facets: tuple[Facet, ...]


class Curve(NamedTuple):
    """A metric against one key for one combination ``fixed`` of the other varied keys."""

    fixed: dict[str, Any]
    x: np.ndarray
    values: np.ndarray


class CriticalCurve(NamedTuple):
    """The mean-field critical line of one activation: ``sigma_w[i]`` with chi_1 = 1 at
    ``sigma_b[i]`` (only sigma_b values where a stable critical point exists)."""

    activation: str
    sigma_b: np.ndarray
    sigma_w: np.ndarray


class RidgeRow(NamedTuple):
    """One sigma_b row of a facet: the grid sigma_w that scores best, the critical sigma_w and
    the grid value nearest to it; ``follows`` when the two grid values are the same."""

    fixed: dict[str, Any]
    sigma_b: float
    best_sigma_w: float
    critical_sigma_w: float
    nearest_sigma_w: float
    follows: bool


# ----------------------------------------------------------------------------- keys
def _order(v: Any) -> tuple:
    """Sort key for mixed settings: numbers first by value, then text, then missing."""
    if v is None:
        return (2, "")
    if isinstance(v, (int, float)):
        return (0, v)
    return (1, str(v))


def setting_keys(points) -> list[str]:
    """Every settings key of the stored points, sorted."""
    return sorted({k for p in points for k in p.settings})


def varied_keys(points) -> list[str]:
    """The settings whose values differ across ``points`` (labels ``name`` and ``description``
    left out), grid keys first in the order the grid gave them, then the rest sorted."""
    distinct = {
        k
        for k in setting_keys(points)
        if k not in _LABELS and len({repr(p.settings.get(k)) for p in points}) > 1
    }
    first = [k for p in points for k in p.values if k in distinct]
    ordered = list(dict.fromkeys(first))
    return ordered + sorted(distinct - set(ordered))


def metric_names(points) -> list[str]:
    """Every number name stored for any of ``points``, sorted."""
    return sorted({k for p in points for k in p.numbers})


def _nearest(word: str, names: Sequence[str]) -> str:
    close = difflib.get_close_matches(word, names, n=4, cutoff=0.5)
    return ("nearest: " + ", ".join(close)) if close else f"{len(names)} names are stored"


def check_key(points, key: str, flag: str) -> str:
    """``key`` if it is a settings key of the points.

    Raises:
      InputError: naming the key and the nearest valid keys (difflib ratio >= 0.5).
    """
    keys = setting_keys(points)
    if key not in keys:
        raise InputError(
            f"{flag} {key!r} is not a setting of the stored points",
            expected=f"a dotted spec key ({_nearest(key, keys)})",
            hint="the varied ones are " + (", ".join(varied_keys(points)) or "none"),
        )
    return key


def check_metric(points, metric: str, numeric: bool = True) -> str:
    """``metric`` if some done point stores it (and, when ``numeric``, it is a number).

    Raises:
      InputError: naming the metric and the nearest stored names (difflib ratio >= 0.5), or
        saying that the metric is text (``score.verdict``) where a number is needed.
    """
    names = metric_names(points)
    if names and metric not in names:  # no done point at all: every cell is empty, not an error
        raise InputError(
            f"--metric {metric!r} is not stored",
            expected=f"a number name of result.json ({_nearest(metric, names)})",
            hint="e.g. score.isometry, score.log10_gain, score.log_s_std, "
            "measured.log_s.std, agreement.ks",
        )
    if numeric:
        values = [p.numbers.get(metric) for p in points]
        if any(isinstance(v, str) for v in values):
            raise InputError(
                f"--metric {metric!r} is text (e.g. {next(v for v in values if isinstance(v, str))!r})",
                expected="a numeric metric for a matrix or a curve",
                hint="the points table shows score.verdict in every row; choose a number "
                "for the matrix, e.g. score.isometry",
            )
    return metric


def _parse_like(raw: str, stored: Any) -> Any:
    """``raw`` read as the type of ``stored``: int, float or text (booleans are stored as
    0/1, so ``true``/``false`` read as 1/0 against an integer)."""
    if isinstance(stored, int):  # bool included
        low = raw.strip().lower()
        if low in ("true", "false"):
            return int(low == "true")
        try:
            return int(raw)
        except ValueError:
            try:
                return float(raw)
            except ValueError:
                return raw
    if isinstance(stored, float):
        try:
            return float(raw)
        except ValueError:
            return raw
    return raw


def select(points, where: Sequence[str]) -> list:
    """The points matching every ``KEY=VALUE`` of ``where`` (values parsed like the stored ones).

    Raises:
      InputError: a term without ``=``, an unknown key (nearest names listed), or a term that
        matches no point (the stored values of that key listed).
    """
    shown = list(points)
    for term in where:
        key, eq, raw = term.partition("=")
        key = key.strip()
        if not eq or not key:
            raise InputError(
                f"--where {term!r} is not KEY=VALUE",
                expected="a dotted spec key, '=', a value (e.g. network.depth=16)",
            )
        check_key(points, key, "--where")
        kept = [
            p for p in shown if _parse_like(raw.strip(), p.settings.get(key)) == p.settings.get(key)
        ]
        if not kept:
            values = sorted({p.settings.get(key) for p in shown}, key=_order)
            raise InputError(
                f"--where {term!r} matches none of the {len(shown)} points",
                expected=f"one of the stored values of {key}: " + ", ".join(map(str, values)),
            )
        shown = kept
    return shown


def _numeric(points, key: str) -> bool:
    return all(isinstance(p.settings.get(key), (int, float)) for p in points)


def default_axes(points) -> tuple[str | None, str | None]:
    """``(x, y)`` when neither is given: (init.sigma_w, init.sigma_b) when both vary, else the
    first two varied numeric keys; ``(key, None)`` with one varied key; ``(None, None)``."""
    varied = varied_keys(points)
    if SIGMA_W in varied and SIGMA_B in varied:
        return SIGMA_W, SIGMA_B
    numeric = [k for k in varied if _numeric(points, k)]
    if len(numeric) >= 2:
        return numeric[0], numeric[1]
    if varied:
        return (numeric or varied)[0], None
    return None, None


# ----------------------------------------------------------------------------- tables
def _number(v: Any) -> float:
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else math.nan


def points_table(points, metrics: Sequence[str]) -> Table:
    """One row per point: name, status, error, every varied setting, each of ``metrics``
    (``None`` where a point has no such number)."""
    varied = varied_keys(points)
    cols = ("name", "status", "error", *varied, *metrics)
    rows = tuple(
        (
            p.name,
            p.status,
            p.error,
            *(p.settings.get(k) for k in varied),
            *(p.numbers.get(m) for m in metrics),
        )
        for p in points
    )
    return Table(cols, rows)


def _combinations(points, keys: Sequence[str]) -> list[dict[str, Any]]:
    """Every combination of ``keys`` present among the points, in sorted order."""
    seen = {tuple(p.settings.get(k) for k in keys) for p in points}
    return [dict(zip(keys, c)) for c in sorted(seen, key=lambda c: tuple(map(_order, c)))]


def _too_many(what: str, count: int, limit: int, keys: Sequence[str], points) -> InputError:
    example = keys[0] if keys else "KEY"
    value = points[0].settings.get(example) if points else "VALUE"
    return InputError(
        f"the {what} would need {count} {'rows' if what == 'phase diagram' else 'lines'}, "
        f"one per combination of {', '.join(keys)}",
        expected=f"at most {limit}",
        hint=f"fix some of them with --where, e.g. --where {example}={value}",
    )


def metric_matrix(points, x: str, y: str, metric: str) -> Matrix:
    """``metric`` over the unique sorted values of ``x`` (columns) and ``y`` (rows).

    One facet per combination of the other varied keys; a cell holds the metric of the one
    point with those settings (settings identify a point: the store key is a hash of them), NaN
    when no such point is stored, it failed, or its number is null.

    Raises:
      InputError: ``x == y``, or more than ``MAX_FACETS`` facets (asks for ``--where``).
    """
    if x == y:
        raise InputError(f"--x and --y are both {x!r}", expected="two different keys")
    others = [k for k in varied_keys(points) if k not in (x, y)]
    combos = _combinations(points, others)
    if len(combos) > MAX_FACETS:
        raise _too_many("phase diagram", len(combos), MAX_FACETS, others, points)
    xs = tuple(sorted({p.settings.get(x) for p in points}, key=_order))
    ys = tuple(sorted({p.settings.get(y) for p in points}, key=_order))
    col, row = {v: i for i, v in enumerate(xs)}, {v: i for i, v in enumerate(ys)}
    facets = []
    for fixed in combos:
        values = np.full((len(ys), len(xs)), np.nan)
        names = [[None] * len(xs) for _ in ys]
        for p in points:
            if all(p.settings.get(k) == v for k, v in fixed.items()):
                i, j = row[p.settings.get(y)], col[p.settings.get(x)]
                values[i, j] = _number(p.numbers.get(metric))
                names[i][j] = p.name
        facets.append(Facet(fixed, values, tuple(map(tuple, names))))
    return Matrix(x, y, metric, xs, ys, tuple(facets))


def metric_curves(points, along: str, metric: str) -> list[Curve]:
    """``metric`` against ``along`` (sorted), one curve per combination of the other varied
    keys; points without a number are left out of their curve.

    Raises:
      InputError: more than ``MAX_LINES`` curves (asks for ``--where``).
    """
    others = [k for k in varied_keys(points) if k != along]
    combos = _combinations(points, others)
    if len(combos) > MAX_LINES:
        raise _too_many("curve figure", len(combos), MAX_LINES, others, points)
    curves = []
    for fixed in combos:
        pts = sorted(
            (
                (p.settings.get(along), _number(p.numbers.get(metric)))
                for p in points
                if all(p.settings.get(k) == v for k, v in fixed.items())
            ),
            key=lambda t: _order(t[0]),
        )
        pts = [(a, v) for a, v in pts if math.isfinite(v)]
        curves.append(Curve(fixed, np.array([a for a, _ in pts]), np.array([v for _, v in pts])))
    return curves


# ----------------------------------------------------------------------------- theory
def critical_curve(points, x: str, y: str) -> CriticalCurve | None:
    """The critical line for a (sigma_w, sigma_b) diagram, or ``None`` when it does not apply.

    It applies when ``{x, y} == {init.sigma_w, init.sigma_b}`` and every point is a plain
    stack of one activation (one leaky slope for leaky ReLU).  At ``CRITICAL_SAMPLES`` values
    of sigma_b evenly spaced over the axis range, ``critical_point(act, sigma_b).sigma_w`` is
    the weight scale with chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2] = 1 at the stable fixed point
    q* (Schoenholz et al. 2017, ICLR, sec. 3; Poole et al. 2016, NeurIPS); a sigma_b without a
    stable critical point (ReLU for sigma_b > 0, GELU at small sigma_b) is left out.
    ``None`` also when no sigma_b of the range has one.
    """
    from isoscope.activations import get_activation
    from isoscope.theory.mean_field import critical_point

    if {x, y} != {SIGMA_W, SIGMA_B} or not points:
        return None
    if {p.settings.get("network.family") for p in points} != {"plain"}:
        return None
    acts = {p.settings.get("network.activation") for p in points}
    if len(acts) != 1:
        return None
    (name,) = acts
    slope = None
    if name == "leaky-relu":
        slopes = {p.settings.get("network.leaky_slope") for p in points}
        if len(slopes) != 1:
            return None
        (slope,) = slopes
    act = get_activation(name, slope=slope)
    sbs = [float(p.settings[SIGMA_B]) for p in points]
    lo, hi = min(sbs), max(sbs)
    grid = np.linspace(lo, hi, CRITICAL_SAMPLES) if hi > lo else np.array([lo])
    kept_b, kept_w = [], []
    for sb in grid:
        try:
            kept_w.append(critical_point(act, float(sb)).sigma_w)
        except TheoryError:
            continue
        kept_b.append(float(sb))
    if not kept_b:
        return None
    return CriticalCurve(act.name, np.array(kept_b), np.array(kept_w))


def ridge(matrix: Matrix, curve: CriticalCurve) -> list[RidgeRow]:
    """Along each sigma_b of each facet, the grid sigma_w with the highest metric against the
    grid sigma_w nearest the critical one (interpolated linearly along the critical line;
    sigma_b rows outside the line's range, or without any number, are skipped)."""
    sw_on_x = matrix.x_key == SIGMA_W
    sws = np.array(matrix.x if sw_on_x else matrix.y, dtype=float)
    sbs = matrix.y if sw_on_x else matrix.x
    out = []
    for facet in matrix.facets:
        grid = facet.values if sw_on_x else facet.values.T  # rows: sigma_b, columns: sigma_w
        for i, sb in enumerate(sbs):
            row = grid[i]
            if not np.isfinite(row).any() or not curve.sigma_b[0] <= sb <= curve.sigma_b[-1]:
                continue
            crit = float(np.interp(sb, curve.sigma_b, curve.sigma_w))
            best = float(sws[int(np.nanargmax(row))])
            near = float(sws[int(np.argmin(np.abs(sws - crit)))])
            out.append(RidgeRow(facet.fixed, float(sb), best, crit, near, best == near))
    return out


def best_point(points, metric: str = DEFAULT_METRIC):
    """The done point with the highest finite ``metric`` (the first stored on a tie), or None."""
    scored = [(p, _number(p.numbers.get(metric))) for p in points if p.status == "done"]
    scored = [(p, v) for p, v in scored if math.isfinite(v)]
    return max(scored, key=lambda t: t[1])[0] if scored else None


# ----------------------------------------------------------------------------- one view
class View(NamedTuple):
    """Everything ``isoscope show`` shows of a store (built by :func:`build_view`).

    Attributes:
      store: the store's path, as given.
      where: the ``--where`` terms applied.
      points: the selected points, in stored order.
      varied: their varied keys.
      x, y: the axes (``None`` when not shown).
      metric: the chosen metric.
      matrices: ``{metric: Matrix}`` over (x, y) for the phase metrics and the chosen one, or None.
      curves: the chosen metric along ``x`` when there is no ``y``, or None.
      depth_curves: the chosen metric along ``network.depth`` when depth varies and is no axis.
      critical: the critical line of a (sigma_w, sigma_b) diagram, or None.
      ridge: :func:`ridge` of the isometry matrix against ``critical`` (empty without both).
      notes: what was left out and why.
    """

    store: str
    where: tuple[str, ...]
    points: list
    varied: list[str]
    x: str | None
    y: str | None
    metric: str
    matrices: dict[str, Matrix] | None
    curves: list[Curve] | None
    depth_curves: list[Curve] | None
    critical: CriticalCurve | None
    ridge: list[RidgeRow]
    notes: tuple[str, ...]


def build_view(
    points,
    store: str,
    where: Sequence[str] = (),
    x: str | None = None,
    y: str | None = None,
    metric: str = DEFAULT_METRIC,
) -> View:
    """Select the points (:func:`select`), check the axes and the metric, and compute the
    matrices (``x`` and ``y``), or the curves along ``x`` (``x`` alone), with the depth curves
    and the critical line where they apply.  No axes: the table only.

    Raises:
      InputError: an unknown key or metric (nearest names listed), a ``--where`` that matches
        nothing, ``y`` without ``x``, a text metric where a number is needed, too many facets.
    """
    if y is not None and x is None:
        raise InputError(
            f"--y {y!r} without --x",
            expected="--x KEY, or --x and --y together",
            hint="give --x for the columns (a curve when --y is left out)",
        )
    for key, flag in ((x, "--x"), (y, "--y")):
        if key is not None:
            check_key(points, key, flag)
    chosen = select(points, where)
    check_metric(chosen, metric, numeric=x is not None)
    varied = varied_keys(chosen)
    matrices = curves = depth = critical = None
    rows: list[RidgeRow] = []
    notes: list[str] = []
    if x is not None and y is not None:
        names = [
            m
            for m in dict.fromkeys((*PHASE_METRICS, metric))
            if m == metric or m in metric_names(chosen)
        ]
        matrices = {m: metric_matrix(chosen, x, y, m) for m in names}
        critical = critical_curve(chosen, x, y)
        if critical is not None and DEFAULT_METRIC in matrices:
            rows = ridge(matrices[DEFAULT_METRIC], critical)
    elif x is not None:
        curves = metric_curves(chosen, x, metric)
    if x is not None and DEPTH in varied and DEPTH not in (x, y):
        try:
            depth = metric_curves(chosen, DEPTH, metric)
        except InputError as e:
            notes.append(f"depth curves left out: {e.message}; fix keys with --where to see them")
    return View(
        store,
        tuple(where),
        chosen,
        varied,
        x,
        y,
        metric,
        matrices,
        curves,
        depth,
        critical,
        rows,
        tuple(notes),
    )


def csv_table(points) -> Table:
    """The wide table of every point: name, status, error, every varied setting, every number
    (sorted by name; ``None`` where a point has none)."""
    return points_table(points, metric_names(points))


# ----------------------------------------------------------------------------- JSON
def _values(a: np.ndarray) -> list:
    return [None if not math.isfinite(v) else float(v) for v in np.asarray(a, dtype=float).ravel()]


def _curves(curves: list[Curve] | None, along: str | None) -> dict[str, Any] | None:
    if curves is None:
        return None
    return {
        "along": along,
        "lines": [
            {"fixed": c.fixed, "x": c.x.tolist(), "values": _values(c.values)} for c in curves
        ],
    }


def show_dict(view: View) -> dict[str, Any]:
    """The view as plain data (schema ``isoscope.show/1``): ``store``, ``where``, ``varied``,
    ``axes`` ({x, y}), ``metric``, ``points`` (name, status, error, key, varied settings,
    every number), ``matrix`` (of the chosen metric: x, y, facets with their fixed values and
    rows of numbers, null where no number), ``curves`` and ``depth_curves`` (along, lines),
    ``critical_line`` (sigma_b, sigma_w), ``ridge``, ``best`` (highest isometry score), ``notes``."""
    best = best_point(view.points)
    m = None if view.matrices is None else view.matrices[view.metric]
    return {
        "schema": SHOW_SCHEMA,
        "store": view.store,
        "where": list(view.where),
        "varied": view.varied,
        "axes": {"x": view.x, "y": view.y},
        "metric": view.metric,
        "points": [
            {
                "name": p.name,
                "status": p.status,
                "error": p.error,
                "key": p.key,
                "settings": {k: p.settings.get(k) for k in view.varied},
                "numbers": p.numbers,
            }
            for p in view.points
        ],
        "matrix": None
        if m is None
        else {
            "x": list(m.x),
            "y": list(m.y),
            "facets": [
                {"fixed": f.fixed, "values": [_values(r) for r in f.values]} for f in m.facets
            ],
        },
        "curves": _curves(view.curves, view.x),
        "depth_curves": _curves(view.depth_curves, DEPTH),
        "critical_line": None
        if view.critical is None
        else {
            "activation": view.critical.activation,
            "sigma_b": view.critical.sigma_b.tolist(),
            "sigma_w": view.critical.sigma_w.tolist(),
        },
        "ridge": [r._asdict() for r in view.ridge],
        "best": None
        if best is None
        else {
            "name": best.name,
            "metric": DEFAULT_METRIC,
            "value": best.numbers.get(DEFAULT_METRIC),
            "settings": {k: best.settings.get(k) for k in view.varied},
        },
        "notes": list(view.notes),
    }
