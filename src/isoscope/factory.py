"""Load a user's own network: ``family = "python"`` with ``factory = "FILE.py:NAME"``.

The named function is called with the spec's width and returns

* ``(init, apply)``, or
* ``(init, apply, equivalent)``,

where ``init(key, dtype) -> params`` draws the parameters (any pytree of arrays) in ``dtype``,
``apply(params, x) -> y`` maps one input of shape ``(width,)`` to one output vector, both pure
JAX functions, and ``equivalent`` (optional) is a mapping ``{"network": {...}, "init": {...}}``
in the spec's own keys naming the built-in plain or residual design the network is meant to
equal.  When it is given, the prediction of that design is drawn beside the measurement and
labelled as the equivalent's.

Loading runs the user's file.  Only the named file is executed (imported under a private
module name, without changing ``sys.path``); whatever that file imports is imported as usual.
Load only files you trust, as you would before running them with ``python``.
"""

from __future__ import annotations

import hashlib
import importlib.util
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp

from isoscope.errors import InputError, did_you_mean
from isoscope.network import Network, custom_network

__all__ = ["UserFactory", "load_factory", "parse_reference"]


class UserFactory(NamedTuple):
    """A loaded factory.

    Attributes:
      network: the black-box :class:`~isoscope.network.Network` (family ``"python"``).
      equivalent: the built-in design the factory names as equal, ``{"network": ..., "init":
        ...}``, or ``None``.
      path: the resolved file.
      name: the function's name.
    """

    network: Network
    equivalent: dict[str, dict[str, Any]] | None
    path: Path
    name: str


_CACHE: dict[tuple[str, int, int, str, int], UserFactory] = {}


def parse_reference(reference: str, base: Path) -> tuple[Path, str]:
    """``"path/to/file.py:name"`` -> (resolved path relative to ``base``, name)."""
    if not isinstance(reference, str) or ":" not in reference:
        raise InputError(
            f"factory {reference!r} is not FILE.py:NAME",
            expected='a string "path/to/file.py:name" (path relative to the spec)',
            hint="name the Python file and the function in it",
        )
    file, _, name = reference.rpartition(":")
    if not file or not name.isidentifier():
        raise InputError(
            f"factory {reference!r}: {name!r} is not a Python name"
            if file
            else f"factory {reference!r} names no file",
            expected='"path/to/file.py:name" with a function name after the colon',
            hint='for example factory = "nets/mine.py:make"',
        )
    path = (base / file).resolve()
    if path.suffix != ".py":
        raise InputError(
            f"factory file {file!r} is not a .py file",
            expected="a Python source file",
            hint="point factory at FILE.py:NAME",
        )
    if not path.is_file():
        raise InputError(
            f"factory file {str(path)!r} does not exist",
            expected="a Python file, the path relative to the spec file",
            hint="check the path (it is resolved from the spec's folder)",
        )
    return path, name


def _module(path: Path):
    """Execute exactly this file as a private module (no ``sys.path`` change)."""
    digest = hashlib.sha1(str(path).encode()).hexdigest()[:12]
    mod_name = f"isoscope_user_{digest}"
    spec = importlib.util.spec_from_file_location(mod_name, path)
    if spec is None or spec.loader is None:
        raise InputError(f"cannot load {str(path)!r} as Python", expected="a Python source file")
    module = importlib.util.module_from_spec(spec)
    sys.modules[mod_name] = module  # dataclasses and pickling look the module up
    try:
        spec.loader.exec_module(module)
    except SyntaxError as e:
        sys.modules.pop(mod_name, None)
        raise InputError(
            f"the factory file has a syntax error at line {e.lineno}: {e.msg}",
            expected="a Python file that imports",
            hint=f"fix {path.name}",
        ) from None
    except Exception as e:  # the user's code failed while importing
        sys.modules.pop(mod_name, None)
        raise InputError(
            f"importing the factory file raised {type(e).__name__}: {e}",
            expected="a file that imports without error",
            hint=f"run `python {path}` to see the full traceback",
        ) from None
    return module


def _function(module, name: str, path: Path):
    fn = getattr(module, name, None)
    if fn is None:
        names = [n for n in vars(module) if callable(vars(module)[n]) and not n.startswith("_")]
        raise InputError(
            f"{path.name} has no function {name!r}",
            expected="the name of a function defined in the file"
            + (f" (it defines {', '.join(sorted(names))})" if names else ""),
            hint=did_you_mean(name, names) or "check the name after ':'",
        )
    if not callable(fn):
        raise InputError(
            f"{path.name}:{name} is a {type(fn).__name__}, not a function",
            expected="a function width -> (init, apply[, equivalent])",
        )
    return fn


