"""Shaping result tables: group labels, null kept apart from empty text, the wide matrix.

Group values reach the user in several shapes: as key columns, as the ``from_group`` and
``to_group`` labels of cross-spread, as column names of the ``--wide`` matrix, printed on the
terminal and written as CSV, GeoPackage or Parquet. A null value and an empty text are different
groups, so they stay different in every one of these shapes:

========================  ==================  ============
shape                     null                empty text
========================  ==================  ============
key or label column       null (NULL, None)   ``""``
label of several fields   ``(null)`` part     ``""`` part
wide column name          ``(null)``          ``(empty)``
printed table             ``(null)``          ``""``
CSV                       empty field         ``""``
========================  ==================  ============

Column names of the wide matrix are also made unique ignoring case (GeoPackage columns are
SQLite columns, which ignore case), non-empty (GDAL drops unnamed fields) and different from
``from_group`` and ``fid``; the result carries the mapping from column to group value in
``attrs["wide_columns"]``, and a warning lists every name that differs from its group's value.
"""

from __future__ import annotations

import csv
import io
import warnings
import weakref
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "NULL_TEXT",
    "EMPTY_TEXT",
    "group_labels",
    "column_names",
    "wide_matrix",
    "for_display",
    "csv_text",
    "feature_ids",
    "feature_names",
    "name_features",
    "NOTES",
    "add_notes",
    "noted_groups",
    "noted_pairs",
]

#: how a null group value is written where text is needed (a label part, a column name, print)
NULL_TEXT = "(null)"
#: how an empty-text group value is named as a column (a column name cannot be empty)
EMPTY_TEXT = "(empty)"
#: column names a wide matrix may not use: its label column, and GeoPackage's key column
_RESERVED = ("from_group", "fid")


def _is_null(value: Any) -> bool:
    return (
        value is None or value is pd.NA or value is pd.NaT or (isinstance(value, float) and np.isnan(value))
    )


def _text(value: Any) -> str:
    return NULL_TEXT if _is_null(value) else str(value)


def _numbered(names: Iterable[str], taken: Iterable[str] = ()) -> list[str]:
    """``names`` made unique ignoring case: a repeated name gets " (2)", " (3)", ..."""
    used = {t.lower() for t in taken}
    out = []
    for base in names:
        name, k = base, 2
        while name.lower() in used:
            name, k = f"{base} ({k})", k + 1
        used.add(name.lower())
        out.append(name)
    return out


def group_labels(keys: pd.DataFrame) -> np.ndarray:
    """One label per group (a row of ``keys``), for the ``from_group``/``to_group`` columns.

    One field: the value itself, a null staying null and an empty text staying ``""``. Several
    fields: the values joined by " / ", a null shown as ``(null)``; labels that would coincide
    (a value holding " / ") are numbered. No field: ``all``.

    Examples
    --------
    >>> keys = pd.DataFrame({"site": ["north", "", None]})
    >>> group_labels(keys).tolist()
    ['north', '', None]
    >>> group_labels(pd.DataFrame({"a": ["x", None, "x / y"], "b": ["y / z", "", "z"]})).tolist()
    ['x / y / z', '(null) / ', 'x / y / z (2)']
    """
    if keys.shape[1] == 0:
        return np.array(["all"] * len(keys), dtype=object)
    if keys.shape[1] == 1:
        values = keys.iloc[:, 0].astype(object).to_numpy()
        return np.array([None if _is_null(v) else v for v in values], dtype=object)
    joined = [" / ".join(_text(v) for v in row) for row in keys.itertuples(index=False)]
    return np.array(_numbered(joined), dtype=object)


def column_names(values: Sequence[Any], *, taken: Sequence[str] = _RESERVED) -> list[str]:
    """Unique, non-empty column names for group ``values``, in their order.

    Examples
    --------
    >>> column_names(["North", "north", "", "(null)", None, "from_group", "FID"])
    ['North', 'north (2)', '(empty)', '(null) (2)', '(null)', 'from_group (2)', 'FID (2)']
    """
    # the null group is named first, so that it is '(null)' even beside a value '(null)'
    nulls = [i for i, v in enumerate(values) if _is_null(v)]
    names = dict(zip(nulls, _numbered([NULL_TEXT] * len(nulls), taken), strict=True))
    others = [i for i in range(len(values)) if i not in names]
    bases = [EMPTY_TEXT if not str(values[i]).strip() else str(values[i]) for i in others]
    names.update(zip(others, _numbered(bases, [*taken, *names.values()]), strict=True))
    return [names[i] for i in range(len(values))]


