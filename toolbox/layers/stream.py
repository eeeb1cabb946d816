"""Reading a layer in parts and batches: point coordinates and the needed fields, never the whole layer.

:class:`LayerParts` is a layer cut into *parts* that can each be read on their own, batch by
batch, as often as a computation needs passes over it:

- an OGR layer is one part, streamed through pyogrio's Arrow interface
  (``pyogrio.raw.open_arrow`` with a ``batch_size``): coordinates of 2-D points come straight
  from the WKB buffers, without a shapely object per feature;
- a GeoParquet dataset (a file, a folder or a glob) has one part per file, read in batches of
  row groups through pyarrow (:mod:`toolbox.layers.parquet`), so that Dask workers can each
  read their own files;
- a dask-geopandas GeoDataFrame has one part per partition, computed where it is read;
- a GeoDataFrame in memory is one part, sliced into batches.

A part is a small picklable description (a path, a delayed partition) and the reading function
is a module-level function, so parts can be sent to Dask workers. Each batch is a
:class:`~.read.PointLayer`; its ``feature`` numbers count from the start of the batch.
"""

from __future__ import annotations

import os
import queue
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyogrio

from ..errors import ParameterError, spell
from .read import (
    PointLayer,
    _arrow_attributes,
    _check_fields,
    _is_frame,
    _open,
    _points_from_wkb,
    _reading_failed,
    _warn_if_nothing_matched,
    points_of,
)

__all__ = ["LayerParts", "layer_parts", "feature_batches", "is_dask_frame", "DEFAULT_BATCH_ROWS"]

#: features per batch when none is asked for: about 40 MB of coordinates, codes and weights
DEFAULT_BATCH_ROWS = 1 << 20


@dataclass(frozen=True)
class LayerParts:
    """A layer as parts read batch by batch; every call of :meth:`batches` is a new pass.

    Attributes
    ----------
    parts : list
        Picklable descriptions of the parts (a path and layer name, a file, a partition).
    reader : callable
        ``reader(part, fields, batch_rows)`` yields the :class:`PointLayer` batches of a part.
    label : str
        How messages name the layer.
    crs : pyproj.CRS or None
        The layer's CRS (every part's, checked when the layer is opened).
    fields : list of str
        Its attribute fields.
    rows : int or None
        Number of features when known cheaply (before any filter).
    on_workers : bool
        Whether the parts can be read on Dask workers (files, partitions) rather than only here.
    source : {"ogr", "frame", "parquet", "dask"}
        What the parts are: an OGR layer, a frame in memory, GeoParquet files, Dask partitions.
    """

    parts: list
    reader: Callable[..., Iterator[PointLayer]]
    label: str
    crs: object
    fields: list[str]
    rows: int | None = None
    on_workers: bool = False
    source: str = "ogr"

    def check_fields(self, fields: Sequence[str]) -> list[str]:
        """The fields, without repeats, each checked to exist."""
        fields = list(dict.fromkeys(fields))
        _check_fields(fields, self.fields, self.label)
        return fields

    def batches(
        self, fields: Sequence[str] = (), batch_rows: int = DEFAULT_BATCH_ROWS
    ) -> Iterator[PointLayer]:
        """Every batch of every part, in order, with the named fields.

        Examples
        --------
        >>> import geopandas, shapely
        >>> frame = geopandas.GeoDataFrame({"zone": list("aab")}, geometry=shapely.points([0, 1, 2], [0, 0, 0]))
        >>> [b.x.tolist() for b in layer_parts(frame).batches(["zone"], batch_rows=2)]
        [[0.0, 1.0], [2.0]]
        """
        check_batch_rows(batch_rows)
        fields = self.check_fields(fields)
        for part in self.parts:
            yield from self.reader(part, fields, int(batch_rows))


def prefetched(
    batches: Iterator[PointLayer], depth: int = 2, stop: threading.Event | None = None
) -> Iterator[PointLayer]:
    """The same batches, read ahead by a background thread while the caller works on the last.

    Reading (Parquet decoding, OGR) mostly runs without Python's lock, so on two cores it
    overlaps with the caller's numpy and pandas work. At most ``depth`` batches wait; an error
    in the reader is raised in the caller, and stopping early (an error, Ctrl-C, a ``break``)
    stops the reader. ``stop``, if given, is set when the caller stops, so that work inside
    ``batches`` that waits on the caller can end too.

    Examples
    --------
    >>> list(prefetched(iter([1, 2, 3])))
    [1, 2, 3]
    """
    waiting: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event() if stop is None else stop
    done = object()

    def hand(item) -> bool:
        """Queue ``item`` for the caller; False once the caller has stopped (never blocks then)."""
        while not stop.is_set():
            try:
                waiting.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def work():
        try:
            for batch in batches:
                if not hand(batch):
                    return
            hand(done)
        except BaseException as exc:  # handed to the caller, who raises it
            hand(exc)

    thread = threading.Thread(target=work, name="pairspread-reader", daemon=True)
    thread.start()
    try:
        while True:
            item = waiting.get()
            if item is done:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        thread.join(timeout=5)


