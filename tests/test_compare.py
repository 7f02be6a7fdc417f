"""`isoscope compare`: a ranking equal to separate `analyze` runs, and refusals of bad input."""

import json

import pytest

from isoscope import cli

SPEC = """name = "{name}"
[network]
width = 32
depth = 12
activation = "{act}"
[init]
weights = "{weights}"
sigma_w = {sigma_w}
sigma_b = {sigma_b}
[analysis]
inputs = 2
seed = {seed}
"""


def _write(tmp_path, name, act="tanh", weights="orthogonal", sigma_w=1.05, sigma_b=0.05, seed=3):
    path = tmp_path / f"{name}.toml"
    path.write_text(
        SPEC.format(
            name=name, act=act, weights=weights, sigma_w=sigma_w, sigma_b=sigma_b, seed=seed
        )
    )
    return path


def _run(capsys, *argv):
    code = cli.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _numbers(result):
    """A result without what legitimately differs between two runs (wall times, the glossary)."""
    return {k: v for k, v in result.items() if k not in ("seconds", "glossary")}


def test_compare_equals_separate_analyze_runs(tmp_path, capsys):
    paths = [
        _write(tmp_path, "ortho"),
        _write(tmp_path, "gauss", weights="gaussian", seed=5),
        _write(
            tmp_path,
            "relu",
            act="relu",
            weights="gaussian",
            sigma_w=1.4142135623730951,
            sigma_b=0.0,
        ),
    ]
    code, out, err = _run(capsys, "compare", *paths, "--json")
    assert code == 0, err
    comp = json.loads(out)
    assert comp["schema"] == "isoscope.comparison/1"
    by_name = {d["name"]: d for d in comp["designs"]}
    for path in paths:
        code, out, err = _run(capsys, "analyze", path, "--json")
        assert code == 0, err
        single = json.loads(out)
        assert _numbers(by_name[single["name"]]["result"]) == _numbers(single)
    scores = [d["result"]["score"]["isometry"] for d in comp["designs"]]
    assert scores == sorted(scores, reverse=True)
    assert comp["ranking"] == [d["name"] for d in comp["designs"]]
    assert [d["rank"] for d in comp["designs"]] == [1, 2, 3]
    assert comp["ranking"][0] == "ortho" and comp["winners"]["isometry"] == ["ortho"]
    for d in comp["designs"]:
        assert d["trainable_depth"]["binding"] in ("spread", "signal", "none")


def test_compare_one_seed_for_all(tmp_path, capsys):
    paths = [_write(tmp_path, "a", seed=1), _write(tmp_path, "b", weights="gaussian", seed=2)]
    code, out, err = _run(capsys, "compare", *paths, "--json", "--seed", "11", "--inputs", "1")
    assert code == 0, err
    comp = json.loads(out)
    assert "11" in comp["seed_policy"]
    assert {d["result"]["spec"]["analysis"]["seed"] for d in comp["designs"]} == {11}


@pytest.mark.parametrize("case", ["missing", "duplicate", "same-folder", "one", "bad-key"])
def test_compare_bad_input_exits_2_and_writes_nothing(tmp_path, capsys, case):
    good = _write(tmp_path, "good")
    if case == "missing":
        argv, words = [good, tmp_path / "nope.toml"], ["nope.toml", "does not exist"]
    elif case == "duplicate":
        other = tmp_path / "other.toml"
        other.write_text(
            SPEC.format(name="good", act="tanh", weights="gaussian", sigma_w=1, sigma_b=0, seed=0)
        )
        argv, words = [good, other], ["good", "other.toml", "both name"]
    elif case == "same-folder":
        other = _write(tmp_path, "Good")
        argv, words = [good, other], ["same folder name"]
    elif case == "one":
        argv, words = [good], ["two or more"]
    else:
        bad = tmp_path / "bad.toml"
        bad.write_text(
            SPEC.format(
                name="bad", act="tanh", weights="orthogonal", sigma_w=1, sigma_b=0, seed=0
            ).replace("depth = 12", "depth = 0")
        )
        argv, words = [good, bad], ["bad.toml", "network.depth"]
    out = tmp_path / "cmp"
    before = sorted(p.name for p in tmp_path.iterdir())
    code, _, err = _run(capsys, "compare", *argv, "--out", out)
    assert code == 2
    for w in words:
        assert w in err
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == before
