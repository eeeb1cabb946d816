"""``group-spread``: total and mean distance between the points of each group."""

from __future__ import annotations

import pandas as pd

from .. import estimate
from ._common import method_column, read_grouped


def group_spread(
    data, *, layer, group_by, weight, tolerance, method, distance, crs, where, engine, progress=None
) -> pd.DataFrame:
    """One row per group: its pair-distance total, guaranteed interval and mean."""
    read = read_grouped(
        data, layer=layer, group_by=group_by, weight=weight, where=where, engine=engine,
        distance=distance, crs=crs, script="group-spread",
    )  # fmt: skip
    sums = estimate.pair_sums(read.points, tolerance=tolerance, method=method, progress=progress)
    estimate.raise_for_notes(sums)
    table = read.groups.keys.copy()
    table["n_points"] = sums.n_points
    table["weight_sum"] = sums.weight_sum
    table["pair_weight"] = sums.pair_weight
    table["total_dist"] = sums.total
    table["total_lo"] = sums.lower
    table["total_hi"] = sums.upper
    table["mean_dist"] = sums.mean
    table["rel_bound"] = sums.rel_bound
    table["method"] = method_column(sums.method)
    table["directions"] = sums.directions
    table["units"] = read.setup.units
    return table
