"""Decisions: the trainable-depth estimate against the mean-field depth scales, the ranking,
and recommendations checked by measurement."""

import json
import math

import pytest
from scipy.optimize import brentq

from isoscope import cli
from isoscope import recommend as rec
from isoscope.spec import parse_spec
from isoscope.theory import mean_field as mf


def _spec(
    activation="tanh",
    weights="orthogonal",
    sigma_w=1.0,
    sigma_b=0.0,
    depth=10,
    family="plain",
    **network,
):
    net = {"activation": activation, "depth": depth, "family": family, "width": 32, **network}
    return parse_spec(
        {
            "name": "t",
            "network": net,
            "init": {"weights": weights, "sigma_w": sigma_w, "sigma_b": sigma_b},
        }
    )


# ----------------------------------------------------------------------------- trainable depth
def test_signal_bound_is_six_xi_c_of_a_linear_stack():
    # linear phi: C'(c) = sigma_w^2 exactly, so in the ordered phase xi_c = -1/ln sigma_w^2
    # (Schoenholz et al. 2017, sec. 3, xi_c = -1/ln chi_1 with chi_1 = sigma_w^2); an
    # orthogonal linear stack has every singular value equal (sigma_w^L), spread 0, so the
    # signal bound alone sets the depth: floor(6 xi_c).
    d = rec.trainable_depth(_spec("linear", sigma_w=0.9))
    xi_c = -1.0 / math.log(0.81)
    assert d.xi_c == pytest.approx(xi_c, rel=1e-9)
    assert d.signal_depth == pytest.approx(6.0 * xi_c, rel=1e-9)
    assert d.spread_depth == math.inf and d.binding == "signal"
    assert d.depth == math.floor(6.0 * xi_c) == 28


def test_signal_bound_of_erf_matches_the_closed_form_depth_scale():
    # erf (Williams 1997): V(q) = sigma_w^2 (2/pi) asin(2q/(1+2q)) + sigma_b^2 and
    # chi_1 = (4 sigma_w^2/pi)/sqrt(1 + 4 q*); q* by scipy brentq on the closed form; ordered
    # phase: xi_c = -1/ln chi_1 (Schoenholz et al. 2017, sec. 3).
    sw, sb = 1.0, 0.3
    q = brentq(
        lambda q: sw**2 * (2 / math.pi) * math.asin(2 * q / (1 + 2 * q)) + sb**2 - q,
        1e-9,
        10.0,
        xtol=1e-15,
    )
    chi = (4 * sw**2 / math.pi) / math.sqrt(1 + 4 * q)
    assert chi < 1
    d = rec.trainable_depth(_spec("erf", sigma_w=sw, sigma_b=sb))
    assert d.signal_depth == pytest.approx(-6.0 / math.log(chi), rel=1e-7)
    assert d.depth <= math.floor(d.signal_depth)


def test_chaotic_tanh_signal_bound_uses_the_chaotic_depth_scale():
    # tanh sigma_w^2 = 3, sigma_b^2 = 0.05: c* = 0.299318, xi_c = 9.0515 (check values computed
    # in-house by two independent solvers; Schoenholz et al. 2017 define xi_c = -1/ln C'(c*))
    d = rec.trainable_depth(_spec(sigma_w=math.sqrt(3.0), sigma_b=math.sqrt(0.05)))
    assert d.xi_c == pytest.approx(9.0515, abs=2e-4)
    assert d.signal_depth == pytest.approx(6 * 9.0515, abs=2e-3)
    # chaotic tanh spreads fast: the spread bound binds long before 6 xi_c
    assert d.binding == "spread" and d.depth < d.signal_depth


def test_critical_depth_is_set_by_the_spread_and_brackets_the_limit():
    # at chi_1 = 1 xi_c diverges: only the spread bounds the depth, and the estimate is the
    # last depth whose predicted spread is within the limit
    cp = mf.critical_point("tanh", 0.05)
    spec = _spec(sigma_w=cp.sigma_w, sigma_b=0.05)
    d = rec.trainable_depth(spec)
    assert d.signal_depth == math.inf and d.binding == "spread"
    L = int(d.depth)
    assert rec.predicted_spread(spec, L) <= rec.TRAINABLE_SPREAD < rec.predicted_spread(spec, L + 1)


