"""Every spec in examples/ is analysed at its own size, and the example script runs.

Each example's README entry states what a user should conclude; the checks below are those
conclusions, each against a value from outside isoscope's measurement code.
"""

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

from isoscope import cli

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"
SPECS = sorted(EXAMPLES.glob("*.toml"))


def _check_soil_moisture(r):
    # erf with orthogonal weights on the critical line at a tiny bias (q* = 0.0092): chi_1 = 1,
    # so m1 = chi_1^L = 1 (Pennington, Schoenholz, Ganguli 2017, sec. 2.3, m1 = chi_1^L), and
    # the spread is small because phi'(h)^2 barely varies for h ~ N(0, q*) with q* << 1
    assert r["predicted"]["phase"] == "critical"
    assert abs(r["measured"]["lambda_moments"]["m1"] - 1.0) < 0.05
    assert r["score"]["verdict"] == "isometric"
    assert r["agreement"]["ks"] < 0.06


def _check_sonar(r):
    # ReLU, Gaussian weights, sigma_w^2 = 2 (He et al. 2015): chi_1 = sigma_w^2 / 2 = 1 exactly,
    # so the predicted m1 is 1, yet half of phi'(h) is 0 (P(h < 0) = 1/2): an atom of weight
    # 1/2 at lambda = 0 and a spectrum spread over many decades
    assert r["predicted"]["lambda_moments"]["m1"] == pytest.approx(1.0, rel=1e-9)
    assert r["predicted"]["atom_at_zero"] == pytest.approx(0.5, abs=1e-12)
    assert r["measured"]["zero_fraction"] >= 0.5
    assert r["score"]["verdict"] == "spread" and r["measured"]["log_s"]["std"] > 1.0


def _check_tide_gauge(r):
    # residual stack: S(z) = exp(-tau (1 + 2 z)) (Tarnowski et al. 2019), so m1 = e^tau and
    # m2/m1^2 - 1 = 2 tau; the measured normalised variance follows 2 ln(predicted m1)
    tau = r["predicted"]["tau"]
    assert r["predicted"]["lambda_moments"]["m1"] == pytest.approx(math.exp(tau), rel=1e-9)
    assert 0.05 < tau < 0.12
    assert r["score"]["normalised_variance"] == pytest.approx(2 * tau, rel=0.35)
    assert r["score"]["verdict"] == "spread" and r["score"]["isometry"] > 0.6


def _check_kiln(r):
    # tanh at sigma_w = 2: chi_1 > 1 (Schoenholz et al. 2017, sec. 3: the chaotic phase), the
    # predicted gain chi_1^L is far above 10
    assert r["predicted"]["phase"] == "chaotic" and r["predicted"]["chi"] > 1.2
    assert r["predicted"]["lambda_moments"]["m1"] > 10
    assert r["score"]["verdict"] == "exploding"


def _check_glacier(r):
    # 2,000 layers past the edge of chaos (chi_1 > 1, Schoenholz et al. 2017): the singular
    # values spread over hundreds of decades, beyond float64, so auto takes the deep route and
    # still every ln s is finite; the measured ln s follow the predicted law
    m = r["measured"]
    assert m["route"] == "deep" and m["route_reason"].startswith("auto: depth 2000")
    assert r["predicted"]["phase"] == "chaotic"
    assert all(math.isfinite(v) for v in m["log_s"]["values"])
    assert (max(m["log_s"]["values"]) - min(m["log_s"]["values"])) / math.log(10) > 308
    assert r["agreement"]["ks"] < 0.08 and r["score"]["verdict"] == "exploding"


def _check_seismic(r):
    # delta-orthogonal kernels at the critical scale: each layer is an orthogonal operator times
    # sigma_w (Xiao et al. 2018), so the spectrum follows the plain orthogonal law of width
    # channels with chi_1 = 1, hence m1 = 1 (Pennington et al. 2017, sec. 2.3)
    assert r["predicted"]["design"].startswith("plain orthogonal stack of width 48")
    assert r["predicted"]["lambda_moments"]["m1"] == pytest.approx(1.0, abs=1e-3)
    assert r["measured"]["lambda_moments"]["m1"] == pytest.approx(1.0, abs=0.05)
    assert r["agreement"]["ks"] < 0.05


