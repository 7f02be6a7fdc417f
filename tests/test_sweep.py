"""Sweeps: grid files, the SQLite store, local and Dask executors, kills and resumes.

The outside references: ``isoscope analyze`` itself (a point's stored numbers must equal the
result of analysing its spec alone), the product of the grid lists (itertools), SQLite's own
view of the file (row counts, ``PRAGMA journal_mode``), and ``critical_point``'s critical line
(Poole et al. 2016, chi_1 = 1) for the ridge of the isometry score.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from isoscope.errors import InputError
from isoscope.sweep import load_grid, parse_grid, run_sweep
from isoscope.sweep.grid import point_key
from isoscope.sweep.store import SCHEMA, Store, check_store

GRID = textwrap.dedent("""\
    name = "seed-bank"
    description = "a 2 x 3 x 2 test grid"
    [network]
    width = 8
    activation = "tanh"
    [init]
    weights = "orthogonal"
    [analysis]
    inputs = 2
    [grid]
    "init.sigma_w" = [1.0, 1.3]
    "network.depth" = [2, 3, 4]
    "init.weights" = ["orthogonal", "gaussian"]
    """)


def _write(tmp: Path, text: str = GRID, name: str = "grid.toml") -> Path:
    path = tmp / name
    path.write_text(text, encoding="utf-8")
    return path


def _numbers(store_path: Path) -> dict[str, dict]:
    """``{point_key: numbers}`` without the wall-clock seconds (the only numbers allowed to
    differ between runs)."""
    with Store.reader(store_path) as store:
        return {
            p.key: {k: v for k, v in p.numbers.items() if not k.startswith("seconds.")}
            for p in store.points()
        }


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _cli(*args, env=None, **kw):
    return subprocess.run(
        [sys.executable, "-m", "isoscope", *map(str, args)],
        capture_output=True,
        text=True,
        env=env,
        **kw,
    )


# ----------------------------------------------------------------------------- grids
def test_grid_is_the_product_of_its_lists_with_zipped_keys_together(tmp_path):
    text = GRID + textwrap.dedent("""\
        [grid.zip]
        "init.sigma_b" = [0.0, 0.1]
        "analysis.seed" = [3, 4]
        """)
    grid = load_grid(_write(tmp_path, text))
    lists = [[1.0, 1.3], [2, 3, 4], ["orthogonal", "gaussian"], [(0.0, 3), (0.1, 4)]]
    expected = [(a, b, c, *z) for a, b, c, z in itertools.product(*lists)]  # itertools.product
    got = [
        (
            p.values["init.sigma_w"],
            p.values["network.depth"],
            p.values["init.weights"],
            p.values["init.sigma_b"],
            p.values["analysis.seed"],
        )
        for p in grid.points
    ]
    assert got == expected
    assert len({p.key for p in grid.points}) == 24
    p = grid.points[5]
    assert p.spec.init.sigma_w == p.values["init.sigma_w"] and p.spec.network.width == 8
    assert p.key == point_key(p.spec)


def test_unquoted_dotted_keys_mean_the_same(tmp_path):
    a = load_grid(_write(tmp_path, GRID))
    b = load_grid(_write(tmp_path, GRID.replace('"init.sigma_w"', "init.sigma_w"), "b.toml"))
    assert [p.key for p in a.points] == [p.key for p in b.points]


@pytest.mark.parametrize(
    "grid_lines, key, words",
    [
        ('"init.sigma_ww" = [1.0]', "grid.init.sigma_ww", "did you mean 'init.sigma_w'"),
        ('"init.sigma_w" = []', "grid.init.sigma_w", "empty"),
        ('"init.sigma_w" = 1.2', "grid.init.sigma_w", "not a list"),
        ('"init.sigma_w" = [1.0, -1.0]', "grid.init.sigma_w", "negative"),
        ('"init.sigma_w" = [1.0, 1.0]', "grid.init.sigma_w", "twice"),
        ('"network.activation" = ["tanh", "tahn"]', "grid.network.activation", "tahn"),
        ('"name" = ["a", "b"]', "grid.name", "labels"),
        ('"network.depth" = [2, 0]', "grid.network.depth", "too small"),
    ],
)
def test_bad_grids_are_refused_naming_the_key(tmp_path, grid_lines, key, words):
    text = GRID.split("[grid]")[0] + "[grid]\n" + grid_lines + "\n"
    with pytest.raises(InputError) as e:
        load_grid(_write(tmp_path, text))
    assert e.value.key == key and words.lower() in str(e.value).lower()


def test_zipped_lists_of_different_lengths_are_refused(tmp_path):
    text = GRID + '[grid.zip]\n"init.sigma_b" = [0.0, 0.1]\n"analysis.seed" = [1, 2, 3]\n'
    with pytest.raises(InputError) as e:
        load_grid(_write(tmp_path, text))
    assert e.value.key == "grid.zip" and "init.sigma_b has 2" in str(e.value)
    assert "analysis.seed has 3" in str(e.value)


def test_a_key_varied_twice_and_a_missing_grid_are_refused(tmp_path):
    with pytest.raises(InputError, match="more than once"):
        load_grid(_write(tmp_path, GRID + '[grid.zip]\n"init.sigma_w" = [0.5, 0.6]\n'))
    with pytest.raises(InputError, match=r"no \[grid\] table"):
        load_grid(_write(tmp_path, GRID.split("[grid]")[0]))


def test_values_that_resolve_to_one_design_are_refused():
    data = {"network": {"width": 8, "depth": 2}, "grid": {"init.sigma_w": [1, 1.0]}}
    with pytest.raises(InputError, match="same design"):
        parse_grid(data)


# ----------------------------------------------------------------------------- bad input, exit 2
def test_bad_grid_exits_2_and_leaves_the_store_untouched(tmp_path):
    store = tmp_path / "s.sqlite"
    good = _write(
        tmp_path,
        GRID.replace('"network.depth" = [2, 3, 4]', '"network.depth" = [2]').replace(
            '["orthogonal", "gaussian"]', '["orthogonal"]'
        ),
    )
    run_sweep(load_grid(good), store, workers=1)
    before = _sha(store)
    bad = _write(tmp_path, GRID.replace("[1.0, 1.3]", "[1.0, -2.0]"), "bad.toml")
    r = _cli("sweep", bad, "--store", store)
    assert r.returncode == 2, r.stderr
    assert "grid.init.sigma_w" in r.stderr and "-2.0" in r.stderr
    assert _sha(store) == before


def test_store_of_another_schema_is_refused_and_never_touched(tmp_path):
    other = tmp_path / "other.sqlite"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)")
    con.execute("INSERT INTO meta VALUES ('schema', 'isoscope.sweep/2'), ('isoscope', '9.0')")
    con.commit()
    con.close()
    stamp = (_sha(other), other.stat().st_mtime_ns)
    grid = _write(tmp_path)
    r = _cli("sweep", grid, "--store", other)
    assert r.returncode == 2 and "isoscope.sweep/2" in r.stderr and SCHEMA in r.stderr
    assert (_sha(other), other.stat().st_mtime_ns) == stamp
    assert sorted(p.name for p in tmp_path.iterdir()) == ["grid.toml", "other.sqlite"]
    text = tmp_path / "notes.sqlite"
    text.write_text("field notes, not a database\n")
    r = _cli("sweep", grid, "--store", text)
    assert r.returncode == 2 and "not an SQLite database" in r.stderr
    assert text.read_text() == "field notes, not a database\n"
    plain = tmp_path / "plain.sqlite"
    sqlite3.connect(plain).execute("CREATE TABLE t (x)").connection.commit()
    with pytest.raises(InputError, match="not an isoscope sweep store"):
        check_store(plain)


def test_a_grid_too_large_for_the_memory_exits_2_before_anything_runs(tmp_path):
    grid = _write(tmp_path, GRID.replace("width = 8", "width = 1000000"))
    store = tmp_path / "s.sqlite"
    r = _cli("sweep", grid, "--store", store, "--workers", "2")
    assert r.returncode == 2 and "2 workers each running the largest point" in r.stderr
    assert "of memory" in r.stderr and not store.exists()


def test_a_scheduler_that_does_not_answer_exits_2_and_writes_nothing(tmp_path):
    pytest.importorskip("distributed")
    import socket

    with socket.socket() as s:  # a port on loopback that nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    grid = _write(tmp_path)
    store = tmp_path / "s.sqlite"
    r = _cli("sweep", grid, "--store", store, "--scheduler", f"tcp://127.0.0.1:{port}")
    assert r.returncode == 2, r.stderr
    assert "does not answer" in r.stderr and f"127.0.0.1:{port}" in r.stderr
    assert not store.exists() and not Path(f"{store}.lock").exists()


# ----------------------------------------------------------------------------- the same numbers
@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The 2 x 3 x 2 grid swept by one local worker: the reference store."""
    tmp = tmp_path_factory.mktemp("reference")
    grid = load_grid(_write(tmp))
    store = tmp / "one.sqlite"
    summary = run_sweep(grid, store, workers=1)
    assert (summary.computed, summary.skipped, summary.failed) == (12, 0, 0)
    return grid, store


