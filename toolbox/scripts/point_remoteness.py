"""``point-remoteness``: each feature's mean distance to the rest of its group."""

from __future__ import annotations

import numpy as np

from .. import estimate, layers
from ..errors import GeometryError, InputError
from . import _large
from ._common import group_points

#: new fields, at most 10 characters so that they survive a Shapefile
NEW_FIELDS = ("remote_avg", "remote_lo", "remote_hi", "remote_idx", "group_n")


def point_remoteness(
    data, *, layer, group_by, weight, tolerance, method, distance, crs, where, engine,
    batch_rows, dask_scheduler, progress=None,
):  # fmt: skip
    """A copy of the layer with every feature's mean distance to the others of its group."""
    _large.refuse_per_feature(
        data, layer=layer, where=where, engine=engine, batch_rows=batch_rows, dask_scheduler=dask_scheduler
    )
    frame, label = layers.read_layer(data, layer=layer, where=where, engine=engine)
    taken = [f for f in NEW_FIELDS if f in frame.columns]
    if taken:
        raise InputError(
            f"{label} already has field(s) {', '.join(taken)}; rename them first so that nothing "
            "is overwritten."
        )
    read = layers.points_of(frame, [*group_by, *([weight] if weight else [])], label)
    parts = np.bincount(read.feature, minlength=len(frame))
    if (parts > 1).any():
        raise GeometryError(
            f"{int((parts > 1).sum())} MultiPoint feature(s) of {label} have several points, so "
            "they have no single distance to the rest; split them into single points first."
        )
    setup = estimate.distance_setup(
        read.crs, read.label, distance=distance, target=crs, script="point-remoteness"
    )
    grouped = group_points(read, group_by, weight, setup)
    points, n_groups = grouped.points, grouped.groups.count
    sums = estimate.point_sums(points, tolerance=tolerance, method=method, progress=progress)
    estimate.raise_for_notes(sums)
    # the group's weighted mean pair distance from the same sums: Σ_i w_i R_i = 2·D_g
    w, codes = points.weight_array(), points.groups
    with np.errstate(invalid="ignore", divide="ignore"):
        both = np.bincount(codes, np.nan_to_num(w * sums.total), n_groups) / 2
        pair_weight = np.bincount(codes, w * sums.other_weight, n_groups) / 2
        group_mean = np.where(pair_weight > 0, both / pair_weight, np.nan)
        index = sums.mean / group_mean[codes]
    out = frame.copy()
    for name, values in (
        ("remote_avg", sums.mean),
        ("remote_lo", sums.lower / sums.other_weight),
        ("remote_hi", sums.upper / sums.other_weight),
        ("remote_idx", index),
    ):
        column = np.full(len(frame), np.nan)
        column[read.feature] = values
        out[name] = column
    feature_codes = grouped.groups.codes
    out["group_n"] = np.bincount(feature_codes, minlength=n_groups)[feature_codes]
    return out
