"""Inputs too large to read whole: when to stream them, and the streamed sums a script asks for.

A script reads its layer whole unless the user asks for batches (``--batch-rows``), names a
Dask scheduler (``--dask-scheduler``), passes a dask-geopandas frame, or the input file holds
more than ``STREAM_ABOVE`` features; then the sums come from :mod:`toolbox.streaming`, batch
by batch (or partition by partition on the cluster), with the same guarantee.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import cluster, cluster_pass, estimate, layers, streaming, tables
from ..errors import GeometryError, InputError, ParameterError
from ..layers import stream
from ..layers.batched import FrameBatches

#: input files with more features than this are streamed even when no batch size is given
#: (about 2 GB of points, codes, weights and their sorted copies in memory)
STREAM_ABOVE = 20_000_000


@dataclass(frozen=True)
class Streamed:
    """Streamed sums and what a table needs to name their rows."""

    sums: estimate.GroupPairSums
    keys: pd.DataFrame
    units: str


def large_parts(data, *, layer, where, engine, batch_rows, dask_scheduler):
    """The input as parts when it is to be streamed, else None (read it whole)."""
    if batch_rows is not None or dask_scheduler is not None or stream.is_dask_frame(data):
        return stream.layer_parts(data, layer=layer, where=where, engine=engine)
    if engine == "fiona" or not isinstance(data, (str, os.PathLike)):
        return None  # a frame in memory is read already; fiona has no batches
    parts = stream.layer_parts(data, layer=layer, where=where, engine=engine)
    return parts if parts.rows is not None and parts.rows > STREAM_ABOVE else None


def refuse_per_feature_on_cluster(*, dask_scheduler) -> None:
    """Refuse a cluster for a per-feature script, saying why and what to do.

    Its result has one row per feature, every field kept: as large as its input, and written
    from this machine, so every feature would travel from the workers to here. It streams
    batches here instead (``--batch-rows``), writing its output batch by batch.
    """
    if dask_scheduler is None:
        return  # a Dask frame without a scheduler is read here, partition after partition
    raise ParameterError(
        "point-remoteness writes one row per feature from this machine, so on a cluster every "
        "feature would travel here, and it was given --dask-scheduler. Give it the layer's files "
        "with --batch-rows instead: it reads them in batches and writes its output batch by batch."
    )


def per_feature(
    parts, *, group_by, weight, tolerance, method, distance, crs, batch_rows, new_fields, add_fields
) -> FrameBatches:  # fmt: skip
    """Per-feature results of a layer in parts, made batch by batch as they are written.

    The passes of group-spread (survey, bins, heavy bins) run first; then each batch of whole
    features is read again, its points placed in the finished bins
    (:func:`toolbox.estimate.state.point_sums_of`) and ``add_fields(frame, feature, sums,
    group_mean, group_n)`` gives its rows. Memory holds one batch and the state, never the
    layer or its result.
    """
    setup = estimate.distance_setup(parts.crs, parts.label, distance=distance, target=crs, script="point-remoteness")
    rows = stream.DEFAULT_BATCH_ROWS if batch_rows is None else batch_rows
    with streaming.prepare(parts, group_by=group_by, weight=weight, setup=setup, batch_rows=rows) as ready:
        plan, state, refined = streaming.binned(ready, tolerance=tolerance, method=method)
    groups = streaming.pair_sums_of_binned(plan, state, refined)  # the groups' means, for remote_idx
    # groups that cannot be computed (notes) are known now, before anything is written
    affected = tables.noted_groups(tables.group_labels(ready.keys.keys), groups.note)
    fields = [*group_by, *([weight] if weight else [])]

    def make():
        for frame in stream.feature_batches(parts, rows):
            batch = layers.points_of(frame, fields, parts.label)
            if batch.feature.size != len(frame):
                raise GeometryError(
                    f"MultiPoint feature(s) of {parts.label} have several points, so they have no "
                    "single distance to the rest; split them into single points first."
                )
            points = streaming.coded_points(ready, batch)
            sums = state.point_sums_of(plan, points, refined)
            codes = points.groups
            out = add_fields(frame, batch.feature, sums, groups.mean[codes], groups.n_points[codes])
            notes = np.full(len(frame), "", dtype=object)
            notes[batch.feature] = sums.note
            yield tables.add_notes(out, notes, affected)

    columns = [*parts.fields, *new_fields, "geometry"]
    return FrameBatches(make, columns, "geometry", parts.crs, attrs={tables.NOTES: affected})


def _default_client():
    """The Dask client the caller has made the default, if any (a Dask frame then runs there)."""
    try:
        from distributed import default_client
    except ImportError:
        return None
    try:
        return default_client()
    except ValueError:
        return None


def _address(parts, dask_scheduler):
    """The scheduler to run on: the one named, else a Dask frame's default client (if any)."""
    if dask_scheduler is None and parts.source == "dask":
        return _default_client()
    return dask_scheduler


