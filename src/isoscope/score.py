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
  singular value within about 12% of 1); ``mis-scaled`` (the shape score >= 0.8: the values
  agree with each other, only the gain is off, which rescaling sigma_w corrects); ``spread``.  The thresholds 10 and 0.8 are
  isoscope's conventions (common practice, no source): a factor of ten on the squared
  gradient norm is where step sizes stop transferring between layers.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.special import logsumexp

from isoscope.activations import get_activation
from isoscope.spectrum import Spectrum

__all__ = [
    "Score",
    "score_spectrum",
    "VERDICTS",
    "GAIN_LIMIT",
    "ISOMETRIC_SCORE",
    "Agreement",
    "agreement",
    "ks_distance",
    "censored_log_stats",
    "KS_LIMIT",
    "Outlier",
    "split_outliers",
    "length_mode_side",
    "tail_share",
    "atom_tolerance",
    "snap_to_atoms",
    "judged_gain",
    "non_finite_score",
    "outlier_counts",
    "isometry_of_logs",
    "predicted_isometry",
]

GAIN_LIMIT = 10.0  # convention, see module docstring
ISOMETRIC_SCORE = 0.8  # convention, see module docstring
VERDICTS = {
    "isometric": "every direction keeps its length to within about 12% (isometry score >= 0.8)",
    "mis-scaled": "the singular values agree with each other but not with 1 (shape score >= 0.8): "
    "every direction is scaled alike; rescale sigma_w to bring the gain to 1",
    "spread": "gain near 1 but singular values spread: some directions are amplified, others lost",
    "vanishing": "mean squared singular value below 1/10: gradients shrink through the stack",
    "exploding": "mean squared singular value above 10: gradients grow through the stack",
    "non-finite": "the forward pass or the Jacobian overflowed; no spectrum was measured",
}


class Score(NamedTuple):
    """Isometry score of one measured spectrum (see the module docstring for formulas).

    ``gain`` is the measured m1; ``gain_basis`` says which m1 the verdict judged the gain by
    (``"measured m1"``, or ``"predicted m1"`` when the measured one cannot be estimated and the
    mean of ln s confirms the theory, see :func:`judged_gain`); ``scored`` says which singular
    values were scored (all, or the bulk without outliers, see :func:`split_outliers`).
    """

    isometry: float
    shape_score: float
    gain: float
    log10_gain: float
    gain_per_layer: float | None
    normalised_variance: float
    log_s_std: float
    verdict: str
    reason: str
    gain_basis: str = "measured m1"
    scored: str = "all singular values"


def isometry_of_logs(log_lam: np.ndarray) -> float:
    """The isometry score ``E[min(lambda, 1/lambda)] = E[exp(-|ln lambda|)]`` of a sample given
    as ``ln lambda`` (formed in logs, so values beyond the dtype's range score right; a zero,
    ``ln lambda = -inf``, contributes 0)."""
    return float(np.mean(np.exp(-np.abs(log_lam))))


def score_spectrum(
    spectrum: Spectrum,
    depth: int | None,
    judged_gain: tuple[float, str] | None = None,
    scored: str = "all singular values",
) -> Score:
    """Score a measured spectrum.

    Moments are taken in logarithms (``ln m_k`` by log-sum-exp), so a gain that under- or
    overflows float64 still gives a finite ``log10_gain`` and the right verdict.

    Args:
      spectrum: the pooled measurement (the bulk, when outliers were set apart).
      depth: the number of layers L (for the per-layer gain), or ``None``.
      judged_gain: ``(m1, why)`` to judge the gain by instead of the measured m1, when the
        measured m1 cannot be trusted (see :func:`judged_gain`); ``why`` joins the reason.

    Returns:
      A :class:`Score`.
    """
    log_lam = 2.0 * spectrum.log_s.ravel()
    log_m1, log_m2 = spectrum.log_lambda_moment(1), spectrum.log_lambda_moment(2)
    isometry = isometry_of_logs(log_lam)
    shape = isometry_of_logs(log_lam - log_m1) if math.isfinite(log_m1) else 0.0
    per_layer = (
        math.exp(log_m1 / depth) if depth and math.isfinite(log_m1) else (0.0 if depth else None)
    )
    nvar = _exp(log_m2 - 2.0 * log_m1) - 1.0 if math.isfinite(log_m1) else math.nan
    basis = log_m1 if judged_gain is None else math.log(judged_gain[0])
    if basis < math.log(1.0 / GAIN_LIMIT):
        verdict = "vanishing"
    elif basis > math.log(GAIN_LIMIT):
        verdict = "exploding"
    elif isometry >= ISOMETRIC_SCORE:
        verdict = "isometric"
    elif shape >= ISOMETRIC_SCORE:
        verdict = "mis-scaled"
    else:
        verdict = "spread"
    reason = VERDICTS[verdict] + ("" if judged_gain is None else f" ({judged_gain[1]})")
    return Score(
        isometry=isometry,
        shape_score=shape,
        gain=_exp(log_m1),
        log10_gain=log_m1 / math.log(10.0),
        gain_per_layer=per_layer,
        normalised_variance=nvar,
        log_s_std=spectrum.log_s_std,
        verdict=verdict,
        reason=reason,
        gain_basis="measured m1" if judged_gain is None else "predicted m1",
        scored=scored,
    )


