"""``group-spread``: total and mean distance between the points of each group."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import grouping, kernels, layers


def group_spread(
    data,
    *,
    layer=None,
    group_by=(),
    weight=None,
    tolerance=0.01,
    method="auto",
    where=None,
    engine="pyogrio",
    progress=None,
) -> pd.DataFrame:
    """One row per group: its pair-distance total, guaranteed interval and mean."""
    group_by = list(group_by or ())
    points = layers.read_points(
        data, layer=layer, fields=[*group_by, *([weight] if weight else [])], where=where, engine=engine
    )
    units = grouping.planar_units(points.crs, points.label)
    groups = grouping.group_features(points.attributes, group_by)
    weights = grouping.feature_weights(points.attributes, weight, points.label)
    sums = kernels.grouped_pair_sums(
        points.x,
        points.y,
        groups.codes[points.feature],
        groups.count,
        None if weights is None else weights[points.feature],
        tolerance=tolerance,
        method=method,
        progress=progress,
    )
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
    table["units"] = units
    return table
