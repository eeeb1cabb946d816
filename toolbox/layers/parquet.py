"""Layers held as Arrow: GeoParquet files, folders and globs, Arrow streams, GeoJSON from memory.

GDAL's Parquet driver is optional and missing from the build pyogrio bundles, so GeoParquet is
read here through ``pyarrow.dataset``: one file, a folder of files (Hive-style ``key=value``
sub-folders become fields) or a glob such as ``"years/*.parquet"``. The geometry column and its
CRS come from the file's ``geo`` metadata (the GeoParquet specification) or from a GeoArrow
extension type; both WKB and the GeoArrow encodings (``point``, ``multipoint``, ``linestring``,
``polygon`` and their multi- forms, separated or interleaved coordinates) are understood, and the
coordinates of points are taken straight from the Arrow buffers, without a shapely object per
feature.

:class:`ArrowLayer` serves two ways of reading: :meth:`ArrowLayer.table` reads the whole layer
(only the needed columns, with an optional row filter pushed down to the files) and
:meth:`ArrowLayer.batches` yields record batches of bounded size, so streaming code reads the
same files through the same checks.
"""

from __future__ import annotations

import glob
import json
import os
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import shapely

from ..errors import InputError, spell
from .read import (
    PointLayer,
    _arrow_attributes,
    _check_fields,
    _finish,
    _first_line,
    _points_from_geometry,
    _points_from_wkb,
    _warn_if_nothing_matched,
)
from .where import parse_where

if TYPE_CHECKING:
    import geopandas

__all__ = [
    "PARQUET_SUFFIXES",
    "ArrowLayer",
    "is_parquet",
    "open_parquet",
    "arrow_layer",
    "points_of_table",
    "frame_of_table",
]

PARQUET_SUFFIXES = (".parquet", ".geoparquet", ".parq")
_GLOB_CHARACTERS = set("*?[")
#: GeoArrow type names (``geoarrow.point`` ...) and the shapely geometry type of each
_GEOARROW = {
    "point": shapely.GeometryType.POINT,
    "linestring": shapely.GeometryType.LINESTRING,
    "polygon": shapely.GeometryType.POLYGON,
    "multipoint": shapely.GeometryType.MULTIPOINT,
    "multilinestring": shapely.GeometryType.MULTILINESTRING,
    "multipolygon": shapely.GeometryType.MULTIPOLYGON,
}
_INDEX = re.compile(r"__index_level_\d+__")  # a pandas index stored by to_parquet, not a field
_DEFAULT_CRS = "OGC:CRS84"  # the GeoParquet specification's CRS when the key is absent


def _is_glob(text: str) -> bool:
    return bool(_GLOB_CHARACTERS & set(text))


def _parquet_files(folder: Path) -> list[str]:
    return sorted(
        str(p)
        for p in folder.rglob("*")
        if p.suffix.lower() in PARQUET_SUFFIXES and p.is_file() and not p.name.startswith((".", "_"))
    )


def is_parquet(data) -> bool:
    """Whether ``data`` names GeoParquet: a ``.parquet`` file, a folder of them, or a glob.

    Examples
    --------
    >>> is_parquet("counts/*.parquet"), is_parquet("homes.gpkg")
    (True, False)
    """
    if not isinstance(data, (str, os.PathLike)):
        return False
    text = os.fspath(data)
    if text == "-" or text.startswith("/vsi") or "://" in text:
        return False
    path = Path(text)
    if path.suffix.lower() in PARQUET_SUFFIXES:
        return True
    if _is_glob(text) and not path.exists():
        return Path(text.rstrip("*?]")).suffix.lower() in PARQUET_SUFFIXES or any(
            Path(p).suffix.lower() in PARQUET_SUFFIXES for p in glob.glob(text, recursive=True)[:50]
        )
    if path.is_dir():
        return not any(path.glob("*.shp")) and bool(_parquet_files(path))
    if path.is_file():
        with open(path, "rb") as handle:
            return handle.read(4) == b"PAR1"
    return False


