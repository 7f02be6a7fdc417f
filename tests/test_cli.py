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
    for path in (
        "measured.lambda_moments.m1",
        "measured.lambda_moments.m2",
        "measured.log_s.mean",
        "measured.log_s.std",
        "measured.zero_fraction",
        "score.isometry",
        "score.verdict",
    ):
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


@pytest.mark.parametrize(
    "edit,needle",
    [
        (('activation = "tanh"', 'activation = "tahn"'), "network.activation.*'tahn'.*tanh"),
        (('weights = "orthogonal"', 'weights = "ortho"'), "init.weights.*'ortho'.*orthogonal"),
        (("width = 24", "width = 0"), "network.width.*0.*>= 1"),
        (("depth = 6", "depth = -1"), "network.depth.*-1.*>= 1"),
        (("sigma_w = 1.1", "sigma_w = -1.1"), "init.sigma_w.*-1.1.*>= 0"),
        (
            ('family = "plain"', 'family = "recurrent"'),
            "network.family.*recurrent.*plain, residual",
        ),
        (("seed = 3", "seed = 3\nsead = 4"), "analysis.sead.*unknown key"),
        (("width = 24", "width = [24"), "malformed TOML"),
    ],
)
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
    assert (
        code == 2 and "(3, 5)" in err and "(24,) or (2, 24)" in err and "analysis.input_file" in err
    )
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
    text = (
        GOOD.replace("depth = 6", "depth = 120")
        .replace("sigma_w = 1.1", "sigma_w = 3.0")
        .replace('activation = "tanh"', 'activation = "linear"')
        .replace("seed = 3", 'seed = 3\ndtype = "float32"\ninput = "gaussian"')
    )
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


def test_predict_json_from_flags(capsys):
    code, out, _ = _run(
        [
            "predict",
            "--activation",
            "tanh",
            "--weights",
            "orthogonal",
            "--sigma-w",
            1.2,
            "--sigma-b",
            0.1,
            "--depth",
            10,
            "--points",
            64,
            "--json",
        ],
        capsys,
    )
    assert code == 0
    r = json.loads(out)
    assert r["schema"] == "isoscope.prediction/1"
    for key in ("q_star", "chi", "xi_q", "xi_c", "c_star", "atom_at_zero"):
        assert isinstance(r[key], float), key
    assert set(r["lambda_moments"]) == {"m1", "m2", "m3", "m4"}
    assert len(r["density"]["x"]) == len(r["density"]["rho"]) == 64
    assert r["sigma_w2"] == pytest.approx(1.44) and r["sigma_b2"] == pytest.approx(0.01)
    # tanh q* solves q = sigma_w^2 E[tanh(sqrt(q) z)^2] + sigma_b^2 (Poole et al. 2016, eq. 3),
    # the expectation checked here with scipy.integrate.quad
    from scipy import integrate, stats

    q = r["q_star"]
    e = integrate.quad(lambda z: np.tanh(np.sqrt(q) * z) ** 2 * stats.norm.pdf(z), -12, 12)[0]
    assert 1.44 * e + 0.01 == pytest.approx(q, rel=1e-9)


def test_predict_from_a_spec_with_a_flag_override(tmp_path, capsys):
    spec = _write(tmp_path, GOOD)
    code, out, _ = _run(["predict", spec, "--depth", 12, "--points", 64, "--json"], capsys)
    r = json.loads(out)
    assert code == 0 and r["depth"] == 12 and r["sigma_w"] == 1.1 and r["activation"] == "tanh"


@pytest.mark.parametrize(
    "args,needle",
    [
        (["--activation", "tanh", "--depth", 5], "--sigma-w"),
        (["--activation", "tahn", "--sigma-w", 1.0, "--depth", 5], "unknown activation 'tahn'"),
        (["--activation", "tanh", "--sigma-w", 1.0, "--depth", 0], "depth.*0.*>= 1"),
        (
            ["--activation", "gelu", "--sigma-w", 2.0, "--sigma-b", 0.1, "--depth", 4],
            "no finite stable fixed point",
        ),
    ],
)
def test_predict_bad_requests_exit_2(capsys, args, needle):
    import re

    code, out, err = _run(["predict", *args], capsys)
    assert code == 2 and out == "" and re.search(needle, err), err


