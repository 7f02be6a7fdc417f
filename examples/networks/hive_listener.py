"""Hive-listener: the acoustic front end of a beehive health monitor, in plain JAX.

Twelve tanh layers of width ``width`` read a frame of hive sound features; the weights are
Haar-orthogonal with sigma_w = 1.05 and a small bias.  The layers are a Python list of
``{"w", "b"}`` dicts (the way this network is written in its own project), not isoscope's
stacked arrays; the function returns the third value ``equivalent`` because the design is
exactly a built-in plain stack, so isoscope draws that stack's prediction beside the
measurement.

Used by ``examples/hive-listener-python.toml`` (``factory = "networks/hive_listener.py:build"``).
"""

import jax
import jax.numpy as jnp

DEPTH = 12
SIGMA_W = 1.05
SIGMA_B = 0.05


def build(width):
    """``(init, apply, equivalent)`` for a hive-listener of the given width."""
    orthogonal = jax.nn.initializers.orthogonal(scale=SIGMA_W)

    def init(key, dtype):
        layers = []
        for k in jax.random.split(key, DEPTH):
            kw, kb = jax.random.split(k)
            layers.append(
                {
                    "w": orthogonal(kw, (width, width), dtype),
                    "b": SIGMA_B * jax.random.normal(kb, (width,), dtype),
                }
            )
        return layers

    def apply(layers, x):
        for layer in layers:
            x = jnp.tanh(layer["w"] @ x + layer["b"])
        return x

    equivalent = {
        "network": {"family": "plain", "depth": DEPTH, "activation": "tanh"},
        "init": {"weights": "orthogonal", "sigma_w": SIGMA_W, "sigma_b": SIGMA_B},
    }
    return init, apply, equivalent
