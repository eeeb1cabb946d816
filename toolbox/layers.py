"""Layer I/O: the only module that talks to OGR (through pyogrio, or fiona when asked).

Reading turns a vector layer into point coordinates plus the attribute columns a script needs;
writing puts a result table or layer on disk without ever leaving a half-written file or
touching layers that were already there.
"""

from __future__ import annotations

import difflib
import os
import shutil
import sys
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import shapely

from .errors import GeometryError, InputError, OutputError, ParameterError

__all__ = [
    "ENGINES",
    "TABLE_SUFFIXES",
    "PointLayer",
    "read_points",
    "check_table_output",
    "write_table",
]

ENGINES = ("pyogrio", "fiona")
TABLE_SUFFIXES = (".gpkg", ".csv", ".parquet")

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
        raise InputError(f"{path!r} holds {len(names)} layers ({', '.join(names)}); choose one with --layer.")
    if layer not in names:
        raise InputError(f"{path!r} has no layer {layer!r}; {_suggest(layer, names)}")
    return layer


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def read_points(
    data,
    *,
    layer: str | None = None,
    fields: Sequence[str] = (),
    where: str | None = None,
    engine: str = "pyogrio",
) -> PointLayer:
    """Read the points of a layer and the named attribute fields.

    Parameters
    ----------
    data : str, os.PathLike or geopandas.GeoDataFrame
        Any vector dataset OGR reads, or a GeoDataFrame already in memory.
    layer : str, optional
        Layer name; required when the dataset holds several layers.
    fields : sequence of str
        Attribute fields to keep (each must exist).
    where : str, optional
        OGR SQL filter applied by the reader (the user's own filter on the user's own file).
    engine : {"pyogrio", "fiona"}
        Reader to use.

    Returns
    -------
    PointLayer
    """
    fields = list(dict.fromkeys(fields))
    if engine not in ENGINES:
        raise ParameterError(f"engine must be one of {', '.join(ENGINES)}. Got {engine!r} instead.")
    if hasattr(data, "geometry") and hasattr(data, "columns"):
        frame = data
        if where:
            raise ParameterError("A where filter applies to files only; filter the GeoDataFrame first.")
        _check_fields(fields, [c for c in frame.columns if c != frame.geometry.name], "the GeoDataFrame")
        label = "the GeoDataFrame"
        attributes = pd.DataFrame(frame[fields]).reset_index(drop=True)
        geometry = np.asarray(frame.geometry.values, dtype=object)
        return _points_from_geometry(attributes, geometry, frame.crs, label)

    path = os.fspath(data)
    if _is_local_path(path) and not Path(path).exists():
        raise InputError(f"Input {path!r} does not exist; check the path.")
    name = _resolve_layer(path, layer)
    label = f"layer {name!r} of {path!r}"
    info = pyogrio.read_info(path, layer=name)
    _check_fields(fields, [str(f) for f in info["fields"]], label)
    try:
        if engine == "pyogrio":
            meta, table = pyogrio.read_arrow(path, layer=name, columns=fields, where=where)
            geom_name = meta["geometry_name"] or "wkb_geometry"
            wkb = table.column(geom_name).to_numpy(zero_copy_only=False)
            attributes = table.drop_columns([geom_name]).to_pandas()
            crs = meta["crs"]
            return _points_from_wkb(attributes, wkb, crs, label)
        import geopandas

        frame = geopandas.read_file(path, layer=name, columns=fields, where=where, engine="fiona")
    except (InputError, GeometryError):
        raise
    except ImportError as exc:
        raise InputError(f"The {engine} engine is not installed: {exc}") from exc
    except Exception as exc:
        hint = " (check the --where filter)" if where else ""
        raise InputError(f"Reading {label} failed{hint}: {_first_line(exc)}") from exc
    attributes = pd.DataFrame(frame[fields]).reset_index(drop=True)
    return _points_from_geometry(attributes, np.asarray(frame.geometry.values), frame.crs, label)


def _check_fields(fields, available, label):
    for field in fields:
        if field not in available:
            raise InputError(f"{label} has no field {field!r}; {_suggest(field, available)}")


def _points_from_wkb(attributes, wkb, crs, label) -> PointLayer:
    # Fast path: a layer of 2-D little-endian WKB points is a fixed 21-byte record per feature.
    if wkb.size and all(v is not None for v in wkb[:1]):
        lengths = np.fromiter((len(v) if v is not None else -1 for v in wkb), np.int64, wkb.size)
        if (lengths == 21).all():
            raw = np.frombuffer(b"".join(wkb), dtype=np.uint8).reshape(-1, 21)
            if (raw[:, 0] == 1).all() and (raw[:, 1:5].view("<u4")[:, 0] == 1).all():
                xy = raw[:, 5:].copy().view("<f8")
                x, y = xy[:, 0].copy(), xy[:, 1].copy()
                empty = np.isnan(x) & np.isnan(y)  # WKB encodes POINT EMPTY as NaN, NaN
                if not empty.any():
                    feature = np.arange(x.size, dtype=np.int64)
                    return _finish(attributes, x, y, feature, crs, label)
    geometry = shapely.from_wkb(wkb)
    return _points_from_geometry(attributes, geometry, crs, label)


