"""What every script does before asking for sums: read, group, weigh, decide the distance.

Also where features that are not points become points (``--as-points``), where points are
grouped by the region polygon that holds them (``--regions``) and where a result goes onto
the region layer (``--output-on regions``), so that every script takes them alike.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import estimate, grouping, layers
from ..errors import ParameterError, spell
from ..layers import regions as region_layers
from ..layers import shapes as shape_layers


@dataclass(frozen=True)
class Places:
    """How a layer's features become grouped points: ``--as-points``, ``--fill-spacing``, ``--regions``.

    Scripts build it from their parameters with :meth:`of`; the default takes points as stored.
    """

    as_points: str | None = None
    fill_spacing: float | None = None
    regions: object = None
    regions_layer: str | None = None
    region_id: str | None = None
    outside_regions: str | None = None
    output_on: str | None = None
    tolerance: float = 0.01  # the default fill spacing follows it

    @classmethod
    def of(cls, values: dict) -> Places:
        """The options of this class found among a script's parameters (``locals()``)."""
        places = cls(**{k: values[k] for k in cls.__dataclass_fields__ if k in values})
        places.check()
        return places

    def check(self) -> None:
        """Refuse options that need another one, before anything is read."""
        if self.regions is None:
            given = [n for n in ("region_id", "regions_layer", "outside_regions") if getattr(self, n) is not None]
            if given:
                raise ParameterError(
                    f"{' and '.join(spell(n) for n in given)} need{'s' if len(given) == 1 else ''} "
                    f"{spell('regions')}, the region polygon layer; add it or drop them."
                )
            if self.output_on == "regions":
                raise ParameterError(
                    f"{spell('output_on', 'regions')} writes the results onto the region layer, so it "
                    f"needs {spell('regions')} (and {spell('region_id')}); add them or drop it."
                )
        elif not self.region_id:
            raise ParameterError(
                f"{spell('regions')} needs {spell('region_id')}, the field of the region layer that names each region."
            )
        if self.fill_spacing is not None and not (self.fill_spacing > 0 and self.fill_spacing < float("inf")):
            raise ParameterError(
                f"{spell('fill_spacing')} must be a positive number (a length in the CRS units). "
                f"Got {self.fill_spacing!r} instead."
            )
        if self.fill_spacing is not None and self.as_points != "fill":
            raise ParameterError(
                f"{spell('fill_spacing')} applies to {spell('as_points', 'fill')} only; add "
                f"{spell('as_points', 'fill')} or drop it."
            )

    def read_whole(self, data, batch_rows, dask_scheduler) -> bool:
        """Whether the layer must be read whole (refusing batches asked for), for ``--as-points``/``--regions``.

        Features become points and points find their regions on the whole layer: the batched
        and cluster readers take points as stored, so asking for both is refused.
        """
        if not self.reshaped:
            return False
        from ..layers import stream

        asked = [spell(n) for n, v in (("batch_rows", batch_rows), ("dask_scheduler", dask_scheduler)) if v is not None]
        if stream.is_dask_frame(data):
            asked.append("a Dask GeoDataFrame")
        if asked:
            used = [spell(n) for n in ("as_points", "regions") if getattr(self, n) is not None]
            raise ParameterError(
                f"{' and '.join(used)} work on the whole layer in memory, and {' and '.join(asked)} "
                f"read{'s' if len(asked) == 1 else ''} it in parts; drop one of them (for a very "
                "large layer, turn features into points or join regions first, and write points)."
            )
        return True

    @property
    def reshaped(self) -> bool:
        """Whether the layer is read other than as stored points (so it cannot be streamed)."""
        return self.as_points is not None or self.regions is not None


@dataclass(frozen=True)
class Grouped:
    """A layer's points ready for the estimator, with what a table needs to name the rows.

    ``join`` is the region of every point when grouped by ``--regions``; ``features`` numbers,
    for every point, the input feature it came from.
    """

    points: estimate.Points
    groups: grouping.Grouping
    layer: layers.PointLayer
    setup: estimate.DistanceSetup
    join: region_layers.RegionJoin | None = None
    features: object = None
    made: str | None = None


def group_points(layer, group_by, weight, setup, *, note: bool = False) -> Grouped:
    """Points of an already read layer, grouped by ``group_by`` and weighted by ``weight``.

    Samples of ``--as-points fill`` carry their feature's weight times their share of it, and
    their shifts, so that the estimator widens the intervals by the fill model's allowance.
    """
    groups = grouping.group_features(layer.attributes, list(group_by))
    weights = grouping.feature_weights(layer.attributes, weight, layer.label)
    point_weights = None if weights is None else weights[layer.feature]
    shift = None
    if getattr(layer, "rule", None) == "fill":
        point_weights = layer.share if point_weights is None else point_weights * layer.share
        shift = layer.shift
    points = estimate.Points.from_layer(
        setup,
        layer.x,
        layer.y,
        layer.crs,
        layer.label,
        groups.codes[layer.feature] if groups.count != 1 else None,  # one group: no per-point codes to gather
        groups.count,
        point_weights,
        names=grouping.group_namer(groups.keys),
        note=note,
        shift=shift,
    )
    return Grouped(points, groups, layer, setup)


