"""One analysis end to end: build, draw, differentiate, measure, score.

``analyze(spec) -> Analysis``.  For each of ``spec.analysis.inputs`` draws the key
``fold_in(PRNGKey(seed), i)`` is split into a parameter key and an input key, so a spec and
its seed fix every number.  Inputs are resolved here because the default (the network's
steady state) needs the mean-field length map: measurement and theory never import each
other, this module joins them.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable, Sequence
from concurrent import futures
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
from scipy.special import logsumexp

from isoscope import jacobian as jac
from isoscope import routes
from isoscope.activations import Activation, get_activation
from isoscope.errors import InputError, TheoryError
from isoscope.network import Network, conv_stack, plain_stack, residual_stack
from isoscope.score import (
    ISOMETRIC_SCORE,
    Agreement,
    Score,
    agreement,
    censored_log_stats,
    isometry_of_logs,
    judged_gain,
    non_finite_score,
    outlier_counts,
    predicted_isometry,
    score_spectrum,
    split_outliers,
)
from isoscope.spec import CONV_FAMILIES, Spec, parse_spec
from isoscope.spectrum import Spectrum, from_log_singular_values, zero_threshold
from isoscope.theory import free_probability, mean_field
from isoscope.theory.predict import Prediction, predict
from isoscope.threads import limited_blas

__all__ = [
    "Analysis",
    "DepthProfile",
    "InputPlan",
    "analyze",
    "build_network",
    "depth_profile",
    "profile_predictions",
    "layer_predictions",
    "isometric_until",
    "plan_inputs",
    "theory_design",
    "predict_spec",
    "prediction_for",
    "profile_depths",
    "seed_key",
    "spec_activation",
]


@dataclasses.dataclass(frozen=True)
class InputPlan:
    """How inputs are drawn.

    Attributes:
      kind: ``"steady-state"`` (``x = phi(h)``, ``h ~ N(0, q)``), ``"gaussian"``
        (``x ~ N(0, variance)``) or ``"file"``.
      variance: q for steady-state, the variance for gaussian, the file's mean square otherwise.
      detail: one sentence for the report.
    """

    kind: str
    variance: float
    detail: str


@dataclasses.dataclass(frozen=True)
class DepthProfile:
    """Where along the stack a design stops being isometric: every layer on its own, and the
    partial Jacobians ``J_l ... J_1`` at the profile depths, measured beside the prediction.

    Attributes:
      depths: profile depths l (shape ``(k,)``, :func:`profile_depths`).
      measured_log_s_std, predicted_log_s_std: std of ln s of ``J_l ... J_1`` (first draw)
        above the SVD floor of each depth, and of the law of a stack of depth l.
      measured_log_m1, predicted_log_m1: ``ln E[lambda]`` (measured in logs, so finite even
        where lambda itself leaves the dtype's range).
      measured_isometry, predicted_isometry: isometry score ``E[exp(-|ln lambda|)]`` of
        ``J_l ... J_1`` (first draw, outliers set apart) and of the law at depth l.
      isometric_until, predicted_isometric_until: the largest profile depth up to which every
        profiled partial product scores at least ``score.ISOMETRIC_SCORE``; ``None`` when the
        first does not.
      layers: 1..L (shape ``(L,)``).
      measured_q, measured_q_draw_std: ``q^l = |h^l|^2/N``, mean over draws and its standard
        deviation across draws (NaN for one draw).
      predicted_q: the mean-field trajectory q^l from the input mean square.
      measured_layer_gain: ``g^l = ||J_l||_F^2/N``, mean over draws
        (:func:`~isoscope.jacobian.layer_statistics`).
      predicted_layer_gain: its mean-field value, ``chi^l = sigma_w^2 E[phi'(h)^2]`` at q^l
        (plain) or ``1 + alpha^2 sigma_w^2 E[phi'(h)^2]`` (residual).
      Entries with no finite answer (an exactly zero product, fewer than two singular values
      above the floor, a moment theory cannot represent, an overflowed layer) are NaN.
    """

    depths: np.ndarray
    measured_log_s_std: np.ndarray
    predicted_log_s_std: np.ndarray
    measured_log_m1: np.ndarray
    predicted_log_m1: np.ndarray
    measured_isometry: np.ndarray
    predicted_isometry: np.ndarray
    isometric_until: int | None
    predicted_isometric_until: int | None
    layers: np.ndarray
    measured_q: np.ndarray
    measured_q_draw_std: np.ndarray
    predicted_q: np.ndarray
    measured_layer_gain: np.ndarray
    predicted_layer_gain: np.ndarray


@dataclasses.dataclass(frozen=True)
class Analysis:
    """The result of analysing one design.

    Attributes:
      spec: the resolved spec.
      inputs: how inputs were drawn.
      spectrum: pooled measurement (``None`` when it overflowed).
      fault: where the measurement overflowed, if it did.
      score: the isometry score and verdict.
      predicted: the infinite-width prediction (``None`` when theory has none: the reason is
        in ``warnings``).
      agreement: measured against predicted (``None`` without both).
      profile: spread against depth, measured and predicted (``None`` without both).
      warnings: sentences a user must read before trusting the numbers.
      seconds: wall time per stage.
      route: the measurement route taken (``"dense"``, ``"deep"`` or ``"matrix-free"``).
      route_reason: why (:func:`~isoscope.routes.choose_route`, or the dense measurement's
        shortfall that sent ``"auto"`` on to the deep route).
      theory_label: what the prediction describes when it is not the spec's own design (a
        convolution stack's plain-stack law, a factory's equivalent design); empty otherwise.
      quadrature: per draw, the matrix-free route's quadrature summary (moments with their
        standard errors, extreme Ritz values); ``None`` on the other routes.
    """

    spec: Spec
    inputs: InputPlan
    spectrum: Spectrum | None
    fault: jac.Fault | None
    score: Score
    predicted: Prediction | None
    agreement: Agreement | None
    profile: DepthProfile | None
    warnings: tuple[str, ...]
    seconds: dict[str, float]
    route: str = "dense"
    route_reason: str = ""
    theory_label: str = ""
    quadrature: tuple[dict, ...] | None = None


def spec_activation(spec: Spec) -> Activation:
    """The spec's activation as one registry object (leaky ReLU with ``network.leaky_slope``)."""
    n = spec.network
    if n.activation is None:
        raise ValueError(f"spec {spec.name!r} (family {n.family!r}) names no activation")
    return get_activation(
        n.activation, slope=n.leaky_slope if n.activation == "leaky-relu" else None
    )


def build_network(spec: Spec) -> Network:
    """The :class:`~isoscope.network.Network` a spec describes (a ``python`` family loads the
    user's factory: :func:`isoscope.factory.load_factory` runs that one file)."""
    n, i = spec.network, spec.init
    if n.family == "python":
        return _factory(spec).network
    act = spec_activation(spec)
    assert n.depth is not None, "a built-in family always has a depth (spec.py)"
    if n.family == "residual":
        return residual_stack(
            n.width,
            n.depth,
            act,
            weights=i.weights,
            sigma_w=i.sigma_w,
            sigma_b=i.sigma_b,
            alpha=n.alpha,
        )
    if n.family in CONV_FAMILIES:
        return conv_stack(
            1 if n.family == "conv1d" else 2,
            n.channels,
            n.size,
            n.kernel,
            n.depth,
            act,
            weights=i.weights,
            sigma_w=i.sigma_w,
            sigma_b=i.sigma_b,
        )
    return plain_stack(
        n.width, n.depth, act, weights=i.weights, sigma_w=i.sigma_w, sigma_b=i.sigma_b
    )


def _factory(spec: Spec):
    from isoscope.factory import load_factory

    base = Path(spec.source).parent if spec.source else Path.cwd()
    assert spec.network.factory is not None, "a python family always names its factory (spec.py)"
    try:
        return load_factory(spec.network.factory, base, spec.network.width)
    except InputError as e:
        raise e.located(file=spec.source, key="network.factory") from None


def theory_design(spec: Spec) -> tuple[Spec | None, str]:
    """The design whose infinite-width law is compared with the spec's measurement, and a
    label when it is not the spec's own.

    * plain and residual stacks: the spec itself;
    * convolution stacks: the plain stack of width ``channels`` with the same activation,
      depth and scales.  Delta-orthogonal kernels (centre tap ``sigma_w H``, H Haar) make each
      layer an orthogonal operator, and with circular padding the spectrum follows the plain
      orthogonal law, with finite-size error set by the channels (Xiao et al. 2018, ICML,
      sec. 2-3).  Gaussian (or uniform) kernels are compared with the plain Gaussian law at the
      same sigma_w: the circular convolution is block diagonal over spatial frequencies, each
      block a channels x channels Gaussian matrix of the same variance, so the weight
      operator's own singular values follow the same Marchenko-Pastur law; that its products
      with the position-diagonal D^l follow the free product of the plain stack is the
      hypothesis the comparison tests (it assumes the Fourier-diagonal W and the position-
      diagonal D are asymptotically free), and the label says so;
    * a ``python`` factory: the built-in design it names as equivalent, if any; ``None``
      otherwise (no theory for a black box).
    """
    n = spec.network
    if n.family in ("plain", "residual"):
        return spec, ""
    analysis = spec.to_dict()["analysis"]
    analysis["route"] = "auto"
    if n.family in CONV_FAMILIES:
        w = spec.init.weights
        network = {
            "family": "plain",
            "width": n.channels,
            "depth": n.depth,
            "activation": n.activation,
        }
        if n.activation == "leaky-relu":
            network["leaky_slope"] = n.leaky_slope
        plain = parse_spec(
            {
                "name": spec.name,
                "network": network,
                "init": {
                    "weights": "orthogonal" if w == "delta-orthogonal" else w,
                    "sigma_w": spec.init.sigma_w,
                    "sigma_b": spec.init.sigma_b,
                },
                "analysis": analysis,
            },
            source=spec.source,
        )
        if w == "delta-orthogonal":
            return plain, (
                f"plain orthogonal stack of width {n.channels} (delta-orthogonal "
                "kernels follow the orthogonal law, Xiao et al. 2018)"
            )
        return plain, (
            f"plain {w} stack of width {n.channels} (a hypothesis for {w} kernels: "
            "asymptotic freeness of the Fourier-diagonal convolution and the "
            "position-diagonal derivatives)"
        )
    equivalent = _factory(spec).equivalent
    if equivalent is None:
        return None, ""
    network = dict(equivalent.get("network", {}), width=n.width)
    try:
        design = parse_spec(
            {
                "name": spec.name,
                "network": network,
                "init": dict(equivalent.get("init", {})),
                "analysis": analysis,
            },
            source=spec.source,
        )
    except InputError as e:
        raise InputError(
            f"the factory's equivalent design is not a valid spec: {e.message}",
            expected="network and init tables of a plain or residual stack",
            hint="fix the mapping the factory returns as its third value",
            file=spec.source,
            key="network.factory",
        ) from None
    if design.network.family not in ("plain", "residual"):
        raise InputError(
            f"the factory's equivalent design has family {design.network.family!r}",
            expected="a plain or residual stack",
            file=spec.source,
            key="network.factory",
        )
    i, d = design.init, design.network
    return design, (
        f"equivalent built-in design named by the factory: {d.family} {d.activation} "
        f"{i.weights}, depth {d.depth}, sigma_w {i.sigma_w:g}, sigma_b {i.sigma_b:g}"
    )


def plan_inputs(spec: Spec) -> tuple[InputPlan, tuple[str, ...]]:
    """Resolve the input distribution, with warnings when the requested one is unavailable.

    Steady state (plain stacks): h ~ N(0, q*) with q* the fixed point of the length map
    ``V(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2`` (Poole et al. 2016, sec. 2), so that
    every layer sees pre-activations of variance q*.  Residual stacks have no fixed point
    (the length grows with depth); their steady-state inputs are Gaussian of the spec's
    ``input_variance``.

    A convolution stack or a factory with an equivalent design takes the steady state of the
    design theory compares it with (:func:`theory_design`); a factory without one gets
    Gaussian inputs of ``input_variance``.

    Positively homogeneous phi (linear, ReLU, leaky ReLU) with q* = 0 (no bias, and either a
    decaying length, ``sigma_w^2 E[phi(h)^2]/q < 1``, or a marginal one where every q is a fixed
    point): q* = 0 would feed the zero input (J = 0).  Their Jacobian does not depend on the
    input's scale (``D^l`` depends only on the signs of ``h^l``), so inputs are
    ``x = phi(h), h ~ N(0, input_variance)`` (default 1), and ``detail`` says so, with the
    per-layer factor of the decaying length and, where it applies, the layer at which the
    forward pass underflows the spec's dtype.
    """
    a = spec.analysis
    if a.input == "file":
        return InputPlan("file", math.nan, f"inputs read from {a.input_file}"), ()
    if a.input == "gaussian":
        return InputPlan(
            "gaussian", a.input_variance, f"x ~ N(0, {a.input_variance:g}) in every coordinate"
        ), ()
    design, _ = theory_design(spec)
    if design is None:
        return (
            InputPlan(
                "gaussian",
                a.input_variance,
                f"x ~ N(0, {a.input_variance:g}): a user's network without an "
                "equivalent design has no steady state known here",
            ),
            (),
        )
    spec = design  # a user's network is planned as its equivalent built-in design
    if spec.network.family == "residual":
        return (
            InputPlan(
                "gaussian",
                a.input_variance,
                f"x ~ N(0, {a.input_variance:g}): a residual stack has no steady state",
            ),
            (),
        )
    act = spec_activation(spec)
    try:
        q = mean_field.fixed_point(act, spec.init.sigma_w, spec.init.sigma_b)
    except TheoryError as e:
        msg = (
            f"no steady state for these settings ({e}); inputs fall back to "
            f"x ~ N(0, {a.input_variance:g})"
        )
        return InputPlan("gaussian", a.input_variance, msg), (msg,)
    v = a.input_variance
    if q == 0.0 and v > 0 and act.law_free_of_q:
        return _homogeneous_plan(spec, act, v)
    if (
        q == 0.0
        and v > 0
        and abs(mean_field.length_map(act, spec.init.sigma_w, spec.init.sigma_b, v) - v)
        <= 1e-12 * v
    ):
        # a marginal length map: every variance is a fixed point, and q* = 0 would feed the
        # constant input phi(0)
        return (
            InputPlan(
                "steady-state",
                v,
                f"x = phi(h), h ~ N(0, {v:g}): every variance is a "
                "fixed point of the length map here, input_variance sets it",
            ),
            (),
        )
    return (
        InputPlan(
            "steady-state",
            q,
            f"x = phi(h), h ~ N(0, q*) with q* = {q:.6g} (fixed point of the length map)",
        ),
        (),
    )


def _homogeneous_plan(spec: Spec, act: Activation, v: float) -> tuple[InputPlan, tuple[str, ...]]:
    """Inputs at ``input_variance`` for a homogeneous phi whose fixed point is q* = 0."""
    sw = spec.init.sigma_w
    factor = mean_field.length_map(act, sw, 0.0, v) / v  # sigma_w^2 E[phi(h)^2]/q, q-free
    detail = (
        f"x = phi(h), h ~ N(0, {v:g}) (input_variance): the length map's fixed point is "
        f"q* = 0, which would feed the zero input; {act.label} is positively homogeneous, "
        "so its Jacobian does not depend on the input's scale"
    )
    warnings: tuple[str, ...] = ()
    if abs(factor - 1.0) > 1e-12:
        detail += f"; the variance changes by {factor:.6g} per layer"
        tiny = float(np.finfo(np.float64 if spec.analysis.dtype == "float64" else np.float32).tiny)
        q1 = sw * sw * mean_field.length_map(act, 1.0, 0.0, v)
        if 0.0 < factor < 1.0 and q1 > 0:
            layer = 1 + math.log(tiny / q1) / math.log(factor)
            if spec.network.depth is not None and layer < spec.network.depth:
                warnings = (
                    f"the pre-activation variance falls by {factor:.6g} per layer and "
                    f"leaves the {spec.analysis.dtype} range after about {layer:.0f} of "
                    f"{spec.network.depth} layers: the measured Jacobian is unreliable "
                    "beyond (use float64, a smaller depth, or sigma_w closer to the "
                    "critical value)",
                )
    return InputPlan("steady-state", v, detail), warnings


def _load_inputs(spec: Spec, dtype) -> np.ndarray:
    """The inputs of ``input = "file"``: a real ``.npy`` array of shape ``(width,)`` (one input
    for every draw) or ``(inputs, width)``, finite, cast to ``dtype``.

    Raises:
      InputError: the file is missing, unreadable, an ``.npz`` archive, complex, of the wrong
        shape or not finite (each message names the file and ``analysis.input_file``).
    """
    a, n = spec.analysis, spec.network.width

    def refuse(message, expected, hint=None):
        return InputError(
            message, expected=expected, hint=hint, file=spec.source, key="analysis.input_file"
        )

    assert a.input_file is not None, "input = 'file' always names its file (spec.py)"
    path = Path(a.input_file)
    try:
        x = np.load(path, allow_pickle=False)
    except FileNotFoundError:
        raise refuse(f"input file {str(path)!r} does not exist", "a .npy file") from None
    except IsADirectoryError:
        raise refuse(f"input file {str(path)!r} is a folder", "a .npy file") from None
    except PermissionError:
        raise refuse(
            f"input file {str(path)!r} cannot be read (permission denied)",
            "a readable .npy file",
            "check its permissions",
        ) from None
    except (ValueError, OSError, EOFError) as e:
        raise refuse(
            f"input file {str(path)!r} is not a readable .npy array ({e})",
            "a file written by numpy.save",
        ) from None
    if isinstance(x, np.lib.npyio.NpzFile):
        names = list(x.files)
        x.close()
        raise refuse(
            f"input file {str(path)!r} is an .npz archive (arrays {names})",
            "one .npy array",
            'save the array you mean with numpy.save("x.npy", array)',
        )
    if np.iscomplexobj(x):
        raise refuse(
            f"input file {str(path)!r} holds a complex array (dtype {x.dtype})",
            "real numbers (a network input is real)",
            "save the real part, or the real and imaginary parts as separate coordinates",
        )
    if x.shape == (n,):
        x = np.broadcast_to(x, (a.inputs, n))
    if x.shape != (a.inputs, n) or not (np.issubdtype(x.dtype, np.number) or x.dtype == np.bool_):
        raise refuse(
            f"input file {str(path)!r} holds an array of shape {x.shape} and dtype {x.dtype}",
            f"a numeric array of shape ({n},) or ({a.inputs}, {n}) (width, or inputs x width)",
            "save one row per draw, or set analysis.inputs to the number of rows",
        )
    if not np.all(np.isfinite(x)):
        raise refuse(f"input file {str(path)!r} contains inf or NaN", "finite values")
    return np.asarray(x, dtype=dtype)


def seed_key(seed: int) -> jax.Array:
    """The root PRNG key of a seed in ``[0, 2^64)``: the raw threefry key ``[seed >> 32, seed mod 2^32]``
    (two uint32 words, Salmon et al. 2011), equal to ``jax.random.PRNGKey(seed)`` for every seed
    below 2^63, which ``PRNGKey`` cannot take beyond."""
    seed = int(seed)
    if not 0 <= seed < 2**64:
        raise InputError(
            f"seed {seed} is out of range",
            expected="an integer from 0 to 2^64 - 1",
            key="analysis.seed",
        )
    return jnp.asarray([seed >> 32, seed & 0xFFFFFFFF], dtype=jnp.uint32)


def _draw_input(
    plan: InputPlan, activation: Activation | None, width: int, key, dtype
) -> jax.Array:
    z = jax.random.normal(key, (width,), dtype)
    if plan.kind == "steady-state":
        assert activation is not None, "a steady state is planned only for a known activation"
        return activation.fn(jnp.sqrt(jnp.asarray(plan.variance, dtype)) * z)
    return jnp.sqrt(jnp.asarray(plan.variance, dtype)) * z


def _precision_warnings(spectrum: Spectrum) -> tuple[str, ...]:
    if spectrum.method == "udt":  # the stabilised product resolves every ln s
        return ()
    digits = routes.RELIABLE_DIGITS.get(spectrum.dtype, 13.0)
    if spectrum.log10_condition > digits:
        return (
            f"singular values span {spectrum.log10_condition:.1f} decades, more than the "
            f"{digits:.0f} that an SVD in {spectrum.dtype} resolves: the smallest ones are "
            "rounding noise"
            + (
                ' (use dtype = "float64")'
                if spectrum.dtype == "float32"
                else "; their count is reported as numerically zero"
            ),
        )
    return ()


def _input_mean_square(spec: Spec, plan: InputPlan) -> float:
    """``|x^0|^2/N`` expected for the plan: ``E[phi(h)^2], h ~ N(0, q)`` for steady-state
    inputs, the variance (or the file's mean square) otherwise."""
    if plan.kind == "steady-state":
        return mean_field.length_map(spec_activation(spec), 1.0, 0.0, plan.variance)
    return plan.variance


def predict_spec(spec: Spec, plan: InputPlan | None = None, points: int = 400) -> Prediction:
    """The infinite-width prediction for a spec whose inputs follow ``plan``.

    Every kind of input enters through its mean square ``q0 = |x^0|^2/N``, from which the q^l
    trajectory starts (``q^1 = sigma_w^2 q0 + sigma_b^2``): steady-state inputs
    ``x = phi(h), h ~ N(0, q*)`` have ``q0 = E[phi(h)^2]`` and so put every layer at q*.

    Args:
      spec: the design.
      plan: the inputs (default: :func:`plan_inputs` of the spec).
      points: grid size of the predicted density.

    A convolution stack or a factory is predicted by its :func:`theory_design`.

    Raises:
      TheoryError: theory has no prediction (no fixed point, a failed solve, a user's network
        without an equivalent design).
    """
    plan = plan_inputs(spec)[0] if plan is None else plan
    if plan.kind == "file" and not math.isfinite(plan.variance):
        x = _load_inputs(spec, np.float64)
        plan = dataclasses.replace(plan, variance=float(np.mean(x**2)))
    design, _ = theory_design(spec)
    if design is None:
        raise TheoryError(
            "a user's network has no infinite-width law unless its factory names "
            "an equivalent built-in design (a third return value)"
        )
    n, i = design.network, design.init
    assert n.depth is not None, "an equivalent design always has a depth"
    return predict(
        spec_activation(design),
        i.weights,
        i.sigma_w,
        i.sigma_b,
        n.depth,
        family=n.family,
        alpha=n.alpha,
        input_variance=_input_mean_square(design, plan),
        points=points,
    )


def prediction_for(spec: Spec, plan: InputPlan) -> tuple[Prediction | None, tuple[str, ...]]:
    """:func:`predict_spec`, with its notes, or ``None`` and the reason as a warning."""
    try:
        p = predict_spec(spec, plan)
    except TheoryError as e:
        return None, (f"no infinite-width prediction: {e}",)
    return p, p.notes


PROFILE_POINTS = 8


def profile_depths(depth: int) -> np.ndarray:
    """Up to ``PROFILE_POINTS`` log-spaced depths in ``1..depth``, always ending at ``depth``."""
    return np.unique(np.round(np.geomspace(1, depth, min(PROFILE_POINTS, depth))).astype(int))


def _measured_row(log_s: np.ndarray, dtype) -> tuple[float, float, float]:
    """``(floor, std, ln m1)`` of one partial product's ``ln s`` (decreasing): the SVD floor
    ``ln(n eps s_max)`` (:func:`~isoscope.spectrum.zero_threshold`), the std of ln s above it
    and ``ln m1 = ln((1/n) sum s^2)`` by log-sum-exp.  NaN where a value has no finite answer
    (every s is zero, fewer than two above the floor)."""
    floor = math.log(zero_threshold(log_s.size, dtype)) + float(log_s[0])
    above = log_s[log_s > floor]
    std = float(above.std()) if above.size > 1 else math.nan
    log_m1 = (
        float(logsumexp(2.0 * log_s) - math.log(log_s.size)) if np.isfinite(log_s[0]) else math.nan
    )
    return floor, std, log_m1


def profile_predictions(
    spec: Spec, plan: InputPlan, depths: np.ndarray, predicted: Prediction
) -> dict[int, Prediction]:
    """The predictions the depth profile compares with: ``predicted`` at the full depth and
    :func:`~isoscope.theory.predict.predict` at each shallower depth l (a coarser 120-point
    density).  Pure (it depends on the design and the depths only), so :func:`analyze` runs it
    beside the measurement."""
    n, i = spec.network, spec.init
    out = {}
    for d in (int(v) for v in depths):
        out[d] = (
            predicted
            if d == n.depth
            else predict(
                spec_activation(spec),
                i.weights,
                i.sigma_w,
                i.sigma_b,
                d,
                family=n.family,
                alpha=n.alpha,
                input_variance=_input_mean_square(spec, plan),
                points=120,
            )
        )
    return out


def layer_predictions(spec: Spec, predicted: Prediction) -> tuple[np.ndarray, np.ndarray]:
    """``(q^l, gain^l)`` of every layer l = 1..L at infinite width.

    ``q^l`` is the mean-field trajectory the prediction was built from
    (``Prediction.q_layers``: :func:`~isoscope.theory.mean_field.q_trajectory` from the
    input mean square, constant q* for steady-state inputs).  The per-layer gain, the mean
    squared singular value of layer l's Jacobian, is ``chi^l = sigma_w^2 E[phi'(h)^2]``,
    ``h ~ N(0, q^l)``, for a plain stack (Poole et al. 2016, sec. 3; Schoenholz et al. 2017:
    chi_1 at q*), and ``1 + alpha^2 sigma_w^2 E[phi'(h)^2]`` for a residual block, the mean of
    ``(1/N)||I + alpha D W||_F^2`` (the cross term ``2 alpha tr(D W)/N`` has mean 0 over the
    weights); its excess ``s_l`` over 1 sums to the residual law's tau (Tarnowski et al.
    2019).  Pure (the design only), so :func:`analyze` runs it beside the measurement.
    """
    i, n = spec.init, spec.network
    q = np.asarray(predicted.q_layers, dtype=float)
    branch = i.sigma_w * i.sigma_w * free_probability.derivative_means(spec_activation(spec), q)
    return q, (branch if n.family == "plain" else 1.0 + n.alpha * n.alpha * branch)


def isometric_until(depths: np.ndarray, scores: Sequence[float] | np.ndarray) -> int | None:
    """The largest of ``depths`` up to which every score is at least ``ISOMETRIC_SCORE``
    (``None`` when the first is not; a NaN score is not isometric)."""
    ok = np.asarray(scores, dtype=float) >= ISOMETRIC_SCORE
    count = ok.size if ok.all() else int(np.argmin(ok))
    return int(depths[count - 1]) if count > 0 else None


def depth_profile(
    spec: Spec,
    partial: jac.PartialSpectra,
    predictions: dict[int, Prediction],
    layers: list[jac.LayerStatistics],
    predicted_layers: tuple[np.ndarray, np.ndarray],
) -> DepthProfile:
    """The per-layer view and the spread at the depths of ``partial`` (:func:`profile_depths`).

    Partial products, measured: singular values of ``J_l ... J_1`` for one draw, kept by the
    Jacobian pass itself (:func:`~isoscope.jacobian.profiled_jacobian`), so they are right in
    ``ln s`` even where the product leaves the dtype's range; std of ln s above the SVD floor
    ``s > n eps s_max``, ``ln m1`` and the isometry score ``E[exp(-|2 ln s|)]``
    (:func:`~isoscope.score.isometry_of_logs`).  Predicted: ``predictions[l]``
    (:func:`profile_predictions`); std of ln s of the law restricted to the same floor
    (Pennington, Schoenholz & Ganguli 2017, sec. 3, for the law) and the law's isometry score
    (:func:`~isoscope.score.predicted_isometry`).  Outliers the bulk law does not describe (a
    residual stack's mean mode, a plain stack's input-length direction) are left out as in
    :func:`~isoscope.score.split_outliers`.  A value with no finite answer (a product that is
    exactly zero, a moment theory cannot represent) is NaN.

    Layers: ``layers`` holds every draw's :class:`~isoscope.jacobian.LayerStatistics`
    (pooled: mean over draws, and the spread of q^l across draws), ``predicted_layers`` the
    output of :func:`layer_predictions`.
    """
    m_std, m_m1, m_iso, p_std, p_m1, p_iso = [], [], [], [], [], []
    for d, row in zip(partial.depths, partial.log_s):
        p = predictions[int(d)]
        top, bottom = outlier_counts(p)
        bulk = row[top : row.size - bottom]
        floor, std, log_m1 = _measured_row(bulk, spec.analysis.dtype)
        m_std.append(std)
        m_m1.append(log_m1)
        m_iso.append(isometry_of_logs(2.0 * bulk))
        p_std.append(censored_log_stats(p.density, 2.0 * floor)[1] / 2.0)
        p_m1.append(p.moments.log_m1 if math.isfinite(p.moments.log_m1) else math.nan)
        p_iso.append(predicted_isometry(p.density))
    depths = np.asarray(partial.depths)
    q = np.stack([s.q for s in layers])
    gain = np.stack([s.gain for s in layers])
    with np.errstate(invalid="ignore"):  # an overflowed layer gives NaN, not a warning
        q_std = q.std(axis=0) if q.shape[0] > 1 else np.full(q.shape[1], math.nan)
    return DepthProfile(
        depths,
        np.array(m_std),
        np.array(p_std),
        np.array(m_m1),
        np.array(p_m1),
        np.array(m_iso),
        np.array(p_iso),
        isometric_until(depths, m_iso),
        isometric_until(depths, p_iso),
        np.arange(1, q.shape[1] + 1),
        q.mean(axis=0),
        q_std,
        predicted_layers[0],
        gain.mean(axis=0),
        predicted_layers[1],
    )


def _profile_theory(spec: Spec, plan: InputPlan, depths: np.ndarray, predicted: Prediction):
    """The profile's predictions: :func:`profile_predictions` and :func:`layer_predictions`."""
    return profile_predictions(spec, plan, depths, predicted), layer_predictions(spec, predicted)


def analyze(spec: Spec, progress: Callable[[int, int], None] | None = None) -> Analysis:
    """Measure and score one design.

    For each draw i: parameters ``network.init(k_params)``, an input from the resolved
    :class:`InputPlan`, the exact Jacobian by forward mode, its singular values.  Draws are
    pooled in one :class:`~isoscope.spectrum.Spectrum`.  The first draw's Jacobian pass also
    keeps the partial products for the depth profile
    (:func:`~isoscope.jacobian.profiled_jacobian`, equal to ``jax.jacfwd``); the others use
    :func:`~isoscope.jacobian.dense_jacobian`.  If any draw overflows, the analysis reports
    where (forward pass or Jacobian, and the first layer) and scores ``non-finite``.

    Args:
      spec: the design.
      progress: called as ``progress(done, total)`` after each draw (``total`` = draws).

    The bulk is scored: outliers that the bulk law does not describe (a residual stack's mean
    mode, a plain stack's input-length direction) are set apart first
    (:func:`~isoscope.score.split_outliers`), and a gain that N values per draw cannot
    estimate is judged by the robust statistic (:func:`~isoscope.score.judged_gain`).

    ``seconds`` holds the wall time of each stage: sampling (parameters and input), jacobian,
    svd, theory, profile (the per-layer statistics of every draw, the partial products' SVDs
    and the shallower predictions; the first draw's own singular values come from that SVD)
    and total.  BLAS/LAPACK runs under the
    thread policy of :func:`isoscope.threads.thread_policy` for the whole analysis.
    """
    with limited_blas():
        return _analyze(spec, progress)


def _analyze(spec: Spec, progress: Callable[[int, int], None] | None) -> Analysis:
    t0 = time.perf_counter()
    network = build_network(spec)
    design, label = theory_design(spec)
    dtype = jnp.float64 if spec.analysis.dtype == "float64" else jnp.float32
    plan, warnings = plan_inputs(spec)
    file_inputs = _load_inputs(spec, dtype) if plan.kind == "file" else None
    if file_inputs is not None:
        plan = dataclasses.replace(
            plan, variance=float(np.mean(file_inputs.astype(np.float64) ** 2))
        )
    route, reason = routes.choose_route(spec, network.layer is not None)
    depths = (
        profile_depths(spec.network.depth)
        if network.layer is not None and route != "matrix-free" and spec.network.depth is not None
        else None
    )
    # theory depends on the design only: the prediction, then the profile's shallower
    # predictions, are solved on a worker thread while the draws run (the solver is NumPy;
    # XLA and LAPACK release the GIL)
    pool = futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="isoscope-theory")
    prediction = pool.submit(_timed_prediction, spec, plan)
    pending = (
        pool.submit(_profile_after, prediction, design, plan, depths)
        if depths is not None and design is not None
        else None
    )
    try:
        draws = _draws(spec, network, design, dtype, plan, file_inputs, route, depths, progress)
        why = (
            routes.needs_deep(draws.spectrum, draws.fault)
            if (spec.analysis.route == "auto" and route == "dense" and network.layer is not None)
            else None
        )
        if why is not None:
            route, reason = "deep", f"auto: {why}; measured again on the deep route"
            draws = _draws(spec, network, design, dtype, plan, file_inputs, route, depths, progress)
        return _finish(
            spec, design, label, plan, warnings, prediction, pending, draws, route, reason, t0
        )
    finally:
        pool.shutdown(wait=False, cancel_futures=True)


