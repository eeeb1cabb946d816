"""Group keys across batches: the same group gets the same code in every batch and partition.

Reading a layer whole, :func:`toolbox.grouping.group_features` codes its features at once. Read
in batches (a stream, Dask partitions) no batch sees every group. Each batch's groups form a
small :class:`KeyTable`; key tables merge by value, in any order and tree, into the table of
the whole layer, whose row order is the one ``group_features`` gives (sorted, nulls last).
In one process a :class:`KeyRegistry` does the same incrementally: each batch's keys get
running codes as they come, and :meth:`KeyRegistry.table` sorts them once at the end.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import grouping

__all__ = ["KeyTable", "KeyRegistry", "key_table", "merge_key_tables"]


def _key(values) -> tuple:
    """A hashable key of one row: nulls of any kind become None; 1 and 1.0 hash alike."""
    return tuple(None if pd.isna(v) else v for v in values)


@dataclass(frozen=True)
class KeyTable:
    """Group keys: row ``i`` of ``keys`` (one column per field) is the group with code ``i``.

    Without fields there is one group (the whole layer) and ``keys`` has no columns.
    """

    fields: tuple[str, ...]
    keys: pd.DataFrame
    _lookup: dict = field(default_factory=dict, repr=False, compare=False)

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
        if not self._lookup:
            rows = self.keys[list(self.fields)].to_numpy(dtype=object)
            self._lookup.update({_key(row): code for code, row in enumerate(rows)})
        local = grouping.group_features(attributes, list(self.fields))
        rows = local.keys[list(self.fields)].to_numpy(dtype=object)
        mapping = np.array([self._lookup.get(_key(row), -1) for row in rows], dtype=np.int64)
        return mapping[local.codes]

    def grouping(self) -> grouping.Grouping:
        """The table as a :class:`toolbox.grouping.Grouping` without feature codes (for naming)."""
        keys = self.keys if self.fields else pd.DataFrame(index=range(1))
        return grouping.Grouping(np.zeros(0, dtype=np.int64), keys)


def key_table(attributes: pd.DataFrame, fields: Sequence[str]) -> KeyTable:
    """The key table of one batch (its groups, sorted as ``group_features`` sorts them).

    Examples
    --------
    >>> key_table(pd.DataFrame({"zone": ["b", "a", "b"]}), ["zone"]).keys["zone"].tolist()
    ['a', 'b']
    """
    local = grouping.group_features(attributes, list(fields))
    return KeyTable(tuple(fields), local.keys.reset_index(drop=True))


def merge_key_tables(tables: Sequence[KeyTable]) -> KeyTable:
    """One key table from several of the same fields, keys sorted as ``group_features`` sorts.

    Merging is associative and commutative, so batches and partitions may be merged in any
    order and tree.

    Examples
    --------
    >>> a = key_table(pd.DataFrame({"z": ["b", None]}), ["z"])
    >>> b = key_table(pd.DataFrame({"z": ["a", "b"]}), ["z"])
    >>> merge_key_tables([a, b]).keys["z"].fillna("(null)").tolist()
    ['a', 'b', '(null)']
    """
    tables = [t for t in tables if t is not None]
    first = tables[0]
    if len(tables) == 1 or not first.fields:
        return first
    stacked = pd.concat([t.keys for t in tables], ignore_index=True)
    return _sorted_unique(first.fields, stacked)


def _sorted_unique(fields: tuple[str, ...], stacked: pd.DataFrame) -> KeyTable:
    """The distinct rows of ``stacked``, sorted as ``group_features`` sorts them."""
    rows = stacked[list(fields)]
    try:  # the batches agree on each field's type (the usual case): pandas sorts them as is
        keys = grouping.group_features(rows, list(fields)).keys
    except TypeError:  # e.g. int64 in one batch and float64 (with nulls) in another
        keys = grouping.group_features(rows.astype(object), list(fields)).keys
    keys = keys.reset_index(drop=True)
    unique = {_key(row) for row in keys.to_numpy(dtype=object)}
    if len(unique) < len(keys):  # 1 and 1.0 in different batches: one group
        keys = grouping.group_features(keys.astype(object).where(keys.notna(), None), list(fields)).keys
    return KeyTable(fields, keys.reset_index(drop=True))


@dataclass
class KeyRegistry:
    """Group keys met so far, numbered as they come (a running code per key).

    Examples
    --------
    >>> registry = KeyRegistry(("zone",))
    >>> registry.add(pd.DataFrame({"zone": ["b", "c"]})).tolist(), registry.add(pd.DataFrame({"zone": ["a", "b"]})).tolist()
    ([0, 1], [2, 0])
    >>> table, order = registry.table()
    >>> table.keys["zone"].tolist(), order.tolist()
    (['a', 'b', 'c'], [1, 2, 0])
    """

    fields: tuple[str, ...]
    codes: dict = field(default_factory=dict)
    rows: list = field(default_factory=list)

    @property
    def count(self) -> int:
        """Number of groups met so far (1 without fields)."""
        return len(self.codes) if self.fields else 1

    def add(self, keys: pd.DataFrame) -> np.ndarray:
        """Running codes of the rows of ``keys`` (one row per group of a batch), new ones added."""
        if not self.fields:
            return np.zeros(1, dtype=np.int64)
        frame = keys[list(self.fields)]
        out = np.empty(len(frame), dtype=np.int64)
        new = []
        for i, row in enumerate(frame.to_numpy(dtype=object)):
            key = _key(row)
            code = self.codes.get(key)
            if code is None:
                code = self.codes[key] = len(self.codes)
                new.append(i)
            out[i] = code
        if new:
            self.rows.append(frame.iloc[new])
        return out

    def table(self) -> tuple[KeyTable, np.ndarray]:
        """The sorted key table, and the code in it of every running code."""
        if not self.fields:
            return KeyTable((), pd.DataFrame(index=range(1))), np.zeros(1, dtype=np.int64)
        table = _sorted_unique(self.fields, pd.concat(self.rows, ignore_index=True))
        rows = pd.concat(self.rows, ignore_index=True).to_numpy(dtype=object)
        return table, table.codes(pd.DataFrame(rows, columns=list(self.fields)))
