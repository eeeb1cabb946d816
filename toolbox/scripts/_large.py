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

import pandas as pd

from .. import cluster, estimate, streaming
from ..errors import InputError, ParameterError
from ..layers import stream

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


def refuse_per_feature(data, *, layer, where, engine, batch_rows, dask_scheduler) -> None:
    """Refuse, saying why and what to do, an input a per-feature script cannot read whole.

    A per-feature result is as large as its input (one row per feature, every field kept),
    and the per-point sums need every group's points at hand, so such a script reads its
    layer whole; batches and clusters serve the per-group scripts.
    """
    asked = "--batch-rows" if batch_rows is not None else "--dask-scheduler" if dask_scheduler else None
    if asked is None and stream.is_dask_frame(data):
        asked = "a Dask GeoDataFrame"
    rows = None
    if asked is None and engine != "fiona" and isinstance(data, (str, os.PathLike)):
        rows = stream.layer_parts(data, layer=layer, where=where, engine=engine).rows
        if rows is None or rows <= STREAM_ABOVE:
            return
    if asked is None and rows is None:
        return
    what = f"it was given {asked}" if asked else f"its input holds {rows:,} features"
    raise ParameterError(
        f"point-remoteness writes one row per feature and needs each group's points together, so "
        f"it reads its layer whole, and {what}. Run it on parts of the layer that fit in memory "
        "(each a set of whole groups, chosen with --where), or use group-spread, which reads in "
        "batches, for per-group totals and means."
    )


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
    else here, partition after partition.
    """
    setup = estimate.distance_setup(parts.crs, parts.label, distance=distance, target=crs, script=script)
    rows = stream.DEFAULT_BATCH_ROWS if batch_rows is None else batch_rows
    with cluster.connected(_address(parts, dask_scheduler)) as client:
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
