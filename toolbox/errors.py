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
    "current_caller",
    "param_noun",
    "speaking",
    "PairspreadError",
    "ParameterError",
    "InputError",
    "GeometryError",
    "OutputError",
    "ManifestError",
    "PartialResultError",
    "PartialResultWarning",
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


class PartialResultError(PairspreadError):
    """Some groups could not be computed, and ``strict`` asked for all or nothing.

    Nothing was written. The command line exits with status 3 (``--strict``).
    """

    exit_code = 3


class PartialResultWarning(UserWarning):
    """Some groups could not be computed: their rows have empty distances and a ``note``.

    The other groups are complete. Turn it into :class:`PartialResultError` with
    ``strict=True`` (``--strict``), or into an exception of its own with :mod:`warnings` filters.
    """


_UNSET = object()
#: who is being spoken to: "python" (the default), "cli" or "chain" (a chain file's keys), and
#: names with a fixed spelling (the DATASET argument; a chain command's own options)
_CALLER: contextvars.ContextVar[tuple[str, dict[str, str]]] = contextvars.ContextVar(
    "pairspread_caller", default=("python", {})
)
CALLERS = ("python", "cli", "chain")


def current_caller() -> str:
    """The caller messages are rendered for now: "python", "cli" or "chain"."""
    return _CALLER.get()[0]


@contextlib.contextmanager
def speaking(caller: str, fixed: dict[str, str] | None = None) -> Iterator[None]:
    """Render parameter names for ``caller`` inside the ``with`` block.

    ``fixed`` gives names a spelling of their own (on the command line the dataset parameter
    is the DATASET argument, not an option).

    Examples
    --------
    >>> with speaking("cli"):
    ...     spell("overwrite", True)
    '--overwrite'
    >>> spell("overwrite", True)
    'overwrite=True'
    >>> with speaking("chain", {"overwrite": "--overwrite"}):
    ...     spell("tolerance", 2), param_noun("tolerance"), spell("overwrite", True)
    ('tolerance = 2', "parameter 'tolerance'", '--overwrite')
    """
    if caller not in CALLERS:
        raise ValueError(f"caller must be one of {', '.join(CALLERS)}, not {caller!r}")
    token = _CALLER.set((caller, dict(fixed or {})))
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
    caller, fixed = _CALLER.get()
    if name in fixed:
        return fixed[name]
    if caller == "cli":
        option = "--" + name.replace("_", "-")
        if value is _UNSET or value is True:
            return option
        return f"{option} {value}"
    if value is _UNSET:
        return repr(name)
    if caller == "chain":  # as written in the chain file (TOML)
        return f"{name} = {str(value).lower() if isinstance(value, bool) else repr(value)}"
    return f"{name}={value!r}"


def param_noun(name: str) -> str:
    """``name`` with the word for it: "option --crs", "argument DATASET", "keyword argument 'crs'".

    Examples
    --------
    >>> param_noun("tolerance")
    "keyword argument 'tolerance'"
    """
    caller, fixed = _CALLER.get()
    if caller == "cli":
        return f"{'argument' if name in fixed else 'option'} {spell(name)}"
    if caller == "chain":
        return f"parameter {spell(name)}"
    return f"keyword argument {spell(name)}"
