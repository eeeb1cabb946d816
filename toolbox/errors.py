"""The error hierarchy of pairspread.

Every mistake a user can make ends in a subclass of :class:`PairspreadError`. The command line
prints its message as one line on stderr and exits non-zero; the Python API lets it propagate.
Messages name the problem, the value received and the fix.

A message names parameters as its caller writes them: ``--to-layer`` and ``DATASET`` on the
command line, ``to_layer`` and ``data`` from Python. Code below the entry points never spells a
parameter itself; it calls :func:`spell` (or :func:`param_noun`), which renders the name for the
caller that :func:`speaking` declared (the runner does, from how the script was called).
"""

from __future__ import annotations

import contextlib
import contextvars
from collections.abc import Iterator
from typing import Any

__all__ = [
    "sentence",
    "spell",
    "param_noun",
    "speaking",
    "PairspreadError",
    "ParameterError",
    "InputError",
    "GeometryError",
    "OutputError",
    "ManifestError",
]


def sentence(text: str) -> str:
    """A message as a sentence: its first word capitalised, unless that word is a name.

    Messages often begin with a label ("layer 'homes' of 'x.gpkg' has ..."); the command line
    prints every error and warning through this, so they all read as sentences. Quoted values, options (``--crs``), names with
    ``-``, ``_`` or digits and one-letter names (``x``) are left as written.

    Examples
    --------
    >>> sentence("layer 'homes' of 'x.gpkg' has no field 'pop'")
    "Layer 'homes' of 'x.gpkg' has no field 'pop'"
    >>> sentence("'x.gpkg' already exists"), sentence("cross-spread needs --to"), sentence("x and y")
    ("'x.gpkg' already exists", 'cross-spread needs --to', 'x and y')
    """
    word = text.split(" ", 1)[0]
    if len(word) > 1 and word.isalpha() and word.islower():
        return text[0].upper() + text[1:]
    return text


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


_UNSET = object()
#: who is being spoken to: "python" (the default) or "cli", and the positional parameters'
#: command-line names (a dataset parameter is the DATASET argument, not an option)
_CALLER: contextvars.ContextVar[tuple[str, dict[str, str]]] = contextvars.ContextVar(
    "pairspread_caller", default=("python", {})
)


@contextlib.contextmanager
def speaking(caller: str, positional: dict[str, str] | None = None) -> Iterator[None]:
    """Render parameter names for ``caller`` ("cli" or "python") inside the ``with`` block.

    Examples
    --------
    >>> with speaking("cli"):
    ...     spell("overwrite", True)
    '--overwrite'
    >>> spell("overwrite", True)
    'overwrite=True'
    """
    if caller not in ("cli", "python"):
        raise ValueError(f"caller must be 'cli' or 'python', not {caller!r}")
    token = _CALLER.set((caller, dict(positional or {})))
    try:
        yield
    finally:
        _CALLER.reset(token)


def spell(name: str, value: Any = _UNSET) -> str:
    """Parameter ``name`` (its Python name), optionally with a value, as the caller writes it.

    Examples
    --------
    >>> spell("to_layer"), spell("distance", "planar"), spell("overwrite", True)
    ("'to_layer'", "distance='planar'", 'overwrite=True')
    >>> with speaking("cli", {"data": "DATASET"}):
    ...     spell("to_layer"), spell("distance", "planar"), spell("overwrite", True), spell("data")
    ('--to-layer', '--distance planar', '--overwrite', 'DATASET')
    """
    caller, positional = _CALLER.get()
    if caller == "cli":
        if name in positional:
            return positional[name]
        option = "--" + name.replace("_", "-")
        if value is _UNSET or value is True:
            return option
        return f"{option} {value}"
    if value is _UNSET:
        return repr(name)
    return f"{name}={value!r}"


def param_noun(name: str) -> str:
    """``name`` with the word for it: "option --crs", "argument DATASET", "keyword argument 'crs'".

    Examples
    --------
    >>> param_noun("tolerance")
    "keyword argument 'tolerance'"
    """
    caller, positional = _CALLER.get()
    if caller == "cli":
        return f"{'argument' if name in positional else 'option'} {spell(name)}"
    return f"keyword argument {spell(name)}"
