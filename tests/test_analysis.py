"""analyze(): inputs at the steady state, reproducibility, the built-in demo end to end."""

import json

import numpy as np

from isoscope import cli
from isoscope.analysis import analyze, plan_inputs
from isoscope.spec import parse_spec
from isoscope.theory import mean_field


def _spec(**init):
    return parse_spec({"network": {"width": 64, "depth": 8, "activation": init.pop("act", "tanh")},
                       "init": init, "analysis": {"inputs": 2, "seed": 1}})


def test_steady_state_inputs_use_the_length_map_fixed_point():
    spec = _spec(weights="orthogonal", sigma_w=1.3, sigma_b=0.1)
    plan, warns = plan_inputs(spec)
    assert plan.kind == "steady-state" and not warns
    q = plan.variance
    assert abs(mean_field.length_map("tanh", 1.3, 0.1, q) - q) < 1e-12  # V(q*) = q* (Poole et al. 2016)


def test_marginal_relu_map_does_not_feed_a_constant_input():
    # ReLU at sigma_w^2 = 2, sigma_b = 0: V(q) = q for every q (THEORY.md sec. 2, ReLU oracle)
    spec = _spec(act="relu", weights="gaussian", sigma_w=2 ** 0.5, sigma_b=0.0)
    plan, _ = plan_inputs(spec)
    assert plan.variance == 1.0
    a = analyze(spec)
    # half the units are active at every layer, so J is far from zero (E m1 = 1 exactly for He init)
    assert a.spectrum.zero_fraction < 0.9 and 0.2 < a.score.gain < 5


def test_same_seed_same_numbers_other_seed_other_numbers():
    a, b = analyze(_spec(weights="gaussian", sigma_w=1.1)), analyze(_spec(weights="gaussian", sigma_w=1.1))
    np.testing.assert_array_equal(a.spectrum.log_s, b.spectrum.log_s)


def test_demo_runs_end_to_end(tmp_path, capsys):
    out = tmp_path / "demo"
    assert cli.main(["demo", "--out", str(out)]) == 0
    summary = json.loads((out / "summary.json").read_text())
    verdicts = {r["name"]: r["score"]["verdict"] for r in summary["results"]}
    assert len(verdicts) == 4
    # orthogonal tanh at the edge of chaos with q* ~ 0.009 is near-isometric at L = 64
    # (variance about 8 L q*^2 = 0.04, THEORY.md sec. 3); Gaussian weights spread at least like L
    assert verdicts["heron-tanh-orthogonal"] == "isometric"
    assert verdicts["heron-tanh-gaussian"] != "isometric"
    assert (out / "report.html").stat().st_size > 10000 and (out / "specs").is_dir()