def test_stored_numbers_equal_those_of_analyze(reference):
    from isoscope.analysis import analyze
    from isoscope.report import result_dict
    from isoscope.sweep.store import flat_numbers

    grid, store = reference
    point = grid.points[7]
    alone = flat_numbers(result_dict(analyze(point.spec)))
    stored = _numbers(store)[point.key]
    alone = {k: v for k, v in alone.items() if not k.startswith("seconds.")}
    assert stored == {k: (int(v) if isinstance(v, bool) else v) for k, v in alone.items()}
    with Store.reader(store) as st:
        full = st.result(point.key)
    assert full["spec"] == point.spec.to_dict() and full["environment"]["jaxlib"]


def test_store_layout(reference):
    grid, store = reference
    con = sqlite3.connect(store)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert con.execute("SELECT value FROM meta WHERE key = 'schema'").fetchone()[0] == SCHEMA
    assert con.execute("SELECT COUNT(*), COUNT(DISTINCT point_key) FROM points").fetchone() == (
        12,
        12,
    )
    row = con.execute(
        "SELECT n.value FROM points p JOIN numbers n ON n.point_id = p.id "
        "WHERE p.point_key = ? AND n.name = 'score.isometry'",
        (grid.points[0].key,),
    ).fetchone()
    assert 0.0 <= row[0] <= 1.0
    keys = {k for (k,) in con.execute("SELECT DISTINCT key FROM settings")}
    assert {"init.sigma_w", "network.depth", "init.weights", "analysis.seed"} <= keys
    values = json.loads(con.execute("SELECT point_values FROM points LIMIT 1").fetchone()[0])
    assert set(values) == {"init.sigma_w", "network.depth", "init.weights"}
    assert not Path(f"{store}.lock").exists()
    con.close()


