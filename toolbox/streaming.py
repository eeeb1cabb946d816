"""A layer read in batches, made ready for the estimator: pass 1, group codes, and a spill.

The estimator's binned state is planned from per-group count, weight and extent, then filled
batch by batch. :func:`prepare` is that first pass: it reads every batch once (in this process,
or on the Dask workers), checks weights and geometries, turns coordinates into the estimator's
(planar in the layer's CRS or in ``--crs``, or longitude and latitude for geodesic distances)
and gathers a :class:`~toolbox.batchkeys.KeyTable` of the groups with their count, weight,
extent and centroid sums. The result, :class:`Prepared`, replays the layer as estimator-ready
batches ``(x, y, weights, codes)`` as often as later passes need:

- in this process, pass 1 also writes each batch's decoded columns to a spill file in the
  temporary folder (about 28 bytes a point, when the disk has twice that free); later passes
  read it back instead of decoding the source again, which costs a fraction of parsing WKB
  or OGR features (and the OS's page cache usually still holds it);
- otherwise (no room, or on a cluster, where each worker reads its own partition) later passes
  read the source again and code each batch from the key table.

Memory stays bounded by one batch and the key table, whatever the layer's size.
"""

from __future__ import annotations

import functools
import os
import shutil
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import grouping
from .batchkeys import KeyTable, merge_key_tables
from .cluster import reduce_parts
from .errors import InputError
from .kernels.summary import group_summary
from .layers import PointLayer
from .layers.stream import LayerParts, prefetched

__all__ = ["Prepared", "prepare", "SPILL_BYTES_PER_POINT"]

#: bytes a point takes in the spill: x, y and weight as float64, its batch-local group code
SPILL_BYTES_PER_POINT = 28
#: per-group values gathered in pass 1 and how they merge
PASS1_RULES = {
    "n_points": "sum",
    "weight_sum": "sum",
    "xmin": "min",
    "xmax": "max",
    "ymin": "min",
    "ymax": "max",
    "wx": "sum",
    "wy": "sum",
    "ux": "sum",
    "uy": "sum",
    "uz": "sum",
}


@dataclass
class _Decoded:
    """One batch in the estimator's coordinates, with its local group codes and keys."""

    x: np.ndarray
    y: np.ndarray
    w: np.ndarray | None
    local_codes: np.ndarray
    table: KeyTable


def _decode(batch: PointLayer, group_by, weight, setup) -> _Decoded:
    weights = grouping.feature_weights(batch.attributes, weight, batch.label)
    x, y = setup.coordinates(batch.x, batch.y, batch.crs, batch.label)
    # one point per feature (no MultiPoint): then point i is feature i, and no gathering is needed
    per_row = None if batch.feature.size == len(batch.attributes) else batch.feature
    w = weights if weights is None or per_row is None else weights[per_row]
    local = grouping.group_features(batch.attributes, list(group_by))
    codes = local.codes if per_row is None else local.codes[per_row]
    values = group_summary(codes, local.count, x, y, w)
    if setup.kind == "geodesic":  # unit vectors: their sum points at the group's centre
        lon, lat = np.radians(x), np.radians(y)
        for name, part in (
            ("ux", np.cos(lat) * np.cos(lon)),
            ("uy", np.cos(lat) * np.sin(lon)),
            ("uz", np.sin(lat)),
        ):
            values[name] = np.bincount(codes, part, minlength=local.count)
    rules = {name: PASS1_RULES[name] for name in values}
    table = KeyTable(tuple(group_by), local.keys.reset_index(drop=True), pd.DataFrame(values), rules)
    return _Decoded(x, y, w, codes.astype(np.int32), table)


def _pass1_summary(batch: PointLayer, group_by, weight, setup) -> KeyTable:
    return _decode(batch, group_by, weight, setup).table


@dataclass
class _Spill:
    """Decoded batches written one after the other to a file, read back batch by batch."""

    folder: str
    weighted: bool
    batches: list = field(default_factory=list)  # (offset, n, keys of the batch)

    @property
    def path(self) -> str:
        return os.path.join(self.folder, "points.bin")

    def write(self, decoded: _Decoded) -> None:
        offset = os.path.getsize(self.path) if os.path.exists(self.path) else 0
        with open(self.path, "ab") as handle:
            for column in (
                decoded.x,
                decoded.y,
                *([decoded.w] if self.weighted else []),
                decoded.local_codes,
            ):
                handle.write(np.ascontiguousarray(column).tobytes())
        self.batches.append((offset, decoded.x.size, decoded.table))

    def read(self) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray, KeyTable]]:
        with open(self.path, "rb") as handle:
            for offset, n, table in self.batches:
                handle.seek(offset)
                x = np.fromfile(handle, np.float64, n)
                y = np.fromfile(handle, np.float64, n)
                w = np.fromfile(handle, np.float64, n) if self.weighted else None
                codes = np.fromfile(handle, np.int32, n)
                yield x, y, w, codes, table

    def close(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)


