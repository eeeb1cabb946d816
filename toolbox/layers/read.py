"""Reading layers: a vector layer to point coordinates plus the attribute columns a script needs."""

from __future__ import annotations

import difflib
import os
import sys
import warnings
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import pyogrio
import shapely

from ..errors import GeometryError, InputError, ParameterError, param_noun, spell
from ..tables import feature_ids, feature_names, name_features

if TYPE_CHECKING:
    import geopandas

__all__ = ["ENGINES", "PointLayer", "read_points", "read_layer", "points_of"]

ENGINES = ("pyogrio", "fiona")
#: names OGR gives the FID column when it is read as one (a field of such a name would clash)
_FID_NAMES = {"fid", "__ogr_fid", "ogc_fid"}

_POINT_TYPES = {0: "Point", 4: "MultiPoint"}
_TYPE_NAMES = {
    -1: "missing",
    0: "Point",
    1: "LineString",
    2: "LinearRing",
    3: "Polygon",
    4: "MultiPoint",
    5: "MultiLineString",
    6: "MultiPolygon",
    7: "GeometryCollection",
}


@dataclass(frozen=True)
class PointLayer:
    """Points of a layer and the attributes of the features they belong to.

    ``attributes`` has one row per feature; ``x``, ``y`` and ``feature`` have one entry per point
    (a MultiPoint feature gives several points sharing its row number in ``feature``).
    """

    attributes: pd.DataFrame
    x: np.ndarray
    y: np.ndarray
    feature: np.ndarray
    crs: object  # pyproj.CRS or None
    label: str


def _is_local_path(data) -> bool:
    text = str(data)
    return not (text.startswith("/vsi") or "://" in text)


def _suggest(name: str, choices: Sequence[str]) -> str:
    close = difflib.get_close_matches(name, list(choices), n=3, cutoff=0.6)
    if close:
        return "did you mean " + " or ".join(repr(c) for c in close) + "?"
    return "available: " + (", ".join(repr(c) for c in choices) if choices else "none")


def _resolve_layer(path: str, layer: str | None) -> str:
    try:
        listed = pyogrio.list_layers(path)
    except Exception as exc:  # pyogrio raises DataSourceError with GDAL's message
        raise InputError(f"Cannot open {path!r} as a vector dataset: {_first_line(exc)}") from exc
    names = [str(row[0]) for row in listed]
    if layer is None:
        if len(names) == 1:
            return names[0]
        raise InputError(f"{path!r} holds {len(names)} layers ({', '.join(names)}); choose one with {spell('layer')}.")
    if layer not in names:
        raise InputError(f"{path!r} has no layer {layer!r}; {_suggest(layer, names)}")
    return layer


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _is_frame(data) -> bool:
    # geopandas loads only when needed (it is slow to import); a GeoDataFrame implies it is loaded
    geopandas = sys.modules.get("geopandas")
    return geopandas is not None and isinstance(data, geopandas.GeoDataFrame)


def _open(data, layer, engine, where):
    """Check a path and pick its layer; returns (path, layer name, label, field names)."""
    if engine not in ENGINES:
        raise ParameterError(
            f"The {param_noun('engine')} must be one of {', '.join(ENGINES)}. Got {engine!r} instead."
        )
    path = os.fspath(data)
    if _is_local_path(path) and not Path(path).exists():
        raise InputError(f"Input {path!r} does not exist; check the path.")
    name = _resolve_layer(path, layer)
    label = f"layer {name!r} of {path!r}"
    info = pyogrio.read_info(path, layer=name)
    return path, name, label, [str(f) for f in info["fields"]]


def _warn_if_nothing_matched(rows: int, where, label):
    if where and rows == 0:
        warnings.warn(
            f"No feature of {label} matched the {spell('where')} filter {where!r}.", UserWarning, stacklevel=3
        )


def _reading_failed(exc, label, where, engine):
    if isinstance(exc, ImportError):
        return InputError(f"The {engine} engine is not installed: {exc}")
    hint = f" (check the {spell('where')} filter)" if where else ""
    return InputError(f"Reading {label} failed{hint}: {_first_line(exc)}")


