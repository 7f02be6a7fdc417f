"""Errors and warnings, in one place so that every message has the same shape.

An :class:`InputError` says what was received, what was expected and what to do; the
command line turns it into exit code 2.  A :class:`TheoryError` marks a theory request that
has no answer (no critical point, no fixed point, a solve that did not converge): isoscope
raises it rather than return a number it cannot stand behind.  Its subclass
:class:`SolverError` marks the limit of a numerical method (a root finder or a continuation
that did not converge, a density whose mass check failed): not bad input, so the command line
exits 1 for it, with the statement of the limit and no traceback.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = [
    "did_you_mean",
    "hints",
    "InputError",
    "TheoryError",
    "SolverError",
    "IsoscopeWarning",
    "FiniteWidthWarning",
    "NumericalFaultWarning",
]


def did_you_mean(received: object, allowed: Iterable[str]) -> str | None:
    """``"did you mean 'tanh'?"`` for the allowed name nearest to ``received``, else ``None``.

    Nearness is difflib's ratio 2M/T (M matching characters in the longest matching blocks, T
    the total length of both strings; Ratcliff and Obershelp's gestalt pattern matching), with
    the cut-off 0.6 that ``difflib.get_close_matches`` uses by default.  Case is ignored.
    """
    lowered = {n.lower(): n for n in allowed}
    near = difflib.get_close_matches(str(received).lower(), list(lowered), n=1)
    return f"did you mean {lowered[near[0]]!r}?" if near else None


def hints(*parts: str | None) -> str | None:
    """The non-empty hints as sentences, in order (``None`` when there are none)."""
    text = None
    for part in filter(None, parts):
        if text is None:
            text = part
        else:
            text += (" " if text.endswith(("?", ".")) else ". ") + part[0].upper() + part[1:]
    return text


class InputError(ValueError):
    """Bad input from a user: a spec key, a flag, a file.

    Args:
      message: what was received, for example ``"unknown activation 'tahn'"``.
      expected: what would have been accepted.
      hint: what to do next.
      file: the file the value came from, if any.
      key: the spec key or flag, if any.
    """

    def __init__(
        self,
        message: str,
        *,
        expected: str | None = None,
        hint: str | None = None,
        file: str | None = None,
        key: str | None = None,
    ):
        self.message, self.expected, self.hint = message, expected, hint
        self.file, self.key = file, key
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = ": ".join(p for p in (self.file, f"key '{self.key}'" if self.key else None) if p)
        text = f"{where}: {self.message}" if where else self.message
        if self.expected:
            text += f"; expected {self.expected}"
        if self.hint:
            text += f". {self.hint[0].upper()}{self.hint[1:]}"
        return text

    def located(self, *, file: str | None = None, key: str | None = None) -> InputError:
        """A copy with the file and/or key filled in (for errors raised below the spec layer)."""
        return InputError(
            self.message,
            expected=self.expected,
            hint=self.hint,
            file=file or self.file,
            key=key or self.key,
        )


class TheoryError(ValueError):
    """A theory request with no trustworthy answer (message says why and what to try)."""


class SolverError(TheoryError):
    """A numerical method reached its limit (no convergence, a failed mass check): the design
    is valid, the solver could not answer it.  The message states the limit."""


class IsoscopeWarning(UserWarning):
    """Base class of isoscope's warnings."""


class FiniteWidthWarning(IsoscopeWarning):
    """The finite network is far from the regime the infinite-width theory assumes."""


class NumericalFaultWarning(IsoscopeWarning):
    """Overflow, underflow or loss of precision in a measurement."""
