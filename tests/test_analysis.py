"""analyze(): inputs at the steady state, reproducibility, the built-in demo end to end."""

import json

import numpy as np
import pytest

from isoscope import cli
from isoscope.analysis import analyze, plan_inputs
from isoscope.spec import parse_spec
from isoscope.theory import mean_field


def _spec(**init):
    return parse_spec(
        {
            "network": {"width": 64, "depth": 8, "activation": init.pop("act", "tanh")},
            "init": init,
            "analysis": {"inputs": 2, "seed": 1},
        }
    )


def test_steady_state_inputs_use_the_length_map_fixed_point():
    spec = _spec(weights="orthogonal", sigma_w=1.3, sigma_b=0.1)
    plan, warns = plan_inputs(spec)
    assert plan.kind == "steady-state" and not warns
    q = plan.variance
    assert (
        abs(mean_field.length_map("tanh", 1.3, 0.1, q) - q) < 1e-12
    )  # V(q*) = q* (Poole et al. 2016)


def test_marginal_relu_map_does_not_feed_a_constant_input():
    # ReLU at sigma_w^2 = 2, sigma_b = 0: V(q) = q for every q (Poole et al. 2016: V(q) = sigma_w^2 q / 2 for ReLU)
    spec = _spec(act="relu", weights="gaussian", sigma_w=2**0.5, sigma_b=0.0)
    plan, _ = plan_inputs(spec)
    assert plan.variance == 1.0
    a = analyze(spec)
    # half the units are active at every layer, so J is far from zero (E m1 = 1 exactly for He init)
    assert a.spectrum.zero_fraction < 0.9 and 0.2 < a.score.gain < 5


def test_same_seed_same_numbers_other_seed_other_numbers():
    a, b = (
        analyze(_spec(weights="gaussian", sigma_w=1.1)),
        analyze(_spec(weights="gaussian", sigma_w=1.1)),
    )
    np.testing.assert_array_equal(a.spectrum.log_s, b.spectrum.log_s)


def test_demo_runs_end_to_end(tmp_path, capsys):
    out = tmp_path / "demo"
    assert cli.main(["demo", "--out", str(out)]) == 0
    comp = json.loads((out / "comparison.json").read_text())
    assert comp["schema"] == "isoscope.comparison/1"
    verdicts = {d["name"]: d["result"]["score"]["verdict"] for d in comp["designs"]}
    assert len(verdicts) == 4
    # orthogonal tanh at the edge of chaos with q* ~ 0.009 is near-isometric at L = 64
    # (variance about 8 L q*^2 = 0.04, Pennington, Schoenholz & Ganguli 2017, sec. 3); Gaussian
    # weights spread at least like L; so it ranks first
    assert verdicts["heron-tanh-orthogonal"] == "isometric"
    assert verdicts["heron-tanh-gaussian"] != "isometric"
    assert comp["ranking"][0] == "heron-tanh-orthogonal"
    # the ranking and the numbers equal those of separate analyses of the same specs
    from isoscope.report import result_dict
    from isoscope.spec import load_spec

    for d in comp["designs"]:
        single = result_dict(analyze(load_spec(out / "specs" / f"{d['name']}.toml")))
        strip = lambda r: {
            k: v for k, v in r.items() if k not in ("seconds", "spec", "environment")
        }
        assert strip(d["result"]) == strip(json.loads(json.dumps(single)))
    assert (out / "report.html").stat().st_size > 10000 and (out / "specs").is_dir()
    for d in comp["designs"]:
        assert (out / d["name"] / "result.json").is_file()


@pytest.mark.parametrize(
    "act,sigma_w,sigma_b,depth,dtype",
    [
        ("tanh", 1e-10, 0.0, 50, "float64"),  # s ~ 1e-10^l: J_l ... J_1 underflows past l ~ 30
        ("tanh", 1e-3, 0.0, 50, "float32"),  # 1e-3^l leaves float32 (1e-45) past l ~ 15
        ("hard-tanh", 5.0, 10.0, 8, "float64"),  # |h| >> 1 mostly: phi' = 0, products exactly 0
    ],
)
def test_profile_of_vanishing_jacobians_finishes(act, sigma_w, sigma_b, depth, dtype):
    spec = parse_spec(
        {
            "network": {"width": 16, "depth": depth, "activation": act},
            "init": {"weights": "gaussian", "sigma_w": sigma_w, "sigma_b": sigma_b},
            "analysis": {"inputs": 2, "seed": 1, "dtype": dtype},
        }
    )
    a = analyze(spec)
    pr = a.profile
    assert pr is not None and pr.depths[0] == 1 and pr.depths[-1] == depth
    for row in (
        pr.measured_log_s_std,
        pr.measured_log_m1,
        pr.predicted_log_s_std,
        pr.predicted_log_m1,
    ):
        assert row.shape == pr.depths.shape
        assert not np.any(np.isinf(row))  # a value with no finite answer is NaN, never +-inf
    if act == "tanh":
        # |h| ~ sigma_w: tanh is linear to 1e-6 relative, so J_l ... J_1 = W_l ... W_1 and
        # E m1 = sigma_w^(2l) (E |W v|^2 = sigma_w^2 |v|^2 for N(0, sigma_w^2/N) entries, exact).
        # The partial products are kept as powers of two times a mantissa, so ln m1 is measured
        # far beyond the dtype's range (-2300 at l = 50 in float64, -690 in float32); one draw's
        # ln m1 fluctuates by O(sqrt(l / N)) around it (allowed: 0.1 l + 1).
        want = 2 * pr.depths * np.log(sigma_w)
        assert np.all(np.isfinite(pr.measured_log_m1))
        assert np.all(np.abs(pr.measured_log_m1 - want) < 0.1 * pr.depths + 1), (
            pr.measured_log_m1 - want
        )
    else:
        # once a partial product is exactly zero every deeper one is: NaN from there on
        gone = np.isnan(pr.measured_log_m1)
        assert gone.any() and np.all(gone[np.argmax(gone) :])