def wide_matrix(long: pd.DataFrame, values: str = "mean_dist") -> pd.DataFrame:
    """The long cross table as a matrix: one row per from-group, one column per to-group.

    Rows and columns keep the order of first appearance. The row labels stay group values
    (null and ``""`` apart); column names come from :func:`column_names`, and
    ``attrs["wide_columns"]`` maps each column to its group's value.

    Examples
    --------
    >>> long = pd.DataFrame({"from_group": ["a", "a", "", ""], "to_group": ["a", "", "a", ""],
    ...                      "mean_dist": [1.0, 2.0, 2.0, 3.0]})
    >>> wide = wide_matrix(long)
    >>> wide.columns.tolist(), wide.attrs["wide_columns"]
    (['from_group', 'a', '(empty)'], {'a': 'a', '(empty)': ''})
    >>> wide["from_group"].tolist(), wide["(empty)"].tolist()
    (['a', ''], [2.0, 3.0])
    """
    row_codes, row_values = pd.factorize(long["from_group"].astype(object), use_na_sentinel=False)
    col_codes, col_values = pd.factorize(long["to_group"].astype(object), use_na_sentinel=False)
    matrix = np.full((len(row_values), len(col_values)), np.nan)
    matrix[row_codes, col_codes] = long[values].to_numpy(dtype=float)
    names = column_names(list(col_values))
    wide = pd.DataFrame(matrix, columns=names)
    wide.insert(0, "from_group", pd.Series([None if _is_null(v) else v for v in row_values], dtype=object))
    mapping = {name: (None if _is_null(v) else v) for name, v in zip(names, col_values, strict=True)}
    wide.attrs["wide_columns"] = mapping
    if NOTES in long.attrs:  # the matrix has no room for a note per cell: they stay in attrs
        wide.attrs[NOTES] = dict(long.attrs[NOTES])
    renamed = [f"{v!r} → {name!r}" for name, v in mapping.items() if v is not None and name != str(v)]
    if renamed:
        warnings.warn(
            "Some groups are named differently as columns of the wide table (column names must "
            f"be unique ignoring case, non-empty and not {' or '.join(_RESERVED)}; a null group "
            f"is {NULL_TEXT!r}): " + ", ".join(renamed),
            UserWarning,
            stacklevel=2,
        )
    return wide


#: key of ``attrs`` under which a result keeps {affected group: why it could not be computed},
#: for the runner's one warning, ``strict`` and the output's provenance
NOTES = "notes"


def add_notes(table: pd.DataFrame, row_notes: Iterable[Any], affected: dict[str, str]) -> pd.DataFrame:
    """Give ``table`` its ``note`` column (null where the row was computed) and ``attrs["notes"]``.

    ``affected`` names each group that could not be computed with its note (see
    :func:`noted_groups`); the runner turns it into one warning, or refuses with ``strict``.
    It is set even when empty, so a table made from an earlier result never carries stale notes.

    Examples
    --------
    >>> t = add_notes(pd.DataFrame({"zone": ["a", "b"]}), ["", "too wide"], {"b": "too wide"})
    >>> t["note"].tolist(), t.attrs["notes"]
    ([None, 'too wide'], {'b': 'too wide'})
    """
    table["note"] = pd.Series(
        [n if isinstance(n, str) and n else None for n in row_notes], index=table.index, dtype=object
    )
    table.attrs[NOTES] = dict(affected)
    return table


def noted_groups(labels: Sequence[Any], notes: Sequence[str], codes: Sequence[int] | None = None) -> dict[str, str]:
    """{group label: its note} for every group with a note; ``codes`` maps entries to groups.

    Examples
    --------
    >>> noted_groups(["north", None], ["", "too wide"])
    {'(null)': 'too wide'}
    >>> noted_groups(["north", "south"], ["x", "", "x"], codes=[0, 1, 0])
    {'north': 'x'}
    """
    codes = range(len(notes)) if codes is None else codes
    found: dict[str, str] = {}
    for code, note in zip(codes, notes, strict=True):
        if isinstance(note, str) and note:
            found.setdefault(_text(labels[code]), str(note))
    return found


def noted_pairs(labels: Sequence[Any], notes: np.ndarray) -> dict[str, str]:
    """{label: note} for a G × G matrix of notes (cross sums), naming what was not computed.

    A group whose own pairs have a note is named once (every row it is in has a note); a
    pair of groups that could each be computed, but not together, is named ``"A ↔ B"``.

    Examples
    --------
    >>> notes = np.array([["wide", "wide", "wide"], ["wide", "", "far"], ["wide", "far", ""]])
    >>> noted_pairs(["world", "town", "port"], notes)
    {'world': 'wide', 'town ↔ port': 'far'}
    """
    own = [bool(notes[g, g]) for g in range(len(labels))]
    found = noted_groups(labels, [notes[g, g] for g in range(len(labels))])
    for a, b in zip(*np.nonzero(np.triu(notes.astype(bool), 1)), strict=True):
        if not (own[a] or own[b]):
            found.setdefault(f"{_text(labels[a])} ↔ {_text(labels[b])}", str(notes[a, b]))
    return found


