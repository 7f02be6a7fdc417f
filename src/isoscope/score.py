"""How close a Jacobian is to an isometry: gain, shape, one score, one verdict.

Definitions (also in docs/score.md), lambda = s^2 pooled over draws, m1 = E[lambda]:

* **gain** ``m1``: the mean squared singular value, the factor by which the network scales
  the squared norm of a random direction.  ``gain_per_layer = m1^(1/L)``.
* **shape**: the spectrum after dividing out the gain, ``lambda~ = lambda / m1``.
  ``normalised_variance = m2/m1^2 - 1`` (0 only when all lambda are equal) and
  ``log_s_std`` (standard deviation of ln s over the non-zero s).
* **isometry score** ``I = E[min(lambda, 1/lambda)] = E[exp(-|ln lambda|)]``.
  I lies in [0, 1]; I = 1 exactly when every singular value equals 1; a zero singular value
  contributes 0, so I stays defined (ReLU); it is an average over singular values, so it does
  not grow or shrink with the width.  ``shape_score`` is the same average taken over
  ``lambda~``: what I would be if the gain were corrected by rescaling sigma_w.
* **verdict**, the first that applies: ``non-finite`` (the measurement overflowed);
  ``vanishing`` (m1 < 1/10); ``exploding`` (m1 > 10); ``isometric`` (I >= 0.8: a typical
  singular value within about 12% of 1); ``spread``.  The thresholds 10 and 0.8 are
  isoscope's conventions (common practice, no source): a factor of ten on the squared
  gradient norm is where step sizes stop transferring between layers.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from isoscope.spectrum import Spectrum

__all__ = ["Score", "score_spectrum", "VERDICTS", "GAIN_LIMIT", "ISOMETRIC_SCORE"]

GAIN_LIMIT = 10.0      # convention, see module docstring
ISOMETRIC_SCORE = 0.8  # convention, see module docstring
VERDICTS = {
    "isometric": "every direction keeps its length to within about 12% (isometry score >= 0.8)",
    "spread": "gain near 1 but singular values spread: some directions are amplified, others lost",
    "vanishing": "mean squared singular value below 1/10: gradients shrink through the stack",
    "exploding": "mean squared singular value above 10: gradients grow through the stack",
    "non-finite": "the forward pass or the Jacobian overflowed; no spectrum was measured",
}


class Score(NamedTuple):
    """Isometry score of one measured spectrum (see the module docstring for formulas)."""

    isometry: float
    shape_score: float
    gain: float
    log10_gain: float
    gain_per_layer: float | None
    normalised_variance: float
    log_s_std: float
    verdict: str
    reason: str


def _mean_closeness(log_lam: np.ndarray) -> float:
    """``E[exp(-|ln lambda|)]`` with ``ln lambda = -inf`` (a zero) contributing 0."""
    return float(np.mean(np.exp(-np.abs(log_lam))))


def score_spectrum(spectrum: Spectrum, depth: int | None) -> Score:
    """Score a measured spectrum.

    Args:
      spectrum: the pooled measurement.
      depth: the number of layers L (for the per-layer gain), or ``None``.

    Returns:
      A :class:`Score`.
    """
    log_lam = 2.0 * spectrum.log_s.ravel()
    m1, m2 = spectrum.lambda_moment(1), spectrum.lambda_moment(2)
    log_m1 = math.log(m1) if m1 > 0 else -math.inf
    isometry = _mean_closeness(log_lam)
    shape = _mean_closeness(log_lam - log_m1) if m1 > 0 else 0.0
    per_layer = math.exp(log_m1 / depth) if depth else None
    nvar = m2 / m1 ** 2 - 1.0 if m1 > 0 and math.isfinite(m2) else math.inf
    if m1 < 1.0 / GAIN_LIMIT:
        verdict = "vanishing"
    elif m1 > GAIN_LIMIT:
        verdict = "exploding"
    elif isometry >= ISOMETRIC_SCORE:
        verdict = "isometric"
    else:
        verdict = "spread"
    return Score(isometry=isometry, shape_score=shape, gain=m1,
                 log10_gain=log_m1 / math.log(10.0), gain_per_layer=per_layer,
                 normalised_variance=nvar, log_s_std=spectrum.log_s_std,
                 verdict=verdict, reason=VERDICTS[verdict])


def non_finite_score(detail: str) -> Score:
    """The score of a measurement that overflowed: every number NaN, verdict ``non-finite``."""
    nan = math.nan
    return Score(nan, nan, nan, nan, nan, nan, nan, "non-finite", f"{VERDICTS['non-finite']}: {detail}")
