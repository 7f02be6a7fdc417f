"""Argument checks of the mean-field functions: activation, scales, variances, correlations.

Every public function of :mod:`isoscope.theory.mean_field` converts its arguments here, so a bad
value raises one :class:`~isoscope.errors.InputError` saying what was received, what was
expected and what to do.  The conventions checked are those of Poole et al. 2016 (NeurIPS),
sec. 2: ``sigma_w`` and ``sigma_b`` are *scales* (``W_ij ~ N(0, sigma_w^2/N)``,
``b_i ~ N(0, sigma_b^2)``), finite and >= 0; a pre-activation variance ``q`` is finite and >= 0;
a correlation ``c`` (a covariance divided by q) lies in [-1, 1].  ``_act`` resolves a registry
name to an :class:`~isoscope.activations.Activation`.
"""

from __future__ import annotations

import math

from isoscope.activations import Activation, get_activation
from isoscope.errors import InputError


def _act(activation: str | Activation) -> Activation:
    return get_activation(activation)


def _scale(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} = {value!r} is not a number",
            expected="a finite real >= 0",
            hint=f"pass {name} as a float scale (standard deviation), e.g. 1.0",
        ) from None
    if not math.isfinite(v) or v < 0:
        raise InputError(
            f"{name} = {value!r} is out of range",
            expected="a finite real >= 0",
            hint=f"{name} is a scale (standard deviation), not a variance; pass its absolute value",
        )
    return v


def _variance(q: float, name: str = "q") -> float:
    try:
        v = float(q)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} = {q!r} is not a number",
            expected="a finite variance >= 0",
            hint="pass the pre-activation variance as a float",
        ) from None
    if not math.isfinite(v) or v < 0:
        raise InputError(
            f"{name} = {q!r} is out of range",
            expected="a finite variance >= 0",
            hint="pass a pre-activation variance, e.g. q* from fixed_point()",
        )
    return v


def _correlation(c: float) -> float:
    try:
        v = float(c)
    except (TypeError, ValueError):
        raise InputError(
            f"c = {c!r} is not a number",
            expected="a correlation in [-1, 1]",
            hint="pass the correlation between two inputs' pre-activations",
        ) from None
    if not -1.0 <= v <= 1.0:
        raise InputError(
            f"c = {c!r} is out of range",
            expected="a correlation in [-1, 1]",
            hint="a correlation is a covariance divided by the variance q",
        )
    return v
