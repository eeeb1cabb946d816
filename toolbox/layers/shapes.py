"""Polygons and lines as weighted points (``--as-points centroid|inside|fill``).

``centroid`` and ``inside`` put each feature's whole weight on one point. ``fill`` spreads it
uniformly over the feature's area (polygons) or length (lines): a square grid of spacing D,
aligned on the layer, cuts every polygon into pieces, and lines are cut along their length into
pieces of at most D; each piece becomes one sample point (the centroid of the piece) carrying
the feature's weight times the piece's share of the feature's area or length. Every sample also
carries its *shift*: the mean distance from it to the points of its piece (exactly
D·(√2 + ln(1+√2))/6 ≈ 0.383·D for a cell wholly inside a polygon, a quarter of the length for a
piece of line, and the largest distance to a vertex, an upper bound, for a cell cut by a
polygon's boundary).

The model behind ``fill`` is "weight spread uniformly over the feature". Its mean distance is
E|X − Y| for X, Y drawn independently from that spread weight. Moving every point of a piece to
the piece's sample moves it by at most r, so each pair distance changes by at most 2r; using the
mean shift instead of the largest, and the fact that a sample is its piece's centroid, gives
tighter allowances. The estimator folds them into its guaranteed intervals when the points carry
their shifts (``estimate.Points(..., shift=...)``, see :mod:`toolbox.estimate.pieces`).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import shapely

from ..errors import GeometryError, ParameterError, spell
from .read import _TYPE_NAMES, PointLayer, _check_fields, _finish, read_layer, read_points

__all__ = [
    "RULES",
    "ShapePoints",
    "read_input",
    "as_points",
    "default_spacing",
]

#: the ways a feature becomes points (``--as-points``)
RULES = ("centroid", "inside", "fill")

#: the most sample points ``fill`` makes by default; a finer --fill-spacing may exceed it
_DEFAULT_BUDGET = 400_000
#: the most sample points ``fill`` makes at all (memory of the sampling itself)
_HARD_LIMIT = 20_000_000

_POINTS, _LINES, _POLYGONS = (0, 4), (1, 2, 5), (3, 6)
#: mean distance from the centre of a unit square to its points (common practice; checked in tests)
_SQUARE_CENTRE_MEAN = (math.sqrt(2) + math.log1p(math.sqrt(2))) / 6


@dataclass(frozen=True)
class ShapePoints(PointLayer):
    """Weighted points standing for the features of a layer.

    Besides the :class:`~toolbox.layers.PointLayer` fields: ``share`` is each point's fraction of
    its feature's weight (the shares of one feature add up to 1), ``shift`` the mean distance (or
    an upper bound of it) from the point to the part of the feature it stands for (0 for
    ``centroid`` and ``inside``, whose model is the point itself), ``rule`` the --as-points rule and ``spacing`` the grid
    spacing of ``fill`` (None otherwise).
    """

    share: np.ndarray
    shift: np.ndarray
    rule: str
    spacing: float | None

    def describe(self, units: str = "", *, default: bool = False) -> str:
        """One line saying how the features became points, for outputs and provenance.

        ``default`` says the spacing was chosen by :func:`default_spacing`, not given.
        """
        if self.rule == "points":
            return "points as stored"
        if self.rule == "centroid":
            return "centroid (one point per feature; it may lie outside a concave polygon)"
        if self.rule != "fill":
            return f"{self.rule} (one point per feature)"
        unit = f" {units}" if units and units != "unknown" else ""
        chosen = ", the default for the layer and tolerance" if default else ""
        return f"fill (grid spacing {self.spacing:.6g}{unit}{chosen}; {self.x.size} sample points)"


def read_input(
    data,
    *,
    layer: str | None = None,
    fields: Sequence[str] = (),
    where: str | None = None,
    engine: str = "pyogrio",
    as_points: str | None = None,
    fill_spacing: float | None = None,
    tolerance: float = 0.01,
    crs=None,
) -> ShapePoints:
    """Read a layer as weighted points: its points as they are, or its features by ``as_points``.

    ``crs`` (the run's --crs, or a function of the layer's CRS and label that returns the CRS
    distances are measured in) reprojects the features before they become points, so that the
    fill grid and its allowances are in the CRS the distances are measured in.

    Without ``as_points`` the layer must hold points (the reader's message names --as-points
    otherwise); every point then has share 1 and shift 0. With it, polygons and lines become
    points by :func:`as_points`. ``fill_spacing`` without ``as_points="fill"`` is refused.
    """
    if fill_spacing is not None and as_points != "fill":
        raise ParameterError(
            f"{spell('fill_spacing')} applies to {spell('as_points', 'fill')} only; add {spell('as_points', 'fill')} or drop it."
        )
    if as_points is None:
        base = read_points(data, layer=layer, fields=fields, where=where, engine=engine)
        ones, zeros = np.ones(base.x.size), np.zeros(base.x.size)
        return ShapePoints(**base.__dict__, share=ones, shift=zeros, rule="points", spacing=None)
    frame, label = read_layer(data, layer=layer, where=where, engine=engine, columns=list(dict.fromkeys(fields)))
    target = crs(frame.crs, label) if callable(crs) else crs
    if target is not None and frame.crs is not None and not frame.crs.equals(target):
        frame = frame.to_crs(target)
    fields = list(dict.fromkeys(fields))
    return _by_rule(frame, fields, label, rule=as_points, spacing=fill_spacing, tolerance=tolerance)


def _type_ids(geometry: np.ndarray, label: str) -> np.ndarray:
    types = shapely.get_type_id(geometry)
    missing = (types < 0) | shapely.is_empty(geometry)
    if missing.any():
        raise GeometryError(
            f"{int(missing.sum())} of {geometry.size} features of {label} have no geometry "
            f"(null or empty); drop them first, e.g. with {spell('where')}."
        )
    return types


def _side(minx, miny, maxx, maxy):
    """Side of the square of a box's area; half the longer side for a thin box (a line)."""
    width, height = maxx - minx, maxy - miny
    return np.maximum(np.sqrt(width * height), np.maximum(width, height) / 2)


