"""Group keys across batches: the same group gets the same code in every batch and partition.

Reading a layer whole, :func:`toolbox.grouping.group_features` codes its features at once. Read
in batches (a stream, Dask partitions) no batch sees every group, so a first pass gathers a
small :class:`KeyTable` per batch (the keys it holds, with per-group sums such as the count
and weight of points); key tables merge by key, in any order and grouping, into the table of
the whole layer, whose row order is the one ``group_features`` gives (sorted, nulls last).
Later passes turn each batch's attribute rows into codes of that table with :meth:`KeyTable.codes`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from . import grouping

__all__ = ["KeyTable", "key_table", "key_table_and_codes", "merge_key_tables"]

#: how each per-group column merges: sums add, extents take the smaller or larger end
MERGE_RULES = {"sum": "sum", "min": "min", "max": "max"}


@dataclass(frozen=True)
class KeyTable:
    """Group keys (``fields`` columns) with per-group values that merge by a known rule.

    ``values`` holds one column per name in ``rules`` (``"sum"``, ``"min"`` or ``"max"``);
    row ``i`` of ``keys`` and ``values`` describe the group with code ``i``.
    """

    fields: tuple[str, ...]
    keys: pd.DataFrame
    values: pd.DataFrame
    rules: dict

    @property
    def count(self) -> int:
        """Number of groups."""
        return len(self.keys) if self.fields else 1

    def codes(self, attributes: pd.DataFrame) -> np.ndarray:
        """The code of every row of ``attributes`` (which must hold the key fields).

        Rows whose key is not in the table get -1 (a batch read after the table was made from
        other data); callers refuse them.

        Examples
        --------
        >>> whole = key_table(pd.DataFrame({"zone": ["b", "a", "b"]}), ["zone"])
        >>> whole.codes(pd.DataFrame({"zone": ["a", "b", "c"]})).tolist()
        [0, 1, -1]
        """
        if not self.fields:
            return np.zeros(len(attributes), dtype=np.int64)
        local = grouping.group_features(attributes, list(self.fields))
        known = _as_objects(self.keys).assign(_code=np.arange(len(self.keys)))
        found = _as_objects(local.keys).merge(known, how="left", on=list(self.fields), sort=False)
        mapping = found["_code"].fillna(-1).to_numpy(dtype=np.int64)
        return mapping[local.codes]

    def grouping(self) -> grouping.Grouping:
        """The table as a :class:`toolbox.grouping.Grouping` without feature codes (for naming)."""
        keys = self.keys if self.fields else pd.DataFrame(index=range(1))
        return grouping.Grouping(np.zeros(0, dtype=np.int64), keys)


def _as_objects(frame: pd.DataFrame) -> pd.DataFrame:
    """Keys as Python objects, so that batches that read a field as int64 in one batch and float64
    (nulls present) in another still match (1 == 1.0 and hash alike)."""
    out = frame.astype(object)
    return out.where(out.notna(), None)


def key_table(
    attributes: pd.DataFrame,
    fields: Sequence[str],
    values: dict[str, np.ndarray] | None = None,
    rules: dict[str, str] | None = None,
    per_row: np.ndarray | None = None,
) -> KeyTable:
    """The key table of one batch: its groups and, per group, ``values`` merged by ``rules``.

    Parameters
    ----------
    attributes : pandas.DataFrame
        One row per feature, holding the key fields.
    fields : sequence of str
        Key fields (none: one group).
    values : dict of str to ndarray, optional
        Per-point values to reduce per group; ``per_row`` maps points to feature rows.
    rules : dict of str to {"sum", "min", "max"}
        How each value reduces within a group and merges between batches.
    per_row : ndarray of int, optional
        Row of ``attributes`` of every point (default: one point per row).

    Examples
    --------
    >>> t = key_table(pd.DataFrame({"zone": ["b", "a", "b"]}), ["zone"], {"n": np.ones(3)}, {"n": "sum"})
    >>> t.keys["zone"].tolist(), t.values["n"].tolist()
    (['a', 'b'], [1.0, 2.0])
    """
    return key_table_and_codes(attributes, fields, values, rules, per_row)[0]


def key_table_and_codes(
    attributes, fields, values=None, rules=None, per_row=None
) -> tuple[KeyTable, np.ndarray]:
    """:func:`key_table` and the batch-local code of every point (a row of the table)."""
    fields = tuple(fields)
    values, rules = dict(values or {}), dict(rules or {})
    local = grouping.group_features(attributes, list(fields))
    codes = local.codes if per_row is None else local.codes[per_row]
    reduced = {}
    for name, column in values.items():
        reduced[name] = _reduce(codes, np.asarray(column, dtype=np.float64), rules[name], local.count)
    return KeyTable(fields, local.keys.reset_index(drop=True), pd.DataFrame(reduced), rules), codes


def _reduce(codes: np.ndarray, column: np.ndarray, rule: str, count: int) -> np.ndarray:
    """Per-code sum, min or max of ``column`` (numpy's grouped reductions: no pandas overhead)."""
    if rule == "sum":
        return np.bincount(codes, column, minlength=count)
    out = np.full(count, np.inf if rule == "min" else -np.inf)
    (np.minimum if rule == "min" else np.maximum).at(out, codes, column)
    return out


def merge_key_tables(tables: Sequence[KeyTable]) -> KeyTable:
    """One key table from several of the same fields and rules, keys sorted as ``group_features``.

    Merging is associative and commutative, so batches and partitions may be merged in any
    order and tree.

    Examples
    --------
    >>> a = key_table(pd.DataFrame({"z": ["b", None]}), ["z"], {"n": np.ones(2)}, {"n": "sum"})
    >>> b = key_table(pd.DataFrame({"z": ["a", "b"]}), ["z"], {"n": np.ones(2)}, {"n": "sum"})
    >>> m = merge_key_tables([a, b])
    >>> m.keys["z"].fillna("(null)").tolist(), m.values["n"].tolist()
    (['a', 'b', '(null)'], [1.0, 2.0, 1.0])
    """
    tables = [t for t in tables if t is not None]
    first = tables[0]
    if len(tables) == 1:
        return first
    if not first.fields:
        stacked = pd.concat([t.values for t in tables], ignore_index=True)
        merged = pd.DataFrame({n: [stacked[n].agg(r)] for n, r in first.rules.items()})
        return KeyTable((), first.keys, merged, first.rules)
    fields = list(first.fields)
    frames = [pd.concat([_as_objects(t.keys), t.values], axis=1) for t in tables]
    stacked = pd.concat(frames, ignore_index=True)
    grouped = stacked.groupby(fields, dropna=False, sort=True)
    merged = (
        grouped.agg({n: MERGE_RULES[r] for n, r in first.rules.items()}) if first.rules else grouped.size()
    )
    merged = merged.reset_index() if first.rules else merged.reset_index()[fields]
    keys = _typed_keys(merged[fields], [t.keys for t in tables])
    return KeyTable(first.fields, keys, merged[list(first.rules)].reset_index(drop=True), first.rules)


def _typed_keys(keys: pd.DataFrame, originals: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Keys back from Python objects to the columns' own dtype where the batches agree on one."""
    out = {}
    for field in keys.columns:
        dtypes = {str(o[field].dtype) for o in originals if len(o) and o[field].notna().any()}
        column = keys[field]
        if len(dtypes) == 1:
            try:
                column = column.astype(next(iter(dtypes)))
            except (TypeError, ValueError):
                pass
        out[field] = column.reset_index(drop=True)
    return pd.DataFrame(out)