def _timed_prediction(spec: Spec, plan: InputPlan):
    """:func:`prediction_for` and the seconds it took."""
    t = time.perf_counter()
    predicted, notes = prediction_for(spec, plan)
    return predicted, notes, time.perf_counter() - t


def _profile_after(prediction: futures.Future, design: Spec, plan: InputPlan, depths: np.ndarray):
    """:func:`_profile_theory` once the prediction is known (``None`` without one)."""
    predicted = prediction.result()[0]
    return None if predicted is None else _profile_theory(design, plan, depths, predicted)


@dataclasses.dataclass
class _Draws:
    """What the draws of one route measured."""

    spectrum: Spectrum | None
    fault: jac.Fault | None
    fault_draw: int
    partial: jac.PartialSpectra | None
    layers: list
    quadrature: tuple[dict, ...] | None
    seconds: dict[str, float]


def _draws(spec, network, design, dtype, plan, file_inputs, route, depths, progress) -> _Draws:
    """Every draw on one route: parameters, input, the route's ln s (and on the first draw the
    partial products at the profile depths), the per-layer statistics, pooled in a Spectrum."""
    root = seed_key(spec.analysis.seed)
    total = spec.analysis.inputs
    activation = spec_activation(design) if plan.kind == "steady-state" else None
    seconds = {"sampling": 0.0, "jacobian": 0.0, "svd": 0.0, "profile": 0.0}
    rows: list[np.ndarray] = []
    fault, partial, layers, quadrature, i = None, None, [], [], 0
    for i in range(total):
        t = time.perf_counter()
        k_draw = jax.random.fold_in(root, i)
        k_params, k_input = jax.random.split(k_draw)
        params = network.init(k_params, dtype)
        x = (
            jnp.asarray(file_inputs[i])
            if file_inputs is not None
            else _draw_input(plan, activation, network.width, k_input, dtype)
        )
        jax.block_until_ready((params, x))
        seconds["sampling"] += time.perf_counter() - t
        if depths is not None:
            t = time.perf_counter()
            layers.append(jac.layer_statistics(network, params, x))
            seconds["profile"] += time.perf_counter() - t
        draw = routes.measure_draw(
            route,
            network,
            params,
            x,
            depths if i == 0 else None,
            spec,
            jax.random.fold_in(k_draw, 2**31 - 1),
        )
        for stage, v in draw.seconds.items():
            seconds[stage] += v
        if progress is not None:
            progress(i + 1, total)
        if draw.fault is not None:
            fault = draw.fault
            break
        assert draw.log_s is not None, "a draw without a fault has its spectrum"
        rows.append(draw.log_s)
        partial = draw.partial if i == 0 else partial
        if draw.quadrature is not None:
            quadrature.append(draw.quadrature)
    method = {"dense": "svd", "deep": "udt", "matrix-free": "slq"}[route]
    # the zero threshold of each route (relative to s_max): the dtype's on the dense route;
    # none on the deep route (its finite values are resolved); on the matrix-free route the
    # resolution of m Lanczos steps, whose degree-m polynomials resolve lambda near the lower
    # end of [0, lambda_max] only to about lambda_max / m^2, i.e. s to s_max / m (the
    # Chebyshev extremal property; Lin, Saad & Yang 2016, SIAM Rev. 58, sec. 3)
    threshold = {"dense": None, "deep": 0.0, "matrix-free": 1.0 / spec.analysis.lanczos_steps}[
        route
    ]
    spectrum = (
        None
        if fault is not None
        else from_log_singular_values(np.stack(rows), dtype, method, threshold)
    )
    return _Draws(spectrum, fault, i, partial, layers, tuple(quadrature) or None, seconds)