def default_spacing(geometry: np.ndarray, tolerance: float, budget: int = _DEFAULT_BUDGET) -> float:
    """The --fill-spacing used when none is given: fine enough for ``tolerance``, within a budget.

    A group's mean distance is at least about that of one of its features, about half the side
    s of the feature's extent for a compact shape; a mean allowance of about 0.77·D (whole cells)
    stays near half of ``tolerance`` times it when D = tolerance · s / 3. s is the median
    feature's side (never more than the layer's), so that groups as small as one typical
    feature, such as a region holding few features, still get a tight bound. The spacing is
    never so fine that the layer needs more than about ``budget`` sample points (area / D² for
    polygons, length / D for lines); then the allowance is wider and the output says so through
    ``rel_bound``.

    Examples
    --------
    >>> import shapely
    >>> round(default_spacing(np.array([shapely.box(0, 0, 300, 300)]), 0.01), 6)
    1.0
    >>> boxes = np.array([shapely.box(0, 0, 30, 30), shapely.box(100, 0, 130, 30), shapely.box(0, 100, 60, 160)])
    >>> round(default_spacing(boxes, 0.03), 6)  # the median box is 30 wide
    0.3
    """
    layer_side = float(_side(*shapely.total_bounds(geometry)))
    feature_side = float(np.median(_side(*shapely.bounds(geometry).T)))
    side = min(layer_side, feature_side) if feature_side > 0 else layer_side
    wanted = tolerance * side / 3
    area = float(shapely.area(geometry).sum())
    length = float(shapely.length(geometry).sum())
    if area > 0:
        floor = math.sqrt(area / budget)
    else:
        floor = length / budget
    return max(wanted, floor, layer_side * 1e-6)