@dataclass
class Prepared:
    """The outcome of pass 1: the groups of the whole layer and a way to replay its batches.

    ``keys`` holds one row per group (codes in row order, sorted as
    :func:`toolbox.grouping.group_features` sorts) with ``n_points``, ``weight_sum``, the
    extent (``xmin`` ... ``ymax``), weighted coordinate sums ``wx``, ``wy`` and, for geodesic
    distances (longitudes and latitudes), sums of the points' unit vectors ``ux``, ``uy``, ``uz``. Use it as a context manager, so that
    the spill is removed however the computation ends.
    """

    parts: LayerParts
    group_by: tuple[str, ...]
    weight: str | None
    setup: object
    batch_rows: int
    keys: KeyTable
    spill: _Spill | None = None
    _mappings: dict = field(default_factory=dict, repr=False)

    @property
    def grouping(self) -> grouping.Grouping:
        """The groups as a :class:`toolbox.grouping.Grouping` (keys only), for naming rows."""
        return self.keys.grouping()

    def batches(self) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray]]:
        """Every batch again as ``(x, y, weights or None, group codes)``, codes of ``keys``."""
        if self.spill is not None:
            for index, (x, y, w, local, table) in enumerate(self.spill.read()):
                if index not in self._mappings:  # the same for every pass
                    self._mappings[index] = self._mapping(table)
                yield x, y, w, self._mappings[index][local]
            return
        for batch in self.parts.batches(self._fields(), self.batch_rows):
            decoded = _decode(batch, self.group_by, self.weight, self.setup)
            yield decoded.x, decoded.y, decoded.w, self._mapping(decoded.table)[decoded.local_codes]

    def _fields(self) -> list[str]:
        return [*self.group_by, *([self.weight] if self.weight else [])]

    def _mapping(self, table: KeyTable) -> np.ndarray:
        if not self.group_by:
            return np.zeros(1, dtype=np.int64)
        codes = self.keys.codes(table.keys)
        if (codes < 0).any():
            raise InputError(
                f"{self.parts.label} changed while it was read (a group appeared that the first "
                "pass did not see); read it again when nothing writes to it."
            )
        return codes

    def close(self) -> None:
        if self.spill is not None:
            self.spill.close()
            self.spill = None

    def __enter__(self) -> Prepared:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _spill_folder(parts: LayerParts) -> str | None:
    """A new folder for the spill when the temporary folder has room for twice its size."""
    if parts.rows is None:
        return None
    base = tempfile.gettempdir()
    needed = 2 * SPILL_BYTES_PER_POINT * parts.rows
    if shutil.disk_usage(base).free < needed:
        return None
    return tempfile.mkdtemp(prefix="pairspread-spill-", dir=base)


def prepare(
    parts: LayerParts,
    *,
    group_by: Sequence[str],
    weight: str | None,
    setup,
    batch_rows: int,
    client=None,
    spill: bool = True,
    progress=None,
) -> Prepared:
    """Pass 1 over a layer in parts: its groups and their count, weight and extent.

    Parameters
    ----------
    parts : LayerParts
        The layer (:func:`toolbox.layers.stream.layer_parts`).
    group_by : sequence of str
        Key fields.
    weight : str, optional
        Weight field (checked in every batch: finite and non-negative).
    setup : DistanceSetup
        How coordinates become the estimator's.
    batch_rows : int
        Most features per batch.
    client : distributed.Client, optional
        Read and summarise the parts on this cluster (no spill: workers reread their parts).
    spill : bool
        In this process, keep the decoded batches in a temporary file for the later passes.

    Returns
    -------
    Prepared

    Examples
    --------
    >>> import geopandas, shapely
    >>> from toolbox.geodesy import DistanceSetup
    >>> from toolbox.layers.stream import layer_parts
    >>> frame = geopandas.GeoDataFrame({"zone": list("abab")}, geometry=shapely.points([0, 1, 5, 7], 0))
    >>> setup = DistanceSetup("planar", "unknown")
    >>> with prepare(layer_parts(frame), group_by=["zone"], weight=None, setup=setup, batch_rows=3) as ready:
    ...     print(ready.keys.values[["n_points", "xmin", "xmax"]].to_numpy().tolist())
    ...     print([codes.tolist() for _, _, _, codes in ready.batches()])
    [[2.0, 0.0, 5.0], [2.0, 1.0, 7.0]]
    [[0, 1, 0], [1]]
    """
    group_by = tuple(group_by or ())
    fields = [*group_by, *([weight] if weight else [])]
    parts.check_fields(fields)
    folder = _spill_folder(parts) if spill and client is None else None
    if folder is None:
        summarise = functools.partial(_pass1_summary, group_by=group_by, weight=weight, setup=setup)
        keys = reduce_parts(
            parts, fields, batch_rows, summarise, merge_key_tables, client=client, progress=progress
        )
        store = None
    else:
        store = _Spill(folder, weight is not None)
        try:
            tables = []
            for batch in prefetched(parts.batches(fields, batch_rows)):
                decoded = _decode(batch, group_by, weight, setup)
                store.write(decoded)
                tables.append(decoded.table)
                if len(tables) >= 64:  # keep the list of key tables short
                    tables = [merge_key_tables(tables)]
            keys = merge_key_tables(tables) if tables else None
        except BaseException:
            store.close()
            raise
    if keys is None:
        if store is not None:
            store.close()
        raise InputError(f"{parts.label} has no feature to compute with.")
    return Prepared(parts, group_by, weight, setup, batch_rows, keys, store)
