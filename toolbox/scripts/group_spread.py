"""``group-spread``: total and mean distance between the points of each group."""

from __future__ import annotations

import pandas as pd

from .. import estimate, tables
from ..errors import ParameterError, spell
from . import _large
from ._common import Places, finish_table, method_column, read_grouped, with_group_shape


def group_spread(
    data, *, layer, group_by, weight, tolerance, method, distance, crs, where, engine,
    batch_rows, dask_scheduler, as_points, fill_spacing, regions, regions_layer, region_id, outside_regions,
    output_on, group_shape, progress=None,
) -> pd.DataFrame:  # fmt: skip
    """One row per group: its pair-distance total, guaranteed interval and mean."""
    places = Places.of(locals())
    parts = None if places.read_whole(data, batch_rows, dask_scheduler) else _large.large_parts(
        data, layer=layer, where=where, engine=engine, batch_rows=batch_rows, dask_scheduler=dask_scheduler
    )
    if parts is not None:  # batch by batch, or partition by partition on a cluster
        if group_shape != "none":
            raise ParameterError(
                f"{spell('group_shape')} needs the whole layer in memory, but this input is read in batches; "
                f"drop {spell('group_shape')} (or {spell('batch_rows')} / {spell('dask_scheduler')})."
            )
        read = _large.pair_sums(
            parts, group_by=group_by, weight=weight, tolerance=tolerance, method=method, distance=distance,
            crs=crs, batch_rows=batch_rows, dask_scheduler=dask_scheduler, script="group-spread",
        )  # fmt: skip
        sums, keys, units = read.sums, read.keys, read.units
    else:
        read = read_grouped(
            data, layer=layer, group_by=group_by, weight=weight, where=where, engine=engine,
            distance=distance, crs=crs, script="group-spread", places=places,
        )  # fmt: skip
        sums = estimate.pair_sums(read.points, tolerance=tolerance, method=method, progress=progress)
        keys, units = read.groups.keys, read.setup.units
    table = keys.copy()
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
    table["units"] = units
    tables.add_notes(table, sums.note, tables.noted_groups(tables.group_labels(keys), sums.note))
    return table if parts is not None else with_group_shape(finish_table(table, read, places), read, group_shape)
