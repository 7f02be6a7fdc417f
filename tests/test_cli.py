"""The command line: exit codes, messages naming file/key/value/allowed, crash-safe folders."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from isoscope import cli

GOOD = """name = "t"
[network]
family = "plain"
width = 24
depth = 6
activation = "tanh"
[init]
weights = "orthogonal"
sigma_w = 1.1
sigma_b = 0.05
[analysis]
inputs = 2
seed = 3
"""


def _write(tmp_path, text, name="spec.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def _run(args, capsys):
    code = cli.main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_analyze_writes_complete_folder_and_json(tmp_path, capsys):
    spec = _write(tmp_path, GOOD)
    out = tmp_path / "res"
    code, stdout, _ = _run(["analyze", spec, "--out", out, "--json"], capsys)
    assert code == 0
    r = json.loads(stdout)
    on_disk = json.loads((out / "result.json").read_text())
    for path in ("measured.lambda_moments.m1", "measured.lambda_moments.m2", "measured.log_s.mean",
                 "measured.log_s.std", "measured.zero_fraction", "score.isometry", "score.verdict"):
        node = r
        for part in path.split("."):
            node = node[part]
        assert node is not None, path
    assert r["spec"]["analysis"]["seed"] == 3 and r["spec"]["analysis"]["dtype"] == "float64"
    assert on_disk["measured"] == r["measured"]
    for f in ("report.html", "spectrum-log-s.png", "spectrum-log-s.svg", "spectrum-lambda.png"):
        assert (out / f).stat().st_size > 0
    # same spec and seed: the same numbers (DESIGN.md conventions)
    code, stdout2, _ = _run(["analyze", spec, "--out", out, "--json"], capsys)
    assert json.loads(stdout2)["measured"] == r["measured"]


@pytest.mark.parametrize("edit,needle", [
    (('activation = "tanh"', 'activation = "tahn"'), "network.activation.*'tahn'.*tanh"),
    (('weights = "orthogonal"', 'weights = "ortho"'), "init.weights.*'ortho'.*orthogonal"),
    (("width = 24", "width = 0"), "network.width.*0.*>= 1"),
    (("depth = 6", "depth = -1"), "network.depth.*-1.*>= 1"),
    (("sigma_w = 1.1", "sigma_w = -1.1"), "init.sigma_w.*-1.1.*>= 0"),
    (('family = "plain"', 'family = "recurrent"'), "network.family.*recurrent.*plain, residual"),
    (("seed = 3", "seed = 3\nsead = 4"), "analysis.sead.*unknown key"),
    (("width = 24", "width = [24"), "malformed TOML"),
])
def test_bad_spec_exit_2_with_clear_message(tmp_path, capsys, edit, needle):
    spec = _write(tmp_path, GOOD.replace(*edit))
    code, _, err = _run(["analyze", spec, "--out", tmp_path / "o"], capsys)
    assert code == 2
    assert str(spec) in err
    import re
    assert re.search(needle, err), err
    assert not (tmp_path / "o").exists()


def test_missing_spec_file(tmp_path, capsys):
    code, _, err = _run(["analyze", tmp_path / "nope.toml"], capsys)
    assert code == 2 and "nope.toml" in err and "does not exist" in err


def test_npy_inputs_wrong_shape_and_right_shape(tmp_path, capsys):
    np.save(tmp_path / "x.npy", np.ones((3, 5)))
    text = GOOD.replace("seed = 3", 'seed = 3\ninput = "file"\ninput_file = "x.npy"')
    spec = _write(tmp_path, text)
    code, _, err = _run(["analyze", spec, "--out", tmp_path / "o"], capsys)
    assert code == 2 and "(3, 5)" in err and "(24,) or (2, 24)" in err and "analysis.input_file" in err
    np.save(tmp_path / "x.npy", np.random.default_rng(0).normal(size=(2, 24)))
    code, _, _ = _run(["analyze", spec, "--out", tmp_path / "o"], capsys)
    assert code == 0 and (tmp_path / "o" / "result.json").exists()


def test_failed_run_leaves_no_half_written_folder(tmp_path, capsys, monkeypatch):
    from isoscope import plot

    def boom(*a, **k):
        raise RuntimeError("disk full (simulated)")
    monkeypatch.setattr(plot, "lambda_figure", boom)
    spec = _write(tmp_path, GOOD)
    code, _, _ = _run(["analyze", spec, "--out", tmp_path / "o"], capsys)
    assert code == 1
    assert not (tmp_path / "o").exists()
    assert not [p for p in tmp_path.iterdir() if "partial" in p.name]


def test_refuses_to_overwrite_a_users_folder(tmp_path, capsys):
    spec = _write(tmp_path, GOOD)
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep me")
    code, _, err = _run(["analyze", spec, "--out", mine], capsys)
    assert code == 2 and "not written by isoscope" in err
    assert (mine / "notes.txt").read_text() == "keep me"


def test_float32_overflow_is_reported_not_garbage(tmp_path, capsys):
    text = GOOD.replace("depth = 6", "depth = 120").replace("sigma_w = 1.1", "sigma_w = 3.0").replace(
        'activation = "tanh"', 'activation = "linear"').replace("seed = 3", 'seed = 3\ndtype = "float32"\ninput = "gaussian"')
    spec = _write(tmp_path, text)
    code, stdout, _ = _run(["analyze", spec, "--out", tmp_path / "o", "--json"], capsys)
    assert code == 0
    r = json.loads(stdout)
    assert r["score"]["verdict"] == "non-finite" and r["measured"] is None
    assert r["fault"]["stage"] == "forward" and 70 <= r["fault"]["layer"] <= 85
    assert any("overflow" in w for w in r["warnings"])


def test_module_entry_point_help():
    p = subprocess.run([sys.executable, "-m", "isoscope", "--help"], capture_output=True, text=True)
    assert p.returncode == 0 and "analyze" in p.stdout and "demo" in p.stdout