def read_points(
    data,
    *,
    layer: str | None = None,
    fields: Sequence[str] = (),
    where: str | None = None,
    engine: str = "pyogrio",
) -> PointLayer:
    """Read the points of a layer and the named attribute fields (only those).

    Parameters
    ----------
    data : str, os.PathLike, geopandas.GeoDataFrame or ArrowLayer
        Any vector dataset OGR reads; GeoParquet (a file, a folder of files or a glob, read
        through pyarrow); a GeoDataFrame or a layer already in memory.
    layer : str, optional
        Layer name; required when the dataset holds several layers.
    fields : sequence of str
        Attribute fields to keep (each must exist).
    where : str, optional
        SQL filter applied by the reader (OGR's for OGR formats; for GeoParquet and Arrow
        layers the subset that :func:`toolbox.layers.where.parse_where` reads).
    engine : {"pyogrio", "fiona"}
        Reader to use.

    Returns
    -------
    PointLayer
    """
    fields = list(dict.fromkeys(fields))
    arrow = _arrow_layer(data, layer)
    if arrow is not None:
        return arrow.points(fields, where)
    if _is_frame(data) or engine == "fiona":
        frame, label = read_layer(data, layer=layer, where=where, engine=engine, columns=fields)
        return points_of(frame, fields, label)
    path, name, label, available = _open(data, layer, engine, where)
    _check_fields(fields, available, label)
    # the FIDs name features in messages; not when a field would share the FID column's name
    fids = not {f.lower() for f in available} & _FID_NAMES
    try:
        # a filter may name fields that are not read; some drivers then drop every row
        meta, table = pyogrio.read_arrow(
            path, layer=name, columns=None if where else fields, where=where, return_fids=fids
        )
    except Exception as exc:
        raise _reading_failed(exc, label, where, engine) from exc
    geom_name = meta["geometry_name"] or "wkb_geometry"
    _warn_if_nothing_matched(table.num_rows, where, label)
    attributes = table.select(fields).to_pandas()
    if fids and meta.get("fid_column") in table.column_names:
        name_features(attributes, "FID", table.column(meta["fid_column"]).to_numpy())
    return _points_from_wkb(attributes, table.column(geom_name), meta["crs"], label)


def read_layer(
    data,
    *,
    layer: str | None = None,
    where: str | None = None,
    engine: str = "pyogrio",
    columns: Sequence[str] | None = None,
) -> tuple[geopandas.GeoDataFrame, str]:
    """Read a whole layer (or the named ``columns``) as a GeoDataFrame, with a label for messages.

    A GeoDataFrame passed in is returned as it is (never modified by any script).
    """
    arrow = _arrow_layer(data, layer)
    if arrow is not None:
        return arrow.frame(None if columns is None else list(columns), where), arrow.label
    if _is_frame(data):
        if columns is not None:
            _check_fields(columns, [c for c in data.columns if c != data.geometry.name], "the GeoDataFrame")
        if where:  # the same filter language as for GeoParquet; the caller's frame is not modified
            from .where import filter_frame

            data = filter_frame(data, where, "the GeoDataFrame")
            _warn_if_nothing_matched(len(data), where, "the GeoDataFrame")
        return data, "the GeoDataFrame"
    path, name, label, available = _open(data, layer, engine, where)
    if columns is not None:
        _check_fields(columns, available, label)
    try:
        if engine == "pyogrio":
            # a filter may name fields that are not read; some drivers then drop every row
            subset = None if where else columns
            frame = pyogrio.read_dataframe(
                path, layer=name, where=where, columns=subset, use_arrow=True, fid_as_index=True
            )
            fids = frame.index.to_numpy()
            frame = frame.reset_index(drop=True)
        else:  # some fiona drivers cannot skip fields: read them all, keep the named ones after
            import geopandas

            frame = geopandas.read_file(path, layer=name, where=where, engine="fiona")
    except Exception as exc:
        raise _reading_failed(exc, label, where, engine) from exc
    _warn_if_nothing_matched(len(frame), where, label)
    if columns is not None:
        frame = frame[[*columns, frame.geometry.name]]
    if engine == "pyogrio":
        name_features(frame, "FID", fids)
    return frame, label


def _arrow_layer(data, layer):
    """The :class:`~toolbox.layers.parquet.ArrowLayer` of GeoParquet or an Arrow layer, else None.

    GeoParquet goes through pyarrow whatever the GDAL build supports (the one bundled with
    pyogrio has no Parquet driver).
    """
    from . import parquet

    if isinstance(data, parquet.ArrowLayer):
        if layer is not None:
            raise InputError(f"{data.label} holds one layer; leave out the layer name.")
        return data
    if parquet.is_parquet(data):
        return parquet.open_parquet(data, layer)
    return None


