"""Decisions: how deep a design can go, which of several designs wins, what to initialize with.

Three things a user decides with, each built on the theory and checked by measurement:

* :func:`trainable_depth`: the depth up to which a design stays usable at initialization, the
  smaller of two depths: where the predicted spread of ln s reaches ``TRAINABLE_SPREAD``
  (free probability, Pennington, Schoenholz & Ganguli 2017), and ``SIGNAL_MULTIPLE`` times the
  correlation depth scale xi_c (mean field, Schoenholz et al. 2017).
* :func:`rank`: designs ordered by measured isometry score, and which design wins on what.
* :func:`recommend`: weights, sigma_w, sigma_b (and alpha for residual stacks) for an
  activation, depth and width, proposed by theory and then measured at the user's width.

All of it is judged at initialization only: training dynamics, normalisation layers and
optimiser settings are outside what isoscope measures (``ADVICE``).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Sequence
from typing import Any, NamedTuple

from scipy.optimize import brentq

from isoscope.activations import get_activation
from isoscope.analysis import (
    Analysis,
    InputPlan,
    analyze,
    plan_inputs,
    predict_spec,
    spec_activation,
)
from isoscope.errors import InputError, TheoryError
from isoscope.spec import Spec, parse_spec
from isoscope.theory import free_probability as fp
from isoscope.theory import mean_field as mf
from isoscope.theory.predict import log_lambda_stats, predict

__all__ = [
    "ADVICE",
    "TRAINABLE_SPREAD",
    "SIGNAL_MULTIPLE",
    "MAX_DEPTH",
    "DepthLimit",
    "TARGET_SPREAD",
    "predicted_spread",
    "trainable_depth",
    "Ranking",
    "rank",
    "Candidate",
    "Recommendation",
    "plain_can_be_isometric",
    "propose",
    "recommend",
    "residual_tau_for_spread",
]

ADVICE = (
    "Advice, not a guarantee: judged at initialization only. Training dynamics, "
    "normalisation layers and optimiser settings are outside what isoscope measures."
)

# The spread of ln s at which a design counts as no longer trainable: a standard deviation of
# one decade in s (ln 10), so that the squared gradient norms of directions one std apart
# differ a hundredfold (isoscope's convention, common practice with no source; one square
# Gaussian layer alone has a std of about 1 in ln s, so a tighter limit would refuse it).
TRAINABLE_SPREAD = math.log(10.0)
# Schoenholz et al. 2017 (ICLR), sec. 5 and their trainability figures: plain networks train
# when L is below about 6 xi_c (the multiple is read off their figures, recalled from memory).
SIGNAL_MULTIPLE = 6.0
# The deepest stack the depth search looks at; beyond it a depth is reported as "beyond".
MAX_DEPTH = 100_000
# Grid of the predicted densities used by the searches (coarser than analyze's 400 points).
_POINTS = 120


# The default target spread of `recommend`, a std of 0.1 in ln s: the middle 95% of singular
# values within a factor exp(+-0.2) of the median.  A gain-1 log-normal spectrum of this spread
# scores E[exp(-|ln lambda|)] = 2 exp(v^2/2) Phi(-v) = 0.858 (v = 0.2 the std of ln lambda),
# inside the isometric verdict (0.8) with room for finite-width noise (isoscope's convention,
# common practice with no source).
TARGET_SPREAD = 0.1


# ----------------------------------------------------------------------------- depth
class DepthLimit(NamedTuple):
    """How deep a design can go at initialization (:func:`trainable_depth`).

    Attributes:
      depth: the estimate, ``min(spread_depth, floor(signal_depth))``; ``inf`` when neither
        bound is reached by ``MAX_DEPTH`` layers.
      spread_depth: the largest depth whose predicted std ln s is at most ``limit`` (0 when one
        layer already exceeds it; ``inf`` beyond ``MAX_DEPTH``).
      signal_depth: ``SIGNAL_MULTIPLE * xi_c`` (plain stacks; ``inf`` at criticality, where
        xi_c diverges, and for residual stacks, which have no such depth scale).
      xi_c: the correlation depth scale (NaN for residual stacks).
      limit: the spread limit used.
      binding: ``"spread"``, ``"signal"`` or ``"none"``: which bound sets ``depth``.
      reason: one sentence.
    """

    depth: float
    spread_depth: float
    signal_depth: float
    xi_c: float
    limit: float
    binding: str
    reason: str


def _at_depth(spec: Spec, depth: int) -> Spec:
    return dataclasses.replace(spec, network=dataclasses.replace(spec.network, depth=int(depth)))


@functools.lru_cache(maxsize=4096)
def _spread(spec: Spec, plan: InputPlan, depth: int) -> float:
    n, i = spec.network, spec.init
    if n.family == "plain" and plan.kind == "steady-state":
        # steady-state inputs keep every layer at the law's variance: the same law as
        # predict_spec's, without walking a q trajectory of `depth` layers
        return predict(
            spec_activation(spec), i.weights, i.sigma_w, i.sigma_b, depth, points=_POINTS
        ).log_s_std
    return predict_spec(_at_depth(spec, depth), plan, points=_POINTS).log_s_std


def predicted_spread(spec: Spec, depth: int, plan: InputPlan | None = None) -> float:
    """Predicted std of ln s (over the non-zero part of the law) of ``spec`` at another depth,
    with the spec's inputs (:func:`~isoscope.analysis.predict_spec`, a 120-point density).
    Cached per (spec, inputs, depth).  Raises TheoryError where theory has no prediction."""
    plan = plan_inputs(spec)[0] if plan is None else plan
    return _spread(spec, plan, int(depth))


def _spread_depth(spec: Spec, plan: InputPlan, limit: float) -> tuple[float, str]:
    """The largest L <= MAX_DEPTH with predicted spread <= limit.

    The spread grows with depth (each layer multiplies in one more free factor, Pennington et
    al. 2017; for large L it grows about linearly, the limit law of ``(J J^T)^{1/L}`` being
    deterministic, Tucci 2010; residual stacks: tau grows with L, Tarnowski et al. 2019), so the
    search steps by secant extrapolation through the last two depths (at most 8x, at least 1.5x
    per step) until it brackets the crossing, then narrows the bracket by false position with
    integer depths until the two ends are adjacent.  A handful of predictions at any depth.
    """

    def spread(depth: int) -> float:
        s = predicted_spread(spec, depth, plan)
        return s if math.isfinite(s) else math.inf

    seen = {1: spread(1)}
    if seen[1] > limit:
        return (
            0.0,
            f"one layer already has a predicted std ln s of {seen[1]:.3g}, above {limit:.3g}",
        )
    good, bad = 1, None
    prev = None
    while bad is None:
        if good == MAX_DEPTH:
            return (
                math.inf,
                f"the predicted spread stays within {limit:.3g} up to {MAX_DEPTH} layers",
            )
        guess = 2 * good if prev is None else _crossing(prev, good, seen[prev], seen[good], limit)
        ahead = 8 * good if not math.isfinite(guess) else math.ceil(guess * 1.02) + 1
        nxt = int(min(MAX_DEPTH, max(math.ceil(1.5 * good), min(8 * good, ahead))))
        try:
            seen[nxt] = spread(nxt)
        except TheoryError as e:
            return float(good), f"theory stops beyond {good} layers ({e})"
        prev, good, bad = (good, nxt, None) if seen[nxt] <= limit else (prev, good, nxt)
    while bad - good > 1:
        guess = _crossing(good, bad, seen[good], seen[bad], limit)
        mid = int(min(bad - 1, max(good + 1, round(guess))))
        seen[mid] = spread(mid)
        if seen[mid] <= limit:
            good = mid
            if bad - good > 1:  # confirm the neighbour above, the usual landing spot
                seen[good + 1] = spread(good + 1)
                if seen[good + 1] > limit:
                    bad = good + 1
                else:
                    good += 1
        else:
            bad = mid
    return float(good), f"the predicted std ln s passes {limit:.3g} at {bad} layers"


def _crossing(x0: int, x1: int, y0: float, y1: float, limit: float) -> float:
    """Where the line through (x0, y0), (x1, y1) reaches ``limit`` (inf if it does not rise)."""
    if not (math.isfinite(y0) and math.isfinite(y1)) or y1 <= y0:
        return math.inf if y1 <= limit else float(x1)
    return x1 + (limit - y1) * (x1 - x0) / (y1 - y0)


def trainable_depth(
    spec: Spec, limit: float = TRAINABLE_SPREAD, plan: InputPlan | None = None
) -> DepthLimit:
    """Depth up to which ``spec``'s design stays usable at initialization.

    Two bounds, the smaller wins:

    * spread: the largest depth whose predicted std of ln s stays at or below ``limit``
      (the free-probability law of the design at that depth; the default, one decade, means
      squared gradient norms a hundredfold apart between directions one std apart).  This is the bound that dynamical isometry is about
      (Pennington, Schoenholz & Ganguli 2017): at the edge of chaos the gain is 1 at every depth
      but the spread still grows.
    * signal: ``SIGNAL_MULTIPLE * xi_c`` with ``1/xi_c = -ln C'(c*)`` the correlation depth
      scale (Schoenholz et al. 2017, eq. for xi_c in sec. 3; ordered phase ``xi_c = -1/ln
      chi_1``).  Off the critical line, correlations between inputs (and with them gradients)
      are lost over a few xi_c; Schoenholz et al. found plain networks trainable up to about
      6 xi_c.  It diverges at criticality, and residual stacks have no such scale.

    Args:
      spec: the design (its depth is not used: the search runs over depths).
      limit: the spread limit in ln s.
      plan: the inputs (default :func:`~isoscope.analysis.plan_inputs` of the spec).
    """
    if not (isinstance(limit, (int, float)) and limit > 0 and math.isfinite(limit)):
        raise InputError(
            f"spread limit {limit!r} is not a positive number",
            expected="a positive std of ln s, e.g. 1.0",
        )
    plan = plan_inputs(spec)[0] if plan is None else plan
    xi_c, signal = math.nan, math.inf
    if spec.network.family == "plain":
        try:
            summary = mf.mean_field(spec_activation(spec), spec.init.sigma_w, spec.init.sigma_b)
            xi_c = summary.xi_c
            signal = SIGNAL_MULTIPLE * xi_c if math.isfinite(xi_c) else math.inf
        except TheoryError:
            pass
    spread, why = _spread_depth(spec, plan, limit)
    depth = min(spread, math.floor(signal) if math.isfinite(signal) else math.inf)
    if depth == math.inf:
        binding, reason = "none", why
    elif math.isfinite(signal) and math.floor(signal) <= spread:
        binding = "signal"
        reason = (
            f"{SIGNAL_MULTIPLE:g} xi_c = {signal:.4g} layers: off the critical line, "
            f"correlations decay over xi_c = {xi_c:.4g} layers"
        )
    else:
        binding, reason = "spread", why
    return DepthLimit(float(depth), spread, signal, xi_c, float(limit), binding, reason)


# ----------------------------------------------------------------------------- ranking
class Ranking(NamedTuple):
    """Designs ordered best first, and the winners per criterion.

    Attributes:
      order: indices into the analyses, best first: by measured isometry score (higher is
        better), ties by std ln s (lower is better); a design without a measurement comes last.
      winners: criterion -> names of the designs that win it (all of them on a tie):
        ``isometry`` (highest score), ``gain`` (m1 closest to 1 on a log scale), ``spread``
        (lowest std ln s), ``agreement`` (lowest KS distance to theory), ``trainable_depth``
        (deepest; only when depth limits are given).
    """

    order: list[int]
    winners: dict[str, list[str]]


def _finite(v: Any) -> bool:
    return isinstance(v, (int, float)) and math.isfinite(v)


def _best(names: Sequence[str], values: Sequence[float], higher: bool) -> list[str]:
    pairs = [(n, v) for n, v in zip(names, values) if _finite(v) or v == math.inf]
    if not pairs:
        return []
    top = max(v for _, v in pairs) if higher else min(v for _, v in pairs)
    return [
        n
        for n, v in pairs
        if v == top or (math.isfinite(top) and abs(v - top) <= 1e-12 * max(1.0, abs(top)))
    ]


def rank(analyses: Sequence[Analysis], limits: Sequence[DepthLimit] | None = None) -> Ranking:
    """Order designs by measured isometry score and name the winner of each criterion
    (see :class:`Ranking`).  Pure: depends on the analyses' numbers only."""

    def key(i: int) -> tuple[int, float, float]:
        sc = analyses[i].score
        iso = sc.isometry if _finite(sc.isometry) else -math.inf
        spread = sc.log_s_std if _finite(sc.log_s_std) else math.inf
        return (0 if analyses[i].spectrum is not None else 1, -iso, spread)

    order = sorted(range(len(analyses)), key=key)
    names = [a.spec.name for a in analyses]
    winners = {
        "isometry": _best(names, [a.score.isometry for a in analyses], higher=True),
        "gain": _best(
            names,
            [
                abs(a.score.log10_gain) if _finite(a.score.log10_gain) else math.nan
                for a in analyses
            ],
            higher=False,
        ),
        "spread": _best(names, [a.score.log_s_std for a in analyses], higher=False),
        "agreement": _best(
            names,
            [a.agreement.ks if a.agreement is not None else math.nan for a in analyses],
            higher=False,
        ),
    }
    if limits is not None:
        winners["trainable_depth"] = _best(names, [d.depth for d in limits], higher=True)
    return Ranking(order, winners)