def test_two_workers_store_the_same_numbers(reference, tmp_path):
    grid, store = reference
    two = tmp_path / "two.sqlite"
    summary = run_sweep(grid, two, workers=2)
    assert summary.computed == 12 and "2 worker processes x 1 XLA thread" in summary.executor
    assert _numbers(two) == _numbers(store)


def test_a_local_dask_cluster_stores_the_same_numbers(reference, tmp_path):
    pytest.importorskip("distributed")
    grid, store = reference
    dask = tmp_path / "dask.sqlite"
    summary = run_sweep(grid, dask, workers=2, scheduler="local")
    assert summary.computed == 12 and "LocalCluster" in summary.executor
    assert _numbers(dask) == _numbers(store)


def test_the_same_grid_again_adds_nothing_and_a_wider_grid_adds_only_the_new_points(
    reference, tmp_path
):
    grid, store = reference
    copy = tmp_path / "copy.sqlite"
    copy.write_bytes(store.read_bytes())
    again = run_sweep(grid, copy, workers=1)
    assert (again.computed, again.skipped, again.stored) == (0, 12, 12)
    wider = load_grid(_write(tmp_path, GRID.replace("[1.0, 1.3]", "[1.0, 1.3, 1.6]")))
    more = run_sweep(wider, copy, workers=2)
    assert (more.computed, more.skipped, more.stored) == (6, 12, 18)
    assert {k: v for k, v in _numbers(copy).items() if k in _numbers(store)} == _numbers(store)


