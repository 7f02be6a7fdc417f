"""A misspelled name gets the nearest valid one suggested.

The reference for "nearest" is the standard library's ``difflib.get_close_matches`` (gestalt
pattern matching, Ratcliff and Obershelp; default cut-off 0.6): each case checks that the
suggestion in the message is exactly the name difflib returns among the allowed names.
"""

import difflib

import pytest

from isoscope import cli
from isoscope.activations import get_activation
from isoscope.errors import InputError, did_you_mean
from isoscope.initializers import get_initializer
from isoscope.spec import parse_spec

BASE = {"name": "x", "network": {"width": 8, "depth": 2, "activation": "tanh"}}


def _spec_error(data):
    with pytest.raises(InputError) as e:
        parse_spec(data)
    return e.value


def _with(section, key, value):
    data = {k: (dict(v) if isinstance(v, dict) else v) for k, v in BASE.items()}
    data.setdefault(section, {})[key] = value
    return data


@pytest.mark.parametrize(
    "received, allowed",
    [
        ("tahn", ["linear", "tanh", "relu"]),
        ("ortogonal", ["gaussian", "orthogonal", "uniform"]),
        ("Residul", ["plain", "residual", "conv1d"]),
    ],
)
def test_suggestion_is_difflibs_nearest_name(received, allowed):
    # reference: difflib.get_close_matches(received.lower(), allowed, n=1)
    expected = difflib.get_close_matches(received.lower(), allowed, n=1)[0]
    assert did_you_mean(received, allowed) == f"did you mean {expected!r}?"


def test_nothing_close_gets_no_suggestion():
    assert difflib.get_close_matches("zzzz", ["tanh", "relu"], n=1) == []
    assert did_you_mean("zzzz", ["tanh", "relu"]) is None


@pytest.mark.parametrize(
    "data, key, nearest",
    [
        (_with("network", "activaton", "tanh"), "network.activaton", "activation"),
        (_with("init", "sigmaw", 1.0), "init.sigmaw", "sigma_w"),
        (_with("analysis", "rout", "dense"), "analysis.rout", "route"),
        ({**BASE, "netwrk": {}}, "netwrk", "network"),
        (_with("network", "family", "residul"), "network.family", "residual"),
        (_with("init", "weights", "orthogonl"), "init.weights", "orthogonal"),
        (_with("analysis", "route", "matrixfree"), "analysis.route", "matrix-free"),
        (_with("analysis", "dtype", "float23"), "analysis.dtype", "float32"),
    ],
)
def test_spec_typos_name_the_key_and_the_nearest_valid_name(data, key, nearest):
    err = _spec_error(data)
    assert err.key == key
    assert f"did you mean {nearest!r}?" in str(err).lower()


def test_misspelled_activation_and_initializer_names():
    with pytest.raises(InputError, match=r"(?i)did you mean 'tanh'\?"):
        get_activation("tahn")
    with pytest.raises(InputError, match=r"(?i)did you mean 'leaky-relu'\?"):
        get_activation("leaky-rlu")
    with pytest.raises(InputError, match=r"(?i)did you mean 'gaussian'\?"):
        get_initializer("gausian", 1.0)


def test_misspelled_command_and_flag_value(capsys):
    with pytest.raises(SystemExit) as e:
        cli.main(["analyse", "x.toml"])
    assert e.value.code == 2
    assert "did you mean 'analyze'?" in capsys.readouterr().err
    code = cli.main(
        ["recommend", "--activation", "tanh", "--family", "residul", "--depth", "4", "--width", "8"]
    )
    assert code == 2
    assert "did you mean 'residual'?" in capsys.readouterr().err.lower()


def _subparsers(parser):
    import argparse

    (action,) = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    return action.choices


def test_every_commands_help_ends_with_two_or_three_examples_that_parse():
    import shlex
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    parser = cli.build_parser()
    commands = {"isoscope": parser, **_subparsers(parser)}
    assert set(commands) == set(cli.EXAMPLES)
    for name, sub in commands.items():
        text = sub.format_help().rstrip().splitlines()
        examples = cli.EXAMPLES[name]
        assert 2 <= len(examples) <= 3, name
        assert text[-len(examples) - 1] == "examples:", name
        assert [t.strip() for t in text[-len(examples) :]] == examples, name
        for line in examples:
            words = shlex.split(line)
            assert words[0] == "isoscope"
            for w in words:
                if w.startswith("examples/"):
                    assert (root / w).is_file(), f"{line}: {w} is not in the repository"
            if "--help" not in words:
                args = parser.parse_args(words[1:])  # exits 2 on an unknown flag
                assert args.command == (words[1] if name == "isoscope" else name)