def points_of(frame: geopandas.GeoDataFrame, fields: Sequence[str], label: str) -> PointLayer:
    """The points of a GeoDataFrame and its named attribute fields."""
    _check_fields(fields, [c for c in frame.columns if c != frame.geometry.name], label)
    attributes = pd.DataFrame(frame[list(fields)]).reset_index(drop=True)
    # features are named by the layer's FIDs, or by a GeoDataFrame's own index labels
    name_features(attributes, *(feature_names(frame) or ("index", frame.index.to_numpy())))
    return _points_from_geometry(
        attributes, np.asarray(frame.geometry.values, dtype=object), frame.crs, label
    )


def _check_fields(fields, available, label):
    for field in fields:
        if field not in available:
            raise InputError(f"{label} has no field {field!r}; {_suggest(field, available)}")


def _arrow_attributes(table, fields: Sequence[str]) -> pd.DataFrame:
    """The named fields of an Arrow table or record batch as a frame, as ``to_pandas`` gives them.

    Integer and float columns without nulls (the usual group keys and weights) are copied
    straight out of their buffers: pyarrow's pandas conversion costs several times the copy, a
    price paid per batch when a layer is streamed. Anything else goes through ``to_pandas``.
    """
    import pyarrow as pa

    columns = {}
    for name in fields:
        column = table.column(name)
        kind = column.type
        if column.null_count or not (pa.types.is_integer(kind) or pa.types.is_float32(kind) or pa.types.is_float64(kind)):
            return _sorted_categories(table.select(list(fields)).to_pandas())
        columns[name] = np.array(column)  # a writable copy, as to_pandas makes
    return pd.DataFrame(columns, index=pd.RangeIndex(table.num_rows), columns=list(fields), copy=False)