def test_critical_json_matches_the_tanh_check_value(tmp_path, capsys):
    # docs/theory-mean-field.md check value: tanh at sigma_b^2 = 0.05 is critical at sigma_w^2 = 1.760954639607,
    # q* = 0.570047881641 (Schoenholz et al. 2017 show about 1.76)
    fig = tmp_path / "line.png"
    code, out, _ = _run(
        [
            "critical",
            "--activation",
            "tanh",
            "--sigma-b",
            0.05**0.5,
            "--sigma-w",
            1.0,
            "--depth",
            50,
            "--plot",
            fig,
            "--json",
        ],
        capsys,
    )
    assert code == 0
    r = json.loads(out)
    assert r["schema"] == "isoscope.critical/1"
    assert r["sigma_w2"] == pytest.approx(1.760954639607, abs=1e-9)
    assert r["sigma_w"] == pytest.approx(1.760954639607**0.5, abs=1e-9)
    assert r["q_star"] == pytest.approx(0.570047881641, abs=1e-9)
    # the user's point sigma_w^2 = 1, sigma_b^2 = 0.05 (docs/theory-mean-field.md):
    # q* = 0.193593, chi_1 = 0.759032, xi_q = 1.7476, xi_c = 3.6270; ordered, 50 > 6 xi_c
    pt = r["point"]
    assert pt["q_star"] == pytest.approx(0.193593, abs=1e-6)
    assert pt["chi1"] == pytest.approx(0.759032, abs=1e-6)
    assert pt["xi_q"] == pytest.approx(1.7476, abs=1e-4)
    assert pt["xi_c"] == pytest.approx(3.6270, abs=1e-4)
    assert r["depth_within_6_xi_c"] is False
    assert fig.stat().st_size > 0 and not [p for p in tmp_path.iterdir() if "partial" in p.name]


@pytest.mark.parametrize(
    "args,needle",
    [
        (["--activation", "relu", "--sigma-b", 0.1], "no critical point at sigma_b = 0.1"),
        (["--activation", "tanh", "--sigma-b", -1], "sigma_b = -1.0 is out of range"),
        (["--activation", "tanh", "--plot", "line.txt"], "suffix '.txt'.*png or .svg"),
    ],
)
def test_critical_bad_requests_exit_2(capsys, args, needle):
    import re

    code, out, err = _run(["critical", *args], capsys)
    assert code == 2 and out == "" and re.search(needle, err), err


def test_analyze_result_carries_prediction_agreement_and_profile(tmp_path, capsys):
    spec = _write(tmp_path, GOOD)
    code, out, _ = _run(["analyze", spec, "--out", tmp_path / "res", "--json"], capsys)
    assert code == 0
    r = json.loads(out)
    assert r["predicted"]["lambda_moments"]["m1"] > 0 and r["predicted"]["q_star"] > 0
    a = r["agreement"]
    assert 0.0 <= a["ks"] <= 1.0 and a["m1_rel_error"] is not None
    # width 24 at depth 6 with 48 pooled values: the KS distance is far above its sampling scale
    # (~1/sqrt(48) = 0.14, Kolmogorov distribution) only if it disagrees, and then it must say
    # why: sqrt(L/N) = 0.5 > 0.3 names finite width
    if a["ks"] > 0.05:
        assert any("finite width" in w and "sqrt(L/N) = 0.50" in w for w in a["warnings"])
    assert len(r["profile"]["depths"]) == len(r["profile"]["measured_log_s_std"])
    for f in ("spread-by-depth.png", "critical-line.png"):
        assert (tmp_path / "res" / f).stat().st_size > 0


# ----------------------------------------------------------------------------- issue 8: crashes, flags
def test_seed_beyond_int64_runs_and_is_recorded(tmp_path, capsys):
    # JAX keys are two uint32 words (threefry, Salmon et al. 2011): every seed in [0, 2^64) maps
    # to one key; seeds below 2^63 keep the key jax.random.PRNGKey gives
    spec = _write(tmp_path, GOOD.replace("seed = 3", f"seed = {2**64 - 1}"))
    code, out, err = _run(["analyze", spec, "--json"], capsys)
    assert code == 0, err
    assert json.loads(out)["spec"]["analysis"]["seed"] == 2**64 - 1