def _points_from_geometry(attributes, geometry, crs, label) -> PointLayer:
    geometry = np.asarray(geometry, dtype=object)
    types = shapely.get_type_id(geometry)
    missing = (types < 0) | shapely.is_empty(geometry)
    if missing.any():
        raise GeometryError(
            f"{int(missing.sum())} of {geometry.size} features of {label} have no geometry "
            "(null or empty); drop them first, e.g. with --where."
        )
    wrong = ~np.isin(types, list(_POINT_TYPES))
    if wrong.any():
        kinds, counts = np.unique(types[wrong], return_counts=True)
        listed = ", ".join(
            f"{c} {_TYPE_NAMES.get(int(k), str(k))}" for k, c in zip(kinds, counts, strict=True)
        )
        raise GeometryError(
            f"{label} has {int(wrong.sum())} feature(s) that are not points ({listed}); "
            "this script needs Point or MultiPoint features."
        )
    coords, feature = shapely.get_coordinates(geometry, return_index=True)
    return _finish(attributes, coords[:, 0].copy(), coords[:, 1].copy(), feature, crs, label)


def _finish(attributes, x, y, feature, crs, label) -> PointLayer:
    bad = ~(np.isfinite(x) & np.isfinite(y))
    if bad.any():
        rows = np.unique(feature[bad])
        shown = ", ".join(str(int(r)) for r in rows[:5])
        raise GeometryError(
            f"{rows.size} feature(s) of {label} have NaN or infinite coordinates (rows {shown}"
            f"{', ...' if rows.size > 5 else ''}); repair or drop them first."
        )
    if crs is not None and not hasattr(crs, "to_wkt"):
        import pyproj

        crs = pyproj.CRS.from_user_input(crs)
    return PointLayer(attributes, x, y, np.asarray(feature, dtype=np.int64), crs, label)


# --------------------------------------------------------------------------------------------
# writing


def _table_kind(path: str) -> str:
    if path == "-":
        return "stdout"
    suffix = Path(path).suffix.lower()
    if suffix not in TABLE_SUFFIXES:
        raise OutputError(
            f"Cannot tell the output format of {path!r}; end it with "
            f"{', '.join(TABLE_SUFFIXES)} or use '-' for CSV on standard output."
        )
    return suffix[1:]


def _check_folder(path: Path):
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"The output folder {str(folder)!r} does not exist; create it first.")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(f"The output folder {str(folder)!r} is not writable; choose another output.")


def _gpkg_layers(path: Path) -> list[str]:
    for sidecar in ("-wal", "-journal"):
        if Path(str(path) + sidecar).exists():
            raise OutputError(
                f"{str(path)!r} seems to be open in another program ({path.name}{sidecar} exists); "
                "close it and try again."
            )
    try:
        return [str(row[0]) for row in pyogrio.list_layers(path)]
    except Exception as exc:
        raise OutputError(
            f"The existing file {str(path)!r} cannot be opened as a GeoPackage "
            f"({_first_line(exc)}); it was left untouched. Choose another output."
        ) from exc


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def check_table_output(path: str, layer_name: str, overwrite: bool, *, inputs=()) -> None:
    """Refuse, before any work is done, an output that cannot or must not be written.

    Parameters
    ----------
    path : str
        Output path (``.gpkg``, ``.csv``, ``.parquet``) or ``-`` for standard output.
    layer_name : str
        Table name inside a GeoPackage.
    overwrite : bool
        Whether an existing table or file may be replaced.
    inputs : sequence of (path, layer) pairs
        Layers being read, which are never replaced.
    """
    kind = _table_kind(path)
    if kind == "stdout":
        return
    target = Path(path)
    _check_folder(target)
    if target.is_dir():
        raise OutputError(f"The output {path!r} is a folder; name a file.")
    if kind == "gpkg":
        if not layer_name:
            raise ParameterError("The output layer name must not be empty.")
        for in_path, in_layer in inputs:
            same = target.exists() and Path(in_path).exists() and os.path.samefile(in_path, target)
            if same and in_layer == layer_name:
                raise OutputError(
                    f"The output table {layer_name!r} would replace the input layer; "
                    "choose another --output-layer."
                )
        if target.exists():
            names = _gpkg_layers(target)
            if layer_name in names and not overwrite:
                raise OutputError(
                    f"{path!r} already has a layer {layer_name!r}; pass --overwrite to replace it "
                    "or choose another --output-layer."
                )
    elif target.exists() and not overwrite:
        raise OutputError(f"{path!r} already exists; pass --overwrite to replace it.")


def write_table(table: pd.DataFrame, path: str, *, layer_name: str = "", overwrite: bool = False) -> str:
    """Write an attribute table atomically; returns a description of where it went.

    A GeoPackage output gets a non-spatial table and keeps every other layer it had: the
    table is written into a copy beside the file, which then replaces it in one rename. CSV
    and Parquet files are written under a temporary name and renamed. A failure leaves no
    partial output and the previous file as it was.
    """
    check_table_output(path, layer_name, overwrite)
    kind = _table_kind(path)
    if kind == "stdout":
        table.to_csv(sys.stdout, index=False)
        sys.stdout.flush()
        return "standard output"
    target = Path(path)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        if kind == "gpkg":
            if target.exists():
                shutil.copyfile(target, tmp)
                shutil.copymode(target, tmp)
            else:
                tmp.unlink()
            pyogrio.write_dataframe(table, tmp, layer=layer_name, driver="GPKG")
        elif kind == "csv":
            table.to_csv(tmp, index=False)
        else:
            table.to_parquet(tmp, index=False)
        if not target.exists():
            os.chmod(tmp, 0o666 & ~_umask())  # mkstemp made it private; give the usual mode
        os.replace(tmp, target)
    except BaseException as exc:
        for leftover in (tmp, Path(str(tmp) + "-journal"), Path(str(tmp) + "-wal")):
            leftover.unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise OutputError(
                f"Writing {path!r} failed: {exc.strerror or exc}; nothing was written."
            ) from exc
        if isinstance(exc, Exception) and not isinstance(exc, OutputError):
            raise OutputError(f"Writing {path!r} failed: {_first_line(exc)}; nothing was written.") from exc
        raise
    if kind == "gpkg":
        return f"table {layer_name!r} in {path}"
    return str(path)
