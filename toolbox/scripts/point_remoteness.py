"""``point-remoteness``: each feature's mean distance to the rest of its group."""

from __future__ import annotations

import numpy as np

from .. import estimate, layers, tables
from ..errors import GeometryError, InputError, spell
from . import _large
from ._common import Places, frame_points, group_points, join_places

#: new fields, at most 10 characters so that they survive a Shapefile
NEW_FIELDS = ("remote_avg", "remote_lo", "remote_hi", "remote_idx", "group_n", "note")


def point_remoteness(
    data, *, layer, group_by, weight, tolerance, method, distance, crs, where, engine,
    batch_rows, dask_scheduler, as_points, fill_spacing, regions, regions_layer, region_id, outside_regions,
    progress=None,
):  # fmt: skip
    """A copy of the layer with every feature's mean distance to the others of its group."""
    places = Places.of(locals())
    if not places.read_whole(data, batch_rows, dask_scheduler):  # points as stored: may be streamed
        _large.refuse_per_feature_on_cluster(dask_scheduler=dask_scheduler)
        parts = _large.large_parts(
            data, layer=layer, where=where, engine=engine, batch_rows=batch_rows, dask_scheduler=None
        )
        if parts is not None:  # read, and written, batch by batch
            _check_free(parts.fields, parts.label)
            return _large.per_feature(
                parts, group_by=group_by, weight=weight, tolerance=tolerance, method=method, distance=distance,
                crs=crs, batch_rows=batch_rows, new_fields=NEW_FIELDS, add_fields=_with_fields,
            )  # fmt: skip
    frame, label = layers.read_layer(data, layer=layer, where=where, engine=engine)
    _check_free(frame.columns, label, *([region_id] if regions is not None else ()))
    fields = [*group_by, *([weight] if weight else [])]
    read, setup = frame_points(frame, label, fields, places=places, distance=distance, crs=crs, script="point-remoteness")
    parts = np.bincount(read.feature, minlength=len(frame))
    if as_points != "fill" and (parts > 1).any():
        raise GeometryError(
            f"{int((parts > 1).sum())} MultiPoint feature(s) of {label} have several points, so "
            f"they have no single distance to the rest; split them into single points first, or "
            f"take them whole with {spell('as_points', 'fill')}."
        )
    read, group_by, join, source = join_places(read, group_by, places, engine)
    grouped = group_points(read, group_by, weight, setup)
    points, n_groups = grouped.points, grouped.groups.count
    # one entry per input feature that has points (all of them, unless --outside-regions drop)
    present, feature_of = np.unique(source, return_inverse=True)
    codes = np.zeros(present.size, dtype=np.int64)
    codes[feature_of] = points.groups
    if (codes[feature_of] != points.groups).any():
        raise GeometryError(
            f"Some features of {label} lie in several regions of {join.label}, so they have no one "
            f"group to be compared with; use {spell('as_points', 'inside')} (a point on each feature) "
            "to place each feature in one region."
        )
    if as_points == "fill":  # a feature is many pieces: sums per feature
        sums = estimate.feature_sums(
            points, feature_of, present.size, read.share, tolerance=tolerance, method=method, progress=progress
        )
        w, rows = np.bincount(feature_of, points.weight_array(), present.size), present
    else:  # one point per feature
        sums = estimate.point_sums(points, tolerance=tolerance, method=method, progress=progress)
        w, rows, codes = points.weight_array(), present[feature_of], points.groups
    # the group's weighted mean distance between features from the same sums: Σ_i w_i R_i = 2·D_g
    with np.errstate(invalid="ignore", divide="ignore"):
        both = np.bincount(codes, np.nan_to_num(w * sums.total), n_groups) / 2
        pair_weight = np.bincount(codes, w * sums.other_weight, n_groups) / 2
        group_mean = np.where(pair_weight > 0, both / pair_weight, np.nan)
    group_n = np.zeros(len(frame), dtype=np.int64)
    group_n[rows] = np.bincount(codes, minlength=n_groups)[codes]
    out = _with_fields(frame, rows, sums, group_mean[codes], group_n)
    if join is not None:  # which region each feature was compared within (empty: none, or left out)
        region = np.full(len(frame), None, dtype=object)
        region[source] = read.attributes[region_id].astype(object).where(read.attributes[region_id].notna(), None)
        out[region_id] = region
    notes = np.full(len(frame), "", dtype=object)
    notes[rows] = sums.note
    labels = tables.group_labels(grouped.groups.keys)
    return tables.add_notes(out, notes, tables.noted_groups(labels, sums.note, codes))


def _check_free(fields, label, *more) -> None:
    taken = [f for f in (*NEW_FIELDS, *more) if f in fields]
    if taken:
        raise InputError(
            f"{label} already has field(s) {', '.join(taken)}; rename them first so that nothing "
            "is overwritten."
        )


def _with_fields(frame, feature, sums, group_mean, group_n):
    """A copy of ``frame`` with the new fields, from ``sums`` (entry i for the row
    ``feature[i]``), each entry's group mean distance and each row's group size."""
    out = frame.copy()
    with np.errstate(invalid="ignore", divide="ignore"):
        for name, values in (
            ("remote_avg", sums.mean),
            ("remote_lo", sums.lower / sums.other_weight),
            ("remote_hi", sums.upper / sums.other_weight),
            ("remote_idx", sums.mean / group_mean),
        ):
            column = np.full(len(frame), np.nan)
            column[feature] = values
            out[name] = column
    out["group_n"] = group_n
    return out
