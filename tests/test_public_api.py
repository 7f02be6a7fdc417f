"""Every public name has a docstring (STYLE.md habit 1)."""

import inspect

import isoscope
from isoscope import (
    activations,
    analysis,
    initializers,
    jacobian,
    network,
    report,
    score,
    spec,
    spectrum,
)


def test_public_names_have_docstrings():
    missing = []
    for mod in (
        isoscope,
        activations,
        analysis,
        initializers,
        jacobian,
        network,
        report,
        score,
        spec,
        spectrum,
    ):
        for name in getattr(mod, "__all__", []):
            obj = getattr(mod, name)
            if (inspect.isfunction(obj) or inspect.isclass(obj)) and not inspect.getdoc(obj):
                missing.append(f"{mod.__name__}.{name}")
    assert not missing, missing
