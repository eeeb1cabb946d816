"""``point-remoteness``: each feature's mean distance to the rest of its group."""

from __future__ import annotations

import numpy as np

from .. import geodesy, grouping, kernels, layers
from ..errors import GeometryError, InputError

#: new fields, at most 10 characters so that they survive a Shapefile
NEW_FIELDS = ("remote_avg", "remote_lo", "remote_hi", "remote_idx", "group_n")


def point_remoteness(
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
):
    """A copy of the layer with every feature's mean distance to the others of its group."""
    group_by = list(group_by or ())
    frame, label = layers.read_layer(data, layer=layer, where=where, engine=engine)
    taken = [f for f in NEW_FIELDS if f in frame.columns]
    if taken:
        raise InputError(
            f"{label} already has field(s) {', '.join(taken)}; rename them first so that nothing "
            "is overwritten."
        )
    points = layers.points_of(frame, [*group_by, *([weight] if weight else [])], label)
    parts = np.bincount(points.feature, minlength=len(frame))
    if (parts > 1).any():
        raise GeometryError(
            f"{int((parts > 1).sum())} MultiPoint feature(s) of {label} have several points, so "
            "they have no single distance to the rest; split them into single points first."
        )
    setup = geodesy.distance_setup(
        points.crs, points.label, distance=distance, target=crs, script="point-remoteness"
    )
    groups = grouping.group_features(points.attributes, group_by)
    weights = grouping.feature_weights(points.attributes, weight, points.label)
    codes = groups.codes[points.feature]
    x, y = setup.coordinates(points.x, points.y, points.crs, points.label)
    args = (x, y, codes, groups.count, None if weights is None else weights[points.feature])
    if setup.kind == "geodesic":
        sums = geodesy.grouped_geodesic_point_sums(
            *args,
            a=setup.a,
            f=setup.f,
            tolerance=tolerance,
            method=method,
            progress=progress,
            label_of=grouping.group_namer(groups.keys),
        )
    else:
        sums = kernels.grouped_point_sums(*args, tolerance=tolerance, method=method, progress=progress)
    # the group's weighted mean pair distance from the same sums: Σ_i w_i R_i = 2·D_g
    w = np.ones(points.x.size) if weights is None else weights[points.feature]
    with np.errstate(invalid="ignore", divide="ignore"):
        both = np.bincount(codes, np.nan_to_num(w * sums.total), groups.count) / 2
        pair_weight = np.bincount(codes, w * sums.other_weight, groups.count) / 2
        group_mean = np.where(pair_weight > 0, both / pair_weight, np.nan)
        index = sums.mean / group_mean[codes]

    out = frame.copy()
    feature = points.feature
    for name, values in (
        ("remote_avg", sums.mean),
        ("remote_lo", sums.lower / sums.other_weight),
        ("remote_hi", sums.upper / sums.other_weight),
        ("remote_idx", index),
    ):
        column = np.full(len(frame), np.nan)
        column[feature] = values
        out[name] = column
    out["group_n"] = np.bincount(groups.codes, minlength=groups.count)[groups.codes]
    return out