@dataclass(frozen=True)
class GeometryColumn:
    """Where the geometry is and how it is stored."""

    name: str
    encoding: str  # "WKB" or a key of _GEOARROW
    crs: object  # pyproj.CRS or None


@dataclass(frozen=True)
class ArrowLayer:
    """A layer read through pyarrow: files on disk or a table in memory.

    Attributes
    ----------
    dataset : pyarrow.dataset.Dataset
        The files (or the in-memory table) behind the layer.
    geometry : GeometryColumn
        Name, encoding and CRS of the geometry column.
    label : str
        How messages name the layer, e.g. ``"GeoParquet 'homes.parquet'"``.
    """

    dataset: pads.Dataset
    geometry: GeometryColumn
    label: str

    def __str__(self) -> str:  # messages and provenance records name the layer, not its data
        return self.label

    @property
    def crs(self):
        return self.geometry.crs

    @property
    def fields(self) -> list[str]:
        """Attribute field names (the geometry column left out)."""
        return [n for n in self.dataset.schema.names if n != self.geometry.name and not _INDEX.fullmatch(n)]

    def _scan_args(self, fields: Sequence[str] | None, where: str | None) -> dict:
        if fields is not None:
            _check_fields(fields, self.fields, self.label)
        columns = None if fields is None else [*dict.fromkeys(fields), self.geometry.name]
        expression = parse_where(where, self.dataset.schema.names) if where else None
        return {"columns": columns, "filter": expression}

    def table(self, fields: Sequence[str] | None = None, where: str | None = None) -> pa.Table:
        """Read the named fields (all when None) and the geometry, rows meeting ``where`` only."""
        try:
            table = self.dataset.to_table(**self._scan_args(fields, where))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError, OSError) as exc:
            raise _failed(self.label, where, exc) from exc
        _warn_if_nothing_matched(table.num_rows, where, self.label)
        return table

    def batches(
        self, fields: Sequence[str] | None = None, where: str | None = None, batch_rows: int = 1 << 17
    ) -> Iterator[pa.RecordBatch]:
        """Record batches of at most ``batch_rows`` rows: the fields, the geometry, the rows kept.

        Each batch can be turned into points with :func:`points_of_table`.
        """
        args = self._scan_args(fields, where)
        try:
            for batch in self.dataset.to_batches(batch_size=batch_rows, **args):
                if batch.num_rows:
                    yield batch
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError, OSError) as exc:
            raise _failed(self.label, where, exc) from exc

    def points(self, fields: Sequence[str] = (), where: str | None = None) -> PointLayer:
        """Point coordinates and the named attribute fields of the whole layer."""
        return points_of_table(self.table(list(fields), where), self, fields)

    def frame(self, fields: Sequence[str] | None = None, where: str | None = None) -> geopandas.GeoDataFrame:
        """The layer (or the named fields and the geometry) as a GeoDataFrame."""
        return frame_of_table(self.table(fields, where), self)


def _failed(label: str, where: str | None, exc: BaseException) -> InputError:
    hint = f" (check that the {spell('where')} filter compares fields with values of their type)" if where else ""
    return InputError(f"Reading {label} failed{hint}: {_first_line(exc)}")


# --------------------------------------------------------------------------------------------
# finding the geometry column


def _crs_of(value):
    import pyproj

    if value is None:
        return None
    try:
        return (
            pyproj.CRS.from_json_dict(value) if isinstance(value, dict) else pyproj.CRS.from_user_input(value)
        )
    except pyproj.exceptions.CRSError as exc:
        raise InputError(f"The CRS in the GeoParquet metadata cannot be read: {_first_line(exc)}") from exc


def _encoding_of(name: str, text: str, where: str) -> str:
    encoding = text.lower().removeprefix("geoarrow.")
    if encoding == "wkb":
        return "WKB"
    if encoding not in _GEOARROW:
        raise InputError(
            f"{where} stores its geometry column {name!r} as {text!r}, which is not read here; "
            "write it as WKB or a GeoArrow point, line or polygon encoding."
        )
    return encoding