def test_seed_out_of_range_is_refused(tmp_path, capsys):
    spec = _write(tmp_path, GOOD.replace("seed = 3", f"seed = {2**64}"))
    code, out, err = _run(["analyze", spec, "--json"], capsys)
    assert code == 2 and "analysis.seed" in err and "18446744073709551615" in err, err


def test_unreadable_spec_file_exit_2(tmp_path, capsys, monkeypatch):
    import os

    spec = _write(tmp_path, GOOD)
    os.chmod(spec, 0)
    if os.access(spec, os.R_OK):  # running as root: permissions do not apply, so simulate them
        real = Path.read_text

        def denied(self, *a, **k):
            if self == spec:
                raise PermissionError(13, "Permission denied", str(self))
            return real(self, *a, **k)

        monkeypatch.setattr(Path, "read_text", denied)
    code, _, err = _run(["analyze", spec, "--json"], capsys)
    assert code == 2 and str(spec) in err and "cannot be read" in err, err


def test_spec_path_that_is_a_folder_exit_2(tmp_path, capsys):
    code, _, err = _run(["analyze", tmp_path, "--json"], capsys)
    assert code == 2 and "is a folder" in err, err


@pytest.mark.parametrize(
    "make,needle",
    [
        (lambda p: np.savez(p.with_suffix(".npz"), x=np.ones(24)), "npz"),
        (lambda p: np.save(p, np.ones(24) + 1j), "complex"),
    ],
)
def test_npz_and_complex_inputs_are_refused(tmp_path, capsys, make, needle):
    make(tmp_path / "x.npy")
    name = "x.npz" if needle == "npz" else "x.npy"
    text = GOOD.replace("seed = 3", f'seed = 3\ninput = "file"\ninput_file = "{name}"')
    spec = _write(tmp_path, text)
    code, _, err = _run(["analyze", spec, "--json"], capsys)
    assert code == 2 and "analysis.input_file" in err and needle in err, err


def test_huge_width_is_refused_with_the_memory_estimate(tmp_path, capsys):
    spec = _write(tmp_path, GOOD.replace("width = 24", "width = 1000000000000"))
    code, out, err = _run(["analyze", spec, "--json"], capsys)
    assert code == 2 and out == "" and "memory" in err and "available" in err, err


@pytest.mark.parametrize("out", ["/proc/isoscope-x", "FILE/sub", "RO/sub"])
def test_unwritable_out_fails_before_computing(tmp_path, capsys, monkeypatch, out):
    import os

    from isoscope import analysis

    (tmp_path / "FILE").write_text("a file")
    (tmp_path / "RO").mkdir()
    os.chmod(tmp_path / "RO", 0o555)
    if out.startswith("RO") and os.access(tmp_path / "RO", os.W_OK):
        pytest.skip("permissions are not enforced for this user")
    called = []
    monkeypatch.setattr(analysis, "analyze", lambda *a, **k: called.append(1))
    target = out if out.startswith("/") else tmp_path / out
    code, _, err = _run(["analyze", _write(tmp_path, GOOD), "--out", target], capsys)
    assert code == 2 and not called and "cannot create output folder" in err, err


def test_empty_out_is_an_error(tmp_path, capsys):
    code, _, err = _run(["analyze", _write(tmp_path, GOOD), "--out", ""], capsys)
    assert code == 2 and "--out is empty" in err