def _exp(x: float) -> float:
    """``exp`` that saturates to ``inf`` (and ``0.0``) instead of raising OverflowError."""
    return math.exp(x) if x < 709.78 else math.inf


def non_finite_score(detail: str) -> Score:
    """The score of a measurement that overflowed: every number NaN, verdict ``non-finite``."""
    nan = math.nan
    return Score(
        nan,
        nan,
        nan,
        nan,
        nan,
        nan,
        nan,
        "non-finite",
        f"{VERDICTS['non-finite']}: {detail}",
        "none",
    )


# ---------------------------------------------------------------------------------------------
# Agreement between a measured spectrum and an infinite-width prediction
# ---------------------------------------------------------------------------------------------

# Above these, measurement and theory are said to disagree (isoscope's conventions, common
# practice, no source: a KS distance of 0.05 is visible by eye on a histogram of a few
# thousand values, and 10 % on m1 is a tenth of the gain).
KS_LIMIT = 0.05
MOMENT_LIMIT = 0.10
# sqrt(L/N) sets the size of finite-width effects (Pennington, Schoenholz, Ganguli 2018, sec. 5;
# Hanin & Nica 2019: the log-norm of a product of L random N x N layers fluctuates at
# sqrt(L/N)).  Above this ratio, finite width is named as the likely cause of a disagreement.
FINITE_WIDTH_LIMIT = 0.3
# A moment m_k cannot be estimated from N values per draw when the top 1/N of the predicted law
# carries more than this share of it (convention, half of MOMENT_LIMIT: such a sample typically
# misses that share, see tail_share).
TAIL_LIMIT = 0.05
# The robust gain statistic, the mean of ln s, "agrees" within this (convention: 10 % on the
# typical singular value), or 3 standard errors if larger.
LOG_MEAN_LIMIT = 0.1
# Inputs "at the fixed point": no layer's variance departs from q* by more than this (relative);
# the same criterion as the prediction's own note.
STEADY_RTOL = 0.05
# A residual block "contributes O(1/L)" while alpha^2 sigma_w^2 E[phi'^2] <= this.
BLOCK_LIMIT = 0.1


class Outlier(NamedTuple):
    """A singular value per draw that the bulk law does not describe, set apart from the bulk.

    Attributes:
      kind: ``"mean mode"`` (residual stack whose branch has ``E[phi] != 0``: one value far
        above the bulk) or ``"input-length direction"`` (plain stack: the direction along the
        input follows the length map, ``s = V'(q*)^L``, Poole et al. 2016, not the bulk law).
      side: ``"top"`` (the largest value of each draw) or ``"bottom"`` (the smallest).
      measured_s: median over draws of the value set apart.
      predicted_s: its predicted value (NaN when theory gives none: the mean mode).
    """

    kind: str
    side: str
    measured_s: float
    predicted_s: float


