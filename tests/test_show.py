"""isoscope show: views of a sweep store (sweep/view.py), its figures, exports and command.

One small store is swept once for the module (tanh, width 12, depths 4 and 8, three sigma_w,
two sigma_b, one draw: 12 points).  Outside references: ``analyze`` itself (the stored numbers
are those of ``result_dict(analyze(spec))``), ``isoscope.theory.mean_field.critical_point``
(the line drawn) and its closed value at sigma_b = 0 for tanh, sigma_w = 1 (chi_1 =
sigma_w^2 tanh'(0)^2 at q* = 0; Schoenholz et al. 2017, ICLR, sec. 3), and the standard
library's ``csv`` and ``json`` readers.
"""

import base64
import csv
import dataclasses
import json
import math
import warnings

import numpy as np
import pytest

from isoscope import cli, plot
from isoscope.activations import get_activation
from isoscope.analysis import analyze
from isoscope.errors import InputError
from isoscope.report import result_dict
from isoscope.sweep import parse_grid, run_sweep
from isoscope.sweep import view as v
from isoscope.sweep.store import Store, flat_numbers
from isoscope.theory.mean_field import critical_point

SIGMA_W = [0.9, 1.0, 1.2]
SIGMA_B = [0.0, 0.2]
DEPTHS = [4, 8]


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """``(path, grid, points)`` of a swept store."""
    path = tmp_path_factory.mktemp("show") / "phase.sqlite"
    grid = parse_grid(
        {
            "name": "orchard-drone",
            "network": {"width": 12, "depth": 4, "activation": "tanh"},
            "analysis": {"inputs": 1, "seed": 11},
            "grid": {"init.sigma_w": SIGMA_W, "init.sigma_b": SIGMA_B, "network.depth": DEPTHS},
        },
        source="<test grid>",
    )
    summary = run_sweep(grid, path, workers=1)
    assert summary.computed == 12 and summary.failed == 0
    with Store.reader(path) as s:
        points = s.points()
    return path, grid, points


def _run(args, capsys):
    code = cli.main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def _point(points, sw, sb, depth):
    (p,) = [
        p
        for p in points
        if p.settings["init.sigma_w"] == sw
        and p.settings["init.sigma_b"] == sb
        and p.settings["network.depth"] == depth
    ]
    return p


def test_varied_keys_and_default_axes(store):
    _, _, points = store
    assert v.varied_keys(points) == ["init.sigma_w", "init.sigma_b", "network.depth"]
    assert v.default_axes(points) == ("init.sigma_w", "init.sigma_b")
    one = v.select(points, ["network.depth=4", "init.sigma_b=0.2"])
    assert v.varied_keys(one) == ["init.sigma_w"] and v.default_axes(one) == ("init.sigma_w", None)


def test_stored_numbers_are_those_of_analyze(store):
    _, grid, points = store
    target = next(
        p
        for p in grid.points
        if p.values == {"init.sigma_w": 1.2, "init.sigma_b": 0.2, "network.depth": 8}
    )
    direct = flat_numbers(result_dict(analyze(target.spec)))
    stored = _point(points, 1.2, 0.2, 8).numbers
    for name in (
        "score.isometry",
        "score.log10_gain",
        "score.log_s_std",
        "measured.log_s.mean",
        "predicted.q_star",
        "agreement.ks",
    ):
        assert stored[name] == pytest.approx(direct[name], rel=1e-12, abs=1e-300), name


def test_matrix_entries_are_the_stored_numbers(store):
    _, _, points = store
    for metric in v.PHASE_METRICS:
        m = v.metric_matrix(points, "init.sigma_w", "init.sigma_b", metric)
        assert m.x == tuple(SIGMA_W) and m.y == tuple(SIGMA_B)
        assert [f.fixed for f in m.facets] == [{"network.depth": d} for d in DEPTHS]
        for f in m.facets:
            for i, sb in enumerate(SIGMA_B):
                for j, sw in enumerate(SIGMA_W):
                    p = _point(points, sw, sb, f.fixed["network.depth"])
                    assert f.values[i, j] == p.numbers[metric]
                    assert f.names[i][j] == p.name


def test_missing_point_leaves_its_cell_empty_and_hatched(store):
    _, _, points = store
    gone = _point(points, 1.0, 0.2, 4)
    m = v.metric_matrix(
        [p for p in points if p is not gone], "init.sigma_w", "init.sigma_b", "score.isometry"
    )
    values = m.facets[0].values
    assert math.isnan(values[1, 1]) and np.isfinite(values).sum() == values.size - 1
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig = plot.phase_figure([m], "t")
    labels = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
    assert any("no stored number" in t for t in labels)
    plot._pyplot().close(fig)


