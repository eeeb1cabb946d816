"""Grouping points by the region polygons that contain them (``--regions``), and results on them.

The join is geopandas' spatial join (shapely's STRtree underneath), never a hand-written
point-in-polygon test. Rules, stated once here and in the README:

- a point inside one region belongs to it;
- a point on the boundary of several regions (a shared edge or corner), or inside several
  overlapping regions, belongs to the one that comes **first in the region layer**; overlaps
  (points strictly inside two regions) are counted in a warning, since a partition has none;
- a point in no region forms one group whose region id is empty (``outside="group"``), or is
  left out with its count in a warning (``outside="drop"``);
- regions in another CRS than the points are reprojected to the points' CRS, with a warning.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import InputError, ParameterError, spell
from .read import PointLayer, _check_fields, read_layer

__all__ = ["OUTSIDE", "RegionJoin", "join_regions", "attach_regions", "onto_regions"]

#: what happens to points in no region (``--outside-regions``)
OUTSIDE = ("group", "drop")


@dataclass(frozen=True)
class RegionJoin:
    """The region of every point, and the region layer for writing results onto it.

    ``values`` holds the ``field`` value of each point's region (missing for points in no
    region), ``keep`` marks the points that stay (all of them unless ``outside="drop"``),
    ``layer`` is the region layer as read (its own CRS, every field and geometry) and
    ``label`` names it in messages.
    """

    field: str
    values: pd.Series
    keep: np.ndarray
    layer: object  # geopandas.GeoDataFrame
    label: str
    outside: int


def join_regions(
    x: np.ndarray,
    y: np.ndarray,
    crs,
    label: str,
    regions,
    *,
    region_id: str | None,
    layer: str | None = None,
    outside: str = "group",
    engine: str = "pyogrio",
) -> RegionJoin:
    """The region (its ``region_id`` value) of each point ``(x, y)`` given in ``crs``.

    Parameters
    ----------
    x, y : numpy.ndarray
        Point coordinates in the CRS of their layer.
    crs : pyproj.CRS or None
        That CRS.
    label : str
        How messages name the point layer.
    regions : str, os.PathLike or geopandas.GeoDataFrame
        The region polygon layer (never modified).
    region_id : str
        Field of the region layer naming each region (``--region-id``).
    layer : str, optional
        Layer of the regions dataset (``--regions-layer``).
    outside : {"group", "drop"}
        Points in no region: one group with an empty region id, or left out.
    engine : {"pyogrio", "fiona"}
        Reader of the region layer.

    Returns
    -------
    RegionJoin

    Examples
    --------
    >>> import geopandas, shapely
    >>> zones = geopandas.GeoDataFrame({"name": ["west", "east"]},
    ...     geometry=[shapely.box(0, 0, 1, 1), shapely.box(1, 0, 2, 1)])
    >>> join = join_regions(np.array([0.5, 1.0, 1.5, 5.0]), np.zeros(4) + 0.5, None, "pts", zones,
    ...                     region_id="name")
    >>> join.values.tolist()
    ['west', 'west', 'east', nan]
    """
    import geopandas
    import shapely

    if outside not in OUTSIDE:
        raise ParameterError(f"{spell('outside_regions')} must be one of {', '.join(OUTSIDE)}. Got {outside!r} instead.")
    if not region_id:
        raise ParameterError(f"{spell('regions')} needs {spell('region_id')}, the field of the region layer that names each region.")
    frame, region_label = read_layer(regions, layer=layer, engine=engine)
    region_label = f"the region {region_label.removeprefix('the ')}"
    _check_fields([region_id], [c for c in frame.columns if c != frame.geometry.name], region_label)
    geometry = frame.geometry
    usable = geometry.notna() & ~geometry.is_empty
    if not usable.any():
        raise InputError(f"{region_label} has no geometries; check {spell('regions')} and {spell('regions_layer')}.")
    kinds = set(geometry[usable].geom_type)
    if not kinds <= {"Polygon", "MultiPolygon"}:
        raise InputError(
            f"{region_label} holds {', '.join(sorted(kinds - {'Polygon', 'MultiPolygon'}))} features; "
            f"{spell('regions')} needs a polygon layer."
        )
    ids = frame[region_id]
    if ids[usable].isna().any():
        raise InputError(
            f"{int(ids[usable].isna().sum())} region(s) of {region_label} have no {region_id!r} value; "
            f"fill them in or choose another {spell('region_id')}."
        )
    if ids[usable].duplicated().any():
        repeated = ids[usable][ids[usable].duplicated()].unique()[:3]
        warnings.warn(
            f"Several regions of {region_label} share the {region_id!r} value(s) "
            f"{', '.join(map(str, repeated))}; their points form one group each value.",
            UserWarning,
            stacklevel=2,
        )
    polygons = geometry[usable]
    if (crs is None) != (frame.crs is None):
        raise InputError(
            f"Only one of {label} and {region_label} has a CRS, so they cannot be related; assign "
            "the missing CRS first."
        )
    if crs is not None and not frame.crs.equals(crs):
        warnings.warn(
            f"{region_label} is in {frame.crs.name}, the points in {crs.name}; the regions are "
            "reprojected to the points' CRS for the join.",
            UserWarning,
            stacklevel=2,
        )
        polygons = polygons.to_crs(crs)
    points = geopandas.GeoDataFrame(geometry=shapely.points(x, y), crs=crs)
    regions_frame = geopandas.GeoDataFrame(
        {"_region_row": np.flatnonzero(usable.to_numpy())}, geometry=polygons.values, crs=crs
    )
    hits = geopandas.sjoin(points, regions_frame, how="inner", predicate="intersects")
    # the first region in layer order wins on shared boundaries and overlaps
    first = hits.groupby(level=0)["_region_row"].min()
    row = np.full(x.size, -1, dtype=np.int64)
    row[first.index.to_numpy()] = first.to_numpy()
    several = hits.index.value_counts()
    several = several[several > 1].index.to_numpy()
    if several.size:
        inside = geopandas.sjoin(points.iloc[several], regions_frame, predicate="within")
        overlaps = int((inside.index.value_counts() > 1).sum())
        if overlaps:
            warnings.warn(
                f"{overlaps} point(s) of {label} lie inside several regions of {region_label} "
                "(the regions overlap); each goes to the region that comes first in the region layer.",
                UserWarning,
                stacklevel=2,
            )
    values = ids.iloc[np.maximum(row, 0)].reset_index(drop=True).astype(object)
    values[row < 0] = np.nan
    missing = int((row < 0).sum())
    keep = np.ones(x.size, dtype=bool)
    if missing:
        if outside == "drop":
            keep = row >= 0
            what = f"they are left out ({spell('outside_regions', 'drop')})"
        else:
            what = f"they form one group with an empty region id ({spell('outside_regions', 'group')})"
        warnings.warn(
            f"{missing} of {x.size} point(s) of {label} lie in no region of {region_label}; {what}.",
            UserWarning,
            stacklevel=2,
        )
    if ids.dtype.kind in "iub" or pd.api.types.is_integer_dtype(ids.dtype):
        values = pd.array(values.where(row >= 0, None), dtype="Int64") if len(values) else values
        values = pd.Series(values)
    return RegionJoin(region_id, values, keep, frame, region_label, missing)


def attach_regions(points: PointLayer, join: RegionJoin) -> tuple[PointLayer, np.ndarray]:
    """The points as rows of their own, each with its region id in the field ``join.field``.

    Every point becomes one row (a MultiPoint, or the samples of ``--as-points fill``, can lie
    in several regions); points dropped by ``outside="drop"`` are left out. Returns the new
    points, whose ``feature`` numbers the kept points, and for each of them the row of the
    feature it came from.
    """
    if join.field in points.attributes.columns:
        raise InputError(
            f"{points.label} already has a field {join.field!r}, like the {spell('region_id')} field of "
            f"{join.label}; rename one of them so that the groups are not confused."
        )
    keep = join.keep
    source = points.feature[keep]
    attributes = points.attributes.iloc[source].reset_index(drop=True)
    attributes[join.field] = join.values[keep].reset_index(drop=True)
    changes = {"attributes": attributes, "x": points.x[keep], "y": points.y[keep]}
    changes["feature"] = np.arange(int(keep.sum()), dtype=np.int64)
    for name in ("share", "shift"):  # the fill model's per-point arrays, when present
        if hasattr(points, name):
            changes[name] = getattr(points, name)[keep]
    from dataclasses import replace

    return replace(points, **changes), source


def onto_regions(table: pd.DataFrame, join: RegionJoin, *, key: str | None = None):
    """The region layer with the result ``table``'s fields added, matched on the region id.

    Every region keeps its geometry and fields; regions without a result row get empty values,
    and a region with several result rows (``--group-by`` besides the regions) appears once per
    row. Result rows of points in no region have no geometry to go on and are left out (the
    warning of :func:`join_regions` counted them). ``key`` is the table's column holding the
    region id (default: the region id field itself).
    """
    import geopandas

    key = key or join.field
    layer = join.layer
    clash = [c for c in table.columns if c in layer.columns and c != key]
    if clash:
        raise InputError(
            f"{join.label} already has field(s) {', '.join(clash)}, which the result adds; rename them "
            "first so that nothing is overwritten."
        )
    right = table.rename(columns={key: join.field}) if key != join.field else table
    right = right[right[join.field].notna()]
    left = pd.DataFrame(layer.drop(columns=layer.geometry.name))
    left["_region_row"] = np.arange(len(layer))
    left_key = left[join.field]
    if pd.api.types.is_integer_dtype(left_key.dtype):
        right = right.assign(**{join.field: right[join.field].astype("Int64")})
        left[join.field] = left_key.astype("Int64")
    merged = left.merge(right, on=join.field, how="left", sort=False).sort_values("_region_row", kind="stable")
    geometry = layer.geometry.values.take(merged["_region_row"].to_numpy())
    merged = merged.drop(columns="_region_row").reset_index(drop=True)
    merged[join.field] = merged[join.field].astype(layer[join.field].dtype, errors="ignore")
    return geopandas.GeoDataFrame(merged, geometry=geometry, crs=layer.crs)