class Agreement(NamedTuple):
    """How far a measured spectrum lies from its infinite-width prediction.

    Attributes:
      ks: Kolmogorov-Smirnov distance ``sup |F_measured - F_predicted|`` between the laws of
        lambda (atoms included), taken above ``floor``; measured values within the dtype's
        resolution of a predicted atom count as sitting on it (``atom_tolerance``).
      floor: the lambda below which the measurement cannot resolve values (numerically zero
        singular values, see :func:`isoscope.spectrum.zero_threshold`); both laws count
        everything below it as one lump.
      compared: what was compared (all singular values, or the bulk without the outliers).
      m1_rel_error, m2_rel_error: ``measured / predicted - 1`` for m1 and m2 of the bulk.
      m1_sampling_error: relative standard error of the measured m1 across draws.
      log_s_mean, log_s_std: ``(predicted, measured)`` mean and standard deviation of ln s over
        the values above the floor.
      zero_fraction: ``(predicted, measured)`` share of lambda at or below the floor.
      outliers: the values set apart from the bulk (:class:`Outlier`).
      tail_share: ``(m1, m2)``: share of each predicted moment carried by the top 1/N of the
        predicted law (:func:`tail_share`).
      m1_reliable, m2_reliable: whether N values per draw can estimate the moment at all
        (``tail_share <= TAIL_LIMIT``); an unreliable moment is not compared.
      finite_width_ratio: ``sqrt(L/N)``.
      atom_tolerance: the distance in ln lambda within which a measured value counts as
        sitting on a predicted atom.
      disagree: whether measurement and theory disagree (KS above KS_LIMIT, or a reliable m1
        off by more than MOMENT_LIMIT).
      cause: when they disagree, the most likely cause, as one phrase.
      warnings: sentences explaining what a user must know before trusting the comparison.
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
    outliers: tuple[Outlier, ...]
    tail_share: tuple[float, float]
    m1_reliable: bool
    m2_reliable: bool
    finite_width_ratio: float
    atom_tolerance: float
    disagree: bool
    cause: str | None
    warnings: tuple[str, ...]


def _atom_log_locations(density) -> list[tuple[float, float]]:
    """``(ln a, w)`` of every atom of a predicted law, ``-inf`` for the atom at zero (from
    ``log_atoms``, so atoms outside the float64 range keep their place)."""
    return [(float(la), float(w)) for la, w in density.log_atoms]


def _predicted_log_cdf(density, ell: np.ndarray, strict: bool = False) -> np.ndarray:
    """``P(ln lambda <= ell)`` of a predicted law (``P(ln lambda < ell)`` with ``strict``)."""
    ell = np.asarray(ell, dtype=float)
    out = np.zeros(ell.shape)
    for la, w in _atom_log_locations(density):
        out += w * ((ell > la) if strict else (ell >= la))
    if density.log_x.size >= 2:
        e, r = density.log_x, density.rho_log
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(e))])
        out += np.interp(ell, e, cum, left=0.0, right=cum[-1])
    return out


def censored_log_stats(density, floor_ell: float) -> tuple[float, float]:
    """Mean and std of ``ln lambda`` of the predicted law restricted to ``ln lambda > floor``."""
    e, r = density.log_x, density.rho_log
    pts = [(la, w) for la, w in _atom_log_locations(density) if la > floor_ell]
    keep = e > floor_ell
    e, r = e[keep], r[keep]

    def part(k):
        grid = float(np.trapezoid(r * e**k, e)) if e.size >= 2 else 0.0
        return grid + sum(w * la**k for la, w in pts)

    mass = part(0)
    if mass <= 0:
        return math.nan, math.nan
    mean = part(1) / mass
    return mean, math.sqrt(max(part(2) / mass - mean * mean, 0.0))


def predicted_isometry(density) -> float:
    """The isometry score of a predicted law, ``E[exp(-|ln lambda|)]`` over its continuous
    part and its atoms: ``(int rho_log(ell) e^(-|ell|) d ell + sum_a w_a e^(-|ln a|)) / mass``
    with ``rho_log`` the density of ``ell = ln lambda`` (trapezoid on the solver's grid, 0
    inserted as a node so the kink of ``|ell|`` is integrated exactly), the atom at zero
    contributing 0 and ``mass`` the law's total (1 up to the grid's error).  NaN for an empty law.
    """
    e, r = np.asarray(density.log_x, dtype=float), np.asarray(density.rho_log, dtype=float)
    grid = mass = 0.0
    if e.size >= 2:
        if e[0] < 0.0 < e[-1] and not np.any(e == 0.0):
            at = int(np.searchsorted(e, 0.0))
            e, r = np.insert(e, at, 0.0), np.insert(r, at, np.interp(0.0, e, r))
        grid, mass = float(np.trapezoid(r * np.exp(-np.abs(e)), e)), float(np.trapezoid(r, e))
    for la, w in _atom_log_locations(density):
        grid += w * math.exp(-abs(la))
        mass += w
    return grid / mass if mass > 0 else math.nan


def snap_to_atoms(sample_log_lam: np.ndarray, density, tol: float) -> np.ndarray:
    """Measured ``ln lambda`` with every value within ``tol`` of a predicted atom moved onto it.

    A measured value that theory puts exactly on an atom (every s = 1 of an orthogonal linear
    stack; the top atom ``sigma_w^{2L}`` of a hard-tanh stack) comes out of the SVD a few
    units of rounding to either side, so the jump of the empirical CDF would straddle the
    predicted one.  ``tol`` is the dtype's resolution (:func:`atom_tolerance`).
    """
    x = np.array(sample_log_lam, dtype=float)
    for la, _ in _atom_log_locations(density):
        if math.isfinite(la):
            x[np.abs(x - la) <= tol] = la
    return x


def atom_tolerance(dtype: str, size: int, depth: int, log_s_max: float, log_s_atom: float) -> float:
    """Resolution in ``ln lambda`` of a measured singular value near ``s_atom``.

    An SVD returns each singular value to an absolute error of about ``n eps s_max`` (Golub &
    Van Loan, "Matrix Computations", sec. 8.6.1 and the rank tolerance of sec. 5.4.1), and each
    of the L layers of the forward-mode product rounds once more (about ``eps`` relative per
    layer, common practice, no source): ``|d ln s| <= (n + L) eps s_max / s_atom``, doubled for
    ``ln lambda = 2 ln s``.
    """
    eps = float(np.finfo(np.dtype(dtype)).eps)
    rel = (size + depth) * eps * math.exp(min(log_s_max - log_s_atom, 700.0))
    return 2.0 * rel


def ks_distance(
    sample_log_lam: np.ndarray, density, floor_ell: float = -math.inf, atom_tol: float = 0.0
) -> float:
    """Kolmogorov-Smirnov distance between a sample of ``ln lambda`` and a predicted law.

    ``D = sup_{ell >= floor} |F_n(ell) - F(ell)|``.  Between two distinct sample values F_n is
    constant and F non-decreasing, so the supremum is attained at a sample value v, from the
    right (``|F_n(v) - F(v)|``) or from the left (``|F_n(v-) - F(v-)|``); ties and the atoms of F
    (``F(v) - F(v-)`` = the atom's weight) are handled by evaluating both one-sided limits at
    every distinct value.  Values at or below ``floor`` (and ``-inf``, exact zeros) count as one
    lump in both laws, so a measurement that cannot resolve tiny values is not penalised for it.
    Sample values within ``atom_tol`` of a predicted atom are first moved onto it
    (:func:`snap_to_atoms`).  Kolmogorov 1933; Smirnov 1948.

    Args:
      sample_log_lam: pooled ``ln lambda`` (``-inf`` for zeros).
      density: the predicted law (``isoscope.theory.free_probability.Density``).
      floor_ell: censoring level in ``ln lambda``.
      atom_tol: resolution in ``ln lambda`` around each atom (0: none).

    Returns:
      D in [0, 1].
    """
    x = np.sort(
        snap_to_atoms(sample_log_lam, density, atom_tol)
        if atom_tol > 0
        else np.asarray(sample_log_lam, dtype=float)
    )
    n = x.size
    i0 = int(np.count_nonzero(~(x > floor_ell)))  # values in the lump at the floor
    v, first = np.unique(x[i0:], return_index=True)
    last = np.append(first[1:], n - i0)  # one past each tie group
    right = np.abs((i0 + last) / n - _predicted_log_cdf(density, v))
    left = np.abs((i0 + first) / n - _predicted_log_cdf(density, v, strict=True))
    d = max(np.max(right, initial=0.0), np.max(left, initial=0.0))
    # the lump at the floor (at -inf: exact zeros against the atom at zero)
    return float(max(d, abs(i0 / n - float(_predicted_log_cdf(density, np.array([floor_ell]))[0]))))


def tail_share(density, k: int, count: int) -> float:
    """Share of the predicted ``m_k = E[lambda^k]`` that lies above the top ``1/count`` quantile.

    ``share = E[(lambda^k - Q^k)_+] / E[lambda^k]`` with Q the ``1 - 1/count`` quantile.  The N
    eigenvalues of one finite matrix fill the quantiles of their law about one per ``1/N`` of
    probability, and the largest ones undershoot the infinite-width edge (Pennington,
    Schoenholz, Ganguli 2018, sec. 5): a measurement of N values per draw reaches the top
    quantile level Q but not what the law holds beyond it.  A law with no tail beyond Q (an
    atom, a hard edge) gives 0; Exp(1) gives ``e^{-Q}/1 = 1/N``; a heavy-tailed law (a deep
    leaky-ReLU stack) can hold most of its m1 there.  Computed on the solver's grid
    (trapezoid cells in ``ln lambda``) and the atoms, in logs.
    """
    e, r = density.log_x, density.rho_log
    cells_ell, cells_p, cells_logm = [], [], []
    if e.size >= 2:
        de = np.diff(e)
        cells_ell.append(0.5 * (e[1:] + e[:-1]))
        cells_p.append(0.5 * (r[1:] + r[:-1]) * de)
        with np.errstate(divide="ignore"):
            lr = np.log(np.maximum(r, 0.0)) + k * e
        cells_logm.append(np.logaddexp(lr[1:], lr[:-1]) + np.log(0.5 * de))
    for la, w in _atom_log_locations(density):
        if math.isfinite(la) and w > 0:
            cells_ell.append(np.array([la]))
            cells_p.append(np.array([w]))
            cells_logm.append(np.array([math.log(w) + k * la]))
    if not cells_ell:
        return 0.0
    ell, p, logm = (np.concatenate(a) for a in (cells_ell, cells_p, cells_logm))
    order = np.argsort(-ell)
    ell, p, logm = ell[order], p[order], logm[order]
    total = float(logsumexp(logm))
    cum = np.cumsum(p)
    need = 1.0 / count
    j = int(np.searchsorted(cum, need))  # cells fully above the quantile: 0..j-1
    if j >= p.size:
        return 1.0
    before = float(cum[j - 1]) if j else 0.0
    frac = (need - before) / p[j] if p[j] > 0 else 0.0  # the part of cell j above Q
    parts = list(logm[:j]) + ([math.log(frac) + logm[j]] if frac > 0 else [])
    if not parts:
        return 0.0
    above = float(np.exp(logsumexp(parts) - total))  # E[lambda^k; lambda > Q]/m_k
    level = float(np.exp(k * ell[j] - total)) * need  # Q^k P(lambda > Q)/m_k
    return max(above - level, 0.0)


def length_mode_side(prediction) -> str | None:
    """Where the predicted input-length singular value ``V'(q*)^L`` lies against the bulk:
    ``"bottom"`` below the predicted support by more than 5 % in s, ``"top"`` above it, else
    ``None`` (inside, it is one value among N).  ``None`` too for a law with an atom at zero
    below it (the smallest measured values are then zeros, not the length mode)."""
    log_s = prediction.log_length_mode_s
    lo, hi = prediction.density.log_support
    if not (math.isfinite(log_s) and math.isfinite(hi)):
        return None
    margin = math.log(1.05)
    if log_s > hi / 2.0 + margin:
        return "top"
    if log_s < lo / 2.0 - margin and prediction.density.atom_at_zero <= 0:
        return "bottom"
    return None


def _outlier_kinds(prediction) -> list[tuple[str, str, float]]:
    """``(kind, side, predicted s)`` of the outliers a prediction implies (see split_outliers)."""
    found = []
    if prediction.mean_mode:
        found.append(("mean mode", "top", math.nan))
    side = length_mode_side(prediction)
    if side is not None and not any(f[1] == side for f in found):
        found.append(("input-length direction", side, _exp(float(prediction.log_length_mode_s))))
    return found


def outlier_counts(prediction) -> tuple[int, int]:
    """How many values per draw :func:`split_outliers` sets apart: ``(top, bottom)``."""
    kinds = _outlier_kinds(prediction)
    return sum(k[1] == "top" for k in kinds), sum(k[1] == "bottom" for k in kinds)


def split_outliers(spectrum: Spectrum, prediction) -> tuple[Spectrum, tuple[Outlier, ...]]:
    """Set apart the values per draw that the bulk law does not describe.

    The mean mode of a residual stack (``prediction.mean_mode``: the largest value) and the
    input-length direction of a plain stack when it lies outside the bulk
    (:func:`length_mode_side`).  Both are reported, neither is scored: the score and the
    comparison with theory are about the bulk.

    Returns:
      ``(bulk, outliers)``.
    """
    found = [f for f in _outlier_kinds(prediction) if spectrum.size > 2]
    top = sum(f[1] == "top" for f in found)
    bottom = sum(f[1] == "bottom" for f in found)
    outliers = tuple(
        Outlier(
            kind,
            where,
            float(
                np.exp(np.median(spectrum.log_s[:, 0] if where == "top" else spectrum.log_s[:, -1]))
            ),
            pred,
        )
        for kind, where, pred in found
    )
    return (spectrum.trimmed(top, bottom) if found else spectrum), outliers


def _broken_assumption(prediction) -> str | None:
    """The prediction's own premise that this design breaks, as a phrase (or None)."""
    if prediction.family == "plain":
        if get_activation(prediction.activation).law_free_of_q:
            return None  # phi'(h)^2 has one law at every q: the layers' variance is irrelevant
        q, q_law = np.asarray(prediction.q_layers, dtype=float), prediction.q_law
        if q_law > 0 and q.size and float(np.max(np.abs(q - q_law))) > STEADY_RTOL * q_law:
            worst = int(np.argmax(np.abs(q - q_law)))
            return (
                f"the inputs are not at the fixed point (layer {worst + 1} has q = "
                f"{q[worst]:.4g} against q* = {q_law:.4g}) while the prediction takes every "
                'layer at q*: feed steady-state inputs (analysis.input = "steady-state")'
            )
    elif prediction.tau / prediction.depth > BLOCK_LIMIT:
        return (
            f"each residual block contributes {prediction.tau / prediction.depth:.3g} > "
            f"{BLOCK_LIMIT} to tau while the residual law assumes O(1/L) per block: scale "
            "alpha^2 sigma_w^2 like 1/L"
        )
    return None


def _out_of_range(prediction, spectrum: Spectrum) -> str | None:
    """A phrase when the predicted singular values lie below the dtype's range, so that the
    dense Jacobian underflows (its entries, products of L small factors, round to zero)."""
    top = prediction.density.log_support[1] / 2.0  # ln s at the predicted upper edge
    tiny = math.log(float(np.finfo(np.dtype(spectrum.dtype)).tiny))
    if math.isfinite(top) and top < tiny + math.log(spectrum.size):
        return (
            f"underflow: theory puts the largest singular value near e^{top:.4g}, below the "
            f"{spectrum.dtype} range (e^{tiny:.4g}), so the dense Jacobian rounds to zero; "
            "raise sigma_w towards the critical value or lower the depth"
        )
    return None


def agreement(spectrum: Spectrum, prediction) -> Agreement:
    """Compare a measured spectrum with the predicted law of lambda = s^2.

    * outliers that the bulk law does not describe are set apart first
      (:func:`split_outliers`) and reported;
    * KS distance (:func:`ks_distance`) above the measurement floor
      ``ln lambda_floor = 2 (ln threshold + median_d ln s_max,d)``, with measured values on the
      predicted atoms to within the dtype's resolution (:func:`atom_tolerance`);
    * ``m1, m2``: measured pooled moments against the predicted ones (relative error), the
      sampling error of m1 across draws ``std(m1_d) / (sqrt(D) m1)``, and whether N values per
      draw can estimate them at all (:func:`tail_share`);
    * ln s statistics of both laws restricted to values above the floor.

    Measurement and theory *disagree* when KS > KS_LIMIT or a reliable m1 is off by more than
    MOMENT_LIMIT.  Only then is a disagreement warning given, once, naming the most likely
    cause, in this order: a premise of the prediction that the design breaks (inputs off the
    fixed point, when the law of phi'(h)^2 depends on q; a residual branch too strong for the
    large-depth law); singular values below the dtype's range (underflow); finite width
    (``sqrt(L/N) > FINITE_WIDTH_LIMIT``); values lost below the SVD floor; otherwise no known
    cause.  Depth at or above the width alone is not a warning when the spectra agree.

    Args:
      spectrum: the measurement (all singular values of every draw).
      prediction: the :class:`~isoscope.theory.predict.Prediction` of the same design.

    Returns:
      :class:`Agreement`.
    """
    density, moments, depth = prediction.density, prediction.moments, prediction.depth
    bulk, outliers = split_outliers(spectrum, prediction)
    compared = (
        "all singular values"
        if not outliers
        else "the bulk: "
        + "; ".join(
            f"the {'largest' if o.side == 'top' else 'smallest'} "
            f"singular value of each draw ({o.kind}) is set apart"
            for o in outliers
        )
    )
    log_s, zero = bulk.log_s, bulk.zero_mask
    n_draws, width = log_s.shape
    log_s_max = float(np.median(log_s[:, 0]))
    floor_ell = (
        2.0 * (math.log(spectrum.threshold) + log_s_max) if spectrum.threshold > 0 else -math.inf
    )
    log_lam = np.where(zero, -np.inf, 2.0 * log_s).ravel()
    atoms = [la for la, _ in _atom_log_locations(density) if math.isfinite(la)]
    tol = max(
        (atom_tolerance(spectrum.dtype, spectrum.size, depth, log_s_max, la / 2.0) for la in atoms),
        default=0.0,
    )
    ks = ks_distance(log_lam, density, floor_ell, tol)
    lam_k = lambda k: float(logsumexp(2.0 * k * log_s.ravel()) - math.log(log_s.size))
    log_m1, log_m2 = lam_k(1), lam_k(2)
    m1_draws = logsumexp(2.0 * log_s, axis=1) - math.log(width)
    m1_se = (
        float(np.std(np.exp(m1_draws - log_m1)) / math.sqrt(n_draws))
        if n_draws > 1 and math.isfinite(log_m1)
        else math.nan
    )
    kept = log_lam[np.isfinite(log_lam)] / 2.0
    measured_stats = (float(kept.mean()), float(kept.std())) if kept.size else (math.nan, math.nan)
    pm, ps = censored_log_stats(density, floor_ell)
    pred_zero = float(_predicted_log_cdf(density, np.array([floor_ell]))[0])
    meas_zero = float(np.mean(~np.isfinite(log_lam)))
    shares = (tail_share(density, 1, width), tail_share(density, 2, width))
    m1_ok, m2_ok = shares[0] <= TAIL_LIMIT, shares[1] <= TAIL_LIMIT
    e1 = _rel_log(log_m1, moments.log_m1)
    e2 = _rel_log(log_m2, moments.log_m2)
    ratio = math.sqrt(depth / spectrum.size)
    warnings = []
    for o in outliers:
        pred = "" if not math.isfinite(o.predicted_s) else f", predicted {o.predicted_s:.3g}"
        warnings.append(
            f"{o.kind}: one singular value per draw (median s = {o.measured_s:.3g}"
            f"{pred}) lies {'above' if o.side == 'top' else 'below'} the bulk the law "
            "describes; it is reported separately and left out of the score and the "
            "comparison"
        )
    if not m1_ok:
        warnings.append(
            f"heavy tail: the top 1/{width} of the predicted law carries "
            f"{100 * shares[0]:.1f}% of m1, so {width} singular values per draw "
            "cannot estimate the gain m1 (it is not compared); compare the mean of "
            "ln s instead: "
            + (
                f"measured {measured_stats[0]:.4g}, predicted {pm / 2.0:.4g}"
                if kept.size
                else "but no measured value lies above the SVD floor"
            )
        )
    elif not m2_ok:
        warnings.append(
            f"heavy tail: the top 1/{width} of the predicted law carries "
            f"{100 * shares[1]:.1f}% of m2, so m2 is not compared; compare the KS "
            "distance and the ln s statistics"
        )
    # a measurement with a floor (an SVD) loses values below it; one without (the deep route)
    # counts only exact zeros, the rank the layers' Jacobians leave
    below = (
        f"lie below the SVD floor {_exp(floor_ell):.2g}"
        if math.isfinite(floor_ell)
        else "are zero (a layer's Jacobian has lower rank at this width)"
    )
    lost = meas_zero - pred_zero > 0.01
    if lost:
        warnings.append(
            f"{100 * meas_zero:.1f}% of the measured lambda {below} where theory puts "
            f"{100 * pred_zero:.1f}%: the ln s statistics cover only the rest"
        )
    disagree = ks > KS_LIMIT or (m1_ok and math.isfinite(e1) and abs(e1) > MOMENT_LIMIT)
    cause = None
    if disagree:
        cause = _broken_assumption(prediction) or _out_of_range(prediction, spectrum)
        if cause is None and ratio > FINITE_WIDTH_LIMIT:
            cause = (
                f"finite width (sqrt(L/N) = {ratio:.2f} > {FINITE_WIDTH_LIMIT}): widen the "
                "network or compare at a smaller depth"
            )
        if cause is None and lost:
            cause = f"measured values that {below}" + (
                ' (use dtype = "float64")' if spectrum.dtype == "float32" else ""
            )
        if cause is None:
            cause = "no known cause: the design lies outside what the theory was checked on"
        warnings.append(
            f"measured and predicted spectra disagree (KS = {ks:.3f}"
            + (f", m1 off by {_pct(e1)}" if m1_ok and math.isfinite(e1) else "")
            + f"); the most likely cause is {cause}"
        )
    return Agreement(
        ks=ks,
        floor=_exp(floor_ell),
        compared=compared,
        m1_rel_error=e1,
        m2_rel_error=e2,
        m1_sampling_error=m1_se,
        log_s_mean=(pm / 2.0, measured_stats[0]),
        log_s_std=(ps / 2.0, measured_stats[1]),
        zero_fraction=(pred_zero, meas_zero),
        outliers=outliers,
        tail_share=shares,
        m1_reliable=m1_ok,
        m2_reliable=m2_ok,
        finite_width_ratio=ratio,
        atom_tolerance=tol,
        disagree=disagree,
        cause=cause,
        warnings=tuple(warnings),
    )


def judged_gain(agree: Agreement, prediction, spectrum: Spectrum) -> tuple[float, str] | None:
    """The gain to judge a design by when its measured m1 cannot be trusted, else ``None``.

    When N values per draw cannot estimate m1 (``agree.m1_reliable`` false) the robust
    statistic is the mean of ln s.  If the measured mean agrees with the predicted one (within
    LOG_MEAN_LIMIT or 3 standard errors across draws), the measurement confirms the theory
    where it can be checked and the predicted m1 is the gain to judge by; otherwise there is
    no trustworthy gain and the measured m1 is kept, saying so.
    """
    if agree.m1_reliable:
        return None
    pred_mean, meas_mean = agree.log_s_mean
    per_draw = np.array(
        [np.mean(r[np.isfinite(r)]) for r in spectrum.log_s if np.isfinite(r).any()]
    )
    se = float(np.std(per_draw) / math.sqrt(per_draw.size)) if per_draw.size > 1 else 0.0
    log_m1 = prediction.moments.log_m1
    close = math.isfinite(pred_mean) and abs(meas_mean - pred_mean) <= max(LOG_MEAN_LIMIT, 3 * se)
    if not close or not math.isfinite(log_m1):
        return None
    return (
        _exp(log_m1),
        f"judged by the predicted m1 = {_exp(log_m1):.4g}: the measured m1 "
        f"cannot be estimated from {spectrum.size} values per draw (heavy tail), and the mean "
        f"of ln s, which can, agrees with theory: measured {meas_mean:.4g}, predicted "
        f"{pred_mean:.4g}",
    )


def _rel_log(log_got: float, log_want: float) -> float:
    """``got / want - 1`` from logarithms (NaN when either is not finite)."""
    if not (math.isfinite(log_got) and math.isfinite(log_want)):
        return math.nan
    return math.expm1(min(log_got - log_want, 709.0))


def _pct(x: float) -> str:
    return f"{100 * x:+.0f}%" if math.isfinite(x) else "an unknown amount"