def test_residual_relu_depth_follows_tau_linear_in_depth():
    # ReLU residual, sigma_b = 0: tau = L alpha^2 sigma_w^2 / 2 exactly (E[phi'^2] = 1/2 at every
    # q), and the residual law depends on tau alone (Tarnowski et al. 2019): the spread limit is
    # reached at the depth where tau equals the tau of that spread
    alpha = 0.1
    d = rec.trainable_depth(_spec("relu", sigma_w=1.0, family="residual", alpha=alpha))
    tau = rec.residual_tau_for_spread(rec.TRAINABLE_SPREAD)
    assert d.signal_depth == math.inf and math.isnan(d.xi_c)
    assert abs(d.depth - 2 * tau / alpha**2) <= 1.0


def test_an_isometric_stack_has_no_depth_limit():
    d = rec.trainable_depth(_spec("linear", sigma_w=1.0))
    assert d.depth == math.inf and d.binding == "none"


def test_bad_spread_limit_is_refused():
    from isoscope.errors import InputError

    with pytest.raises(InputError, match="spread limit"):
        rec.trainable_depth(_spec(), limit=0.0)


# ----------------------------------------------------------------------------- theory pieces
def test_relu_type_plain_stacks_cannot_be_isometric():
    # ReLU: phi'^2 is 0 or 1 with probability 1/2 each, mu_2/mu_1^2 = 2 at every q* (exact)
    assert not rec.plain_can_be_isometric("relu")
    assert not rec.plain_can_be_isometric("leaky-relu")
    assert rec.plain_can_be_isometric("linear")  # phi' = 1: a point mass
    assert rec.plain_can_be_isometric("tanh")


def test_residual_tau_of_a_small_spread():
    # small tau: m2/m1^2 = 1 + 2 tau (Tarnowski et al. 2019), so std(lambda/m1) = sqrt(2 tau) and
    # std ln s ~ sqrt(tau / 2); the target 0.01 gives tau ~ 2e-4
    assert rec.residual_tau_for_spread(0.01) == pytest.approx(2e-4, rel=0.02)


def test_alpha_for_tau_of_relu_is_exact():
    # ReLU, sigma_b = 0: tau = L alpha^2 sigma_w^2/2 exactly, so alpha = sqrt(2 tau / L)
    alpha = rec._alpha_for_tau(mf._act("relu"), 1.0, 0.0, 200, 0.05, 1.0)
    assert alpha == pytest.approx(math.sqrt(2 * 0.05 / 200), rel=1e-9)


def test_tanh_proposal_sits_on_the_critical_line_at_the_target_spread():
    cands, reasons, ok = rec.propose("tanh", 200, 256)
    best = cands[0]
    sb = best.spec.init.sigma_b
    assert ok and best.spec.init.weights == "orthogonal"
    assert abs(best.spec.init.sigma_w - mf.critical_point("tanh", sb).sigma_w) <= 1e-8
    assert best.predicted_spread == pytest.approx(rec.TARGET_SPREAD, rel=2e-3)
    assert (
        cands[1].spec.init.weights == "gaussian"
        and cands[1].predicted_spread > 10 * rec.TARGET_SPREAD
    )
    # q* is small: the spread grows with q*, and the target keeps it near the linear regime
    assert mf.critical_point("tanh", sb).q_star < 0.05


# ----------------------------------------------------------------------------- ranking
def test_rank_orders_by_isometry_and_names_winners():
    from isoscope.analysis import analyze

    specs = [
        _spec(weights="gaussian", sigma_w=1.2, sigma_b=0.3, depth=8),
        _spec(weights="orthogonal", sigma_w=1.2, sigma_b=0.3, depth=8),
        _spec("linear", weights="orthogonal", sigma_w=1.0, depth=8),
    ]
    specs = [s.replace(analysis={"inputs": 1}) for s in specs]
    specs = [parse_spec({**s.to_dict(), "name": n}) for s, n in zip(specs, ["g", "o", "lin"])]
    analyses = [analyze(s) for s in specs]
    r = rec.rank(analyses)
    names = [analyses[i].spec.name for i in r.order]
    scores = [analyses[i].score.isometry for i in r.order]
    assert scores == sorted(scores, reverse=True)
    assert names[0] == "lin"  # an orthogonal linear stack is an exact isometry
    assert r.winners["isometry"] == ["lin"] and r.winners["spread"] == ["lin"]