def test_depth_curves_are_the_stored_numbers(store):
    _, _, points = store
    curves = v.metric_curves(points, "network.depth", "score.log_s_std")
    assert len(curves) == len(SIGMA_W) * len(SIGMA_B)
    for c in curves:
        assert c.x.tolist() == DEPTHS
        expect = [
            _point(points, c.fixed["init.sigma_w"], c.fixed["init.sigma_b"], d).numbers[
                "score.log_s_std"
            ]
            for d in DEPTHS
        ]
        assert c.values.tolist() == expect


@pytest.mark.parametrize(
    "x,y", [("init.sigma_w", "init.sigma_b"), ("init.sigma_b", "init.sigma_w")]
)
def test_critical_line_drawn_is_critical_point(store, x, y):
    _, _, points = store
    view = v.build_view(points, "s", (), x, y)
    assert view.critical is not None and view.critical.activation == "tanh"
    fig = plot.phase_figure(list(view.matrices.values()), "t", view.critical)
    tanh = get_activation("tanh")
    panels = 0
    for ax in fig.axes:
        lines = [ln for ln in ax.get_lines() if ln.get_label() == plot.CRITICAL_LABEL]
        if not lines:
            continue
        panels += 1
        xd, yd = (np.asarray(d, dtype=float) for d in lines[0].get_data())
        sw, sb = (xd, yd) if x == "init.sigma_w" else (yd, xd)
        assert sb.min() == min(SIGMA_B) and sb.max() == max(SIGMA_B)
        for b, w in zip(sb, sw):
            assert w == critical_point(tanh, float(b)).sigma_w
        # tanh at sigma_b = 0: q* = 0 and chi_1 = sigma_w^2 tanh'(0)^2, so sigma_w = 1
        assert sw[np.argmin(sb)] == pytest.approx(1.0, abs=1e-12)
    assert panels == len(v.PHASE_METRICS) * len(DEPTHS)
    plot._pyplot().close(fig)


def test_no_critical_line_for_other_axes_or_mixed_activations(store):
    _, _, points = store
    assert v.critical_curve(points, "init.sigma_w", "network.depth") is None
    mixed = [
        dataclasses.replace(p, settings={**p.settings, "network.activation": "erf"})
        if i == 0
        else p
        for i, p in enumerate(points)
    ]
    assert v.critical_curve(mixed, "init.sigma_w", "init.sigma_b") is None


def test_ridge_rows_are_the_best_cells(store):
    _, _, points = store
    view = v.build_view(points, "s", (), "init.sigma_w", "init.sigma_b")
    assert len(view.ridge) == len(SIGMA_B) * len(DEPTHS)
    for r in view.ridge:
        row = {
            sw: _point(points, sw, r.sigma_b, r.fixed["network.depth"]).numbers["score.isometry"]
            for sw in SIGMA_W
        }
        assert r.best_sigma_w == max(row, key=row.get)
        assert r.critical_sigma_w == pytest.approx(
            critical_point("tanh", r.sigma_b).sigma_w, rel=1e-9
        )
        assert r.nearest_sigma_w == min(SIGMA_W, key=lambda s: abs(s - r.critical_sigma_w))


def test_json_matrix_and_where(store, capsys):
    path, _, points = store
    code, out, _ = _run(["show", path, "--json"], capsys)
    assert code == 0
    d = json.loads(out)
    assert d["schema"] == "isoscope.show/1" and d["axes"] == {
        "x": "init.sigma_w",
        "y": "init.sigma_b",
    }
    assert len(d["points"]) == 12 and d["metric"] == "score.isometry"
    for f in d["matrix"]["facets"]:
        for i, sb in enumerate(d["matrix"]["y"]):
            for j, sw in enumerate(d["matrix"]["x"]):
                assert (
                    f["values"][i][j]
                    == _point(points, sw, sb, f["fixed"]["network.depth"]).numbers["score.isometry"]
                )
    best = max((p for p in points), key=lambda p: p.numbers["score.isometry"])
    assert d["best"]["name"] == best.name
    code, out, _ = _run(
        ["show", path, "--json", "--where", "network.depth=8", "--metric", "measured.log_s.std"],
        capsys,
    )
    d = json.loads(out)
    assert code == 0 and len(d["points"]) == 6
    assert all(p["numbers"]["measured.log_s.std"] is not None for p in d["points"])
    assert {
        _point(points, p["settings"]["init.sigma_w"], p["settings"]["init.sigma_b"], 8).key
        for p in d["points"]
    } == {p["key"] for p in d["points"]}
    assert [f["fixed"] for f in d["matrix"]["facets"]] == [{}]


