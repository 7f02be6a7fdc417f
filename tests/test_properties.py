"""Property-based tests (hypothesis): generated specs, names and flags nobody wrote by hand.

The generation is derandomized (the profile in conftest.py): every run draws the same cases, so a
failure reproduces with the same command; ``ISOSCOPE_HYPOTHESIS=explore`` draws new ones and
keeps failing cases in ``.hypothesis/`` (see DEVELOPERS.md).

The checks are identities that hold for every spectrum, not values of this project:

* ``m2 >= m1^2`` for the moments ``m_k = E[lambda^k]`` of any distribution (Cauchy-Schwarz);
* ``E[ln lambda] <= ln E[lambda]`` (Jensen), so the mean of ``ln s`` is at most ``ln(m1) / 2``;
* a reported ``log_m_k`` is ``ln(m_k)`` of the same law;
* an isometry score is a fraction in [0, 1] (docs/score.md defines it so).
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import re
import tempfile
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from isoscope import cli
from isoscope.activations import activation_names
from isoscope.errors import InputError
from isoscope.folders import safe_folder_name
from isoscope.spec import ROUTES, SEED_MAX, parse_spec

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
# a user's network (plain JAX, with an equivalent built-in design), to cover family = "python"
FACTORY = f"{EXAMPLES / 'networks' / 'hive_listener.py'}:build"

# --------------------------------------------------------------------------- valid specs
DENSE_WEIGHTS = ("orthogonal", "gaussian", "uniform")
CONV_WEIGHTS = ("delta-orthogonal", "gaussian", "uniform")


@st.composite
def valid_specs(draw):
    """A valid spec mapping: every family, activation, initializer, dtype and route, kept tiny."""
    family = draw(st.sampled_from(("plain", "residual", "conv1d", "conv2d", "python")))
    net: dict = {"family": family}
    if family == "python":
        net.update(factory=FACTORY, width=draw(st.integers(2, 8)))
    else:
        net["depth"] = draw(st.integers(1, 5))
        net["activation"] = draw(st.sampled_from(activation_names()))
        if family in ("conv1d", "conv2d"):
            size = draw(st.integers(1, 4 if family == "conv1d" else 2))
            net.update(channels=draw(st.integers(1, 3)), size=size)
            net["kernel"] = draw(st.sampled_from([k for k in (1, 3) if k <= size]))
        else:
            net["width"] = draw(st.integers(1, 7))
        if family == "residual":
            net["alpha"] = draw(st.floats(0.0, 1.0))
    data: dict = {"name": "generated", "network": net}
    if family != "python":
        weights = CONV_WEIGHTS if family in ("conv1d", "conv2d") else DENSE_WEIGHTS
        data["init"] = {
            "weights": draw(st.sampled_from(weights)),
            "sigma_w": draw(st.floats(0.25, 3.0)),
            "sigma_b": draw(st.sampled_from((0.0, 0.05, 0.3))),
        }
    routes = [r for r in ROUTES if not (family == "python" and r == "deep")]
    route = draw(st.sampled_from(routes))
    data["analysis"] = {
        "inputs": draw(st.integers(1, 2)),
        "seed": draw(st.integers(0, SEED_MAX)),
        "route": route,
        "dtype": draw(st.sampled_from(("float64", "float32"))),
        "input": draw(st.sampled_from(("steady-state", "gaussian"))),
    }
    if route == "matrix-free":
        data["analysis"].update(probes=2, lanczos_steps=draw(st.integers(2, 6)))
    return data


def _strict_json(text: str):
    """JSON with NaN / Infinity refused (the result promises plain JSON: null, never NaN)."""

    def refuse(token):
        raise AssertionError(f"result JSON holds the non-standard token {token}")

    return json.loads(text, parse_constant=refuse)


def _check_result(r: dict) -> None:
    """The promises of result.json for any spec (see the module docstring for the sources)."""
    score, measured, predicted = r["score"], r["measured"], r["predicted"]
    assert r["environment"]["dtype"] == r["spec"]["analysis"]["dtype"]
    assert measured["route"] in ("dense", "deep", "matrix-free")
    for name in ("isometry", "shape_score"):
        v = score[name]
        assert v is None or 0.0 <= v <= 1.0, (name, v)
    if r["fault"] is not None:  # a stopped measurement is flagged, and never scored as clean
        assert score["verdict"] != "isometric"
        assert r["warnings"], "a fault must come with a warning"
        return
    assert isinstance(score["verdict"], str) and score["verdict"]
    lm = measured["lambda_moments"]
    if lm["m1"] is not None and lm["m2"] is not None:
        assert lm["m2"] >= lm["m1"] ** 2 * (1 - 1e-9), lm  # Cauchy-Schwarz
        mean = measured["log_s"]["mean"]
        if mean is not None and lm["m1"] > 0:
            assert 2 * mean <= math.log(lm["m1"]) + 1e-9  # Jensen
    elif r["warnings"] == []:
        raise AssertionError(f"non-finite measured moments without a warning: {lm}")
    if predicted is None:
        return
    pm, plog = predicted["lambda_moments"], predicted["log_lambda_moments"]
    if pm["m1"] is not None and pm["m2"] is not None:
        assert pm["m2"] >= pm["m1"] ** 2 * (1 - 1e-9), pm
    for k in (1, 2, 3, 4):
        m, lg = pm[f"m{k}"], plog[f"log_m{k}"]
        if m is not None and lg is not None and m > 0:
            assert lg == pytest.approx(math.log(m), rel=1e-9, abs=1e-9), (k, m, lg)
    mean = predicted["log_s"]["mean"]
    if mean is not None and plog["log_m1"] is not None:
        assert 2 * mean <= plog["log_m1"] + 1e-9  # Jensen on the predicted law


# strict: the derandomized cases reproduce two open defects this test found; once they are fixed the
# test passes, the xfail turns into a failure, and the mark must go
@pytest.mark.xfail(
    strict=True,
    reason="open defects: (1) matrix-free route, python family (width 2, 2 Lanczos steps): the "
    "pooled mean of ln s exceeds ln(m1)/2 - the moments come from the quadrature and the log "
    "statistics from its quantiles, which disagree at few steps; (2) a positively homogeneous "
    "activation in float32 through analysis._homogeneous_plan (analysis.py:419) and score.py:457",
)
@given(valid_specs())
@hsettings(max_examples=40)
def test_any_valid_spec_gives_a_consistent_result(data):
    from isoscope.analysis import analyze
    from isoscope.report import result_dict, to_json

    spec = parse_spec(data, source=None)
    _check_result(_strict_json(to_json(result_dict(analyze(spec)))))


_LINKED = re.compile(r'(?:src|href)="([^"#:]+)"')


@pytest.mark.xfail(strict=True, reason="the same open defects as the test above (Jensen)")
@given(valid_specs())
@hsettings(max_examples=6)
def test_any_valid_spec_writes_every_promised_file(data):
    from isoscope.analysis import analyze
    from isoscope.report import write_analysis_folder

    analysis = analyze(parse_spec(data, source=None))
    with tempfile.TemporaryDirectory() as tmp:
        out = write_analysis_folder(analysis, Path(tmp) / "out")
        names = {p.name for p in out.iterdir()}
        assert {"result.json", "report.html", "spectrum-log-s.png", "spectrum-lambda.png"} <= names
        page = (out / "report.html").read_text(encoding="utf-8")
        for link in _LINKED.findall(page):
            assert (out / link).is_file(), f"report.html links {link!r}, which is missing"
        _check_result(_strict_json((out / "result.json").read_text(encoding="utf-8")))
        beside = {p.name for p in Path(tmp).iterdir()} - {"out", out.resolve().name, ".out.lock"}
        assert not beside, f"leftovers beside out/: {beside}"  # out links to its version folder


# --------------------------------------------------------------------------- invalid specs
def _base(family: str) -> dict:
    net = {"family": family, "depth": 2, "activation": "tanh"}
    if family in ("conv1d", "conv2d"):
        net.update(channels=2, size=3, kernel=3)
    else:
        net["width"] = 4
    weights = "delta-orthogonal" if family in ("conv1d", "conv2d") else "orthogonal"
    return {"network": net, "init": {"weights": weights}, "analysis": {"inputs": 1}}


_WORD = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=12)
_JUNK = st.one_of(
    st.text(max_size=8),
    st.booleans(),
    st.lists(st.integers(), max_size=2),
    st.dictionaries(_WORD, st.integers(), max_size=1),
)
# (key, strategy of a value the key refuses)
_BAD_VALUES = {
    "network.depth": st.one_of(st.integers(max_value=0), st.floats(0.5, 9.5), _JUNK),
    "network.width": st.one_of(st.integers(max_value=0), st.just(2.5), _JUNK),
    "network.activation": _WORD.filter(lambda w: not _is_activation(w)),
    "network.family": _WORD.filter(lambda w: w not in cli_families()),
    "init.weights": _WORD.filter(lambda w: w not in DENSE_WEIGHTS + CONV_WEIGHTS),
    "init.sigma_w": st.one_of(st.floats(max_value=-1e-300), st.just(math.inf), _JUNK),
    "init.sigma_b": st.one_of(st.floats(max_value=-1e-300), st.just(math.nan), _JUNK),
    "analysis.inputs": st.one_of(st.integers(max_value=0), _JUNK),
    "analysis.seed": st.one_of(st.integers(max_value=-1), st.integers(min_value=SEED_MAX + 1)),
    "analysis.route": _WORD.filter(lambda w: w not in ROUTES),
    "analysis.dtype": st.sampled_from(("float16", "double", "int32", "bfloat16")),
    "analysis.input": _WORD.filter(lambda w: w not in ("steady-state", "gaussian", "file")),
}


def _is_activation(name: str) -> bool:
    from isoscope.activations import get_activation

    try:
        get_activation(name)
    except InputError:
        return False
    return True


def cli_families():
    from isoscope.spec import SPEC_FAMILIES

    return SPEC_FAMILIES


@st.composite
def invalid_specs(draw):
    """A valid spec with one thing wrong, and the key the error must name."""
    data = _base(draw(st.sampled_from(("plain", "residual", "conv1d"))))
    kind = draw(st.sampled_from(("value", "unknown key", "foreign key")))
    if kind == "unknown key":
        section = draw(st.sampled_from(("network", "init", "analysis")))
        word = draw(_WORD.filter(lambda w: w not in _known(section)))
        data[section][word] = 1
        return data, f"{section}.{word}"
    if kind == "foreign key":  # a key of another family
        fam = data["network"]["family"]
        key = "channels" if fam != "conv1d" else "width"
        data["network"][key] = 4
        return data, f"network.{key}"
    key = draw(st.sampled_from(sorted(_BAD_VALUES)))
    if key == "network.width" and data["network"]["family"] == "conv1d":
        key = "network.channels"
    section, name = key.split(".")
    data[section][name] = draw(_BAD_VALUES.get(key, _BAD_VALUES["network.width"]))
    return data, key


def _known(section: str) -> set[str]:
    import dataclasses

    from isoscope.spec import AnalysisSpec, InitSpec, NetworkSpec

    cls = {"network": NetworkSpec, "init": InitSpec, "analysis": AnalysisSpec}[section]
    return {f.name for f in dataclasses.fields(cls)}


def _toml(data: dict) -> str:
    """A TOML document of the mapping (scalars, lists, one level of tables)."""

    def value(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, int):
            return str(v)
        if isinstance(v, float):
            return "nan" if math.isnan(v) else ("inf" if v == math.inf else repr(v))
        if isinstance(v, list):
            return "[" + ", ".join(value(x) for x in v) + "]"
        if isinstance(v, dict):
            return "{" + ", ".join(f"{k} = {value(x)}" for k, x in v.items()) + "}"
        # JSON escapes are valid TOML escapes, except the surrogate pairs ensure_ascii would write
        return json.dumps(v, ensure_ascii=False)

    lines = [f"{k} = {value(v)}" for k, v in data.items() if not isinstance(v, dict)]
    for k, v in data.items():
        if isinstance(v, dict):
            lines += [f"[{k}]"] + [f"{kk} = {value(vv)}" for kk, vv in v.items()]
    return "\n".join(lines) + "\n"


def _run_cli(argv: list[str]) -> tuple[int, str]:
    """``isoscope ARGV`` in this process: the exit code and stderr."""
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        try:
            code = cli.main(argv)
        except SystemExit as e:  # argparse exits on a bad flag
            code = e.code if isinstance(e.code, int) else 2
    return code, err.getvalue()


@given(invalid_specs())
@hsettings(max_examples=150)
def test_any_invalid_spec_is_refused_naming_the_key(case):
    data, key = case
    with pytest.raises(InputError) as e:
        parse_spec(data, source="gen.toml")
    assert e.value.key == key, str(e.value)
    # and through the command line, from a file: exit 2, the key in the message, nothing written
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "gen.toml"
        path.write_text(_toml(data), encoding="utf-8")
        code, err = _run_cli(["analyze", str(path), "--out", str(Path(tmp) / "out")])
        assert code == 2, err
        assert f"'{key}'" in err, err
        assert sorted(p.name for p in Path(tmp).iterdir()) == ["gen.toml"]


_FLAGS = {
    "--seed": st.one_of(st.integers(max_value=-1).map(str), _WORD, st.just("1.5")),
    "--inputs": st.one_of(st.integers(max_value=0).map(str), _WORD),
    "--dtype": _WORD.filter(lambda w: w not in ("float64", "float32")),
    "--width": st.one_of(st.integers(max_value=0).map(str), st.just("2.5"), _WORD),
    "--depth": st.one_of(st.integers(max_value=0).map(str), _WORD),
    "--sigma-w": st.one_of(st.just("-1"), st.just("inf"), _WORD.filter(lambda w: w != "inf")),
    "--sigma-b": st.one_of(st.just("-0.5"), st.just("nan"), _WORD.filter(lambda w: w != "nan")),
}


@given(st.sampled_from(sorted(_FLAGS)), st.data())
@hsettings(max_examples=60)
def test_any_invalid_flag_exits_2_naming_it(flag, data):
    value = data.draw(_FLAGS[flag])
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "gen.toml"
        path.write_text(_toml(_base("plain")), encoding="utf-8")
        code, err = _run_cli(["analyze", str(path), f"{flag}={value}", "--out", f"{tmp}/out"])
        assert code == 2, err
        # argparse names the flag; the spec layer names the key the flag sets
        key = {"--sigma-w": "init.sigma_w", "--sigma-b": "init.sigma_b"}.get(flag, flag)
        assert flag in err or key in err or flag.strip("-") in err, err
        assert sorted(p.name for p in Path(tmp).iterdir()) == ["gen.toml"]


# --------------------------------------------------------------------------- names and folders
@given(st.text(min_size=1, max_size=300))
@hsettings(max_examples=150)
def test_any_name_gives_one_harmless_folder_inside_the_output(name):
    folder = safe_folder_name(name)
    base = Path("/isoscope-out")
    target = base / folder
    assert target.parent == base and target.name == folder  # one component, no separator
    assert os.path.normpath(target) == str(target)  # nothing that '..' or '.' would rewrite
    assert folder not in ("", ".", "..") and not folder.startswith(("-", "."))
    assert "/" not in folder and "\\" not in folder and "\x00" not in folder
    assert len(folder.encode("utf-8")) <= 100  # the promise of safe_folder_name
    assert folder == safe_folder_name(folder)  # a folder name is kept as it is


@given(st.text(alphabet=st.sampled_from("./\\-~ ab"), min_size=1, max_size=12).filter(str.strip))
@hsettings(max_examples=8)
def test_a_design_named_like_a_path_stays_in_the_output_folder(name):
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp) / "work"
        work.mkdir()
        data = _base("plain")
        data["name"] = name
        data["network"].update(width=2, depth=1)
        (work / "s.toml").write_text(_toml(data), encoding="utf-8")
        cwd = os.getcwd()
        os.chdir(work)
        try:
            code, err = _run_cli(["analyze", "s.toml"])
        finally:
            os.chdir(cwd)
        assert code == 0, err
        out = work / "isoscope-out"
        # the result folder is a link to a complete version folder beside it (folders.py)
        assert (out / safe_folder_name(name.strip()) / "result.json").is_file()
        made = [p.resolve() for p in Path(tmp).rglob("result.json")]
        assert made and all(p.parent.parent == out.resolve() for p in made), made