def test_a_failed_point_is_stored_with_its_error_and_retried_on_request(tmp_path):
    x = np.linspace(-1.0, 1.0, 8)
    np.save(tmp_path / "wind.npy", x)
    text = textwrap.dedent("""\
        name = "anemometer"
        [network]
        width = 8
        depth = 2
        [analysis]
        inputs = 1
        input = "file"
        input_file = "wind.npy"
        [grid]
        "analysis.input_file" = ["wind.npy", "gust.npy"]
        """)
    grid = load_grid(_write(tmp_path, text))
    store = tmp_path / "s.sqlite"
    summary = run_sweep(grid, store, workers=1)
    assert (summary.computed, summary.failed) == (1, 1)
    assert "gust.npy" in summary.failures[0][1] and "does not exist" in summary.failures[0][1]
    with Store.reader(store) as st:
        failed = [p for p in st.points() if p.status == "failed"]
    assert len(failed) == 1 and failed[0].numbers == {} and "gust.npy" in failed[0].error
    np.save(tmp_path / "gust.npy", 2 * x)
    assert run_sweep(grid, store, workers=1).skipped == 2  # not retried by default
    retried = run_sweep(grid, store, workers=1, retry_failed=True)
    assert (retried.computed, retried.failed, retried.stored) == (1, 0, 2)
    with Store.reader(store) as st:
        assert [p.status for p in st.points()] == ["done", "done"]


# ----------------------------------------------------------------------------- kills
def _stored(store: Path) -> int:
    if not store.exists():
        return 0
    try:
        con = sqlite3.connect(f"{store.resolve().as_uri()}?mode=ro", uri=True)
        try:
            return con.execute("SELECT COUNT(*) FROM points").fetchone()[0]
        finally:
            con.close()
    except sqlite3.DatabaseError:
        return 0


def _children(pid: int) -> list[int]:
    out = subprocess.run(["ps", "-o", "pid=", "--ppid", str(pid)], capture_output=True, text=True)
    return [int(x) for x in out.stdout.split()]


def test_a_killed_sweep_resumes_to_the_same_store(reference, tmp_path):
    """SIGKILL the coordinator at several points (during start-up, after 3 and after 7 stored
    points, then by SIGINT); each rerun of the same command resumes, and the final store equals
    the uninterrupted one with no duplicates."""
    grid_text, store = (tmp_path / "grid.toml"), tmp_path / "killed.sqlite"
    grid_text.write_text(GRID, encoding="utf-8")
    ref_grid, ref_store = reference
    command = [
        sys.executable,
        "-m",
        "isoscope",
        "sweep",
        str(grid_text),
        "--store",
        str(store),
        "--workers",
        "2",
    ]
    for stop_after, sig in (
        (None, signal.SIGKILL),
        (3, signal.SIGKILL),
        (7, signal.SIGKILL),
        (9, signal.SIGINT),
    ):
        proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 240
        if stop_after is None:
            time.sleep(1.5)  # while the workers start
        else:
            while (
                _stored(store) < stop_after and time.monotonic() < deadline and proc.poll() is None
            ):
                time.sleep(0.05)
        kids = _children(proc.pid)
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=60)
        if sig == signal.SIGINT:
            assert proc.returncode == 130, err
            assert "rerun" in err or "resume" in err
        else:
            assert proc.returncode == -signal.SIGKILL
        time.sleep(0.5)
        alive = [
            k
            for k in kids
            if Path(f"/proc/{k}").exists()
            and "Z" not in Path(f"/proc/{k}/stat").read_text().split()[2]
        ]
        assert alive == [], "workers outlived their coordinator"
        con = sqlite3.connect(store) if store.exists() else None
        if con is not None:
            n, distinct = con.execute(
                "SELECT COUNT(*), COUNT(DISTINCT point_key) FROM points"
            ).fetchone()
            assert n == distinct
            con.close()
    final = subprocess.run(command, capture_output=True, text=True, timeout=600)
    assert final.returncode == 0, final.stderr
    assert _numbers(store) == _numbers(ref_store)
    con = sqlite3.connect(store)
    assert con.execute("SELECT COUNT(*) FROM points").fetchone()[0] == 12
    statuses = [s for (s,) in con.execute("SELECT status FROM runs ORDER BY id")]
    con.close()
    assert statuses[-1] == "finished" and "interrupted" in statuses and "killed" in statuses
    assert "running" not in statuses