def check_batch_rows(batch_rows) -> int:
    """``batch_rows`` as a positive int, or a ParameterError naming it."""
    if isinstance(batch_rows, bool) or not isinstance(batch_rows, (int, np.integer)) or batch_rows < 1:
        raise ParameterError(f"batch_rows must be a positive integer. Got {batch_rows!r} instead.")
    return int(batch_rows)


def layer_parts(
    data, *, layer: str | None = None, where: str | None = None, engine: str = "pyogrio"
) -> LayerParts:
    """Open a layer for reading in parts and batches (checks the path, layer and CRS first).

    Parameters
    ----------
    data : str, os.PathLike, geopandas.GeoDataFrame or dask_geopandas.GeoDataFrame
        Any vector dataset OGR reads; GeoParquet (a file, a folder or a glob); a frame.
    layer : str, optional
        Layer name; required when an OGR dataset holds several.
    where : str, optional
        Attribute filter applied by the reader (OGR SQL for OGR formats).
    engine : {"pyogrio"}
        Streaming reads go through pyogrio's Arrow interface; fiona has none.

    Returns
    -------
    LayerParts

    Examples
    --------
    >>> import geopandas, shapely
    >>> frame = geopandas.GeoDataFrame({"w": [1.0, 2.0]}, geometry=shapely.points([0, 3], [0, 4]))
    >>> parts = layer_parts(frame)
    >>> parts.rows, [b.attributes["w"].tolist() for b in parts.batches(["w"], batch_rows=1)]
    (2, [[1.0], [2.0]])
    """
    if is_dask_frame(data):
        if where:
            raise ParameterError("A where filter applies to files only; filter the Dask GeoDataFrame first.")
        return _dask_parts(data)
    if _is_frame(data):
        if where:
            raise ParameterError("A where filter applies to files only; filter the GeoDataFrame first.")
        label = "the GeoDataFrame"
        fields = [str(c) for c in data.columns if c != data.geometry.name]
        return LayerParts([(data, label)], _read_frame, label, data.crs, fields, len(data), source="frame")
    from . import parquet

    if isinstance(data, parquet.ArrowLayer) or parquet.is_parquet(data):
        return _parquet_parts(data, layer, where)
    if engine == "fiona":
        raise ParameterError(
            "Reading in batches goes through pyogrio's Arrow stream, which the fiona engine lacks; "
            f"leave out {spell('engine', 'fiona')}, or leave out {spell('batch_rows')} to read the whole layer with fiona."
        )
    path, name, label, available = _open(data, layer, engine, where)
    info = pyogrio.read_info(path, layer=name)
    rows = int(info["features"]) if info.get("features", -1) >= 0 else None
    return LayerParts(
        [(path, name, where, label)], _read_ogr, label, _crs_of(info.get("crs")), available, rows
    )


def _crs_of(text):
    if text is None:
        return None
    import pyproj

    return pyproj.CRS.from_user_input(text)


def _read_ogr(part, fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
    path, name, where, label = part
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
                attributes = _arrow_attributes(batch, fields)
                yield _points_from_wkb(attributes, batch.column(geom), meta["crs"], label)
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError) as exc:
        raise _reading_failed(exc, label, where, "pyogrio") from exc
    _warn_if_nothing_matched(seen, where, label)