def _check_radio(r):
    # wider than the dense route's limit: matrix-free in float32; ReLU at sigma_w^2 = 2 has
    # predicted m1 = 1 exactly (He et al. 2015), matched by the quadrature within 4 standard
    # errors, and half of lambda is the atom at 0 (counted below the Lanczos resolution)
    m = r["measured"]
    assert m["route"] == "matrix-free" and r["spec"]["analysis"]["dtype"] == "float32"
    q = m["quadrature"]["pooled"]
    assert abs(q["m1"] - 1.0) < 4 * q["m1_se"]
    assert m["zero_fraction"] >= 0.5
    assert r["agreement"]["ks"] < 0.06


def _check_hive(r):
    # the user's plain-JAX network is exactly the built-in plain tanh orthogonal stack it names
    assert r["measured"]["route"] == "dense"
    assert r["predicted"]["design"].startswith("equivalent built-in design named by the factory")
    assert r["agreement"]["ks"] < 0.06


def _check_gearbox(r):
    # Equinox's default Linear initialization is uniform on +-1/sqrt(fan_in), variance
    # 1/(3 fan_in): 7 linear maps give a gain of at most (1/3)^7 (tanh' <= 1), far below 1
    assert r["predicted"] is None
    assert r["measured"]["lambda_moments"]["m1"] < 3.0**-7
    assert r["score"]["verdict"] == "vanishing"


CHECKS = {
    "glacier-core-tanh-deep": _check_glacier,
    "seismic-trace-conv1d": _check_seismic,
    "radio-array-wide-relu": _check_radio,
    "hive-listener-python": _check_hive,
    "gearbox-whisper-equinox": _check_gearbox,
    "soil-moisture-erf-orthogonal": _check_soil_moisture,
    "sonar-denoiser-relu-gaussian": _check_sonar,
    "tide-gauge-residual-tanh": _check_tide_gauge,
    "kiln-monitor-tanh-chaotic": _check_kiln,
}


def test_every_example_spec_has_a_check_and_a_readme_line():
    assert len(SPECS) == 9
    assert {p.stem for p in SPECS} == set(CHECKS)
    readme = (EXAMPLES / "README.md").read_text()
    top = (ROOT / "README.md").read_text()
    for p in SPECS + sorted(EXAMPLES.glob("*.py")) + sorted(EXAMPLES.glob("networks/*.py")):
        assert p.name in readme, f"{p.name} is not described in examples/README.md"
        assert p.name in top, f"{p.name} is not listed in README.md"


@pytest.mark.parametrize("spec", SPECS, ids=[p.stem for p in SPECS])
def test_example_spec_runs_and_supports_its_conclusion(spec, tmp_path, capsys):
    out = tmp_path / spec.stem
    assert cli.main(["analyze", str(spec), "--out", str(out)]) == 0
    capsys.readouterr()
    r = json.loads((out / "result.json").read_text())
    assert r["name"] == spec.stem
    CHECKS[spec.stem](r)


def test_example_script_runs_and_finds_the_edge_of_chaos():
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    run = subprocess.run(
        [sys.executable, str(EXAMPLES / "edge_of_chaos_sweep.py")],
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert run.returncode == 0, run.stderr
    lines = run.stdout.splitlines()
    rows = [ln.split() for ln in lines if ln.strip()[:4] in ("0.85", "1.00", "1.15")]
    assert [r[0] for r in rows] == ["0.85", "1.00", "1.15"]
    # columns: factor, sigma_w, chi_1, phase, m1 theory, m1 measured, std ln s, isometry, shape, verdict
    assert [r[3] for r in rows] == ["ordered", "critical", "chaotic"]
    for r in rows:  # measured gain within 15% of chi_1^L (Pennington et al. 2017, sec. 2.3)
        assert float(r[5]) == pytest.approx(float(r[4]), rel=0.15)
    # ordered phase: q* ~ 0, tanh is nearly linear, so every s ~ sigma_w^L: the shape is near
    # perfect while the gain vanishes
    assert rows[0][9] == "vanishing" and float(rows[0][8]) > 0.95
    assert "at sigma_w/sigma_w* = 1.00" in lines[-1]
