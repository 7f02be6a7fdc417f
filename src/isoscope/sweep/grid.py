"""Grid files: a spec plus a ``[grid]`` table of dotted spec keys and lists of values.

A grid file is an ordinary spec (the same ``name``, ``[network]``, ``[init]`` and
``[analysis]`` sections, which set every key the grid does not vary) plus::

    [grid]
    "init.sigma_w" = [1.0, 1.1, 1.2]      # dotted spec keys, each with a list of values
    "network.depth" = [16, 32]

    [grid.zip]                            # optional: keys that vary together, lists of one length
    "init.sigma_b" = [0.0, 0.05]
    "analysis.seed" = [1, 2]

The points are the Cartesian product of the ``[grid]`` lists and of the zipped group (one
factor whose i-th value sets every zipped key to its i-th entry); several zipped groups are
written as ``[[grid.zip]]`` tables, one factor each.  Unquoted dotted keys
(``init.sigma_w = [...]`` inside ``[grid]``) mean the same.  Every point is validated as a spec
(:func:`isoscope.spec.parse_spec`), so a value the spec refuses is refused here, naming the
grid key and the point.

A point's identity (:attr:`Point.key`) is the SHA-256 of its resolved spec without the labels
``name`` and ``description``: the same design reached from another grid file is the same
point, and a store never holds it twice.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import math
import tomllib
from pathlib import Path
from typing import Any

from isoscope.errors import InputError, did_you_mean
from isoscope.spec import AnalysisSpec, InitSpec, NetworkSpec, Spec, parse_spec

__all__ = [
    "Grid",
    "Point",
    "load_grid",
    "parse_grid",
    "grid_keys",
    "point_key",
    "flat_spec",
    "MAX_POINTS",
]

MAX_POINTS = 100_000

_SECTIONS = {"network": NetworkSpec, "init": InitSpec, "analysis": AnalysisSpec}


def grid_keys() -> tuple[str, ...]:
    """Every dotted spec key a grid may vary (``section.key`` of the spec's three sections)."""
    return tuple(f"{s}.{f.name}" for s, cls in _SECTIONS.items() for f in dataclasses.fields(cls))


def flat_spec(spec: Spec) -> dict[str, Any]:
    """The resolved spec as ``{dotted key: value}`` (:meth:`Spec.to_dict`, sections flattened)."""
    out: dict[str, Any] = {}
    for section, values in spec.to_dict().items():
        if isinstance(values, dict):
            out.update({f"{section}.{k}": v for k, v in values.items()})
        else:
            out[section] = values
    return out


def point_key(spec: Spec) -> str:
    """The identity of a design: SHA-256 (hex) of the canonical JSON of its resolved spec
    without ``name`` and ``description`` (labels that do not change a number)."""
    data = spec.to_dict()
    data.pop("name", None)
    data.pop("description", None)
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclasses.dataclass(frozen=True)
class Point:
    """One design of a grid.

    Attributes:
      index: position in the grid's product order (0-based).
      values: the varied keys and their resolved values (``{"init.sigma_w": 1.2, ...}``).
      spec: the validated spec of this point.
      key: :func:`point_key` of the spec.
    """

    index: int
    values: dict[str, Any]
    spec: Spec
    key: str

    @property
    def shape(self) -> tuple:
        """What a compiled function and a unit draw depend on: points of one shape share
        both (family, width, depth, activation, leaky slope, weights, dtype, draws, seed)."""
        n, a = self.spec.network, self.spec.analysis
        return (
            n.family,
            n.width,
            n.depth,
            n.activation,
            n.leaky_slope if n.activation == "leaky-relu" else None,
            self.spec.init.weights,
            a.dtype,
            a.inputs,
            a.seed,
            a.input,
        )

    @property
    def cost(self) -> float:
        """Relative cost, the floating-point operations of the measurement
        (:func:`isoscope.budget.estimate`), used to start the expensive points first."""
        from isoscope.budget import estimate

        return estimate(self.spec, rate=1.0).flops


@dataclasses.dataclass(frozen=True)
class Grid:
    """A parsed grid file.

    Attributes:
      base: the spec of the file without its grid (every key the grid does not vary).
      axes: the ``[grid]`` keys and their lists, in file order.
      zipped: the zipped groups, each ``{key: list}`` with lists of one length.
      points: every point, in product order (the last ``[grid]`` key varies fastest, then the
        zipped groups).
      source: the grid file, for messages.
      text: the file's text, kept in the store with each run.
    """

    base: Spec
    axes: dict[str, list]
    zipped: tuple[dict[str, list], ...]
    points: tuple[Point, ...]
    source: str | None
    text: str

    @property
    def varied(self) -> tuple[str, ...]:
        """Every key the grid varies, in file order."""
        return tuple(self.axes) + tuple(k for g in self.zipped for k in g)


def _refuse(source, key, message, expected, hint=None):
    return InputError(message, expected=expected, hint=hint, file=source, key=key)


def _flatten(table: dict, prefix: str = "") -> dict[str, Any]:
    """``{"init": {"sigma_w": [..]}}`` and ``{"init.sigma_w": [..]}`` both to dotted keys."""
    out = {}
    for k, v in table.items():
        name = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(_flatten(v, name + "."))
        else:
            out[name] = v
    return out


def _check_key(source, table: str, key: str) -> None:
    allowed = grid_keys()
    if key in allowed:
        return
    top = key.split(".")[0]
    hint = did_you_mean(key, allowed) or (
        "name and description are labels and cannot vary"
        if top in ("name", "description")
        else 'write the key as section.key, e.g. "init.sigma_w"'
    )
    raise _refuse(
        source,
        f"{table}.{key}",
        f"unknown grid key {key!r}",
        f"a dotted spec key: one of {', '.join(allowed)}",
        hint,
    )


def _check_values(source, table: str, key: str, values) -> list:
    where = f"{table}.{key}"
    if not isinstance(values, list):
        raise _refuse(
            source,
            where,
            f"value {values!r} is not a list",
            "a list of values, e.g. [1.0, 1.2]",
            f"write {key!r} = [{values!r}] to hold it at one value, or set it in the "
            "spec's own section",
        )
    if not values:
        raise _refuse(
            source,
            where,
            "the list is empty",
            "at least one value",
            "an empty list would make the grid empty; drop the key instead",
        )
    seen: list[Any] = []
    for v in values:
        if isinstance(v, (dict, list)):
            raise _refuse(
                source,
                where,
                f"value {v!r} is a {type(v).__name__}",
                "plain values (numbers, strings)",
            )
        if isinstance(v, float) and not math.isfinite(v):
            raise _refuse(source, where, f"value {v!r} is not finite", "finite numbers")
        if any(type(v) is type(s) and v == s for s in seen):
            raise _refuse(
                source,
                where,
                f"value {v!r} appears twice",
                "distinct values",
                "each value gives one point; remove the repeat",
            )
        seen.append(v)
    return values


def _zipped_groups(source, raw) -> tuple[dict[str, list], ...]:
    groups = raw if isinstance(raw, list) else [raw]
    out = []
    for i, g in enumerate(groups):
        table = "grid.zip" if not isinstance(raw, list) else f"grid.zip[{i}]"
        if not isinstance(g, dict) or not g:
            raise _refuse(
                source,
                table,
                f"expected a table of keys and lists, received {g!r}",
                "[grid.zip] with two or more dotted keys, each a list of one length",
            )
        flat = _flatten(g)
        for k, v in flat.items():
            _check_key(source, table, k)
            _check_values(source, table, k, v)
        lengths = {k: len(v) for k, v in flat.items()}
        if len(set(lengths.values())) > 1:
            listed = ", ".join(f"{k} has {n}" for k, n in lengths.items())
            raise _refuse(
                source,
                table,
                f"the zipped lists differ in length ({listed})",
                "lists of one length (their i-th values form one point)",
                "make every list in the group as long as the others, or move a key "
                "to [grid] to vary it independently",
            )
        out.append(flat)
    return tuple(out)


def _set(data: dict, dotted: str, value) -> None:
    section, key = dotted.split(".", 1)
    data.setdefault(section, {})[key] = value


def _label(values: dict[str, Any]) -> str:
    return ", ".join(f"{k}={v}" for k, v in values.items())


def parse_grid(data: dict[str, Any], source: str | None = None, text: str = "") -> Grid:
    """Validate a grid mapping (a spec mapping with a ``grid`` table) and expand its points.

    Raises:
      InputError: no ``[grid]`` table; an unknown key (with the nearest valid one); a value
        that is not a non-empty list of distinct plain values; a key given twice; zipped lists
        of different lengths; more than ``MAX_POINTS`` points; or a point the spec refuses
        (the message names the grid key and the point).
    """
    data = dict(data)
    raw = data.pop("grid", None)
    if not isinstance(raw, dict):
        raise _refuse(
            source,
            "grid",
            "no [grid] table" if raw is None else f"grid is {raw!r}, not a table",
            'a [grid] table of dotted spec keys and lists, e.g. "init.sigma_w" = [1.0, 1.2]',
            "use `isoscope analyze` for a single design",
        )
    raw = dict(raw)
    zipped = _zipped_groups(source, raw.pop("zip")) if "zip" in raw else ()
    axes = _flatten(raw)
    for k, v in axes.items():
        _check_key(source, "grid", k)
        _check_values(source, "grid", k, v)
    keys = list(axes) + [k for g in zipped for k in g]
    twice = sorted({k for k in keys if keys.count(k) > 1})
    if twice:
        raise _refuse(
            source,
            f"grid.{twice[0]}",
            f"key {twice[0]!r} is varied more than once",
            "each key in [grid] or in one zipped group, once",
        )
    if not keys:
        raise _refuse(
            source,
            "grid",
            "the [grid] table varies no key",
            "at least one dotted key with a list of values",
        )
    count = math.prod(len(v) for v in axes.values()) * math.prod(
        len(next(iter(g.values()))) for g in zipped
    )
    if count > MAX_POINTS:
        raise _refuse(
            source,
            "grid",
            f"the grid has {count} points",
            f"at most {MAX_POINTS}",
            "split it into several grid files over the same store",
        )
    base = parse_spec(data, source=source)
    factors = [[{k: v} for v in vals] for k, vals in axes.items()]
    factors += [
        [{k: vals[i] for k, vals in g.items()} for i in range(len(next(iter(g.values()))))]
        for g in zipped
    ]
    points = []
    for index, combo in enumerate(itertools.product(*factors)):
        given = {k: v for part in combo for k, v in part.items()}
        spec = _point_spec(base, data, given, source)
        flat = flat_spec(spec)
        values = {k: flat.get(k) for k in keys}
        points.append(Point(index, values, spec, point_key(spec)))
    seen: dict[str, Point] = {}
    for p in points:
        if p.key in seen:
            raise _refuse(
                source,
                "grid",
                f"points {_label(seen[p.key].values)} and {_label(p.values)} are the same design",
                "values that give distinct designs",
                "a key that does not apply (alpha of a plain stack) or two values "
                "that resolve alike (1 and 1.0) give the same point",
            )
        seen[p.key] = p
    return Grid(base, {k: list(v) for k, v in axes.items()}, zipped, tuple(points), source, text)


def _point_spec(base: Spec, data: dict, given: dict[str, Any], source) -> Spec:
    point = json.loads(json.dumps({k: v for k, v in data.items()}))  # a deep copy
    for k, v in given.items():
        _set(point, k, v)
    label = _label(given)
    point["name"] = f"{base.name} [{label}]"
    try:
        return parse_spec(point, source=source)
    except InputError as e:
        key = e.key if e.key in given else next(iter(given))
        raise InputError(
            f"grid point {label}: {e.message}",
            expected=e.expected,
            hint=e.hint,
            file=source,
            key=f"grid.{key}",
        ) from None


def load_grid(path: str | Path) -> Grid:
    """Read and validate a grid file (TOML).

    Raises:
      InputError: the file is missing, not UTF-8, not TOML, or a key or value is refused
        (:func:`parse_grid`).
    """
    path = Path(path)
    if path.is_dir():
        raise InputError(f"grid path {str(path)!r} is a folder", expected="a .toml grid file")
    if not path.is_file():
        raise InputError(
            f"grid file {str(path)!r} does not exist",
            expected="a .toml grid file",
            hint="a grid file is a spec with a [grid] table (see docs/sweep.md)",
        )
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(
            "the file is not UTF-8 text", expected="a TOML text file", file=str(path)
        ) from None
    except OSError as e:
        raise InputError(
            f"grid file {str(path)!r} cannot be read ({e.strerror or e})",
            expected="a readable .toml file",
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
    return parse_grid(data, source=str(path), text=text)