# ----------------------------------------------------------------------------- recommend
class Candidate(NamedTuple):
    """One design a recommendation considered.

    Attributes:
      spec: a full spec ``analyze`` accepts.
      predicted_spread: predicted std ln s at the spec's depth (NaN without a prediction).
      meets_target: whether ``predicted_spread <= target``.
      role: what the candidate stands for, e.g. "orthogonal on the critical line".
      analysis: the measurement (``None`` before :func:`recommend` checks it).
    """

    spec: Spec
    predicted_spread: float
    meets_target: bool
    role: str
    analysis: Analysis | None = None


@dataclasses.dataclass(frozen=True)
class Recommendation:
    """The outcome of :func:`recommend`.

    Attributes:
      question: what was asked (activation, family, depth, width, sigma_b, target_spread, draws).
      recommended: the chosen candidate (measured).
      alternatives: the runner-up candidates, each with ``why`` it lost.
      why: one sentence per alternative, in the same order.
      reason: sentences explaining the choice.
      plain_isometric: plain stacks of this activation can be isometric (False for ReLU-type
        phi, whose mu_2/mu_1^2 > 1 at every q*).
    """

    question: dict[str, Any]
    recommended: Candidate
    alternatives: tuple[Candidate, ...]
    why: tuple[str, ...]
    reason: tuple[str, ...]
    plain_isometric: bool