def geometry_column(schema: pa.Schema, where: str) -> GeometryColumn:
    """The geometry column of a schema: GeoParquet ``geo`` metadata, else a GeoArrow extension."""
    metadata = schema.metadata or {}
    if b"geo" in metadata:
        try:
            geo = json.loads(metadata[b"geo"])
            name = geo.get("primary_column") or next(iter(geo["columns"]))
            spec = geo["columns"][name]
        except (ValueError, KeyError, StopIteration, TypeError) as exc:
            raise InputError(f"{where} has unreadable GeoParquet metadata ('geo'): {exc}") from exc
        if name not in schema.names:
            raise InputError(
                f"{where}: the GeoParquet metadata names geometry column {name!r}, which is missing."
            )
        crs = _crs_of(spec["crs"]) if "crs" in spec else _crs_of(_DEFAULT_CRS)
        return GeometryColumn(name, _encoding_of(name, spec.get("encoding", "WKB"), where), crs)
    for field in schema:
        extension = (field.metadata or {}).get(b"ARROW:extension:name", b"").decode()
        if extension.startswith("geoarrow."):
            meta = (field.metadata or {}).get(b"ARROW:extension:metadata") or b"{}"
            crs = json.loads(meta or b"{}").get("crs")
            return GeometryColumn(field.name, _encoding_of(field.name, extension, where), _crs_of(crs))
        if isinstance(field.type, pa.ExtensionType) and field.type.extension_name.startswith("geoarrow."):
            meta = json.loads(field.type.__arrow_ext_serialize__() or b"{}")
            name = field.type.extension_name
            return GeometryColumn(field.name, _encoding_of(field.name, name, where), _crs_of(meta.get("crs")))
    raise InputError(
        f"{where} has no geometry column (neither GeoParquet 'geo' metadata nor a GeoArrow "
        "extension type); write it with geopandas' to_parquet or another GeoParquet writer."
    )


# --------------------------------------------------------------------------------------------
# opening


def _describe_crs(crs) -> str:
    if crs is None:
        return "no CRS"
    code = crs.to_authority()
    return ":".join(code) if code else crs.name


def _check_agreement(files: Sequence[str], where: str) -> GeometryColumn:
    """One geometry column, encoding, CRS and set of field types across every file."""
    first_file, first_schema, first_geom = None, None, None
    for path in files:
        try:
            schema = pq.read_schema(path)
        except (pa.ArrowInvalid, OSError) as exc:
            raise InputError(f"Cannot read {path!r} of {where} as Parquet: {_first_line(exc)}") from exc
        geom = geometry_column(schema, repr(path))
        if first_schema is None:
            first_file, first_schema, first_geom = path, schema, geom
            continue
        problem = None
        if (geom.name, geom.encoding) != (first_geom.name, first_geom.encoding):
            problem = (
                f"geometry column {geom.name!r} ({geom.encoding}) against "
                f"{first_geom.name!r} ({first_geom.encoding})"
            )
        elif (geom.crs is None) != (first_geom.crs is None) or (
            geom.crs is not None and geom.crs != first_geom.crs
        ):
            problem = f"CRS {_describe_crs(geom.crs)} against {_describe_crs(first_geom.crs)}"
        else:
            mine = {f.name: f.type for f in schema}
            theirs = {f.name: f.type for f in first_schema}
            for name in dict.fromkeys([*theirs, *mine]):
                if mine.get(name) != theirs.get(name):
                    problem = (
                        f"field {name!r} as {mine.get(name, 'missing')} against {theirs.get(name, 'missing')}"
                    )
                    break
        if problem:
            raise InputError(
                f"The GeoParquet files of {where} do not agree: {path!r} has {problem} in "
                f"{first_file!r}; write every part with the same fields and CRS."
            )
    return first_geom


