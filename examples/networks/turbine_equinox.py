"""Gearbox-whisper: a wind-turbine vibration encoder written with Equinox.

An ``equinox.nn.MLP`` of depth 6 with ``tanh`` hidden layers and a linear read-out,
as such a model is usually written in its own project; its default initialization (uniform
weights of variance ``1/(3 fan_in)``, uniform biases) is what the analysis measures.  isoscope
sees it only as ``init(key, dtype)`` and ``apply(params, x)``: the parameters are the
module's array leaves (``equinox.partition``), the static part is closed over.  No equivalent
built-in design is named, so the report shows the measurement without theory.

Needs the optional extra: ``pip install -e '.[examples]'``.  Used by
``examples/gearbox-whisper-equinox.toml`` (``factory = "networks/turbine_equinox.py:build"``).
"""

import equinox as eqx
import jax
import jax.numpy as jnp

DEPTH = 6


def build(width):
    """``(init, apply)`` for an Equinox MLP mapping ``width`` features to ``width`` outputs."""

    def make(key, dtype):
        return eqx.nn.MLP(width, width, width, DEPTH, activation=jnp.tanh, key=key, dtype=dtype)

    static = eqx.partition(
        eqx.filter_eval_shape(make, jax.random.PRNGKey(0), jnp.float32), eqx.is_array
    )[1]

    def init(key, dtype):
        return eqx.partition(make(key, dtype), eqx.is_array)[0]

    def apply(params, x):
        return eqx.combine(params, static)(x)

    return init, apply