def _design(
    activation: str,
    family: str,
    depth: int,
    width: int,
    weights: str,
    sigma_w: float,
    sigma_b: float,
    alpha: float | None,
    draws: int,
    seed: int,
    slope: float | None,
) -> Spec:
    """A validated spec for one candidate (its name says what it is)."""
    name = f"{family}-{weights}-sb{sigma_b:.3g}" + (
        f"-alpha{alpha:.4g}" if alpha is not None else ""
    )
    network: dict[str, Any] = {
        "family": family,
        "width": width,
        "depth": depth,
        "activation": activation,
    }
    if alpha is not None:
        network["alpha"] = alpha
    if slope is not None:
        network["leaky_slope"] = slope
    return parse_spec(
        {
            "name": name,
            "network": network,
            "init": {"weights": weights, "sigma_w": sigma_w, "sigma_b": sigma_b},
            "analysis": {"inputs": draws, "seed": seed},
        },
        source="<recommend>",
    )


def plain_can_be_isometric(activation) -> bool:
    """Whether a plain stack of ``activation`` has any setting whose spread stays bounded with
    depth: False for a positively homogeneous phi whose law of phi'^2 is not a point mass
    (ReLU: mu_2/mu_1^2 = 2 at every q*, leaky ReLU likewise), whose orthogonal spread grows like
    L (mu_2/mu_1^2 - 1) at every q* (Pennington, Schoenholz & Ganguli 2017, sec. 2.5)."""
    act = get_activation(activation) if isinstance(activation, str) else activation
    if not act.law_free_of_q:
        return True
    return fp.derivative_law(act, 1.0).relative_variance() <= 1e-12