def as_points(
    frame,
    fields: Sequence[str],
    label: str,
    *,
    rule: str,
    spacing: float | None = None,
    tolerance: float = 0.01,
) -> ShapePoints:
    """Weighted points for the features of a GeoDataFrame, by the --as-points ``rule``.

    Parameters
    ----------
    frame : geopandas.GeoDataFrame
        The layer (never modified).
    fields : sequence of str
        Attribute fields to keep (one row per feature in ``attributes``).
    label : str
        How messages name the layer.
    rule : {"centroid", "inside", "fill"}
        ``centroid``: the feature's centroid (it may lie outside a concave polygon; a warning
        counts them). ``inside``: a point guaranteed to lie on the feature (shapely's
        point-on-surface). ``fill``: the weight spread uniformly over the area or length.
    spacing : float, optional
        Grid spacing of ``fill`` in CRS units; default :func:`default_spacing`.
    tolerance : float
        The run's tolerance, which the default spacing follows.

    Returns
    -------
    ShapePoints

    Examples
    --------
    >>> import geopandas, shapely
    >>> square = geopandas.GeoDataFrame(geometry=[shapely.box(0, 0, 2, 2)])
    >>> pts = as_points(square, [], "a square", rule="fill", spacing=1.0)
    >>> pts.x.tolist(), pts.y.tolist(), pts.share.tolist()
    ([0.5, 1.5, 0.5, 1.5], [0.5, 0.5, 1.5, 1.5], [0.25, 0.25, 0.25, 0.25])
    """
    if rule not in RULES:
        raise ParameterError(f"{spell('as_points')} must be one of {', '.join(RULES)}. Got {rule!r} instead.")
    _check_fields(fields, [c for c in frame.columns if c != frame.geometry.name], label)
    attributes = pd.DataFrame(frame[list(fields)]).reset_index(drop=True)
    geometry = np.asarray(frame.geometry.values, dtype=object)
    types = _type_ids(geometry, label)
    if shapely.has_z(geometry).any():
        warnings.warn(
            f"{label} has Z coordinates; they are ignored (distances are measured in x and y).",
            UserWarning,
            stacklevel=3,
        )
    if rule in ("centroid", "inside"):
        if rule == "centroid":
            points = shapely.centroid(geometry)
            outside = np.isin(types, _POLYGONS) & ~shapely.intersects(points, geometry)
            if outside.any():
                warnings.warn(
                    f"{int(outside.sum())} centroid(s) of {label} lie outside their polygon (concave "
                    f"or multi-part shapes); {spell('as_points', 'inside')} keeps every point on its feature.",
                    UserWarning,
                    stacklevel=3,
                )
        else:
            points = shapely.point_on_surface(geometry)
        coords = shapely.get_coordinates(points)
        n = len(geometry)
        base = _finish(attributes, coords[:, 0].copy(), coords[:, 1].copy(), np.arange(n), frame.crs, label)
        return ShapePoints(**base.__dict__, share=np.ones(n), shift=np.zeros(n), rule=rule, spacing=None)
    return _fill(frame, attributes, geometry, types, label, spacing, tolerance)


_by_rule = as_points  # read_input's keyword of the same name hides the function there


def _fill(frame, attributes, geometry, types, label, spacing, tolerance) -> ShapePoints:
    kinds = {
        name: np.isin(types, ids) for name, ids in (("point", _POINTS), ("line", _LINES), ("polygon", _POLYGONS))
    }
    present = [name for name, mask in kinds.items() if mask.any()]
    other = ~(kinds["point"] | kinds["line"] | kinds["polygon"])
    if other.any():
        kind = _TYPE_NAMES.get(int(types[other][0]), "other")
        raise GeometryError(
            f"{label} has {int(other.sum())} {kind} feature(s); {spell('as_points', 'fill')} spreads weight over "
            "polygons (by area) or lines (by length) only: explode the collections first."
        )
    if len(present) > 1:
        raise GeometryError(
            f"{label} mixes {' and '.join(present)} features; {spell('as_points', 'fill')} spreads weight by "
            "area for polygons and by length for lines, which cannot be mixed in one layer: split "
            f"it, or use {spell('as_points', 'centroid')} or {spell('as_points', 'inside')}."
        )
    if spacing is None:
        spacing = default_spacing(geometry, tolerance)
    elif not (spacing > 0 and math.isfinite(spacing)):
        raise ParameterError(f"{spell('fill_spacing')} must be a positive number. Got {spacing!r} instead.")
    measure = shapely.area if present == ["polygon"] else shapely.length
    total = measure(geometry)
    if present != ["point"] and (total <= 0).any():
        rows = np.flatnonzero(total <= 0)
        raise GeometryError(
            f"{rows.size} feature(s) of {label} have zero {'area' if present == ['polygon'] else 'length'} "
            f"(rows {', '.join(str(int(r)) for r in rows[:5])}); they cannot spread a weight: "
            f"repair or drop them, or use {spell('as_points', 'inside')}."
        )
    if present == ["point"]:
        coords, feature = shapely.get_coordinates(geometry, return_index=True)
        parts = np.bincount(feature, minlength=len(geometry))
        x, y, share, shift = coords[:, 0], coords[:, 1], 1 / parts[feature], np.zeros(feature.size)
    elif present == ["line"]:
        x, y, feature, share, shift = _fill_lines(geometry, spacing, total, label)
    else:
        x, y, feature, share, shift = _fill_polygons(geometry, spacing, total, label)
    base = _finish(attributes, x, y, feature, frame.crs, label)
    return ShapePoints(**base.__dict__, share=share, shift=shift, rule="fill", spacing=float(spacing))