def test_terminal_matrix_rows_are_y(store, capsys):
    path, _, points = store
    code, out, _ = _run(
        ["show", path, "--x", "init.sigma_w", "--y", "init.sigma_b", "--where", "network.depth=4"],
        capsys,
    )
    assert code == 0
    lines = [ln.split() for ln in out.splitlines()]
    rows = [ln for ln in lines if ln and ln[0] in ("0", "0.2")]
    assert [r[0] for r in rows] == ["0", "0.2"]
    for r in rows:
        sb = float(r[0])
        assert [float(c) for c in r[1:]] == pytest.approx(
            [_point(points, sw, sb, 4).numbers["score.isometry"] for sw in SIGMA_W], rel=1e-3
        )


def test_csv_has_one_row_per_point_and_every_number(store, tmp_path, capsys):
    path, _, points = store
    target = tmp_path / "pts.csv"
    code, _, _ = _run(["show", path, "--csv", target], capsys)
    assert code == 0
    with open(target, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == len(points)
    names = v.metric_names(points)
    assert set(names) | {"name", "status", "error", *v.varied_keys(points)} == set(rows[0])
    by_name = {p.name: p for p in points}
    for r in rows:
        p = by_name[r["name"]]
        assert float(r["score.isometry"]) == p.numbers["score.isometry"]
        assert float(r["init.sigma_w"]) == p.settings["init.sigma_w"]
    assert not [f for f in tmp_path.iterdir() if f.name != "pts.csv"]  # no temporary left


def test_report_folder_holds_the_figures(store, tmp_path, capsys):
    path, _, _ = store
    out = tmp_path / "rep"
    code, _, _ = _run(["show", path, "--out", out], capsys)
    assert code == 0
    pngs = sorted(p.name for p in out.glob("*.png"))
    assert pngs == ["depth-curves.png", "phase-diagram.png"]
    page = (out / "report.html").read_text(encoding="utf-8")
    for name in pngs:
        assert base64.b64encode((out / name).read_bytes()).decode("ascii") in page
    assert "<script" not in page and "critical line" in page
    data = json.loads((out / "show.json").read_text())
    assert data["critical_line"]["activation"] == "tanh"
    with open(out / "points.csv", newline="") as f:
        assert len(list(csv.DictReader(f))) == 12


@pytest.mark.parametrize(
    "args,needle",
    [
        (["--metric", "score.isometri"], "score.isometry"),
        (["--x", "init.sigmaw", "--y", "init.sigma_b"], "init.sigma_w"),
        (["--where", "network.dept=4"], "network.depth"),
        (["--where", "network.depth=5"], "4, 8"),
        (["--where", "network.depth"], "KEY=VALUE"),
        (["--y", "init.sigma_b"], "--x"),
        (["--x", "init.sigma_w", "--y", "init.sigma_w"], "two different keys"),
        (["--x", "init.sigma_w", "--y", "init.sigma_b", "--metric", "score.verdict"], "is text"),
    ],
)
def test_bad_requests_exit_2_naming_the_nearest(store, capsys, args, needle):
    path, _, _ = store
    code, out, err = _run(["show", path, *args], capsys)
    assert code == 2 and out == ""
    assert needle in err


def test_too_many_facets_asks_for_where(store, monkeypatch):
    _, _, points = store
    monkeypatch.setattr(v, "MAX_FACETS", 1)
    with pytest.raises(InputError, match="--where network.depth="):
        v.metric_matrix(points, "init.sigma_w", "init.sigma_b", "score.isometry")


def test_missing_store_or_foreign_file_exit_2(tmp_path, capsys):
    code, _, err = _run(["show", tmp_path / "none.sqlite"], capsys)
    assert code == 2 and "does not exist" in err
    foreign = tmp_path / "notes.sqlite"
    foreign.write_text("field notes\n")
    code, _, err = _run(["show", foreign], capsys)
    assert code == 2 and "not an SQLite database" in err


def test_csv_path_refused_before_the_store_is_read(tmp_path, capsys):
    code, _, err = _run(["show", tmp_path / "none.sqlite", "--csv", tmp_path], capsys)
    assert code == 2 and "--csv" in err and "is a folder" in err
    code, _, err = _run(
        ["show", tmp_path / "none.sqlite", "--csv", tmp_path / "no" / "x.csv"], capsys
    )
    assert code == 2 and "does not exist" in err and "--csv" in err
