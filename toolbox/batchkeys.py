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


def _plain(keys: pd.DataFrame) -> pd.DataFrame:
    """Key columns of categories in sorted order (a text field read as a dictionary) as their
    values: such keys sort alike either way, and the table then holds the field's own type."""
    for name in keys.columns:
        column = keys[name]
        if isinstance(column.dtype, pd.CategoricalDtype) and column.cat.categories.is_monotonic_increasing:
            keys = keys.assign(**{name: column.astype(column.cat.categories.dtype)})
    return keys


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

    def __post_init__(self) -> None:
        object.__setattr__(self, "keys", _plain(self.keys))

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
        if len(self.fields) == 1:  # a hash pass over the rows, a lookup per distinct value
            local, uniques = pd.factorize(attributes[self.fields[0]])  # nulls: -1, the last entry
            keys = [(value,) for value in uniques.tolist()] + [(None,)]
            return np.array([self._lookup.get(key, -1) for key in keys], dtype=np.int64)[local]
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


#: widest range of integer keys looked up through a table (8 bytes an entry: 32 MiB at most)
INTEGER_TABLE_SPAN = 1 << 22


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
    #: running code of integer key ``_table_start + i`` at ``i`` (-1: not looked up yet), a
    #: cache of ``codes`` for one integer field
    _table: np.ndarray | None = field(default=None, init=False, repr=False)
    _table_start: int = field(default=0, init=False, repr=False)

    @property
    def count(self) -> int:
        """Number of groups met so far (1 without fields)."""
        return len(self.codes) if self.fields else 1

    def add(self, keys: pd.DataFrame) -> np.ndarray:
        """Running codes of the rows of ``keys`` (one row per group of a batch), new ones added."""
        if not self.fields:
            return np.zeros(1, dtype=np.int64)
        frame = keys[list(self.fields)]
        out, new = self._running((_key(row) for row in frame.to_numpy(dtype=object)), len(frame))
        if new:
            self.rows.append(_plain(frame.iloc[new]))
        return out

    def code(self, attributes: pd.DataFrame) -> np.ndarray:
        """Running codes of every row of ``attributes`` (which holds the key fields), new keys added.

        The codes :meth:`add` gives the batch's groups, row by row. One key field costs a hash
        pass over the rows (a table lookup for integers in a modest range) and Python work per
        distinct key only, so that batches of many rows in few groups code cheaply.

        Examples
        --------
        >>> registry = KeyRegistry(("zone",))
        >>> registry.code(pd.DataFrame({"zone": [7, 5, 7]})).tolist()
        [0, 1, 0]
        >>> registry.code(pd.DataFrame({"zone": [5.0, None, 6.0]})).tolist()  # 5.0 is 5; a new null key is added last
        [1, 3, 2]
        """
        rows = len(attributes)
        if not self.fields:
            return np.zeros(rows, dtype=np.int64)
        if len(self.fields) > 1:
            return self._code_fields(attributes)
        column = attributes[self.fields[0]]
        dtype = column.dtype
        if rows and isinstance(dtype, np.dtype) and (dtype.kind == "i" or (dtype.kind == "u" and dtype.itemsize < 8)):
            codes = self._looked_up(column.to_numpy())
            if codes is not None:
                return codes
        local, uniques = pd.factorize(column)  # hashing; nulls of any kind get -1
        return self._add_values(uniques, column, local)[local]

    def _code_fields(self, attributes: pd.DataFrame) -> np.ndarray:
        """:meth:`code` for several key fields: each field hashed on its own, the rows' combined
        numbers hashed once more, and the registry's dict consulted once per distinct combination."""
        frame = attributes[list(self.fields)]
        combined, fields, span = np.zeros(len(frame), dtype=np.int64), [], 1
        for name in self.fields:
            local, uniques = pd.factorize(frame[name])  # nulls: -1
            span *= len(uniques) + 1
            if span >= 1 << 62:  # the combined numbers would overflow: pandas' groupby instead
                local = grouping.group_features(frame, list(self.fields))
                return self.add(local.keys)[local.codes]
            combined = combined * (len(uniques) + 1) + (local + 1)
            fields.append([*uniques.tolist(), None])  # position -1: the null
        if span <= len(frame):  # few combinations possible: a table over them, no hashing
            present = np.zeros(span, dtype=bool)
            present[combined] = True
            combinations = np.flatnonzero(present)
            local = (np.cumsum(present) - 1)[combined]
        else:
            local, combinations = pd.factorize(combined)
        first = np.empty(len(combinations), dtype=np.int64)
        first[local] = np.arange(len(frame))  # a row of each combination (any: its keys are the same)
        positions, rest = [], np.asarray(combinations, dtype=np.int64)
        for values in fields[::-1]:
            rest, position = np.divmod(rest, len(values))
            positions.append((values, (position - 1).tolist()))
        keys = (tuple(values[at[i]] for values, at in positions[::-1]) for i in range(len(combinations)))
        out, new = self._running(keys, len(combinations))  # keys as _key makes them
        if new:
            self.rows.append(_plain(frame.iloc[first[new]].reset_index(drop=True)))
        return out[local]

    def _running(self, keys, size: int) -> tuple[np.ndarray, list[int]]:
        """Running codes of distinct ``keys`` (new ones registered, in order) in an array of
        ``size``, and the positions of the new ones."""
        out = np.zeros(size, dtype=np.int64)
        new, codes = [], self.codes
        for i, key in enumerate(keys):
            code = codes.get(key)
            if code is None:
                code = codes[key] = len(codes)
                new.append(i)
            out[i] = code
        return out, new

    def _add_values(self, uniques: pd.Index, column: pd.Series, local: np.ndarray) -> np.ndarray:
        """Running codes of the distinct non-null values ``uniques`` of one key field, then
        (last, for the code -1 of nulls) that of the null key, if ``column`` has nulls."""
        # keys as _key makes them: the value itself (1 and 1.0 alike); the last slot for nulls
        out, new = self._running(((value,) for value in uniques.tolist()), len(uniques) + 1)
        codes = self.codes
        if new:
            self.rows.append(_plain(pd.DataFrame({self.fields[0]: uniques[new]})))
        nulls = np.flatnonzero(local < 0)
        if nulls.size:
            code = codes.get((None,))
            if code is None:
                code = codes[(None,)] = len(codes)
                self.rows.append(_plain(column.iloc[nulls[:1]].to_frame(self.fields[0]).reset_index(drop=True)))
            out[-1] = code
        return out

    def _looked_up(self, values: np.ndarray) -> np.ndarray | None:
        """Running codes of integer keys through a table indexed by value (None when their
        range is too wide for one): a gather per row, the registry's dict only for new keys."""
        lo, hi = int(values.min()), int(values.max())
        table, start = self._table, self._table_start
        if table is not None and start <= lo and hi < start + table.size:
            codes = table[values - np.int64(start)]
            if codes.min() >= 0:
                return codes
        if table is not None:
            lo, hi = min(lo, start), max(hi, start + table.size - 1)
        if hi - lo >= INTEGER_TABLE_SPAN:
            return None
        local, uniques = pd.factorize(values)
        running = self._add_values(pd.Index(uniques), pd.Series(values), local)[:-1]
        wider = np.full(hi - lo + 1, -1, dtype=np.int64)
        if table is not None:
            wider[start - lo : start - lo + table.size] = table
        wider[uniques.astype(np.int64) - lo] = running
        self._table, self._table_start = wider, lo
        return running[local]

    def running_table(self) -> KeyTable:
        """The keys met so far in running-code order: row ``i`` is the group of running code ``i``."""
        if not self.fields:
            return KeyTable((), pd.DataFrame(index=range(1)))
        rows = pd.concat(self.rows, ignore_index=True) if self.rows else pd.DataFrame(columns=list(self.fields))
        return KeyTable(self.fields, rows)

    def table(self) -> tuple[KeyTable, np.ndarray]:
        """The sorted key table, and the code in it of every running code."""
        if not self.fields:
            return KeyTable((), pd.DataFrame(index=range(1))), np.zeros(1, dtype=np.int64)
        table = _sorted_unique(self.fields, pd.concat(self.rows, ignore_index=True))
        rows = pd.concat(self.rows, ignore_index=True).to_numpy(dtype=object)
        return table, table.codes(pd.DataFrame(rows, columns=list(self.fields)))
