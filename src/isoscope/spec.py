"""Spec files (TOML): parsing and validation with messages that name file, key and value.

A spec describes one design to analyse::

    name = "deep-tanh-orthogonal"
    [network]
    family = "plain"          # plain | residual | conv1d | conv2d | python
    width = 512               # plain, residual, python (the input dimension)
    depth = 200               # every family but python
    activation = "tanh"       # every family but python
    alpha = 1.0               # residual branch scale (residual only)
    leaky_slope = 0.01        # slope a of max(h, a h) (activation = "leaky-relu" only)
    channels = 16             # conv1d, conv2d: channels of every layer
    size = 16                 # conv1d: positions; conv2d: an int (square) or [height, width]
    kernel = 3                # conv1d, conv2d: odd kernel size (circular padding)
    factory = "net.py:make"   # python: FILE.py:NAME, relative to the spec file
    [init]                    # not with family = "python" (the factory draws its parameters)
    weights = "orthogonal"    # orthogonal | gaussian | uniform | delta-orthogonal (conv)
    sigma_w = 1.01            # scales, not variances
    sigma_b = 0.0
    [analysis]
    inputs = 4                # independent (parameter, input) draws, pooled
    seed = 0                  # 0 .. 2^64 - 1
    route = "auto"            # auto | dense | deep | matrix-free
    dtype = "float64"         # float64 | float32 (default float32 on the matrix-free route)
    input = "steady-state"    # steady-state | gaussian | file
    input_variance = 1.0      # for input = "gaussian"
    input_file = "x.npy"      # for input = "file"; shape (width,) or (inputs, width)
    probes = 8                # matrix-free: Lanczos probe vectors per draw
    lanczos_steps = 80        # matrix-free: Lanczos steps per probe

A convolution stack's ``width`` is derived (channels x positions) and never given.

Unknown keys are errors (a misspelt key would otherwise be silently ignored).  ``name`` is a
label (any text); the default output folder is derived from it by
:func:`isoscope.folders.safe_folder_name`, never used as a path.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import tomllib
from pathlib import Path
from typing import Any

from isoscope.activations import activation_names, get_activation
from isoscope.errors import InputError, did_you_mean, hints
from isoscope.initializers import initializer_names

__all__ = [
    "Spec",
    "NetworkSpec",
    "InitSpec",
    "AnalysisSpec",
    "load_spec",
    "parse_spec",
    "spec_toml",
    "INPUT_KINDS",
    "DTYPES",
]

INPUT_KINDS = ("steady-state", "gaussian", "file")
DTYPES = ("float64", "float32")
ROUTES = ("auto", "dense", "deep", "matrix-free")
SPEC_FAMILIES = ("plain", "residual", "conv1d", "conv2d", "python")
CONV_FAMILIES = ("conv1d", "conv2d")
# Above this width route = "auto" measures matrix-free (see isoscope.routes.choose_route), and
# so the dtype defaults to float32 there as on route = "matrix-free".
MATRIX_FREE_WIDTH = 2048
# keys of [network] that only some families take (every other key applies to all but python)
_FAMILY_KEYS = {
    "alpha": ("residual",),
    "channels": CONV_FAMILIES,
    "size": CONV_FAMILIES,
    "kernel": CONV_FAMILIES,
    "factory": ("python",),
    "width": ("plain", "residual", "python"),
    "depth": ("plain", "residual", "conv1d", "conv2d"),
    "activation": ("plain", "residual", "conv1d", "conv2d"),
}


@dataclasses.dataclass(frozen=True)
class NetworkSpec:
    """``[network]``: the architecture."""

    family: str = "plain"
    width: int = 256
    depth: int | None = 32
    activation: str | None = "tanh"
    alpha: float = 1.0
    leaky_slope: float = 0.01
    channels: int = 16
    size: tuple[int, ...] = (16,)
    kernel: int = 3
    factory: str | None = None

    @property
    def positions(self) -> int:
        """Spatial positions of a convolution stack (the product of ``size``)."""
        return math.prod(self.size)


@dataclasses.dataclass(frozen=True)
class InitSpec:
    """``[init]``: weight ensemble and scales."""

    weights: str = "orthogonal"
    sigma_w: float = 1.0
    sigma_b: float = 0.0


@dataclasses.dataclass(frozen=True)
class AnalysisSpec:
    """``[analysis]``: draws, seed, dtype, inputs."""

    inputs: int = 4
    seed: int = 0
    route: str = "auto"
    dtype: str = "float64"
    input: str = "steady-state"
    input_variance: float = 1.0
    input_file: str | None = None
    probes: int = 8
    lanczos_steps: int = 80


@dataclasses.dataclass(frozen=True)
class Spec:
    """A whole design: name, network, initialization, analysis settings."""

    name: str = "design"
    description: str = ""
    network: NetworkSpec = NetworkSpec()
    init: InitSpec = InitSpec()
    analysis: AnalysisSpec = AnalysisSpec()
    source: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """The resolved spec (every default filled in) as plain data; ``parse_spec`` reads it
        back to an equal spec (keys that apply only to another family or input kind, such as
        ``network.alpha`` of a plain stack, are left out)."""
        d = dataclasses.asdict(self)
        d.pop("source")
        family = self.network.family
        for key, families in _FAMILY_KEYS.items():
            if family not in families:
                d["network"].pop(key)
        if family in CONV_FAMILIES:
            d["network"]["size"] = (
                self.network.size[0] if family == "conv1d" else list(self.network.size)
            )
        if self.network.activation != "leaky-relu":
            d["network"].pop("leaky_slope")
        if family == "python":
            d.pop("init")
        if d["analysis"]["input_file"] is None:
            d["analysis"].pop("input_file")
        return d

    def replace(self, **sections: dict[str, Any]) -> Spec:
        """A copy with some keys changed, e.g. ``spec.replace(init={"sigma_w": 1.2})``; validated."""
        d = self.to_dict()
        for section, values in sections.items():
            if isinstance(d.get(section), dict):
                d[section].update(values)
            else:
                d[section] = values
        return parse_spec(d, source=self.source)


def _err(source, key, message, expected, hint=None):
    return InputError(message, expected=expected, hint=hint, file=source, key=key)


def _int(source, key, v, minimum, maximum=None, maximum_text=None):
    allowed = (
        f"an integer >= {minimum}"
        if maximum is None
        else f"an integer from {minimum} to {maximum_text or maximum} ({maximum})"
    )
    if isinstance(v, bool) or not isinstance(v, int):
        raise _err(source, key, f"value {v!r} is not a whole number", allowed)
    if v < minimum:
        raise _err(source, key, f"value {v} is too small", allowed)
    if maximum is not None and v > maximum:
        raise _err(source, key, f"value {v} is too large", allowed)
    return v


# A JAX PRNG key (threefry) is two uint32 words, so seeds are unsigned 64-bit integers.
SEED_MAX = 2**64 - 1


def _float(source, key, v, minimum=0.0):
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _err(source, key, f"value {v!r} is not a number", f"a number >= {minimum:g}")
    v = float(v)
    if not math.isfinite(v) or v < minimum:
        raise _err(
            source,
            key,
            f"value {v!r} is negative or not finite",
            f"a finite number >= {minimum:g}",
            "sigma_w and sigma_b are scales (standard deviations), never negative",
        )
    return v


def _slope(source, v):
    """``network.leaky_slope``: any finite real a of ``max(h, a h)``-style ``h > 0 ? h : a h``."""
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        raise _err(
            source,
            "network.leaky_slope",
            f"value {v!r} is not a finite number",
            "a finite real slope a (phi(h) = h for h > 0, a h for h < 0; default 0.01)",
        )
    return float(v)


def _choice(source, key, v, allowed, canonical=None):
    name = str(v).lower()
    if canonical is not None:
        try:
            return canonical(name)
        except InputError as e:
            raise e.located(file=source, key=key) from None
    if name not in allowed:
        raise _err(
            source,
            key,
            f"value {v!r} is not allowed",
            f"one of {', '.join(allowed)}",
            did_you_mean(name, allowed),
        )
    return name


def _section(source, data, name, cls):
    raw = data.get(name, {})
    if not isinstance(raw, dict):
        raise _err(
            source, name, f"expected a table [{name}], received {raw!r}", f"a [{name}] table"
        )
    allowed = [f.name for f in dataclasses.fields(cls)]
    for k in raw:
        if k not in allowed:
            raise _err(
                source,
                f"{name}.{k}",
                "unknown key",
                f"one of {', '.join(allowed)}",
                hints(
                    did_you_mean(k, allowed),
                    "check the spelling; unknown keys are refused so that typos are not ignored",
                ),
            )
    return raw


def _network(source, net: dict[str, Any], family: str) -> NetworkSpec:
    """``[network]`` of one family: the keys it takes, checked; the width of a convolution
    stack derived as channels x positions."""
    d = NetworkSpec()
    for key, families in _FAMILY_KEYS.items():
        if key in net and family not in families:
            raise _err(
                source,
                f"network.{key}",
                f"{key} is set but the family is {family!r}",
                f"{key} only with family = " + " or ".join(f'"{f}"' for f in families),
                f"remove {key}"
                + (
                    " (a convolution stack's width is channels x positions)"
                    if key == "width"
                    else ""
                ),
            )
    if family == "python":
        factory = net.get("factory")
        if not isinstance(factory, str) or ":" not in factory:
            raise _err(
                source,
                "network.factory",
                f"value {factory!r} is not FILE.py:NAME",
                'a string "path/to/file.py:name" (the path relative to the spec file)',
                "name the Python file and the function in it that returns (init, apply)",
            )
        return NetworkSpec(
            family=family,
            width=_int(source, "network.width", net.get("width", d.width), 1),
            depth=None,
            activation=None,
            factory=factory,
        )
    activation = _choice(
        source,
        "network.activation",
        net.get("activation", d.activation),
        activation_names(),
        canonical=lambda n: get_activation(n).name,
    )
    if "leaky_slope" in net and activation != "leaky-relu":
        raise _err(
            source,
            "network.leaky_slope",
            f"leaky_slope is set but the activation is {activation!r}",
            'leaky_slope only with activation = "leaky-relu"',
            'remove leaky_slope or set activation = "leaky-relu"',
        )
    depth = _int(source, "network.depth", net.get("depth", d.depth), 1)
    common = dict(
        family=family,
        depth=depth,
        activation=activation,
        leaky_slope=_slope(source, net.get("leaky_slope", d.leaky_slope)),
    )
    if family in CONV_FAMILIES:
        channels = _int(source, "network.channels", net.get("channels", d.channels), 1)
        size = _size(source, family, net.get("size", 16 if family == "conv1d" else 8))
        kernel = _int(source, "network.kernel", net.get("kernel", d.kernel), 1)
        if kernel % 2 == 0:
            raise _err(
                source,
                "network.kernel",
                f"value {kernel} is even",
                "an odd kernel size (1, 3, 5, ...): the centre tap keeps positions aligned",
                f"use {kernel - 1} or {kernel + 1}",
            )
        if kernel > min(size):
            raise _err(
                source,
                "network.kernel",
                f"kernel {kernel} is larger than the size {list(size)}",
                "a kernel no larger than the spatial size (circular padding wraps once)",
            )
        return NetworkSpec(
            width=channels * math.prod(size), channels=channels, size=size, kernel=kernel, **common
        )
    return NetworkSpec(
        width=_int(source, "network.width", net.get("width", d.width), 1),
        alpha=_float(source, "network.alpha", net.get("alpha", d.alpha), -math.inf),
        **common,
    )


def _size(source, family: str, v: Any) -> tuple[int, ...]:
    """``network.size``: positions of a conv1d stack; an int or ``[height, width]`` for conv2d."""
    dims = 1 if family == "conv1d" else 2
    expected = (
        "a whole number of positions >= 1"
        if dims == 1
        else "a whole number >= 1 (a square) or a list [height, width]"
    )
    if dims == 2 and isinstance(v, list):
        if len(v) != 2:
            raise _err(source, "network.size", f"value {v!r} has {len(v)} entries", expected)
        return tuple(_int(source, "network.size", x, 1) for x in v)
    if isinstance(v, list):
        raise _err(source, "network.size", f"value {v!r} is a list", expected)
    return (_int(source, "network.size", v, 1),) * dims


def _check_weights(source, family: str, weights: str) -> None:
    """Delta-orthogonal kernels are for convolution stacks; a conv kernel is not a square
    matrix, so plain "orthogonal" is refused there."""
    if family in CONV_FAMILIES and weights == "orthogonal":
        raise _err(
            source,
            "init.weights",
            'weights = "orthogonal" for a convolution stack',
            "delta-orthogonal, gaussian or uniform for conv1d/conv2d",
            "delta-orthogonal puts an orthogonal matrix on the centre tap (Xiao et al. 2018)",
        )
    if family not in CONV_FAMILIES and weights == "delta-orthogonal":
        raise _err(
            source,
            "init.weights",
            f'weights = "delta-orthogonal" for family {family!r}',
            "orthogonal, gaussian or uniform for plain and residual stacks",
            "delta-orthogonal is a convolution kernel; use orthogonal for dense layers",
        )


def _default_dtype(network: NetworkSpec, route: str) -> str:
    """float32 where the measurement is matrix-free (the weights dominate memory there),
    float64 elsewhere."""
    free = route == "matrix-free" or (route == "auto" and network.width > MATRIX_FREE_WIDTH)
    return "float32" if free else "float64"


def _check_route(source, network: NetworkSpec, route: str) -> None:
    """The deep route needs per-layer structure, which a user's network does not expose."""
    if route == "deep" and network.family == "python":
        raise _err(
            source,
            "analysis.route",
            'route = "deep" for family "python"',
            "dense, matrix-free or auto for a user's network",
            "the deep route steps through the layers one by one; a factory is a black box",
        )