def residual_tau_for_spread(target: float) -> float:
    """The tau of the residual law whose std of ln s equals ``target``: the law
    ``S(z) = exp(-tau (1 + 2z))`` (Tarnowski et al. 2019) depends on tau alone and its spread
    grows with tau (about sqrt(tau/2) for small tau, from m2/m1^2 = 1 + 2 tau); solved by
    brentq in ln tau on :func:`~isoscope.theory.free_probability.residual_density`."""

    def f(log_tau: float) -> float:
        return log_lambda_stats(fp.residual_density(math.exp(log_tau), _POINTS))[1] / 2.0 - target

    return math.exp(brentq(f, math.log(1e-8), math.log(1e3), xtol=1e-10))


def _alpha_for_tau(
    act, sigma_w: float, sigma_b: float, depth: int, tau: float, input_variance: float
) -> float:
    """The branch scale alpha whose accumulated ``tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2]``
    along the residual q^l trajectory equals ``tau`` (brentq in ln alpha; tau grows with alpha).
    The bracket starts from the constant-q guess ``alpha0^2 = tau / (L sigma_w^2 E[phi'^2])`` at
    the input variance; a trajectory that overflows counts as too large a tau."""
    from isoscope.errors import SolverError

    k = mf.chi1(act, 1.0, input_variance)
    guess = math.sqrt(tau / (depth * sigma_w * sigma_w * k)) if k > 0 else 1.0

    def f(log_alpha: float) -> float:
        a = math.exp(log_alpha)
        try:
            q = mf.q_trajectory(
                act, sigma_w, sigma_b, input_variance, depth, family="residual", alpha=a
            )
        except SolverError:
            return 1e300
        return math.log(fp.residual_tau(act, sigma_w, q, a)) - math.log(tau)

    lo, hi = math.log(guess) - 1.0, math.log(guess) + 1.0
    for _ in range(40):
        if f(lo) < 0:
            break
        lo -= 2.0
    for _ in range(40):
        if f(hi) > 0:
            break
        hi += 2.0
    return math.exp(brentq(f, lo, hi, xtol=1e-12))


