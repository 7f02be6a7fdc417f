"""The memory estimate against the sizes of the arrays a run really allocates."""

import jax
import numpy as np
import pytest

from isoscope import budget, jacobian
from isoscope.analysis import build_network
from isoscope.errors import InputError
from isoscope.spec import parse_spec


def _spec(width=24, depth=5, weights="orthogonal", dtype="float64", inputs=3, family="plain"):
    net = {"width": width, "depth": depth, "activation": "tanh", "family": family}
    return parse_spec(
        {
            "name": "b",
            "network": net,
            "init": {"weights": weights, "sigma_w": 1.1},
            "analysis": {"inputs": inputs, "dtype": dtype},
        }
    )


@pytest.mark.parametrize(
    "weights,dtype,family",
    [
        ("orthogonal", "float64", "plain"),
        ("gaussian", "float32", "plain"),
        ("uniform", "float64", "residual"),
    ],
)
def test_parameter_and_jacobian_bytes_match_the_real_arrays(weights, dtype, family):
    spec = _spec(weights=weights, dtype=dtype, family=family)
    net = build_network(spec)
    params = net.init(jax.random.PRNGKey(0), np.dtype(dtype))
    real = sum(np.asarray(leaf).nbytes for leaf in jax.tree_util.tree_leaves(params))
    b = budget.estimate(spec, rate=1e9)
    assert b.params_bytes == real
    x = np.ones(spec.network.width, dtype)
    assert b.jacobian_bytes == np.asarray(jacobian.dense_jacobian(net, params, x)).nbytes
    # the pooled singular values: draws x width float64 (numpy.stack of the per-draw SVDs)
    assert b.singular_values_bytes == np.zeros((spec.analysis.inputs, spec.network.width)).nbytes
    assert b.peak_bytes > 2 * b.params_bytes


def test_the_two_cases_of_the_issue_are_refused_on_a_24_gb_machine():
    # width 8192 depth 200: the weights alone are 200 * 8192^2 * 8 B = 107 GB
    with pytest.raises(InputError, match=r"needs about .*GB.*available"):
        budget.check(_spec(width=8192, depth=200), available=24 * 10**9)
    # width 128 depth 100000: 100000 * 128^2 * 8 B = 13.1 GB of weights, twice that at the peak
    with pytest.raises(InputError, match="(?i)lower network.width or network.depth"):
        budget.check(_spec(width=128, depth=100_000), available=24 * 10**9)
    assert budget.check(_spec(width=256, depth=64), available=24 * 10**9).params_bytes == 8 * (
        64 * 256**2 + 64 * 256 + 1
    )


def test_time_scales_as_the_flop_count():
    # forward mode: 2 L N^3 per draw (L products of N x N matrices) plus (8/3) N^3 for the SVD
    b = budget.estimate(_spec(width=100, depth=10, weights="gaussian", inputs=2), rate=1e9)
    assert b.flops == pytest.approx(2 * (2 * 10 * 100**3 + 8 / 3 * 100**3))
    assert b.seconds == pytest.approx(b.flops / 1e9)


def test_available_memory_reads_the_kernel():
    avail = budget.available_memory()
    with open("/proc/meminfo") as f:
        line = next(x for x in f if x.startswith("MemAvailable:"))
    # MemAvailable moves between two reads; within 10 %
    assert avail == pytest.approx(int(line.split()[1]) * 1024, rel=0.1)
