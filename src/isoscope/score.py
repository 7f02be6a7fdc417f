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
from scipy.special import logsumexp

from isoscope.spectrum import Spectrum

__all__ = ["Score", "score_spectrum", "VERDICTS", "GAIN_LIMIT", "ISOMETRIC_SCORE", "Agreement",
           "agreement", "ks_distance", "censored_log_stats", "KS_LIMIT"]

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


# ---------------------------------------------------------------------------------------------
# Agreement between a measured spectrum and an infinite-width prediction
# ---------------------------------------------------------------------------------------------

# Above these, measurement and theory are said to disagree (isoscope's conventions, common
# practice, no source: a KS distance of 0.05 is visible by eye on a histogram of a few
# thousand values, and 10 % on m1 is a tenth of the gain).
KS_LIMIT = 0.05
MOMENT_LIMIT = 0.10
# sqrt(L/N) sets the size of finite-width effects (THEORY.md sec. 3, "Finite width").
FINITE_WIDTH_LIMIT = 0.3


class Agreement(NamedTuple):
    """How far a measured spectrum lies from its infinite-width prediction.

    Attributes:
      ks: Kolmogorov-Smirnov distance ``sup |F_measured - F_predicted|`` between the laws of
        lambda (atoms included), taken above ``floor``.
      floor: the lambda below which the measurement cannot resolve values (numerically zero
        singular values, see :func:`isoscope.spectrum.zero_threshold`); both laws count
        everything below it as one lump.
      compared: what was compared (all singular values, or the bulk without the mean mode).
      m1_rel_error, m2_rel_error: ``measured / predicted - 1`` for m1 and m2.
      m1_sampling_error: relative standard error of the measured m1 across draws.
      log_s_mean, log_s_std: ``(predicted, measured)`` mean and standard deviation of ln s over
        the values above the floor.
      zero_fraction: ``(predicted, measured)`` share of lambda at or below the floor.
      outlier_s: median over draws of the excluded largest singular value (mean mode), or None.
      warnings: sentences explaining why theory may not describe this measurement.
    """

    ks: float
    floor: float
    compared: str
    m1_rel_error: float
    m2_rel_error: float
    m1_sampling_error: float
    log_s_mean: tuple[float, float]
    log_s_std: tuple[float, float]
    zero_fraction: tuple[float, float]
    outlier_s: float | None
    warnings: tuple[str, ...]


def _predicted_log_cdf(density, ell: np.ndarray) -> np.ndarray:
    """``P(ln lambda <= ell)`` of a predicted law (``Density``: grid of ln lambda, atoms)."""
    out = np.zeros(ell.shape)
    for a, w in density.atoms:
        la = math.log(a) if a > 0 else -math.inf
        out += w * (ell >= la)
    if density.log_x.size >= 2:
        e, r = density.log_x, density.rho_log
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(e))])
        out += np.interp(ell, e, cum, left=0.0, right=cum[-1])
    return out


def censored_log_stats(density, floor_ell: float) -> tuple[float, float]:
    """Mean and std of ``ln lambda`` of the predicted law restricted to ``ln lambda > floor``."""
    e, r = density.log_x, density.rho_log
    pts = [(math.log(a), w) for a, w in density.atoms if a > 0 and math.log(a) > floor_ell]
    keep = e > floor_ell
    e, r = e[keep], r[keep]

    def part(k):
        grid = float(np.trapezoid(r * e ** k, e)) if e.size >= 2 else 0.0
        return grid + sum(w * la ** k for la, w in pts)

    mass = part(0)
    if mass <= 0:
        return math.nan, math.nan
    mean = part(1) / mass
    return mean, math.sqrt(max(part(2) / mass - mean * mean, 0.0))


def ks_distance(sample_log_lam: np.ndarray, density, floor_ell: float = -math.inf) -> float:
    """Kolmogorov-Smirnov distance between a sample of ``ln lambda`` and a predicted law.

    ``D = sup_{ell >= floor} |F_n(ell) - F(ell)|``, evaluated on both sides of every jump of the
    empirical CDF ``F_n`` (the supremum of a step function minus a non-decreasing one is taken
    there) and at the floor itself.  Values at or below ``floor`` (and ``-inf``, exact zeros)
    count as one lump in both laws, so a measurement that cannot resolve tiny values is not
    penalised for it.  The predicted F includes its atoms (Kolmogorov 1933; Smirnov 1948).

    Args:
      sample_log_lam: pooled ``ln lambda`` (``-inf`` for zeros).
      density: the predicted law (``isoscope.theory.free_probability.Density``).
      floor_ell: censoring level in ``ln lambda``.

    Returns:
      D in [0, 1].
    """
    x = np.sort(np.asarray(sample_log_lam, dtype=float))
    n = x.size
    above = x > floor_ell
    xs = x[above]
    i0 = n - xs.size                         # values in the lump at the floor
    f = _predicted_log_cdf(density, xs)
    ranks = np.arange(i0 + 1, n + 1) / n
    d = max(np.max(np.abs(ranks - f), initial=0.0), np.max(np.abs(ranks - 1.0 / n - f), initial=0.0))
    # the lump at the floor (at -inf: exact zeros against the atom at zero)
    d = max(d, abs(i0 / n - float(_predicted_log_cdf(density, np.array([floor_ell]))[0])))
    return float(d)