def read_measured(data, *, layer, fields, where, engine, distance, crs, script, places: Places, setup=None):
    """A layer read as points (as stored, or by ``--as-points``) and how its distances are measured.

    With ``--as-points`` the features are first put in the CRS distances are measured in (the
    layer's own, ``--crs``, or longitude and latitude for geodesic distances; ``setup`` when
    given, e.g. the first layer's), so that the fill grid and its allowances are in it.
    """
    if places.as_points is None:
        read = layers.read_points(data, layer=layer, fields=fields, where=where, engine=engine)
        if setup is None:
            setup = estimate.distance_setup(read.crs, read.label, distance=distance, target=crs, script=script)
        return read, setup
    chosen = {"setup": setup}

    def measured_in(layer_crs, label):
        if chosen["setup"] is None:
            chosen["setup"] = estimate.distance_setup(layer_crs, label, distance=distance, target=crs, script=script)
        return chosen["setup"].crs

    read = shape_layers.read_input(
        data, layer=layer, fields=fields, where=where, engine=engine, as_points=places.as_points,
        fill_spacing=places.fill_spacing, tolerance=places.tolerance, crs=measured_in,
    )  # fmt: skip
    return read, chosen["setup"]


def frame_points(frame, label, fields, *, places: Places, distance, crs, script):
    """Points of a layer already read (a script that copies the layer keeps the frame)."""
    if places.as_points is None:
        read = layers.points_of(frame, fields, label)
        return read, estimate.distance_setup(read.crs, label, distance=distance, target=crs, script=script)
    setup = estimate.distance_setup(frame.crs, label, distance=distance, target=crs, script=script)
    if setup.crs is not None and frame.crs is not None and not frame.crs.equals(setup.crs):
        frame = frame.to_crs(setup.crs)
    read = shape_layers.as_points(
        frame, fields, label, rule=places.as_points, spacing=places.fill_spacing, tolerance=places.tolerance
    )
    return read, setup


def join_places(read, group_by, places: Places, engine):
    """Points grouped by their region (``--regions``) besides ``group_by``.

    Returns ``(read, group_by, join, features)``: the points (one row each once joined), the
    group fields (the region id first), the join (None without regions) and, for every point,
    the input feature it came from.
    """
    if places.regions is None:
        return read, list(group_by), None, read.feature
    join = region_layers.join_regions(
        read.x, read.y, read.crs, read.label, places.regions, region_id=places.region_id,
        layer=places.regions_layer, outside=places.outside_regions or "group", engine=engine,
    )  # fmt: skip
    read, features = region_layers.attach_regions(read, join)
    return read, [places.region_id, *group_by], join, features


def read_grouped(
    data, *, layer, group_by, weight, where, engine, distance, crs, script, places: Places = Places(),
) -> Grouped:  # fmt: skip
    """Read a layer's points with the fields grouping and weighting need, then group them.

    With ``--regions`` the points are grouped first by the region that holds them (its
    ``--region-id`` value), then by ``group_by``.
    """
    group_by = list(group_by or ())
    fields = [*group_by, *([weight] if weight else [])]
    read, setup = read_measured(
        data, layer=layer, fields=fields, where=where, engine=engine, distance=distance, crs=crs,
        script=script, places=places,
    )  # fmt: skip
    read, group_by, join, features = join_places(read, group_by, places, engine)
    grouped = group_points(read, group_by, weight, setup)
    return Grouped(
        grouped.points, grouped.groups, read, setup, join, features, made_points(read, setup, places)
    )  # fmt: skip


def made_points(read, setup, places: Places) -> str | None:
    """How the features became points, for the ``as_points`` column (None for point layers)."""
    if places.as_points is None:
        return None
    units = "degree" if setup.kind == "geodesic" else setup.units
    return read.describe(units, default=places.fill_spacing is None)


def finish_table(table: pd.DataFrame, grouped: Grouped, places: Places):
    """The result with the ``as_points`` column, or onto the region layer (``--output-on regions``)."""
    if grouped.made is not None:
        table["as_points"] = grouped.made
    if places.output_on == "regions":
        layer = region_layers.onto_regions(table, grouped.join)
        layer.attrs.update(table.attrs)  # the notes (tables.add_notes) go with the rows
        return layer
    return table


def rows_onto_regions(result: pd.DataFrame, ids, join):
    """Result rows onto the region layer, row i on the region whose id is ``ids[i]`` (cross-spread).

    The rows' ``from_group`` label gives way to the region id field, so that a region's rows
    (one per to-group, or one matrix row with ``--wide``) carry its geometry and fields.
    """
    keyed = result.drop(columns="from_group")
    keyed.insert(0, join.field, ids)
    layer = region_layers.onto_regions(keyed, join)
    layer.attrs.update(result.attrs)  # notes and wide-column names go along
    return layer


def method_column(methods):
    """The ``method`` column from ``sums.method``: exact, projection, or null (no total)."""
    return pd.array(methods, dtype="string")


def with_group_shape(table: pd.DataFrame, grouped: Grouped, shape: str, rows=None) -> pd.DataFrame:
    """``table`` as a layer whose rows carry their group's shape (``--group-shape``).

    ``rows`` holds the group code of each row (default: row i is group i). ``shape`` "none"
    returns the table as it is; "hull" or "centre" a GeoDataFrame in the CRS the distances
    were measured in.
    """
    if shape == "none":
        return table
    import geopandas

    from ..layers.groupshapes import group_shapes

    p = grouped.points
    geodesic = p.distance.kind == "geodesic"
    shapes = group_shapes(p.x, p.y, p.groups, p.n_groups, shape, estimate.group_centres(p), degrees=geodesic)
    rows = np.arange(len(table)) if rows is None else np.asarray(rows)
    crs = grouped.setup.crs if grouped.setup.crs is not None else grouped.layer.crs
    layer = geopandas.GeoDataFrame(table, geometry=list(shapes[rows]), crs=crs)
    layer.attrs.update(table.attrs)  # the notes of groups that could not be computed
    return layer
