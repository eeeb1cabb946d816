"""The error hierarchy of pairspread.

Every mistake a user can make ends in a subclass of :class:`PairspreadError`. The command line
prints its message as one line on stderr and exits non-zero; the Python API lets it propagate.
Messages name the problem, the value received and the fix.
"""

from __future__ import annotations

__all__ = [
    "PairspreadError",
    "ParameterError",
    "InputError",
    "GeometryError",
    "OutputError",
    "ManifestError",
]


class PairspreadError(Exception):
    """Root of every error pairspread raises on purpose."""

    exit_code = 2


class ParameterError(PairspreadError, ValueError):
    """A parameter value is missing, of the wrong kind or out of range."""


class InputError(PairspreadError):
    """An input dataset, layer or field cannot be used as given."""


class GeometryError(InputError, ValueError):
    """Geometries or coordinates the computation cannot use (wrong type, empty, not finite)."""


class OutputError(PairspreadError):
    """The output cannot be written where or how it was asked for."""


class ManifestError(PairspreadError):
    """A manifest (ours or a third-party pack's) is malformed."""