def _finish(
    spec, design, label, plan, warnings, prediction, pending, draws: _Draws, route, reason, t0
) -> Analysis:
    """The score, the agreement and the profile (the second half of analyze)."""
    seconds = draws.seconds
    predicted, notes, seconds["theory"] = prediction.result()
    warnings += notes
    depth = (design or spec).network.depth
    spectrum, fault = draws.spectrum, draws.fault
    if fault is not None:
        score = non_finite_score(f"draw {draws.fault_draw}: {fault.detail}")
        warnings += (
            f"measurement stopped: {fault.detail} (draw {draws.fault_draw}); lower "
            "sigma_w or the depth, or use float64",
        )
    else:
        assert spectrum is not None, "draws without a fault have a spectrum"
        score = score_spectrum(spectrum, depth)
        warnings += _precision_warnings(spectrum)
    if route == "matrix-free":
        warnings += (
            "matrix-free route: each draw's spectrum is the stochastic Lanczos "
            f"quadrature estimate ({spec.analysis.probes} probes x "
            f"{spec.analysis.lanczos_steps} steps), shown as its quantiles; s below "
            f"s_max / {spec.analysis.lanczos_steps} (the Lanczos resolution) count as "
            "zero; there is no depth profile on this route",
        )
    if label and predicted is not None:
        warnings += (f"the prediction is that of the {label}",)
    agree = profile = None
    if predicted is not None and spectrum is not None:
        agree = agreement(spectrum, predicted)
        warnings += agree.warnings
        bulk, _ = split_outliers(spectrum, predicted)
        score = score_spectrum(
            bulk, depth, judged_gain(agree, predicted, bulk), scored=agree.compared
        )
        if draws.partial is not None and pending is not None:
            t = time.perf_counter()
            try:
                predictions, predicted_layers = pending.result()
                profile = depth_profile(
                    spec, draws.partial, predictions, draws.layers, predicted_layers
                )
            except TheoryError as e:
                warnings += (f"no depth profile: {e}",)
            seconds["profile"] += time.perf_counter() - t
    seconds["total"] = time.perf_counter() - t0
    return Analysis(
        spec=spec,
        inputs=plan,
        spectrum=spectrum,
        fault=fault,
        score=score,
        predicted=predicted,
        agreement=agree,
        profile=profile,
        warnings=warnings,
        seconds=seconds,
        route=route,
        route_reason=reason,
        theory_label=label,
        quadrature=draws.quadrature,
    )
