"""``group-spread``: total and mean distance between the points of each group."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import geodesy, grouping, kernels, layers


def group_spread(
    data,
    *,
    layer=None,
    group_by=(),
    weight=None,
    tolerance=0.01,
    method="auto",
    distance=None,
    crs=None,
    where=None,
    engine="pyogrio",
    progress=None,
) -> pd.DataFrame:
    """One row per group: its pair-distance total, guaranteed interval and mean."""
    group_by = list(group_by or ())
    points = layers.read_points(
        data, layer=layer, fields=[*group_by, *([weight] if weight else [])], where=where, engine=engine
    )
    setup = geodesy.distance_setup(
        points.crs, points.label, distance=distance, target=crs, script="group-spread"
    )
    groups = grouping.group_features(points.attributes, group_by)
    weights = grouping.feature_weights(points.attributes, weight, points.label)
    x, y = setup.coordinates(points.x, points.y, points.crs, points.label)
    args = (
        x,
        y,
        groups.codes[points.feature],
        groups.count,
        None if weights is None else weights[points.feature],
    )
    if setup.kind == "geodesic":
        sums = geodesy.grouped_geodesic_pair_sums(
            *args,
            a=setup.a,
            f=setup.f,
            tolerance=tolerance,
            method=method,
            progress=progress,
            label_of=grouping.group_namer(groups.keys),
        )
    else:
        sums = kernels.grouped_pair_sums(*args, tolerance=tolerance, method=method, progress=progress)
    has_pairs = ~np.isnan(sums.total)
    table = groups.keys.copy()
    table["n_points"] = sums.n_points
    table["weight_sum"] = sums.weight_sum
    table["pair_weight"] = sums.pair_weight
    table["total_dist"] = sums.total
    table["total_lo"] = sums.lower
    table["total_hi"] = sums.upper
    table["mean_dist"] = sums.mean
    table["rel_bound"] = sums.rel_bound
    table["method"] = pd.array(
        np.where(has_pairs, np.where(sums.exact, "exact", "projection"), None), dtype="string"
    )
    table["directions"] = sums.directions
    table["units"] = setup.units
    return table