def test_json_without_out_writes_nothing(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    spec = _write(tmp_path, GOOD)
    code, out, _ = _run(["analyze", spec, "--json"], capsys)
    assert code == 0 and json.loads(out)["name"] == "t"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["spec.toml"]


def test_critical_plot_at_a_folder_exit_2(tmp_path, capsys):
    (tmp_path / "fig.png").mkdir()
    code, _, err = _run(
        ["critical", "--activation", "tanh", "--plot", tmp_path / "fig.png"], capsys
    )
    assert code == 2 and "is a folder" in err, err


def test_broken_pipe_exits_quietly():
    # `isoscope critical ... | head -0`: the reader is gone before anything is printed
    p = subprocess.Popen(
        [sys.executable, "-m", "isoscope", "critical", "--activation", "tanh"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    p.stdout.close()
    err = p.stderr.read().decode()
    code = p.wait()
    assert "Traceback" not in err and "BrokenPipe" not in err, err
    assert code in (0, 141)


def test_huge_sigma_w_does_not_overflow_the_report(tmp_path, capsys):
    # sigma_w = 1e200: sigma_w**2 overflows a Python float (OverflowError); the report shows inf
    text = GOOD.replace("sigma_w = 1.1", "sigma_w = 1e200").replace("depth = 6", "depth = 2")
    out = tmp_path / "o"
    code, _, err = _run(["analyze", _write(tmp_path, text), "--out", out], capsys)
    assert code == 0, err
    assert "sigma_w = 1e+200" in (out / "report.html").read_text()


def test_critical_with_huge_sigma_w(capsys):
    code, _, err = _run(
        ["critical", "--activation", "tanh", "--sigma-w", 1e200, "--sigma-b", 1e200], capsys
    )
    assert code in (0, 2) and "Traceback" not in err and "OverflowError" not in err, err


def test_analyze_flags_override_the_spec_and_are_recorded(tmp_path, capsys):
    spec = _write(tmp_path, GOOD)
    code, out, err = _run(
        [
            "analyze",
            spec,
            "--json",
            "--seed",
            11,
            "--inputs",
            3,
            "--dtype",
            "float32",
            "--width",
            16,
            "--depth",
            4,
            "--sigma-w",
            1.3,
            "--sigma-b",
            0.2,
        ],
        capsys,
    )
    assert code == 0, err
    r = json.loads(out)
    assert r["spec"]["analysis"] == {
        **r["spec"]["analysis"],
        "seed": 11,
        "inputs": 3,
        "dtype": "float32",
    }
    assert r["spec"]["network"]["width"] == 16 and r["spec"]["network"]["depth"] == 4
    assert r["spec"]["init"]["sigma_w"] == 1.3 and r["spec"]["init"]["sigma_b"] == 0.2
    assert r["measured"]["draws"] == 3 and r["measured"]["singular_values_per_draw"] == 16


@pytest.mark.parametrize(
    "flag,value,needle",
    [
        ("--dtype", "float16", "analysis.dtype.*float16.*float64, float32"),
        ("--inputs", 0, "analysis.inputs.*0.*>= 1"),
        ("--sigma-w", -1, "init.sigma_w"),
    ],
)
def test_analyze_bad_flags_exit_2(tmp_path, capsys, flag, value, needle):
    import re

    code, _, err = _run(["analyze", _write(tmp_path, GOOD), "--json", flag, value], capsys)
    assert code == 2 and re.search(needle, err), err


def test_version(capsys):
    import isoscope

    with pytest.raises(SystemExit) as e:
        cli.main(["--version"])
    assert (
        e.value.code == 0 and capsys.readouterr().out.strip() == f"isoscope {isoscope.__version__}"
    )


def test_progress_bar_only_on_a_terminal(tmp_path, capsys):
    import io

    tty = io.StringIO()
    tty.isatty = lambda: True
    bar = cli._Progress(tty, "draws", min_seconds=0.0)
    for i in range(1, 5):
        bar(i, 4)
    bar.close()
    text = tty.getvalue()
    assert "4/4 draws" in text and "left" in text and text.endswith("\n")
    pipe = io.StringIO()
    bar = cli._Progress(pipe, "draws", min_seconds=0.0)
    bar(1, 4)
    bar.close()
    assert pipe.getvalue() == ""


def test_analyze_reports_progress_after_each_draw():
    from isoscope.analysis import analyze
    from isoscope.spec import parse_spec

    calls = []
    spec = parse_spec({"name": "p", "network": {"width": 8, "depth": 2}, "analysis": {"inputs": 3}})
    analyze(spec, progress=lambda done, total: calls.append((done, total)))
    assert calls == [(1, 3), (2, 3), (3, 3)]
