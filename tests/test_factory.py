"""A user's own network (``family = "python"``): loading, refusals, and agreement with the
built-in design it is equivalent to.

References: the singular values of the same Jacobian computed another way (``numpy.linalg.svd``
of ``jax.jacrev``, reverse mode, an independent path from isoscope's forward-mode scan), and
the built-in plain stack evaluated on the very same parameters.
"""

import json
import sys
import textwrap
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from isoscope import cli
from isoscope import jacobian as jac
from isoscope import network as nw
from isoscope.analysis import seed_key
from isoscope.errors import InputError
from isoscope.factory import load_factory

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"


def _svd(j):
    return np.linalg.svd(np.asarray(j, dtype=np.float64), compute_uv=False)


def test_plain_jax_example_gives_the_builtin_spectrum_on_the_same_parameters():
    # the hive-listener is written as a Python list of layers; on the built-in stack's own
    # parameters (re-packed) its Jacobian must have the same singular values
    width = 48
    user = load_factory("networks/hive_listener.py:build", EXAMPLES, width)
    eq = user.equivalent
    builtin = nw.plain_stack(
        width,
        eq["network"]["depth"],
        eq["network"]["activation"],
        weights=eq["init"]["weights"],
        sigma_w=eq["init"]["sigma_w"],
        sigma_b=eq["init"]["sigma_b"],
    )
    params = builtin.init(jax.random.PRNGKey(5))
    layers = [{"w": params["W"][l], "b": params["b"][l]} for l in range(builtin.depth)]
    x = 0.3 * jax.random.normal(jax.random.PRNGKey(6), (width,), jnp.float64)
    s_builtin = _svd(jac.dense_jacobian(builtin, params, x))
    s_user = _svd(jac.dense_jacobian(user.network, layers, x))
    s_reverse = _svd(jax.jacrev(user.network.apply, argnums=1)(layers, x))
    np.testing.assert_allclose(s_user, s_builtin, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(s_user, s_reverse, rtol=1e-12, atol=1e-14)


def test_plain_jax_example_draws_the_builtin_distribution():
    # its own init (jax.nn.initializers.orthogonal, Haar) gives the same law: the m1 of 12
    # draws each lies within 4 standard errors of the built-in's mean over 12 draws
    width = 32
    user = load_factory("networks/hive_listener.py:build", EXAMPLES, width)
    builtin = nw.plain_stack(width, 12, "tanh", weights="orthogonal", sigma_w=1.05, sigma_b=0.05)
    m_user, m_builtin = [], []
    for s in range(12):
        x = 0.27 * jax.random.normal(jax.random.PRNGKey(100 + s), (width,), jnp.float64)
        p_user = user.network.init(jax.random.PRNGKey(s), jnp.float64)
        m_user.append(np.mean(_svd(jac.dense_jacobian(user.network, p_user, x)) ** 2))
        p_b = builtin.init(jax.random.PRNGKey(s))
        m_builtin.append(np.mean(_svd(jac.dense_jacobian(builtin, p_b, x)) ** 2))
    se = np.hypot(np.std(m_user), np.std(m_builtin)) / np.sqrt(12)
    assert abs(np.mean(m_user) - np.mean(m_builtin)) < 4 * se


def test_equinox_example_matches_reverse_mode():
    pytest.importorskip("equinox")
    width = 24
    user = load_factory("networks/turbine_equinox.py:build", EXAMPLES, width)
    assert user.equivalent is None
    params = user.network.init(jax.random.PRNGKey(2), jnp.float64)
    x = jax.random.normal(jax.random.PRNGKey(3), (width,), jnp.float64)
    s = _svd(jac.dense_jacobian(user.network, params, x))
    ref = _svd(jax.jacrev(user.network.apply, argnums=1)(params, x))
    np.testing.assert_allclose(s, ref, rtol=1e-12, atol=1e-15)


def _write(folder: Path, body: str, name="net.py") -> Path:
    p = folder / name
    p.write_text(textwrap.dedent(body))
    return p


def _spec(folder: Path, factory: str, width=8, extra="") -> Path:
    p = folder / "user.toml"
    p.write_text(
        f'name = "user"\n[network]\nfamily = "python"\nfactory = "{factory}"\n'
        f"width = {width}\n[analysis]\ninputs = 2\nseed = 1\n{extra}"
    )
    return p


LINEAR = """
    import jax, jax.numpy as jnp
    def build(width):
        def init(key, dtype):
            return {"w": jax.random.normal(key, (width, width), dtype) / jnp.sqrt(width)}
        def apply(p, x):
            return p["w"] @ x
        return init, apply
"""


def test_analyze_a_factory_measures_the_jacobian_and_says_there_is_no_theory(tmp_path, capsys):
    _write(tmp_path, LINEAR)
    spec = _spec(tmp_path, "net.py:build", width=16)
    out = tmp_path / "out"
    assert cli.main(["analyze", str(spec), "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert "no infinite-width prediction" in captured.out + captured.err
    r = json.loads((out / "result.json").read_text())
    assert r["measured"]["route"] == "dense"
    # re-draw both draws' weights as analyze does (analysis.seed_key, fold_in per draw, the
    # first half of the split for the parameters) and compare with numpy's SVD
    ref = []
    for i in range(2):
        key = jax.random.split(jax.random.fold_in(seed_key(1), i))[0]
        w = np.asarray(jax.random.normal(key, (16, 16), jnp.float64)) / 4.0
        ref.append(np.log(np.linalg.svd(w, compute_uv=False)))
    got = np.sort(np.asarray(r["measured"]["log_s"]["values"], dtype=float))
    np.testing.assert_allclose(got, np.sort(np.concatenate(ref)), rtol=0, atol=1e-12)


def test_matrix_free_route_on_a_factory_agrees_with_dense(tmp_path, capsys):
    _write(tmp_path, LINEAR)
    dense = _spec(tmp_path, "net.py:build", width=64)
    assert cli.main(["analyze", str(dense), "--out", str(tmp_path / "d")]) == 0
    (tmp_path / "mf").mkdir()
    _write(tmp_path / "mf", LINEAR)
    free = _spec(
        tmp_path / "mf",
        "net.py:build",
        width=64,
        extra='route = "matrix-free"\ndtype = "float64"\n',
    )
    assert cli.main(["analyze", str(free), "--out", str(tmp_path / "f")]) == 0
    capsys.readouterr()
    rd = json.loads((tmp_path / "d" / "result.json").read_text())["measured"]
    rf = json.loads((tmp_path / "f" / "result.json").read_text())["measured"]
    assert rf["route"] == "matrix-free"
    # the same draws; with at least N steps each probe's rule is exact, so the only error is
    # the probes' (Hutchinson 1989): the pooled quadrature moments lie within 4 standard errors
    q = rf["quadrature"]["pooled"]
    for k in ("m1", "m2"):
        assert abs(q[k] - rd["lambda_moments"][k]) < 4 * q[f"{k}_se"]
    # the extreme Ritz values of a full Krylov space are eigenvalues of J^T J: the largest
    # lies at or below the dense s_max^2
    s_max2 = np.exp(2 * max(rd["log_s"]["values"]))
    assert q["lambda_max"] <= s_max2 * (1 + 1e-9) and q["lambda_max"] > 0.9 * s_max2


def test_only_the_named_file_is_executed(tmp_path, capsys):
    marker = tmp_path / "ran"
    _write(tmp_path, f"open({str(marker)!r}, 'w').write('x')\n", name="helper.py")
    _write(tmp_path, LINEAR)
    path_before = list(sys.path)
    load_factory("net.py:build", tmp_path, 4)
    assert not marker.exists()
    assert sys.path == path_before
    assert "net" not in sys.modules


BAD = {
    "missing file": ("nowhere.py:build", None, "does not exist"),
    "not a py file": ("net.txt:build", None, "not a .py file"),
    "bad name": ("net.py:2x", LINEAR, "not a Python name"),
    "syntax error": ("net.py:build", "def build(width)\n    return 1\n", "syntax error at line 1"),
    "import error": ("net.py:build", "import no_such_module_xyz\n", "ModuleNotFoundError"),
    "misspelled function": ("net.py:biuld", LINEAR, "Did you mean 'build'"),
    "not callable": ("net.py:build", "build = 3\n", "not a function"),
    "wrong return": ("net.py:build", "def build(width):\n    return 1\n", "returned int"),
    "raises": (
        "net.py:build",
        "def build(width):\n    raise RuntimeError('boom')\n",
        "RuntimeError: boom",
    ),
    "matrix output": (
        "net.py:build",
        LINEAR.replace('return p["w"] @ x', "return jnp.outer(x, x)"),
        "one output vector",
    ),
    "width mismatch": (
        "net.py:build",
        LINEAR.replace("(width, width)", "(width, width + 1)"),
        "shape (8,)",
    ),
    "bad equivalent": (
        "net.py:build",
        LINEAR.replace("return init, apply", "return init, apply, {'net': 1}"),
        "equivalent design",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_factories_are_refused_with_exit_2_naming_the_key(case, tmp_path, capsys):
    ref, body, phrase = BAD[case]
    if body is not None:
        _write(tmp_path, body)
    spec = _spec(tmp_path, ref)
    out = tmp_path / "out"
    assert cli.main(["analyze", str(spec), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert phrase in err and "network.factory" in err, err
    assert not out.exists()


def test_deep_route_and_init_table_are_refused_for_a_factory(tmp_path, capsys):
    _write(tmp_path, LINEAR)
    spec = _spec(tmp_path, "net.py:build", extra='route = "deep"\n')
    assert cli.main(["analyze", str(spec), "--out", str(tmp_path / "o")]) == 2
    assert "analysis.route" in capsys.readouterr().err
    spec.write_text(spec.read_text().replace("[analysis]", "[init]\nsigma_w = 1.0\n[analysis]"))
    assert cli.main(["analyze", str(spec), "--out", str(tmp_path / "o")]) == 2
    assert "init" in capsys.readouterr().err


def test_load_factory_errors_are_input_errors(tmp_path):
    with pytest.raises(InputError, match="FILE.py:NAME"):
        load_factory("no-colon", tmp_path, 4)