def _equivalent(value, where: str) -> dict[str, dict[str, Any]] | None:
    if value is None:
        return None
    if (
        not isinstance(value, Mapping)
        or not set(value) <= {"network", "init"}
        or not all(isinstance(value.get(k, {}), Mapping) for k in ("network", "init"))
    ):
        raise InputError(
            f"{where} returned an equivalent design of type "
            f"{type(value).__name__} with keys "
            f"{sorted(value) if isinstance(value, Mapping) else '-'}",
            expected='a mapping {"network": {...}, "init": {...}} in spec keys',
            hint='for example {"network": {"family": "plain", "depth": 8, '
            '"activation": "tanh"}, "init": {"weights": "orthogonal"}}',
        )
    return {"network": dict(value.get("network", {})), "init": dict(value.get("init", {}))}


def _check_shapes(init, apply, width: int, where: str) -> None:
    """Trace init and apply abstractly (nothing is computed) to check the output is a vector."""
    try:
        params = jax.eval_shape(lambda k: init(k, jnp.float32), jax.random.PRNGKey(0))
    except Exception as e:
        raise InputError(
            f"{where}: init(key, dtype) raised {type(e).__name__}: {e}",
            expected="init(key, dtype) -> a pytree of arrays",
            hint="init must accept a PRNG key and a dtype",
        ) from None
    try:
        out = jax.eval_shape(apply, params, jax.ShapeDtypeStruct((width,), jnp.float32))
    except Exception as e:
        raise InputError(
            f"{where}: apply(params, x) with x of shape ({width},) raised {type(e).__name__}: {e}",
            expected=f"apply(params, x) for one input of shape ({width},)",
            hint="check network.width against the input size the network takes",
        ) from None
    if not hasattr(out, "shape") or len(out.shape) != 1:
        raise InputError(
            f"{where}: apply returns {getattr(out, 'shape', type(out).__name__)} for one input",
            expected="one output vector (shape (M,)) per input",
            hint="flatten the output, or return the part whose Jacobian you want",
        )


def load_factory(reference: str, base: Path, width: int) -> UserFactory:
    """Run the factory ``reference`` (``"FILE.py:NAME"``, the path relative to ``base``) for
    ``width`` and return the network it builds.

    The file is executed once per (path, modification time, size); the function is called
    with ``width`` and must return ``(init, apply)`` or ``(init, apply, equivalent)`` (see
    the module docstring).  init and apply are traced abstractly to check that one input of
    shape ``(width,)`` gives one output vector.  Every failure is an
    :class:`~isoscope.errors.InputError` that says what was found and what to do.
    """
    path, name = parse_reference(reference, Path(base))
    stat = path.stat()
    key = (str(path), stat.st_mtime_ns, stat.st_size, name, int(width))
    if key in _CACHE:
        return _CACHE[key]
    fn = _function(_module(path), name, path)
    where = f"{path.name}:{name}"
    try:
        built = fn(int(width))
    except Exception as e:
        raise InputError(
            f"{where}({width}) raised {type(e).__name__}: {e}",
            expected="a function of the width returning (init, apply[, equivalent])",
            hint=f"call {name}({width}) in Python to see the traceback",
        ) from None
    if not isinstance(built, tuple) or len(built) not in (2, 3):
        raise InputError(
            f"{where}({width}) returned {type(built).__name__}"
            + (f" of length {len(built)}" if isinstance(built, tuple) else ""),
            expected="a tuple (init, apply) or (init, apply, equivalent)",
            hint="return init(key, dtype) -> params and apply(params, x) -> y",
        )
    init, apply = built[0], built[1]
    if not callable(init) or not callable(apply):
        raise InputError(
            f"{where}({width}) returned ({type(init).__name__}, {type(apply).__name__}, ...)",
            expected="init and apply functions first",
            hint="return (init, apply) or (init, apply, equivalent)",
        )
    equivalent = _equivalent(built[2] if len(built) == 3 else None, where)
    _check_shapes(init, apply, int(width), where)
    loaded = UserFactory(custom_network(init, apply, int(width)), equivalent, path, name)
    _CACHE[key] = loaded
    return loaded