def parse_spec(data: dict[str, Any], source: str | None = None) -> Spec:
    """Validate a spec mapping (as read from TOML) and fill in defaults.

    Args:
      data: the mapping.
      source: the file it came from, for error messages and relative ``input_file`` paths.

    Raises:
      InputError: naming the file, the key, the value received and what is allowed.
    """
    top_allowed = ("name", "description", "network", "init", "analysis")
    for k in data:
        if k not in top_allowed:
            raise _err(
                source,
                k,
                "unknown top-level key",
                f"one of {', '.join(top_allowed)}",
                did_you_mean(k, top_allowed),
            )
    net = _section(source, data, "network", NetworkSpec)
    ini = _section(source, data, "init", InitSpec)
    ana = _section(source, data, "analysis", AnalysisSpec)
    d_net, d_ini, d_ana = NetworkSpec(), InitSpec(), AnalysisSpec()

    family = _choice(source, "network.family", net.get("family", d_net.family), SPEC_FAMILIES)
    network = _network(source, net, family)
    if family == "python" and ini:
        raise _err(
            source,
            "init",
            'an [init] table is given but the family is "python"',
            'no [init] table with family = "python"',
            "the factory's init(key, dtype) draws the parameters; remove [init]",
        )
    default_weights = "delta-orthogonal" if family in CONV_FAMILIES else d_ini.weights
    init = InitSpec(
        weights=_choice(
            source, "init.weights", ini.get("weights", default_weights), initializer_names()
        ),
        sigma_w=_float(source, "init.sigma_w", ini.get("sigma_w", d_ini.sigma_w)),
        sigma_b=_float(source, "init.sigma_b", ini.get("sigma_b", d_ini.sigma_b)),
    )
    _check_weights(source, family, init.weights)
    route = _choice(source, "analysis.route", ana.get("route", d_ana.route), ROUTES)
    _check_route(source, network, route)
    kind = _choice(source, "analysis.input", ana.get("input", d_ana.input), INPUT_KINDS)
    input_file = ana.get("input_file")
    if kind == "file":
        if not isinstance(input_file, str) or not input_file:
            raise _err(
                source,
                "analysis.input_file",
                f"value {input_file!r} is not a path",
                "a path to a .npy file (relative paths are relative to the spec file)",
            )
        if source and not Path(input_file).is_absolute():
            # made absolute once, so that the resolved spec reads back to the same file
            input_file = os.path.abspath(Path(source).parent / input_file)
    elif input_file is not None:
        raise _err(
            source,
            "analysis.input_file",
            'input_file is set but input is not "file"',
            'input = "file" together with input_file',
        )
    analysis = AnalysisSpec(
        inputs=_int(source, "analysis.inputs", ana.get("inputs", d_ana.inputs), 1),
        seed=_int(source, "analysis.seed", ana.get("seed", d_ana.seed), 0, SEED_MAX, "2^64 - 1"),
        route=route,
        dtype=_choice(
            source, "analysis.dtype", ana.get("dtype", _default_dtype(network, route)), DTYPES
        ),
        input=kind,
        input_variance=_float(
            source, "analysis.input_variance", ana.get("input_variance", d_ana.input_variance)
        ),
        input_file=input_file,
        probes=_int(source, "analysis.probes", ana.get("probes", d_ana.probes), 1),
        lanczos_steps=_int(
            source, "analysis.lanczos_steps", ana.get("lanczos_steps", d_ana.lanczos_steps), 2
        ),
    )
    name = data.get("name", Path(source).stem if source else "design")
    if not isinstance(name, str) or not name.strip():
        raise _err(
            source, "name", f"value {name!r} is not a non-empty string", "a short design name"
        )
    description = data.get("description", "")
    if not isinstance(description, str):
        raise _err(source, "description", f"value {description!r} is not a string", "a string")
    return Spec(
        name=name.strip(),
        description=description,
        network=network,
        init=init,
        analysis=analysis,
        source=source,
    )


