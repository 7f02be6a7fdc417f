"""Spec round trips: what a result file records can be read back as the same design."""

import pytest

from isoscope.errors import InputError
from isoscope.spec import parse_spec

PLAIN = {"name": "p", "network": {"width": 16, "depth": 3, "activation": "tanh"},
         "init": {"weights": "gaussian", "sigma_w": 1.1, "sigma_b": 0.05}}
RESIDUAL = {"name": "r", "network": {"family": "residual", "width": 16, "depth": 3,
                                     "activation": "relu", "alpha": 0.25}}


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