def _text_columns(frame: pd.DataFrame) -> list[str]:
    return [
        c
        for c in frame.columns
        if not pd.api.types.is_numeric_dtype(frame[c])
        and not pd.api.types.is_bool_dtype(frame[c])
        and c != getattr(frame, "_geometry_column_name", None)
    ]


def for_display(table: pd.DataFrame) -> pd.DataFrame:
    """A copy for printing: a null as ``(null)``, an empty text as ``""``, other values as they are.

    Examples
    --------
    >>> for_display(pd.DataFrame({"zone": ["a", "", None], "n": [1, 2, 3]}))["zone"].tolist()
    ['a', '""', '(null)']
    """
    shown = table.copy()
    for column in _text_columns(shown):
        shown[column] = [
            NULL_TEXT if _is_null(v) else ('""' if isinstance(v, str) and v == "" else v)
            for v in shown[column].astype(object)
        ]
    return shown


def csv_text(frame: pd.DataFrame) -> str:
    """The frame as CSV text with a null as an empty field and an empty text as ``""``.

    pandas writes both as an empty field; the quoted form is how CSV tells them apart.

    Examples
    --------
    >>> print(csv_text(pd.DataFrame({"zone": ["a", "", None], "n": [1, 2, 3]})), end="")
    zone,n
    a,1
    "",2
    ,3
    """
    columns = _text_columns(frame)
    if not columns:
        return frame.to_csv(index=False, lineterminator="\n")
    text_values = [str(v) for c in columns for v in frame[c].dropna()]
    marker = "\x1e"  # a control character no value holds (checked; another is taken otherwise)
    while any(marker in v for v in text_values):
        marker += "\x1e"
    out = frame.copy()
    for column in columns:
        out[column] = [marker if isinstance(v, str) and v == "" else v for v in out[column].astype(object)]
    buffer = io.StringIO()
    out.to_csv(buffer, index=False, lineterminator="\n", quoting=csv.QUOTE_MINIMAL)
    # the marker is a whole field wherever an empty text was (no value contains it)
    return buffer.getvalue().replace(marker, '""')


#: how the rows of a frame read for a script are known to the user, kept beside the frame (not
#: in ``attrs``: pandas compares attrs when concatenating and writes them into Parquet files)
_NAMES: dict[int, tuple[weakref.ref, tuple[str, np.ndarray]]] = {}


def name_features(frame: pd.DataFrame, kind: str, ids: np.ndarray) -> None:
    """Remember that the rows of ``frame`` are the features ``ids`` ("FID" or "index" labels)."""
    key = id(frame)
    _NAMES[key] = (weakref.ref(frame), (kind, np.asarray(ids)))
    weakref.finalize(frame, _NAMES.pop, key, None)


def feature_names(frame: pd.DataFrame) -> tuple[str, np.ndarray] | None:
    """What :func:`name_features` remembered for ``frame``, or None."""
    ref, names = _NAMES.get(id(frame), (None, None))
    return names if ref is not None and ref() is frame else None


def feature_ids(attributes: pd.DataFrame, positions: Sequence[int], limit: int = 5) -> str:
    """How a user finds the features at ``positions`` of a layer read for a script.

    The reader names the rows (:func:`name_features`): the layer's FIDs for a file OGR reads
    (a GeoPackage numbers them from 1), or the index labels of a GeoDataFrame. Without names
    (GeoParquet, standard input, fiona) the rows are counted from 1 and the message says so.

    Examples
    --------
    >>> table = pd.DataFrame({"w": [1.0, -1.0, 2.0, -3.0]})
    >>> feature_ids(table, [1, 3])
    'rows 2, 4 (1-based)'
    >>> name_features(table, "FID", np.array([10, 11, 12, 13]))
    >>> feature_ids(table, [1]), feature_ids(table, [1, 3])
    ('FID 11', 'FIDs 11, 13')
    """
    positions = np.asarray(positions, dtype=np.int64)
    kind, ids = feature_names(attributes) or (None, None)
    if ids is None or len(ids) != len(attributes):
        shown, word, words, suffix = positions + 1, "row", "rows", " (1-based)"
    else:
        shown, suffix = np.asarray(ids)[positions], ""
        word, words = (kind, kind + "s") if kind == "FID" else (kind, kind)
    text = ", ".join(str(v) for v in shown[:limit]) + (", ..." if len(shown) > limit else "")
    return f"{word if len(shown) == 1 else words} {text}{suffix}"
