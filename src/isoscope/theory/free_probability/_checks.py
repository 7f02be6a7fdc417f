"""Argument checks shared by the free-probability functions (one place for the messages).

Each converts one argument or raises :class:`~isoscope.errors.TheoryError` naming what was
received and what it should be: a pre-activation variance ``q >= 0`` (the mean-field fixed point
q*), ``tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2] >= 0`` (Tarnowski et al. 2019, AISTATS), a
weight scale ``sigma_w > 0`` (``W_ij ~ N(0, sigma_w^2/N)``: the scale, not its square), a grid
size ``points >= 32`` and integers such as the depth.  The check of a whole plain stack (law,
weights, sigma_w, depth) is :func:`isoscope.theory.free_probability.derivative._check_stack`.
"""

from __future__ import annotations

import math

import numpy as np

from isoscope.errors import TheoryError


def _real(name: str, value, *, positive: bool, what: str) -> float:
    """A finite float, > 0 (positive) or >= 0, else TheoryError naming what it should be."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise TheoryError(f"{name} must be a number, received {value!r}; {what}") from None
    if not math.isfinite(x) or (x <= 0 if positive else x < 0):
        raise TheoryError(
            f"{name} must be finite and {'> 0' if positive else '>= 0'}, received {value!r}; {what}"
        )
    return x


def _integer(name: str, value, minimum: int, what: str) -> int:
    """An integer >= minimum (bools refused), else TheoryError."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise TheoryError(f"{name} must be an integer >= {minimum} ({what}), received {value!r}")
    return int(value)


def _check_q(q) -> float:
    return _real(
        "variance q", q, positive=False, what="pass the mean-field fixed point q* (a variance)"
    )


def _check_tau(tau) -> float:
    return _real(
        "tau", tau, positive=False, what="it is a sum of alpha^2 sigma_w^2 E[phi'^2] over layers"
    )


def _check_sigma(sigma_w) -> float:
    return _real("sigma_w", sigma_w, positive=True, what="the weight scale, not its square")


def _check_points(points) -> int:
    return _integer("points", points, 32, "grid size of the density")