def test_a_second_sweep_on_a_busy_store_is_refused_and_another_store_is_unaffected(
    reference, tmp_path
):
    grid, ref_store = reference
    path = _write(tmp_path)
    busy, other = tmp_path / "busy.sqlite", tmp_path / "other.sqlite"
    first = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "isoscope",
            "sweep",
            str(path),
            "--store",
            str(busy),
            "--workers",
            "1",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + 120
        while not Path(f"{busy}.lock").exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        second = _cli("sweep", path, "--store", busy)
        assert second.returncode == 2 and "being written by another sweep" in second.stderr
        beside = _cli("sweep", path, "--store", other, "--workers", "1")
        assert beside.returncode == 0, beside.stderr
    finally:
        out, err = first.communicate(timeout=600)
    assert first.returncode == 0, err
    assert _numbers(busy) == _numbers(other) == _numbers(ref_store)


# ----------------------------------------------------------------------------- the ridge
def test_the_isometry_ridge_follows_the_critical_line(tmp_path):
    """examples/grids/avalanche-phase.toml: tanh, orthogonal, L = 32, N = 64, sigma_w in steps
    of 0.05.  In every sigma_b row the best-scoring sigma_w is within one grid step of the grid
    point nearest the critical sigma_w of ``critical_point`` (chi_1 = 1: Poole et al. 2016;
    Schoenholz et al. 2017), and the ridge moves up with sigma_b as the line does.  (The
    infinite-width law puts the maximum slightly on the ordered side, where the smaller q*
    lowers the spread; that is why the check allows one step, not zero.)"""
    from isoscope.activations import get_activation
    from isoscope.theory.mean_field import critical_point

    grid = load_grid(Path(__file__).resolve().parents[1] / "examples/grids/avalanche-phase.toml")
    store = tmp_path / "avalanche.sqlite"
    assert run_sweep(grid, store, workers=2).computed == 44
    with Store.reader(store) as st:
        points = st.points()
    sw = sorted({p.settings["init.sigma_w"] for p in points})
    sb = sorted({p.settings["init.sigma_b"] for p in points})
    score = np.full((len(sb), len(sw)), np.nan)
    for p in points:
        score[sb.index(p.settings["init.sigma_b"]), sw.index(p.settings["init.sigma_w"])] = (
            p.numbers["score.isometry"]
        )
    assert np.all(np.isfinite(score))
    tanh = get_activation("tanh")
    ridge = []
    for row, b in zip(score, sb):
        critical = critical_point(tanh, b).sigma_w
        nearest = int(np.argmin(np.abs(np.asarray(sw) - critical)))
        best = int(np.argmax(row))
        assert abs(best - nearest) <= 1, (b, sw[best], critical)
        ridge.append(best)
    assert ridge == sorted(ridge) and ridge[-1] > ridge[0]
