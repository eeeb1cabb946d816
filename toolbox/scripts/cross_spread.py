"""``cross-spread``: mean distance between every pair of groups, or between two layers."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import estimate, tables
from ..errors import InputError, ParameterError, spell
from ..layers import stream
from . import _large
from ._common import (
    Places,
    group_points,
    method_column,
    read_grouped,
    read_measured,
    rows_onto_regions,
    with_group_shape,
)


def cross_spread(
    data, *, layer, group_by, weight, to, to_layer, to_group_by, to_weight, tolerance, method, distance, crs,
    where, engine, as_points, fill_spacing, regions, regions_layer, region_id, outside_regions, output_on, wide,
    batch_rows, dask_scheduler, nearest, group_shape, progress=None,
) -> pd.DataFrame:  # fmt: skip
    """Mean distance between groups: every pair of one layer's groups, or groups of two layers."""
    places = Places.of(locals())  # --as-points applies to both layers, --regions to the first
    if to is None and not group_by and regions is None:
        raise ParameterError(
            f"cross-spread on one layer needs {spell('group_by')} or {spell('regions')} (the groups to compare); "
            f"or give a second layer with {spell('to')}."
        )
    if to is None and (to_layer or to_group_by or to_weight):
        raise ParameterError(f"{spell('to_layer')}, {spell('to_group_by')} and {spell('to_weight')} need {spell('to')}.")
    if nearest and (to_weight or method == "projection"):
        raise ParameterError(
            f"{spell('nearest')} measures exact distances to the nearest feature, whatever its weight; "
            f"drop {spell('to_weight') if to_weight else spell('method', 'projection')}."
        )
    large = dict(engine=engine, batch_rows=batch_rows, dask_scheduler=dask_scheduler)
    whole = places.read_whole(data, batch_rows, dask_scheduler) or (to is not None and places.read_whole(to, None, None))
    parts = None if whole else _large.large_parts(data, layer=layer, where=where, **large)
    to_parts = None if to is None or whole else _large.large_parts(to, layer=to_layer, where=None, **large)
    first = sums = None
    if parts is not None or to_parts is not None:  # batch by batch, or on a cluster
        if nearest or group_shape != "none":
            asked = spell("nearest") if nearest else spell("group_shape")
            raise ParameterError(
                f"{asked} needs the layers in memory, but this input is read in batches; drop {asked} "
                f"(or {spell('batch_rows')} / {spell('dask_scheduler')})."
            )
        if parts is None:
            parts = stream.layer_parts(data, layer=layer, where=where, engine=engine)
        if to is not None and to_parts is None:
            to_parts = stream.layer_parts(to, layer=to_layer, engine=engine)
        read = _large.cross_sums(
            parts, to_parts, group_by=group_by, weight=weight, to_group_by=to_group_by, to_weight=to_weight,
            tolerance=tolerance, method=method, distance=distance, crs=crs, batch_rows=batch_rows,
            dask_scheduler=dask_scheduler,
        )  # fmt: skip
        sums, keys, to_keys, units, made = read.sums, read.keys, read.to_keys, read.units, None
        counts = sums.n_points
    else:
        first, points, to_keys = _in_memory(
            data, layer=layer, group_by=group_by, weight=weight, to=to, to_layer=to_layer,
            to_group_by=to_group_by, to_weight=to_weight, distance=distance, crs=crs, where=where,
            engine=engine, places=places,
        )  # fmt: skip
        keys, units, made = first.groups.keys, first.setup.units, first.made
        counts = np.bincount(points.groups, minlength=points.n_groups)
        if not nearest:
            sums = estimate.cross_sums(points, tolerance=tolerance, method=method, progress=progress)
    n_from = len(keys)
    rows = np.arange(n_from)
    cols = np.arange(n_from, counts.size) if to is not None else rows
    a, b = (v.ravel() for v in np.meshgrid(rows, cols, indexing="ij"))
    table = pd.DataFrame(
        {
            "from_group": tables.group_labels(keys)[a],
            "to_group": tables.group_labels(to_keys)[b - (n_from if to is not None else 0)],
            "n_from": counts[a],
            "n_to": counts[b],
        }
    )
    if nearest:  # exact and never refused: a pair without a nearest point is left empty
        near = estimate.nearest_means(points, rows, cols)
        table = table.assign(nearest_avg=near.mean.ravel(), nearest_max=near.largest.ravel(), units=units)
    else:
        table = table.assign(**_sum_columns(sums, a, b), units=units)
        labels = [*tables.group_labels(keys), *(tables.group_labels(to_keys) if to is not None else [])]
        tables.add_notes(table, sums.note[a, b], tables.noted_pairs(labels, sums.note))
    if made is not None:
        table["as_points"] = made
    values = "nearest_avg" if nearest else "mean_dist"
    if places.output_on == "regions":  # each row goes onto its from-group's region
        ids = keys[region_id].to_numpy()
        return rows_onto_regions(tables.wide_matrix(table, values) if wide else table, ids if wide else ids[a], first.join)
    if first is None:
        return tables.wide_matrix(table) if wide else table
    if wide:
        return with_group_shape(tables.wide_matrix(table, values), first, group_shape)
    return with_group_shape(table, first, group_shape, rows=a)


def _sum_columns(sums, a, b) -> dict:
    """The all-pairs columns of the rows (a, b): sums, interval, mean and how they were made."""
    return {
        "total_dist": sums.total[a, b],
        "total_lo": sums.lower[a, b],
        "total_hi": sums.upper[a, b],
        "mean_dist": sums.mean[a, b],
        "rel_bound": sums.rel_bound[a, b],
        "method": method_column(sums.method[a, b]),
        "directions": sums.directions[a, b],
    }


def _in_memory(data, *, layer, group_by, weight, to, to_layer, to_group_by, to_weight, distance, crs, where,
               engine, places):  # fmt: skip
    """Both layers read whole: the first layer's groups, both layers' points and the column keys."""
    first = read_grouped(
        data, layer=layer, group_by=group_by, weight=weight, where=where, engine=engine,
        distance=distance, crs=crs, script="cross-spread", places=places,
    )  # fmt: skip
    points, second = first.points, first
    if to is not None:
        other, _ = read_measured(
            to, layer=to_layer, fields=[*to_group_by, *([to_weight] if to_weight else [])], where=None,
            engine=engine, distance=distance, crs=crs, script="cross-spread", places=places, setup=first.setup,
        )  # fmt: skip
        if (first.layer.crs is None) != (other.crs is None):
            raise InputError(
                f"Only one of {first.layer.label} and {other.label} has a CRS, so their coordinates "
                "cannot be related; assign the missing CRS first."
            )
        # into the first layer's frame; a silent change of CRS is reported unless --crs asked for it
        second = group_points(other, to_group_by, to_weight, first.setup, note=crs is None)
        points = points.join(second.points)
    return first, points, second.groups.keys
