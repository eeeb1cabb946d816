"""What every script does before asking for sums: read, group, weigh, decide the distance."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from .. import estimate, grouping, layers


@dataclass(frozen=True)
class Grouped:
    """A layer's points ready for the estimator, with what a table needs to name the rows."""

    points: estimate.Points
    groups: grouping.Grouping
    layer: layers.PointLayer
    setup: estimate.DistanceSetup


def group_points(layer, group_by, weight, setup, *, note: bool = False) -> Grouped:
    """Points of an already read layer, grouped by ``group_by`` and weighted by ``weight``."""
    groups = grouping.group_features(layer.attributes, list(group_by))
    weights = grouping.feature_weights(layer.attributes, weight, layer.label)
    points = estimate.Points.from_layer(
        setup,
        layer.x,
        layer.y,
        layer.crs,
        layer.label,
        groups.codes[layer.feature],
        groups.count,
        None if weights is None else weights[layer.feature],
        names=grouping.group_namer(groups.keys),
        note=note,
    )
    return Grouped(points, groups, layer, setup)


def read_grouped(data, *, layer, group_by, weight, where, engine, distance, crs, script) -> Grouped:
    """Read a layer's points with the fields grouping and weighting need, then group them."""
    group_by = list(group_by or ())
    fields = [*group_by, *([weight] if weight else [])]
    read = layers.read_points(data, layer=layer, fields=fields, where=where, engine=engine)
    setup = estimate.distance_setup(read.crs, read.label, distance=distance, target=crs, script=script)
    return group_points(read, group_by, weight, setup)


def method_column(methods):
    """The ``method`` column from ``sums.method``: exact, projection, or null (no total)."""
    return pd.array(methods, dtype="string")