def _spread_of(spec: Spec) -> float:
    try:
        return predict_spec(spec, points=_POINTS).log_s_std
    except TheoryError:
        return math.nan


def _candidate(spec: Spec, target: float, role: str) -> Candidate:
    s = _spread_of(spec)
    return Candidate(spec, s, bool(math.isfinite(s) and s <= target * (1 + 1e-6)), role)


def _bias_for_target(act, depth: int, target: float, lo: float, hi: float) -> float:
    """The largest sigma_b in [lo, hi] whose orthogonal critical stack has predicted spread <=
    target (the spread grows with q* along the critical line); lo or hi at the ends."""

    def f(log_sb: float) -> float:
        sb = math.exp(log_sb)
        sw = mf.critical_point(act, sb).sigma_w
        return predict(act, "orthogonal", sw, sb, depth, points=_POINTS).log_s_std - target

    if f(math.log(hi)) <= 0:
        return hi
    if f(math.log(lo)) >= 0:
        return lo
    return math.exp(brentq(f, math.log(lo), math.log(hi), xtol=1e-6))


SIGMA_B_RANGE = (1e-6, 1.0)


def propose(
    activation: str,
    depth: int,
    width: int,
    family: str = "plain",
    sigma_b: float | None = None,
    target_spread: float | None = None,
    draws: int = 2,
    seed: int = 0,
    leaky_slope: float | None = None,
) -> tuple[list[Candidate], list[str], bool]:
    """Theory's candidates for a design question, best first (nothing is measured here).

    Plain stacks of an activation that can be isometric (:func:`plain_can_be_isometric`):
    orthogonal weights on the critical line (sigma_w from
    :func:`~isoscope.theory.mean_field.critical_point` for sigma_b, exactly what ``isoscope
    critical`` prints).  Without sigma_b: the largest sigma_b in ``SIGMA_B_RANGE`` whose predicted
    spread at ``depth`` meets the target.  The spread falls as q* -> 0 (Pennington, Schoenholz &
    Ganguli 2017, sec. 3: the law of phi'^2 narrows), so minimising it alone would drive sigma_b
    to 0, where every pre-activation sits in the linear part of phi; the largest q* that meets the
    target keeps as much of the non-linearity as the target allows.  Alternatives: Gaussian
    weights at the same point, and orthogonal weights at ten times the bias (more non-linear).

    Residual stacks (and plain questions for ReLU-type phi): sigma_w = 1 and the branch scale
    alpha whose tau gives the target spread (:func:`residual_tau_for_spread`), with orthogonal
    and Gaussian branches (the residual law is the same for both).  A plain question for an
    activation without an isometric plain setting also lists the plain critical stacks (He
    scaling for ReLU) as alternatives.

    Returns:
      (candidates, reason sentences, plain_isometric).
    """
    target = TARGET_SPREAD if target_spread is None else float(target_spread)
    act = (
        get_activation(activation, slope=leaky_slope)
        if leaky_slope is not None
        else get_activation(activation)
    )
    name = act.name
    slope = act.slope if name == "leaky-relu" else None

    def spec(fam, weights, sw, sb, alpha=None):
        return _design(name, fam, depth, width, weights, sw, sb, alpha, draws, seed, slope)

    plain_ok = plain_can_be_isometric(act)
    reasons: list[str] = []
    cands: list[Candidate] = []
    if family == "plain" and plain_ok:
        if sigma_b is None:
            sb = _bias_for_target(act, depth, target, *SIGMA_B_RANGE)
        else:
            sb = float(sigma_b)
        cp = mf.critical_point(act, sb)
        best = _candidate(
            spec("plain", "orthogonal", cp.sigma_w, sb), target, "orthogonal on the critical line"
        )
        cands.append(best)
        cands.append(
            _candidate(
                spec("plain", "gaussian", cp.sigma_w, sb), target, "Gaussian at the same point"
            )
        )
        if sigma_b is None and sb < SIGMA_B_RANGE[1]:
            sb10 = min(10.0 * sb, SIGMA_B_RANGE[1])
            cp10 = mf.critical_point(act, sb10)
            cands.append(
                _candidate(
                    spec("plain", "orthogonal", cp10.sigma_w, sb10),
                    target,
                    "orthogonal on the critical line, ten times the bias",
                )
            )
        reasons.append(
            f"On the critical line (chi_1 = 1) the gain stays 1 at every depth; sigma_w = "
            f"{cp.sigma_w:.10g} is the critical weight scale for sigma_b = {sb:.6g} "
            f"(q* = {cp.q_star:.4g})."
        )
        if sigma_b is None:
            reasons.append(
                f"The spread grows with q*: sigma_b = {sb:.4g} is the largest bias whose predicted "
                f"std ln s at depth {depth} is at most the target {target:.4g}, keeping as much of "
                f"{name}'s non-linearity as the target allows."
                if best.meets_target
                else f"Even the smallest bias considered ({sb:.3g}) predicts std ln s = "
                f"{best.predicted_spread:.3g} at depth {depth}, above the target {target:.4g}: "
                "no plain setting meets it; consider a residual stack or a smaller depth."
            )
        reasons.append(
            "Orthogonal weights keep every singular value of W at sigma_w; Gaussian "
            "weights add the spread of the Marchenko-Pastur law at every layer."
        )
        return cands, reasons, plain_ok
    # residual designs (asked for, or the way out for ReLU-type plain stacks)
    sb = 0.0 if sigma_b is None else float(sigma_b)
    tau = residual_tau_for_spread(target)
    alpha = _alpha_for_tau(act, 1.0, sb, depth, tau, 1.0)
    for weights in ("orthogonal", "gaussian"):
        cands.append(
            _candidate(
                spec("residual", weights, 1.0, sb, alpha), target, f"residual, {weights} branches"
            )
        )
    if family == "plain":
        reasons.append(
            f"No plain setting of {name} is isometric: phi'(h)^2 takes more than one value "
            "with a law that is the same at every q*, so mu_2/mu_1^2 > 1 whatever the "
            "scales and the spread grows with every layer. A residual stack is proposed "
            "instead."
        )
        cp = mf.critical_point(act, 0.0)
        for weights in ("orthogonal", "gaussian"):
            cands.append(
                _candidate(
                    spec("plain", weights, cp.sigma_w, 0.0),
                    target,
                    f"plain, {weights}, critical scaling",
                )
            )
    reasons.append(
        f"The residual law depends on tau = sum_l alpha^2 sigma_w^2 E[phi'(h^l)^2] alone: "
        f"tau = {tau:.4g} gives the target std ln s = {target:.4g}, reached with "
        f"sigma_w = 1 and alpha = {alpha:.6g} (alpha^2 L = {alpha * alpha * depth:.4g})."
    )
    return cands, reasons, plain_ok