def _too_many(count: int, spacing: float, label: str) -> None:
    if count > _HARD_LIMIT:
        raise ParameterError(
            f"{spell('fill_spacing', spacing)} would cut {label} into more than {_HARD_LIMIT:,} sample "
            f"points ({count:,}); choose a larger {spell('fill_spacing')}."
        )


def _fill_lines(geometry, spacing, total, label):
    """Lines cut along their length into pieces of at most ``spacing``, sampled at the middle."""
    _too_many(int(np.ceil(total / spacing).sum()), spacing, label)
    parts, feature = shapely.get_parts(geometry, return_index=True)
    dense = shapely.segmentize(parts, spacing)
    coords, part = shapely.get_coordinates(dense, return_index=True)
    # consecutive vertices of the same part are one piece each
    same = part[1:] == part[:-1]
    start, end = coords[:-1][same], coords[1:][same]
    owner = feature[part[:-1][same]]
    length = np.hypot(*(end - start).T)
    keep = length > 0
    start, end, owner, length = start[keep], end[keep], owner[keep], length[keep]
    middle = (start + end) / 2
    # a uniform point of a segment is on average a quarter of its length from the middle
    return middle[:, 0].copy(), middle[:, 1].copy(), owner.astype(np.int64), length / total[owner], length / 4


def _fill_polygons(geometry, spacing, total, label):
    """Polygons cut by the layer's grid; each piece sampled at its centroid."""
    minx, miny = shapely.total_bounds(geometry)[:2]
    origin = (math.floor(minx / spacing) * spacing, math.floor(miny / spacing) * spacing)
    xs, ys, feats, shares, shifts = [], [], [], [], []
    made = 0
    for row, geom in enumerate(geometry):
        x, y, share, shift = _fill_one(geom, spacing, origin, float(total[row]))
        made += x.size
        _too_many(made, spacing, label)
        xs.append(x)
        ys.append(y)
        shares.append(share)
        shifts.append(shift)
        feats.append(np.full(x.size, row, dtype=np.int64))
    join = np.concatenate
    return join(xs), join(ys), join(feats), join(shares), join(shifts)


def _fill_one(geom, spacing, origin, total):
    """Sample points, shares and radii of one polygon on the layer's grid."""
    minx, miny, maxx, maxy = geom.bounds
    i0 = math.floor((minx - origin[0]) / spacing)
    i1 = max(math.ceil((maxx - origin[0]) / spacing), i0 + 1)
    j0 = math.floor((miny - origin[1]) / spacing)
    j1 = max(math.ceil((maxy - origin[1]) / spacing), j0 + 1)
    _too_many((i1 - i0) * (j1 - j0), spacing, "one feature")
    gx, gy = np.meshgrid(
        origin[0] + spacing * np.arange(i0, i1), origin[1] + spacing * np.arange(j0, j1), indexing="xy"
    )
    gx, gy = gx.ravel(), gy.ravel()
    cells = shapely.box(gx, gy, gx + spacing, gy + spacing)
    shapely.prepare(geom)
    x = gx + spacing / 2
    y = gy + spacing / 2
    amount = np.full(gx.size, spacing * spacing)
    # mean distance from the centre of a square of side D to its points: D·(√2 + ln(1+√2))/6
    shift = np.full(gx.size, spacing * _SQUARE_CENTRE_MEAN)
    # cells wholly inside keep their centre; only those on the boundary are cut
    cut = ~shapely.contains_properly(geom, cells)
    if cut.any():
        pieces = shapely.intersection(cells[cut], geom)
        area = shapely.area(pieces)
        amount[cut] = area
        pieces = pieces[area > 0]  # cells that only touch the feature, or miss it, drop out
        cut[cut] = area > 0
        centre = shapely.centroid(pieces)
        cx, cy = shapely.get_x(centre), shapely.get_y(centre)
        x[cut], y[cut] = cx, cy
        coords, index = shapely.get_coordinates(pieces, return_index=True)
        far = np.zeros(pieces.size)
        if index.size:
            # the farthest point of a piece from any point is one of its vertices (convexity)
            np.maximum.at(far, index, np.hypot(coords[:, 0] - cx[index], coords[:, 1] - cy[index]))
        shift[cut] = far
    keep = amount > 0
    return x[keep], y[keep], amount[keep] / total, shift[keep]