def open_parquet(data, layer: str | None = None) -> ArrowLayer:
    """Open a GeoParquet file, a folder of them (Hive partitions as fields) or a glob.

    Parameters
    ----------
    data : str or os.PathLike
        ``homes.parquet``, ``homes/`` (every ``*.parquet`` under it) or ``"homes/*.parquet"``.
    layer : str, optional
        A GeoParquet dataset holds one layer; a name is accepted only if it is the file's (or
        folder's) stem, so that a chain or script written for another format fails clearly.

    Returns
    -------
    ArrowLayer
    """
    text = os.fspath(data)
    path = Path(text)
    label = f"GeoParquet {text!r}"
    if path.is_dir():
        files = _parquet_files(path)
        base = text
    elif path.is_file():
        files, base = [text], None
    elif _is_glob(text):
        files = sorted(p for p in glob.glob(text, recursive=True) if Path(p).is_file())
        # Hive-style key=value folders below the pattern's fixed part still become fields
        fixed = Path(text[: min(text.index(c) for c in _GLOB_CHARACTERS if c in text)])
        base = str(fixed if text.endswith(os.sep) or fixed.is_dir() else fixed.parent)
    else:
        raise InputError(f"Input {text!r} does not exist; check the path.")
    if not files:
        raise InputError(f"{label} matches no .parquet file; check the path or the pattern.")
    stem = path.name if path.is_dir() else path.stem
    if layer is not None and layer != stem:
        raise InputError(f"{label} holds one layer ({stem!r}); leave out the layer name or give {stem!r}.")
    geom = _check_agreement(files, label)
    try:
        partitioning = pads.HivePartitioning.discover(infer_dictionary=False) if base else None
        dataset = pads.dataset(files, format="parquet", partitioning=partitioning, partition_base_dir=base)
    except (pa.ArrowInvalid, OSError) as exc:
        raise InputError(f"Cannot open {label}: {_first_line(exc)}") from exc
    return ArrowLayer(dataset, geom, label)


def dictionary_format(path: str, fields: Sequence[str]) -> pads.ParquetFileFormat:
    """The Parquet format that reads the text ``fields`` of the file at ``path`` as dictionaries.

    Their batches then hold a code per row and each distinct text once (:func:`points_of_table`
    turns them into categories in sorted order, so they group and sort as the texts do).
    """
    try:
        schema = pq.read_schema(path)
    except (pa.ArrowInvalid, OSError) as exc:
        raise InputError(f"Cannot read {path!r} as Parquet: {_first_line(exc)}") from exc
    text = {f for f in fields if f in schema.names and pa.types.is_string(schema.field(f).type)}
    text |= {f for f in fields if f in schema.names and pa.types.is_large_string(schema.field(f).type)}
    return pads.ParquetFileFormat(read_options=pads.ParquetReadOptions(dictionary_columns=text))


def arrow_layer(table: pa.Table, label: str, geometry: GeometryColumn | None = None) -> ArrowLayer:
    """An :class:`ArrowLayer` over a table in memory (read from standard input, say).

    The geometry column is found from the table's metadata unless ``geometry`` says where it is.
    """
    geom = geometry or geometry_column(table.schema, label)
    return ArrowLayer(pads.dataset(table), geom, label)


# --------------------------------------------------------------------------------------------
# geometry: to points, or to shapely


def _coordinates(array: pa.Array) -> np.ndarray:
    """(n, 2) float coordinates of a GeoArrow point array (separated or interleaved)."""
    if pa.types.is_struct(array.type):
        x = array.field(0).to_numpy(zero_copy_only=False)
        y = array.field(1).to_numpy(zero_copy_only=False)
        return np.column_stack([x, y]).astype(float, copy=False)
    if pa.types.is_fixed_size_list(array.type):
        size = array.type.list_size
        values = array.flatten().to_numpy(zero_copy_only=False)
        return values.reshape(-1, size)[:, :2].astype(float, copy=False)
    raise InputError(f"A GeoArrow point column of type {array.type} is not understood.")