def recommend(
    activation: str,
    depth: int,
    width: int,
    family: str = "plain",
    sigma_b: float | None = None,
    target_spread: float | None = None,
    draws: int = 2,
    seed: int = 0,
    leaky_slope: float | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> Recommendation:
    """Propose an initialization (:func:`propose`) and check every candidate by measurement.

    Each candidate is analysed at the user's width and depth with ``draws`` draws
    (:func:`~isoscope.analysis.analyze`, the same numbers as ``isoscope analyze`` on its spec).
    The recommendation is the candidate with the smallest measured std ln s among those whose
    predicted spread meets the target (all candidates if none does): theory proposes,
    measurement decides; the reason says when measurement overturned theory's first choice.
    """
    target = TARGET_SPREAD if target_spread is None else float(target_spread)
    cands, reasons, plain_ok = propose(
        activation, depth, width, family, sigma_b, target, draws, seed, leaky_slope
    )
    measured = []
    for i, c in enumerate(cands):
        measured.append(c._replace(analysis=analyze(c.spec)))
        if progress is not None:
            progress(i + 1, len(cands))
    pool = [c for c in measured if c.meets_target] or measured
    best = min(pool, key=_measured_spread)
    if best is not measured[0] and measured[0] in pool:
        reasons.append(
            f"Measurement overturned theory's first choice: {best.role} measured std ln s "
            f"{_measured_spread(best):.3g} against {_measured_spread(measured[0]):.3g} "
            f"for {measured[0].role}."
        )
    alternatives = tuple(c for c in measured if c is not best)
    why = tuple(_why_lost(c, best, target) for c in alternatives)
    question = {
        "activation": get_activation(activation).name,
        "family": family,
        "depth": depth,
        "width": width,
        "sigma_b": sigma_b,
        "target_spread": target,
        "draws": draws,
        "seed": seed,
    }
    return Recommendation(question, best, alternatives, why, tuple(reasons), plain_ok)


def _measured_spread(c: Candidate) -> float:
    s = c.analysis.score.log_s_std if c.analysis is not None else math.nan
    return s if _finite(s) else math.inf


def _why_lost(c: Candidate, best: Candidate, target: float) -> str:
    m, mb = _measured_spread(c), _measured_spread(best)
    pred = (
        f"predicted std ln s {c.predicted_spread:.3g}"
        if _finite(c.predicted_spread)
        else "no prediction"
    )
    parts = [f"{c.role}: measured std ln s {m:.3g} against {mb:.3g}"]
    if not c.meets_target:
        parts.append(f"{pred}, above the target {target:.3g}")
    else:
        parts.append(pred)
    verdict = c.analysis.score.verdict if c.analysis is not None else "not measured"
    return "; ".join(parts) + f"; verdict {verdict}"