def _sorted_categories(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with the categories of its categorical columns in sorted order.

    An Arrow dictionary (a text field read as Parquet stores it) becomes categories in the order
    the texts first appear; pandas groups and sorts categories in their order, so sorted
    categories group and sort as the texts themselves do. Ordered categories keep their order.
    """
    for name in frame.columns:
        column = frame[name]
        categorical = isinstance(column.dtype, pd.CategoricalDtype) and not column.cat.ordered
        if categorical and not column.cat.categories.is_monotonic_increasing:
            frame[name] = column.cat.reorder_categories(column.cat.categories.sort_values())
    return frame


def _fixed_points(column) -> tuple[np.ndarray, np.ndarray] | None:
    """Coordinates straight from an Arrow WKB column when every value is a 2-D point.

    A little-endian 2-D WKB point is a fixed 21-byte record (byte order, type 1, x, y), so the
    column's data buffer can be read as an array without making a Python object per feature.
    Anything else (nulls, other types, Z/M, big-endian, POINT EMPTY) returns None.
    """
    import pyarrow as pa

    column = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if len(column) == 0 or column.null_count or column.type not in (pa.binary(), pa.large_binary()):
        return None
    width = "<i4" if column.type == pa.binary() else "<i8"
    offsets = np.frombuffer(column.buffers()[1], width)[column.offset : column.offset + len(column) + 1]
    if not (np.diff(offsets) == 21).all():
        return None
    data = column.buffers()[2]
    raw = np.frombuffer(data, np.uint8)[offsets[0] : offsets[-1]].reshape(-1, 21)
    n = raw.shape[0]

    def field(dtype, at):  # one field of every 21-byte record, read in place (no copy)
        return np.ndarray((n,), dtype, buffer=data, offset=int(offsets[0]) + at, strides=(21,))

    if not ((raw[:, 0] == 1).all() and (field("<u4", 1) == 1).all()):
        return None
    x, y = field("<f8", 5).copy(), field("<f8", 13).copy()
    # a finite sum means finite coordinates (two reductions, no masks); else (POINT EMPTY is
    # written as NaN, NaN; a NaN or infinite coordinate) the general path names the features
    with np.errstate(over="ignore", invalid="ignore"):
        if not np.isfinite(x.sum() + y.sum()):
            return None
    return x, y


def _points_from_wkb(attributes, column, crs, label) -> PointLayer:
    fixed = _fixed_points(column)
    if fixed is not None:
        x, y = fixed
        return _finish(attributes, x, y, np.arange(x.size, dtype=np.int64), crs, label, checked=True)
    geometry = shapely.from_wkb(column.to_numpy(zero_copy_only=False))
    return _points_from_geometry(attributes, geometry, crs, label)


#: features per task of :func:`_plain_points`: small enough that a task's GEOS objects are still
#: in cache when the next accessor walks them, large enough that a call costs nothing in comparison
_PLAIN_BLOCK = 1 << 16


def _worker_threads() -> int:
    """Threads for reading coordinates: the compiled kernels' setting (``threads``), else the cores."""
    numba = sys.modules.get("numba")  # loaded with the kernels; its setting follows ``threads``
    return numba.get_num_threads() if numba is not None else os.cpu_count() or 1


def _plain_points(geometry: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Coordinates when every feature is one 2-D point with finite coordinates; else None.

    shapely's ``get_x`` and ``get_y`` give NaN for anything but a non-empty point (a missing
    geometry, a MultiPoint, a line, ...), so finite values prove that every feature is one
    point: no type pass, no empty pass, no index of features. These functions and ``has_z``
    let go of the GIL (``get_coordinates`` does not), so blocks of the array are read in
    threads. Anything else (nulls, empties, other types, Z, NaN) returns None, and the caller
    takes the general path with its messages.
    """
    n = geometry.size
    x, y = np.empty(n), np.empty(n)
    failed: list[int] = []  # once a block is not plain, the others stop early

    def block(a: int) -> bool:
        if failed:
            return False
        b = min(n, a + _PLAIN_BLOCK)
        part = geometry[a:b]
        try:
            shapely.get_x(part, out=x[a:b])
            shapely.get_y(part, out=y[a:b])
        except (shapely.errors.GEOSException, TypeError):  # POINT EMPTY has no x; not a geometry
            failed.append(a)
            return False
        if np.isfinite(x[a:b]).all() and np.isfinite(y[a:b]).all() and not shapely.has_z(part).any():
            return True
        failed.append(a)
        return False

    starts = range(0, n, _PLAIN_BLOCK)
    threads = min(_worker_threads(), len(starts))
    if threads <= 1:
        plain = all(block(a) for a in starts)
    else:
        with ThreadPoolExecutor(threads) as pool:
            try:
                plain = all(list(pool.map(block, starts)))
            except BaseException:  # e.g. Ctrl-C: the queued blocks return at once
                failed.append(-1)
                raise
    return (x, y) if plain else None


def _points_from_geometry(attributes, geometry, crs, label) -> PointLayer:
    geometry = np.asarray(geometry, dtype=object)
    plain = _plain_points(geometry) if geometry.size else None
    if plain is not None:
        return _finish(attributes, *plain, np.arange(geometry.size, dtype=np.int64), crs, label, checked=True)
    types = shapely.get_type_id(geometry)
    missing = (types < 0) | shapely.is_empty(geometry)
    if missing.any():
        raise GeometryError(
            f"{int(missing.sum())} of {geometry.size} features of {label} have no geometry "
            f"(null or empty); drop them first, e.g. with {spell('where')}."
        )
    wrong = ~np.logical_or.reduce([types == t for t in _POINT_TYPES])  # isin sorts: slower
    if wrong.any():
        kinds, counts = np.unique(types[wrong], return_counts=True)
        listed = ", ".join(
            f"{c} {_TYPE_NAMES.get(int(k), str(k))}" for k, c in zip(kinds, counts, strict=True)
        )
        raise GeometryError(
            f"{label} has {int(wrong.sum())} feature(s) that are not points ({listed}); "
            "this script needs Point or MultiPoint features; to use them, turn each into points "
            f"with {spell('as_points')} centroid (the centre), inside (a point on the feature) or "
            "fill (the weight spread over the area or length)."
        )
    if shapely.has_z(geometry).any():
        warnings.warn(
            f"{label} has Z coordinates; they are ignored (distances are measured in x and y).",
            UserWarning,
            stacklevel=4,
        )
    coords, feature = shapely.get_coordinates(geometry, return_index=True)
    return _finish(attributes, coords[:, 0].copy(), coords[:, 1].copy(), feature, crs, label)


def _finish(attributes, x, y, feature, crs, label, *, checked: bool = False) -> PointLayer:
    """The layer of points ``x``, ``y``; ``checked`` says their coordinates are known to be finite."""
    bad = None if checked else ~(np.isfinite(x) & np.isfinite(y))
    if bad is not None and bad.any():
        rows = np.unique(feature[bad])
        raise GeometryError(
            f"{rows.size} feature(s) of {label} have NaN or infinite coordinates "
            f"({feature_ids(attributes, rows)}); repair or drop them first."
        )
    if crs is not None and not hasattr(crs, "to_wkt"):
        import pyproj

        crs = pyproj.CRS.from_user_input(crs)
    return PointLayer(attributes, x, y, np.asarray(feature, dtype=np.int64), crs, label)
