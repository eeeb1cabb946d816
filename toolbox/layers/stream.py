"""Reading a layer batch by batch: point coordinates and the needed fields, never the whole layer.

A :class:`PointStream` is a layer that can be read from the start as often as a computation
needs passes over it (a plan pass, then the sums). Each pass yields :class:`~.read.PointLayer`
batches of at most ``batch_rows`` features, so memory is bounded by the batch, not the layer:

- OGR formats stream through pyogrio's Arrow interface (``pyogrio.raw.open_arrow`` with a
  ``batch_size``): coordinates of 2-D points come straight from the WKB buffers, without a
  shapely object per feature;
- a GeoDataFrame already in memory is sliced into batches (for tests, and so that the same
  driver serves it).

Feature numbers in ``PointLayer.feature`` count from the start of their batch; ``first_row``
of :class:`Batch` places a batch in the layer.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import pyogrio

from ..errors import ParameterError
from .read import (
    PointLayer,
    _check_fields,
    _is_frame,
    _open,
    _points_from_wkb,
    _reading_failed,
    _warn_if_nothing_matched,
    points_of,
)

__all__ = ["Batch", "PointStream", "open_stream", "DEFAULT_BATCH_ROWS"]

#: features per batch when none is asked for: about 30 MB of coordinates and codes
DEFAULT_BATCH_ROWS = 1 << 20


@dataclass(frozen=True)
class Batch:
    """One batch of a stream: its points and where its first feature sits in the layer."""

    points: PointLayer
    first_row: int

    @property
    def rows(self) -> int:
        """Number of features in the batch."""
        return len(self.points.attributes)


@dataclass(frozen=True)
class PointStream:
    """A layer read in batches; every call of :meth:`batches` is a new pass from the start.

    Attributes
    ----------
    label : str
        How messages name the layer.
    crs : pyproj.CRS or None
        The layer's CRS.
    fields : list of str
        Its attribute fields.
    rows : int or None
        Number of features when the source knows it cheaply (before any ``where`` filter).
    """

    label: str
    crs: object
    fields: list[str]
    rows: int | None
    _read: Callable[[list[str], int], Iterator[PointLayer]]

    def batches(self, fields: Sequence[str] = (), batch_rows: int = DEFAULT_BATCH_ROWS) -> Iterator[Batch]:
        """Batches of at most ``batch_rows`` features with the named fields (checked first).

        Examples
        --------
        >>> import geopandas, shapely
        >>> frame = geopandas.GeoDataFrame({"zone": list("aab")}, geometry=shapely.points([0, 1, 2], [0, 0, 0]))
        >>> [b.rows for b in open_stream(frame).batches(["zone"], batch_rows=2)]
        [2, 1]
        """
        if isinstance(batch_rows, bool) or not isinstance(batch_rows, (int, np.integer)) or batch_rows < 1:
            raise ParameterError(f"batch_rows must be a positive integer. Got {batch_rows!r} instead.")
        fields = list(dict.fromkeys(fields))
        _check_fields(fields, self.fields, self.label)
        first = 0
        for points in self._read(fields, int(batch_rows)):
            yield Batch(points, first)
            first += len(points.attributes)


def open_stream(
    data, *, layer: str | None = None, where: str | None = None, engine: str = "pyogrio"
) -> PointStream:
    """Open a layer for reading in batches.

    Parameters
    ----------
    data : str, os.PathLike or geopandas.GeoDataFrame
        Any vector dataset OGR reads, or a GeoDataFrame in memory.
    layer : str, optional
        Layer name; required when the dataset holds several.
    where : str, optional
        OGR SQL filter applied by the reader.
    engine : {"pyogrio"}
        Streaming reads go through pyogrio's Arrow interface; fiona has none.

    Returns
    -------
    PointStream

    Examples
    --------
    >>> import geopandas, shapely
    >>> frame = geopandas.GeoDataFrame({"w": [1.0, 2.0]}, geometry=shapely.points([0, 3], [0, 4]))
    >>> stream = open_stream(frame)
    >>> stream.rows, [b.points.x.tolist() for b in stream.batches(["w"], batch_rows=1)]
    (2, [[0.0], [3.0]])
    """
    if _is_frame(data):
        if where:
            raise ParameterError("A where filter applies to files only; filter the GeoDataFrame first.")
        return _frame_stream(data)
    if engine == "fiona":
        raise ParameterError(
            "Reading in batches goes through pyogrio's Arrow stream, which the fiona engine lacks; "
            "leave out --engine fiona (or --batch-rows, to read the whole layer with fiona)."
        )
    path, name, label, available = _open(data, layer, engine, where)
    info = pyogrio.read_info(path, layer=name)
    rows = int(info["features"]) if info.get("features", -1) >= 0 else None

    def read(fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
        seen = 0
        try:
            # a filter may name fields that are not read; some drivers then drop every row
            source = pyogrio.raw.open_arrow(
                path,
                layer=name,
                columns=None if where else fields,
                where=where,
                batch_size=batch_rows,
                use_pyarrow=True,
            )
            with source as (meta, reader):
                geom = meta["geometry_name"] or "wkb_geometry"
                for batch in reader:
                    if batch.num_rows == 0:
                        continue
                    seen += batch.num_rows
                    attributes = batch.select(fields).to_pandas()
                    yield _points_from_wkb(attributes, batch.column(geom), meta["crs"], label)
        except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError) as exc:
            raise _reading_failed(exc, label, where, engine) from exc
        _warn_if_nothing_matched(seen, where, label)

    return PointStream(label, _crs_of(info.get("crs")), available, rows, read)


def _crs_of(text):
    if text is None:
        return None
    import pyproj

    return pyproj.CRS.from_user_input(text)


def _frame_stream(frame) -> PointStream:
    label = "the GeoDataFrame"
    available = [str(c) for c in frame.columns if c != frame.geometry.name]

    def read(fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
        for start in range(0, len(frame), batch_rows):
            yield points_of(frame.iloc[start : start + batch_rows], fields, label)

    return PointStream(label, frame.crs, available, len(frame), read)


def is_stream_source(data) -> bool:
    """Whether ``data`` is something :func:`open_stream` can read (a path or a GeoDataFrame)."""
    return _is_frame(data) or isinstance(data, (str, os.PathLike))