def agreement(spectrum: Spectrum, density, moments, depth: int, mean_mode: bool = False,
              heavy_tail_limit: float = 0.1) -> Agreement:
    """Compare a measured spectrum with a predicted law of lambda = s^2.

    * KS distance (:func:`ks_distance`) above the measurement floor
      ``ln lambda_floor = 2 (ln threshold + median_d ln s_max,d)``;
    * ``m1, m2``: measured pooled moments against the predicted ones (relative error), and the
      sampling error of m1 across draws, ``std(m1_d) / (sqrt(D) m1)``;
    * ln s statistics of both laws restricted to values above the floor.

    With ``mean_mode`` (a residual stack whose branch has ``E[phi] != 0``) the largest singular
    value of each draw is the mean mode, not part of the bulk the law describes: it is removed
    before comparing and reported as ``outlier_s`` (THEORY.md sec. 4).

    Warnings are raised (as sentences) for: L >= N (finite-width effects of relative size
    sqrt(L/N), THEORY.md sec. 3, as large as the effects predicted); heavy tails, when the predicted law implies a relative
    sampling error of the measured m2 above ``heavy_tail_limit``
    (``sqrt((m4 - m2^2)/(n m2^2))`` for n pooled values); a disagreement beyond KS 0.05 or 10 %
    on m1 (conventions, see KS_LIMIT), naming finite width as the likely cause when
    sqrt(L/N) > 0.3; more values below the floor than theory puts there.

    Args:
      spectrum: the measurement.
      density: the predicted law (``Density``).
      moments: the predicted m1..m4 (``LambdaMoments``).
      depth: number of layers L.
      mean_mode: remove the largest singular value of each draw (see above).
      heavy_tail_limit: relative m2 sampling error above which the tail warning is given.

    Returns:
      :class:`Agreement`.
    """
    log_s = spectrum.log_s
    zero = spectrum.zero_mask
    outlier = None
    compared = "all singular values"
    if mean_mode and log_s.shape[1] > 1:
        outlier = float(np.exp(np.median(log_s[:, 0])))
        log_s, zero = log_s[:, 1:], zero[:, 1:]
        compared = "the bulk: the largest singular value of each draw (the mean mode) is excluded"
    n_draws, width = log_s.shape
    floor_ell = 2.0 * (math.log(spectrum.threshold) + float(np.median(log_s[:, 0])))
    log_lam = np.where(zero, -np.inf, 2.0 * log_s).ravel()
    ks = ks_distance(log_lam, density, floor_ell)
    lam_k = lambda k: float(np.exp(logsumexp(2.0 * k * log_s.ravel()) - math.log(log_s.size)))
    m1, m2 = lam_k(1), lam_k(2)
    rel = lambda got, want: got / want - 1.0 if want > 0 and math.isfinite(want) else math.nan
    m1_draws = np.exp(logsumexp(2.0 * log_s, axis=1) - math.log(width))
    m1_se = float(np.std(m1_draws) / math.sqrt(n_draws) / m1) if n_draws > 1 and m1 > 0 else math.nan
    kept = log_lam[np.isfinite(log_lam)] / 2.0
    measured_stats = ((float(kept.mean()), float(kept.std())) if kept.size else (math.nan, math.nan))
    pm, ps = censored_log_stats(density, floor_ell)
    pred_zero = float(_predicted_log_cdf(density, np.array([floor_ell]))[0])
    meas_zero = float(np.mean(~np.isfinite(log_lam)))
    warnings = []
    ratio = math.sqrt(depth / spectrum.size)
    if ratio >= 1.0:
        warnings.append(f"depth {depth} >= width {spectrum.size}: finite-width effects are of order "
                        f"sqrt(L/N) = {ratio:.2f}, as large as the effects theory describes; the "
                        "infinite-width prediction does not apply (widen the network)")
    p_m2, p_m4 = moments.m2, moments.m4
    if math.isfinite(p_m4) and p_m2 > 0:
        m2_noise = math.sqrt(max(p_m4 - p_m2 ** 2, 0.0) / (log_s.size * p_m2 ** 2))
    else:
        m2_noise = math.inf
    if m2_noise > heavy_tail_limit:
        warnings.append(f"heavy tail: the predicted law puts so much of m2 in rare large values that "
                        f"{log_s.size} pooled values estimate m2 only to about {100 * m2_noise:.0f}%; "
                        "compare the KS distance and ln s statistics, not the moments")
    if meas_zero - pred_zero > 0.01:
        warnings.append(f"{100 * meas_zero:.1f}% of the measured lambda lie below the SVD floor "
                        f"{math.exp(floor_ell):.2g} where theory puts {100 * pred_zero:.1f}%: "
                        "the ln s statistics cover only the resolved part")
    if outlier is not None:
        top = density.support[1]
        warnings.append(f"mean mode: one singular value per draw (median s = {outlier:.3g}) lies "
                        f"far above the bulk (predicted edge s = {math.sqrt(top):.3g}); it is "
                        "reported separately and excluded from the comparison")
    e1 = rel(m1, moments.m1)
    if ks > KS_LIMIT or (math.isfinite(e1) and abs(e1) > MOMENT_LIMIT and m2_noise <= heavy_tail_limit):
        cause = (f"; finite width is the likely cause (sqrt(L/N) = {ratio:.2f}: widen the network "
                 "or compare at a smaller depth)" if FINITE_WIDTH_LIMIT < ratio < 1.0 else "")
        warnings.append(f"measured and predicted spectra disagree (KS = {ks:.3f}, m1 off by "
                        f"{_pct(e1)}): read the theory as the infinite-width trend only{cause}")
    return Agreement(ks=ks, floor=math.exp(floor_ell), compared=compared, m1_rel_error=e1,
                     m2_rel_error=rel(m2, moments.m2), m1_sampling_error=m1_se,
                     log_s_mean=(pm / 2.0, measured_stats[0]),
                     log_s_std=(ps / 2.0, measured_stats[1]),
                     zero_fraction=(pred_zero, meas_zero), outlier_s=outlier,
                     warnings=tuple(warnings))


def _pct(x: float) -> str:
    return f"{100 * x:+.0f}%" if math.isfinite(x) else "an unknown amount"
