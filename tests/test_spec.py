"""Spec round trips: what a result file records can be read back as the same design."""

import pytest

from isoscope.errors import InputError
from isoscope.spec import parse_spec

PLAIN = {
    "name": "p",
    "network": {"width": 16, "depth": 3, "activation": "tanh"},
    "init": {"weights": "gaussian", "sigma_w": 1.1, "sigma_b": 0.05},
}
RESIDUAL = {
    "name": "r",
    "network": {"family": "residual", "width": 16, "depth": 3, "activation": "relu", "alpha": 0.25},
}


@pytest.mark.parametrize("data", [PLAIN, RESIDUAL])
def test_to_dict_reads_back_to_the_same_spec(data):
    spec = parse_spec(data)
    again = parse_spec(spec.to_dict())
    assert again == spec


def test_replace_changes_one_key_and_keeps_the_rest():
    spec = parse_spec(PLAIN)
    other = spec.replace(init={"sigma_w": 1.3}, analysis={"seed": 7})
    assert other.init.sigma_w == 1.3 and other.analysis.seed == 7
    assert other.network == spec.network and other.init.sigma_b == spec.init.sigma_b


def test_replace_is_validated():
    with pytest.raises(InputError, match="init.sigma_w"):
        parse_spec(PLAIN).replace(init={"sigma_w": -1.0})


def test_seed_range_is_uint64():
    # JAX threefry keys hold two uint32 words: seeds 0 .. 2^64 - 1
    assert parse_spec({**PLAIN, "analysis": {"seed": 2**64 - 1}}).analysis.seed == 2**64 - 1
    with pytest.raises(InputError, match=r"analysis.seed.*2\^64 - 1"):
        parse_spec({**PLAIN, "analysis": {"seed": 2**64}})


def test_input_file_path_survives_a_round_trip(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "d").mkdir()
    src = "d/spec.toml"  # a relative spec path, as typed on the command line
    spec = parse_spec({**PLAIN, "analysis": {"input": "file", "input_file": "x.npy"}}, source=src)
    again = parse_spec(spec.to_dict(), source=f"{src} with command-line flags")
    assert again.analysis.input_file == spec.analysis.input_file == str(tmp_path / "d" / "x.npy")


@pytest.mark.parametrize("seed", [0, 5, 2**32 + 7, 2**62 + 3, 2**63 - 1])
def test_seed_key_is_prngkey_below_2_63(seed):
    # the same seed keeps its numbers: jax.random.PRNGKey(seed) is the reference
    import jax
    import numpy as np

    from isoscope.analysis import seed_key

    assert np.array_equal(np.asarray(seed_key(seed)), np.asarray(jax.random.PRNGKey(seed)))


def test_seed_keys_beyond_2_63_are_distinct_words():
    import numpy as np

    from isoscope.analysis import seed_key

    assert np.asarray(seed_key(2**64 - 1)).tolist() == [2**32 - 1, 2**32 - 1]
    assert np.asarray(seed_key(2**63)).tolist() == [2**31, 0]


@pytest.mark.parametrize(
    "name",
    [
        "plain",
        'quote " and \\ backslash',
        "line\nbreak\ttab",
        "unicode: σ_w ≈ 1 · 深度",
        "<script>alert(1)</script>",
        "bell\x07",
    ],
)
def test_spec_toml_reads_back_to_the_same_spec(name):
    import tomllib

    from isoscope.spec import spec_toml

    spec = parse_spec(
        {
            "name": name,
            "description": name + " (described)",
            "network": {"family": "residual", "alpha": 0.125, "depth": 7},
            "init": {"weights": "gaussian", "sigma_w": 1e-05, "sigma_b": 0.1},
            "analysis": {"seed": 2**64 - 1},
        }
    )
    back = parse_spec(tomllib.loads(spec_toml(spec)))
    assert back.to_dict() == spec.to_dict()


def test_spec_toml_round_trips_every_example():
    import pathlib
    import tomllib

    from isoscope.spec import load_spec, spec_toml

    root = pathlib.Path(__file__).resolve().parent.parent
    paths = sorted((root / "examples").glob("*.toml")) + sorted(
        (root / "src/isoscope/scenarios").glob("*.toml")
    )
    assert paths
    for path in paths:
        spec = load_spec(path)
        assert parse_spec(tomllib.loads(spec_toml(spec))).to_dict() == spec.to_dict()
