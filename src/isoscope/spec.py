"""Spec files (TOML): parsing and validation with messages that name file, key and value.

A spec describes one design to analyse::

    name = "deep-tanh-orthogonal"
    [network]
    family = "plain"          # plain | residual
    width = 512
    depth = 200
    activation = "tanh"
    alpha = 1.0               # residual branch scale (residual only)
    leaky_slope = 0.01        # slope a of max(h, a h) (activation = "leaky-relu" only)
    [init]
    weights = "orthogonal"    # orthogonal | gaussian | uniform
    sigma_w = 1.01            # scales, not variances
    sigma_b = 0.0
    [analysis]
    inputs = 4                # independent (parameter, input) draws, pooled
    seed = 0                  # 0 .. 2^64 - 1
    dtype = "float64"         # float64 | float32
    input = "steady-state"    # steady-state | gaussian | file
    input_variance = 1.0      # for input = "gaussian"
    input_file = "x.npy"      # for input = "file"; shape (width,) or (inputs, width)

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
from isoscope.errors import InputError
from isoscope.initializers import initializer_names

__all__ = ["Spec", "NetworkSpec", "InitSpec", "AnalysisSpec", "load_spec", "parse_spec", "spec_toml",
           "INPUT_KINDS", "DTYPES"]

INPUT_KINDS = ("steady-state", "gaussian", "file")
DTYPES = ("float64", "float32")
SPEC_FAMILIES = ("plain", "residual")


@dataclasses.dataclass(frozen=True)
class NetworkSpec:
    """``[network]``: the architecture."""

    family: str = "plain"
    width: int = 256
    depth: int = 32
    activation: str = "tanh"
    alpha: float = 1.0
    leaky_slope: float = 0.01


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
    dtype: str = "float64"
    input: str = "steady-state"
    input_variance: float = 1.0
    input_file: str | None = None


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
        if self.network.family != "residual":
            d["network"].pop("alpha")
        if self.network.activation != "leaky-relu":
            d["network"].pop("leaky_slope")
        if d["analysis"]["input_file"] is None:
            d["analysis"].pop("input_file")
        return d

    def replace(self, **sections: dict[str, Any]) -> "Spec":
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
    allowed = (f"an integer >= {minimum}" if maximum is None else
               f"an integer from {minimum} to {maximum_text or maximum} ({maximum})")
    if isinstance(v, bool) or not isinstance(v, int):
        raise _err(source, key, f"value {v!r} is not a whole number", allowed)
    if v < minimum:
        raise _err(source, key, f"value {v} is too small", allowed)
    if maximum is not None and v > maximum:
        raise _err(source, key, f"value {v} is too large", allowed)
    return v


# A JAX PRNG key (threefry) is two uint32 words, so seeds are unsigned 64-bit integers.
SEED_MAX = 2 ** 64 - 1


def _float(source, key, v, minimum=0.0):
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _err(source, key, f"value {v!r} is not a number", f"a number >= {minimum:g}")
    v = float(v)
    if not math.isfinite(v) or v < minimum:
        raise _err(source, key, f"value {v!r} is negative or not finite",
                   f"a finite number >= {minimum:g}",
                   "sigma_w and sigma_b are scales (standard deviations), never negative")
    return v


def _slope(source, v):
    """``network.leaky_slope``: any finite real a of ``max(h, a h)``-style ``h > 0 ? h : a h``."""
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        raise _err(source, "network.leaky_slope", f"value {v!r} is not a finite number",
                   "a finite real slope a (phi(h) = h for h > 0, a h for h < 0; default 0.01)")
    return float(v)


def _choice(source, key, v, allowed, canonical=None):
    name = str(v).lower()
    if canonical is not None:
        try:
            return canonical(name)
        except InputError as e:
            raise e.located(file=source, key=key) from None
    if name not in allowed:
        raise _err(source, key, f"value {v!r} is not allowed", f"one of {', '.join(allowed)}")
    return name


def _section(source, data, name, cls):
    raw = data.get(name, {})
    if not isinstance(raw, dict):
        raise _err(source, name, f"expected a table [{name}], received {raw!r}", f"a [{name}] table")
    allowed = [f.name for f in dataclasses.fields(cls)]
    for k in raw:
        if k not in allowed:
            raise _err(source, f"{name}.{k}", "unknown key", f"one of {', '.join(allowed)}",
                       "check the spelling; unknown keys are refused so that typos are not ignored")
    return raw


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
            raise _err(source, k, "unknown top-level key", f"one of {', '.join(top_allowed)}")
    net = _section(source, data, "network", NetworkSpec)
    ini = _section(source, data, "init", InitSpec)
    ana = _section(source, data, "analysis", AnalysisSpec)
    d_net, d_ini, d_ana = NetworkSpec(), InitSpec(), AnalysisSpec()

    family = _choice(source, "network.family", net.get("family", d_net.family), SPEC_FAMILIES)
    network = NetworkSpec(
        family=family,
        width=_int(source, "network.width", net.get("width", d_net.width), 1),
        depth=_int(source, "network.depth", net.get("depth", d_net.depth), 1),
        activation=_choice(source, "network.activation", net.get("activation", d_net.activation),
                           activation_names(), canonical=lambda n: get_activation(n).name),
        alpha=_float(source, "network.alpha", net.get("alpha", d_net.alpha), -math.inf),
        leaky_slope=_slope(source, net.get("leaky_slope", d_net.leaky_slope)),
    )
    if "leaky_slope" in net and network.activation != "leaky-relu":
        raise _err(source, "network.leaky_slope",
                   f"leaky_slope is set but the activation is {network.activation!r}",
                   "leaky_slope only with activation = \"leaky-relu\"",
                   "remove leaky_slope or set activation = \"leaky-relu\"")
    if family != "residual" and "alpha" in net:
        raise _err(source, "network.alpha", "alpha is set but the family is not residual",
                   "alpha only with family = \"residual\"", "remove alpha or set family = \"residual\"")
    init = InitSpec(
        weights=_choice(source, "init.weights", ini.get("weights", d_ini.weights), initializer_names()),
        sigma_w=_float(source, "init.sigma_w", ini.get("sigma_w", d_ini.sigma_w)),
        sigma_b=_float(source, "init.sigma_b", ini.get("sigma_b", d_ini.sigma_b)),
    )
    kind = _choice(source, "analysis.input", ana.get("input", d_ana.input), INPUT_KINDS)
    input_file = ana.get("input_file")
    if kind == "file":
        if not isinstance(input_file, str) or not input_file:
            raise _err(source, "analysis.input_file", f"value {input_file!r} is not a path",
                       "a path to a .npy file (relative paths are relative to the spec file)")
        if source and not Path(input_file).is_absolute():
            # made absolute once, so that the resolved spec reads back to the same file
            input_file = os.path.abspath(Path(source).parent / input_file)
    elif input_file is not None:
        raise _err(source, "analysis.input_file", "input_file is set but input is not \"file\"",
                   "input = \"file\" together with input_file")
    analysis = AnalysisSpec(
        inputs=_int(source, "analysis.inputs", ana.get("inputs", d_ana.inputs), 1),
        seed=_int(source, "analysis.seed", ana.get("seed", d_ana.seed), 0, SEED_MAX, "2^64 - 1"),
        dtype=_choice(source, "analysis.dtype", ana.get("dtype", d_ana.dtype), DTYPES),
        input=kind,
        input_variance=_float(source, "analysis.input_variance",
                              ana.get("input_variance", d_ana.input_variance)),
        input_file=input_file,
    )
    name = data.get("name", Path(source).stem if source else "design")
    if not isinstance(name, str) or not name.strip():
        raise _err(source, "name", f"value {name!r} is not a non-empty string", "a short design name")
    description = data.get("description", "")
    if not isinstance(description, str):
        raise _err(source, "description", f"value {description!r} is not a string", "a string")
    return Spec(name=name.strip(), description=description, network=network, init=init,
                analysis=analysis, source=source)


def load_spec(path: str | Path) -> Spec:
    """Read and validate a TOML spec file.

    Raises:
      InputError: the file is missing, is not valid TOML, or has a bad key or value.
    """
    path = Path(path)
    if path.is_dir():
        raise InputError(f"spec path {str(path)!r} is a folder", expected="a readable .toml file",
                         hint="name the spec file inside it")
    if not path.is_file():
        raise InputError(f"spec file {str(path)!r} does not exist", expected="a readable .toml file",
                         hint="check the path; `isoscope demo` writes example specs you can copy")
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError("the file is not UTF-8 text", expected="a TOML text file",
                         file=str(path)) from None
    except OSError as e:
        raise InputError(f"spec file {str(path)!r} cannot be read ({e.strerror or e})",
                         expected="a readable .toml file",
                         hint="check its permissions (chmod u+r) or copy it somewhere readable") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise InputError(f"malformed TOML ({e})", expected="a TOML document", file=str(path),
                         hint="fix the syntax at the line and column named") from None
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