def _has_z(array: pa.Array) -> bool:
    while pa.types.is_list(array.type) or pa.types.is_large_list(array.type):
        array = array.flatten()
    if pa.types.is_struct(array.type):
        return array.type.num_fields > 2
    return array.type.list_size > 2


def _lists(array: pa.Array, depth: int) -> tuple[np.ndarray, tuple[np.ndarray, ...]]:
    """Coordinates and offsets (from 0) of a GeoArrow array nested ``depth`` lists deep."""
    offsets = []
    for _ in range(depth):
        raw = array.offsets.to_numpy()
        offsets.append(raw - raw[0])
        array = array.flatten()
    return _coordinates(array), tuple(offsets)


def _shapely_of(column, encoding: str) -> np.ndarray:
    """Shapely geometries (None for nulls) of a WKB or GeoArrow column."""
    array = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if encoding == "WKB":
        if isinstance(array.type, pa.ExtensionType):
            array = array.storage
        return shapely.from_wkb(array.to_numpy(zero_copy_only=False))
    if isinstance(array.type, pa.ExtensionType):
        array = array.storage
    valid = ~np.asarray(array.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    kind = _GEOARROW[encoding]
    if encoding == "point":
        geometry = shapely.points(_coordinates(array))
    else:
        depth = {"linestring": 1, "multipoint": 1, "polygon": 2, "multilinestring": 2, "multipolygon": 3}
        coords, offsets = _lists(array, depth[encoding])
        geometry = shapely.from_ragged_array(kind, coords, offsets)
    geometry = np.asarray(geometry, dtype=object)
    geometry[~valid] = None
    return geometry


def points_of_table(table, layer: ArrowLayer, fields: Sequence[str] = ()) -> PointLayer:
    """Points and named fields of a table or record batch read from ``layer``.

    Points stored as WKB 2-D points, as GeoArrow points or multipoints (without nulls) are read
    from the Arrow buffers directly; anything else goes through shapely, with the same checks
    (points only, no empty geometry, finite coordinates) and messages as every other format.
    """
    fields = list(dict.fromkeys(fields))
    geom = layer.geometry
    attributes = _arrow_attributes(table, fields)
    column = table.column(geom.name)
    array = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if geom.encoding == "WKB":
        storage = array.storage if isinstance(array.type, pa.ExtensionType) else array
        return _points_from_wkb(attributes, storage, geom.crs, layer.label)
    storage = array.storage if isinstance(array.type, pa.ExtensionType) else array
    if storage.null_count == 0 and geom.encoding in ("point", "multipoint") and not _has_z(storage):
        if geom.encoding == "point":
            xy = _coordinates(storage)
            feature = np.arange(len(storage), dtype=np.int64)
        else:
            xy, (offsets,) = _lists(storage, 1)
            counts = np.diff(offsets)
            if (counts == 0).any():  # empty multipoints: let the shared checks name them
                return _points_from_geometry(
                    attributes, _shapely_of(storage, "multipoint"), geom.crs, layer.label
                )
            feature = np.repeat(np.arange(len(storage), dtype=np.int64), counts)
        return _finish(attributes, xy[:, 0].copy(), xy[:, 1].copy(), feature, geom.crs, layer.label)
    return _points_from_geometry(attributes, _shapely_of(storage, geom.encoding), geom.crs, layer.label)


def frame_of_table(table: pa.Table, layer: ArrowLayer) -> geopandas.GeoDataFrame:
    """A GeoDataFrame of a table read from ``layer`` (fields in their order, geometry kept)."""
    import geopandas

    geom = layer.geometry
    geometry = _shapely_of(table.column(geom.name), geom.encoding)
    attributes = table.drop_columns([geom.name]).to_pandas()
    series = geopandas.GeoSeries(geometry, index=attributes.index, crs=geom.crs, name=geom.name)
    frame = geopandas.GeoDataFrame(attributes, geometry=series)
    order = [n for n in table.column_names if n in frame.columns]
    return frame[order]