def pair_sums(
    parts, *, group_by, weight, tolerance, method, distance, crs, batch_rows, dask_scheduler, script
):
    """Per-group pair sums of a layer in parts, on the cluster at ``dask_scheduler`` if given.

    A dask-geopandas frame without a scheduler runs on the caller's default Dask client, or
    else here, partition after partition. Both here and on a cluster the layer is read once
    when the one-pass windows can do it (planar distances, a tolerance above 0, limits kept),
    else through the planned passes.
    """
    setup = estimate.distance_setup(parts.crs, parts.label, distance=distance, target=crs, script=script)
    rows = stream.DEFAULT_BATCH_ROWS if batch_rows is None else batch_rows
    address = _address(parts, dask_scheduler)
    if address is None:  # one read of the layer, when that is enough
        common = dict(group_by=group_by, weight=weight, setup=setup, batch_rows=rows)
        once = streaming.one_pass_sums(parts, **common, tolerance=tolerance, method=method)
        if once is not None:
            sums, keys = once
            return Streamed(sums, keys.grouping().keys, setup.units)
    with cluster.connected(address) as client:
        if client is not None:  # one read of the files on the workers, when that is enough
            common = dict(group_by=group_by, weight=weight, setup=setup, batch_rows=rows)
            once = cluster_pass.pair_sums(parts, **common, tolerance=tolerance, method=method, client=client)
            if once is not None:
                sums, keys = once
                return Streamed(sums, keys.grouping().keys, setup.units)
        with streaming.prepare(
            parts, group_by=group_by, weight=weight, setup=setup, batch_rows=rows, client=client
        ) as ready:
            sums = streaming.pair_sums(ready, tolerance=tolerance, method=method)
    return Streamed(sums, ready.groups.keys, setup.units)


@dataclass(frozen=True)
class StreamedCross:
    """Streamed cross sums and the keys of the first layer's groups and of the second's."""

    sums: estimate.CrossPairSums
    keys: pd.DataFrame
    to_keys: pd.DataFrame
    units: str


def cross_sums(
    parts, to_parts, *, group_by, weight, to_group_by, to_weight, tolerance, method, distance, crs,
    batch_rows, dask_scheduler,
) -> StreamedCross:  # fmt: skip
    """Cross sums between the groups of a layer in parts (or between those of two layers), on
    the cluster at ``dask_scheduler`` if given; the second layer is measured in the first's setup."""
    setup = estimate.distance_setup(parts.crs, parts.label, distance=distance, target=crs, script="cross-spread")
    rows = stream.DEFAULT_BATCH_ROWS if batch_rows is None else batch_rows
    if to_parts is not None:
        check_crs_pair(parts, to_parts, setup, note=crs is None)
    with cluster.connected(_address(parts, dask_scheduler)) as client:
        common = dict(setup=setup, batch_rows=rows, client=client)
        with streaming.prepare(parts, group_by=group_by, weight=weight, **common) as ready:
            if to_parts is None:
                sums = streaming.cross_sums(ready, tolerance=tolerance, method=method)
                return StreamedCross(sums, ready.groups.keys, ready.groups.keys, setup.units)
            with streaming.prepare(to_parts, group_by=to_group_by, weight=to_weight, **common) as other:
                sums = streaming.cross_sums(ready, other, tolerance=tolerance, method=method)
                return StreamedCross(sums, ready.groups.keys, other.groups.keys, setup.units)


def check_crs_pair(first, second, setup, *, note: bool) -> None:
    """Refuse two layers of which only one has a CRS; say once when the second is transformed."""
    if (first.crs is None) != (second.crs is None):
        raise InputError(
            f"Only one of {first.label} and {second.label} has a CRS, so their coordinates "
            "cannot be related; assign the missing CRS first."
        )
    if note and second.crs is not None and second.crs != first.crs:
        warnings.warn(
            f"{second.label} was transformed from {second.crs.name} into the first layer's "
            f"coordinates ({first.crs.name}) before computing distances.",
            UserWarning,
            stacklevel=3,
        )