def _read_frame(part, fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
    frame, label = part
    for start in range(0, len(frame), batch_rows):
        yield points_of(frame.iloc[start : start + batch_rows], fields, label)


# --------------------------------------------------------------------------------------------
# GeoParquet: one part per file


def _parquet_parts(data, layer, where) -> LayerParts:
    import pyarrow.dataset as pads

    from . import parquet

    # every file's schema, geometry column and CRS are checked to agree here, from the footers
    whole = data if isinstance(data, parquet.ArrowLayer) else parquet.open_parquet(data, layer)
    if where:  # a mistake in the filter shows now, not on a worker
        parquet.parse_where(where, whole.dataset.schema.names)
    fragments = list(whole.dataset.get_fragments())
    if not all(isinstance(f, pads.FileFragment) for f in fragments):  # a table in memory
        return LayerParts(
            [(whole, where)], _read_arrow_layer, whole.label, whole.crs, whole.fields, source="frame"
        )
    base = os.fspath(data) if not isinstance(data, parquet.ArrowLayer) and os.path.isdir(data) else None
    parts = [(f.path, base, where, whole.geometry, whole.label) for f in fragments]
    rows = sum(f.metadata.num_rows for f in fragments)
    return LayerParts(
        parts,
        _read_parquet_file,
        whole.label,
        whole.crs,
        whole.fields,
        rows,
        on_workers=True,
        source="parquet",
    )


def _read_arrow_layer(part, fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
    from . import parquet

    layer, where = part
    for batch in layer.batches(fields, where, batch_rows):
        yield parquet.points_of_table(batch, layer, fields)


def _read_parquet_file(part, fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
    import pyarrow.dataset as pads

    from . import parquet

    path, base, where, geometry, label = part
    # Hive folders (key=value) hold fields the file itself lacks: read it as a one-file dataset
    # with the same partitioning, so they are fields here too (and the filter may use them)
    partitioning = pads.HivePartitioning.discover(infer_dictionary=False) if base else None
    # text fields read as the dictionaries Parquet stores them in: a code per row, each text
    # once per batch (several times cheaper to read and to group); a filter's LIKE has no
    # kernel for dictionaries, so not with a filter
    format = "parquet" if where else parquet.dictionary_format(path, fields)
    dataset = pads.dataset([path], format=format, partitioning=partitioning, partition_base_dir=base)
    layer = parquet.ArrowLayer(dataset, geometry, f"{label} (file {path!r})")
    for batch in layer.batches(fields, where, batch_rows):
        yield parquet.points_of_table(batch, layer, fields)


# --------------------------------------------------------------------------------------------
# Dask frames


def is_dask_frame(data: Any) -> bool:
    """Whether ``data`` is a dask-geopandas GeoDataFrame (without importing Dask otherwise)."""
    module = sys.modules.get("dask_geopandas")
    return module is not None and isinstance(data, module.GeoDataFrame)


def _dask_parts(frame) -> LayerParts:
    label = "the Dask GeoDataFrame"
    geometry = frame.geometry.name
    fields = [str(c) for c in frame.columns if c != geometry]
    parts = [(partition, f"partition {i} of {label}") for i, partition in enumerate(frame.to_delayed())]
    return LayerParts(
        parts, _read_dask_partition, label, frame.crs, fields, None, on_workers=True, source="dask"
    )


def _read_dask_partition(part, fields: list[str], batch_rows: int) -> Iterator[PointLayer]:
    frame, label = part
    if hasattr(frame, "compute"):  # read here, not on a worker (a worker gets the partition itself)
        frame = frame.compute()
    if frame.crs is not None and not hasattr(frame.crs, "to_wkt"):
        frame = frame.set_crs(frame.crs, allow_override=True)
    for start in range(0, len(frame), batch_rows):
        yield points_of(frame.iloc[start : start + batch_rows], fields, label)


# --------------------------------------------------------------------------------------------
# whole features (every field and the geometry), batch by batch, for per-feature outputs


def _frames_ogr(part, batch_rows: int):
    import geopandas
    import shapely

    path, name, where, label = part
    try:
        with pyogrio.raw.open_arrow(path, layer=name, where=where, batch_size=batch_rows, use_pyarrow=True) as (
            meta,
            reader,
        ):
            geom = meta["geometry_name"] or "wkb_geometry"
            for batch in reader:
                if batch.num_rows == 0:
                    continue
                attributes = batch.drop_columns([geom]).to_pandas()
                geometry = shapely.from_wkb(batch.column(geom).to_numpy(zero_copy_only=False))
                yield geopandas.GeoDataFrame(attributes, geometry=geometry, crs=meta["crs"])
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError) as exc:
        raise _reading_failed(exc, label, where, "pyogrio") from exc


def _frames_frame(part, batch_rows: int):
    frame, _ = part
    for start in range(0, len(frame), batch_rows):
        yield frame.iloc[start : start + batch_rows]


def _frames_arrow(part, batch_rows: int):
    import pyarrow as pa

    from . import parquet

    layer, where = part
    for batch in layer.batches(None, where, batch_rows):
        yield parquet.frame_of_table(pa.Table.from_batches([batch]), layer)


def _frames_parquet(part, batch_rows: int):
    import pyarrow as pa
    import pyarrow.dataset as pads

    from . import parquet

    path, base, where, geometry, label = part
    partitioning = pads.HivePartitioning.discover(infer_dictionary=False) if base else None
    dataset = pads.dataset([path], format="parquet", partitioning=partitioning, partition_base_dir=base)
    layer = parquet.ArrowLayer(dataset, geometry, f"{label} (file {path!r})")
    for batch in layer.batches(None, where, batch_rows):
        yield parquet.frame_of_table(pa.Table.from_batches([batch]), layer)


def _frames_dask(part, batch_rows: int):
    frame, label = part
    yield from _frames_frame((frame.compute() if hasattr(frame, "compute") else frame, label), batch_rows)


_FRAMES = {
    _read_ogr: _frames_ogr,
    _read_frame: _frames_frame,
    _read_arrow_layer: _frames_arrow,
    _read_parquet_file: _frames_parquet,
    _read_dask_partition: _frames_dask,
}


def feature_batches(parts: LayerParts, batch_rows: int) -> Iterator:
    """Every feature of the layer with all its fields and geometry, as GeoDataFrames of at most
    ``batch_rows`` rows, in the order :meth:`LayerParts.batches` gives their points."""
    batch_rows = check_batch_rows(batch_rows)
    for part in parts.parts:
        yield from _FRAMES[parts.reader](part, batch_rows)