def load_spec(path: str | Path) -> Spec:
    """Read and validate a TOML spec file.

    Raises:
      InputError: the file is missing, is not valid TOML, or has a bad key or value.
    """
    path = Path(path)
    if path.is_dir():
        raise InputError(
            f"spec path {str(path)!r} is a folder",
            expected="a readable .toml file",
            hint="name the spec file inside it",
        )
    if not path.is_file():
        raise InputError(
            f"spec file {str(path)!r} does not exist",
            expected="a readable .toml file",
            hint="check the path; `isoscope demo` writes example specs you can copy",
        )
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(
            "the file is not UTF-8 text", expected="a TOML text file", file=str(path)
        ) from None
    except OSError as e:
        raise InputError(
            f"spec file {str(path)!r} cannot be read ({e.strerror or e})",
            expected="a readable .toml file",
            hint="check its permissions (chmod u+r) or copy it somewhere readable",
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise InputError(
            f"malformed TOML ({e})",
            expected="a TOML document",
            file=str(path),
            hint="fix the syntax at the line and column named",
        ) from None
    return parse_spec(data, source=str(path))


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v)
    # a TOML basic string: JSON's escapes (\" \\ \n \t \uXXXX ...) are all valid TOML escapes
    return json.dumps(str(v), ensure_ascii=False)


def spec_toml(spec: Spec) -> str:
    """The resolved spec as TOML text that :func:`load_spec` reads back to an equal spec
    (:meth:`Spec.to_dict`, every default filled in): top-level keys first, then one table per
    section."""
    d = spec.to_dict()
    lines = [f"{k} = {_toml_value(v)}" for k, v in d.items() if not isinstance(v, dict)]
    for section, values in d.items():
        if isinstance(values, dict):
            lines += ["", f"[{section}]"] + [f"{k} = {_toml_value(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"