# ----------------------------------------------------------------------------- commands
def _run(capsys, *argv):
    code = cli.main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_recommend_tanh_plain_orthogonal_wins_by_measurement(capsys, tmp_path):
    code, out, err = _run(
        capsys,
        "recommend",
        "--activation",
        "tanh",
        "--depth",
        "200",
        "--width",
        "256",
        "--json",
        "--out",
        str(tmp_path / "rec"),
    )
    assert code == 0, err
    r = json.loads(out)
    assert r["schema"] == "isoscope.recommendation/1"
    best = r["recommended"]
    assert best["weights"] == "orthogonal" and best["alpha"] is None
    code, out, _ = _run(
        capsys, "critical", "--activation", "tanh", "--sigma-b", repr(best["sigma_b"]), "--json"
    )
    assert abs(json.loads(out)["sigma_w"] - best["sigma_w"]) <= 1e-8
    gauss = next(a for a in r["alternatives"] if a["weights"] == "gaussian")
    assert best["measured"]["log_s_std"] * 10 < gauss["measured"]["log_s_std"]
    assert r["measured"]["log_s_std"] == best["measured"]["log_s_std"]
    assert r["predicted"]["log_s_std"] == best["predicted"]["log_s_std"]
    assert "initialization only" in r["advice"] and r["reason"]
    # the recommended spec is a full spec that analyze accepts, also as the file written
    assert parse_spec(best["spec"]).init.sigma_w == best["sigma_w"]
    from isoscope.spec import load_spec

    written = tmp_path / "rec"
    assert load_spec(written / "recommended.toml").to_dict() == parse_spec(best["spec"]).to_dict()
    assert json.loads((written / "recommendation.json").read_text()) == r
    assert (written / "report.html").is_file()
    assert len([p for p in written.iterdir() if p.is_dir()]) == 1 + len(r["alternatives"])


def test_recommend_relu_says_no_plain_setting_and_goes_residual(capsys):
    code, out, err = _run(
        capsys, "recommend", "--activation", "relu", "--depth", "100", "--width", "128"
    )
    assert code == 0, err
    assert "No plain setting of relu is isometric" in out and "initialization only" in out
    code, out, _ = _run(
        capsys, "recommend", "--activation", "relu", "--depth", "100", "--width", "128", "--json"
    )
    r = json.loads(out)
    assert r["plain_isometric"] is False
    assert r["recommended"]["spec"]["network"]["family"] == "residual"
    assert r["recommended"]["alpha"] > 0
    plain = [a for a in r["alternatives"] if a["spec"]["network"]["family"] == "plain"]
    assert plain and all(r["measured"]["log_s_std"] < a["measured"]["log_s_std"] for a in plain)


@pytest.mark.parametrize(
    "argv, words",
    [
        (["--activation", "swishy", "--depth", "10", "--width", "8"], ["swishy"]),
        (["--activation", "tanh", "--depth", "0", "--width", "8"], ["--depth", "0"]),
        (["--activation", "tanh", "--depth", "10", "--width", "0"], ["--width"]),
        (
            ["--activation", "tanh", "--depth", "10", "--width", "8", "--family", "conv"],
            ["--family", "conv"],
        ),
        (
            ["--activation", "tanh", "--depth", "10", "--width", "8", "--target-spread", "-1"],
            ["--target-spread"],
        ),
        (
            ["--activation", "tanh", "--depth", "10", "--width", "8", "--sigma-b", "nan"],
            ["--sigma-b"],
        ),
    ],
)
def test_recommend_bad_input_exits_2(capsys, tmp_path, argv, words):
    out = tmp_path / "rec"
    code, _, err = _run(capsys, "recommend", *argv, "--out", str(out))
    assert code == 2
    for w in words:
        assert w in err
    assert not out.exists() and list(tmp_path.iterdir()) == []
