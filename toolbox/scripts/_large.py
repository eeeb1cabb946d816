"""Inputs too large to read whole: when to stream them, and the streamed sums a script asks for.

A script reads its layer whole unless the user asks for batches (``--batch-rows``), names a
Dask scheduler (``--dask-scheduler``), passes a dask-geopandas frame, or the input file holds
more than ``STREAM_ABOVE`` features; then the sums come from :mod:`toolbox.streaming`, batch
by batch (or partition by partition on the cluster), with the same guarantee.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import pandas as pd

from .. import cluster, estimate, streaming
from ..errors import ParameterError
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


def pair_sums(
    parts, *, group_by, weight, tolerance, method, distance, crs, batch_rows, dask_scheduler, script
):
    """Per-group pair sums of a layer in parts, on the cluster at ``dask_scheduler`` if given.

    A dask-geopandas frame without a scheduler runs on the caller's default Dask client, or
    else here, partition after partition.
    """
    setup = estimate.distance_setup(parts.crs, parts.label, distance=distance, target=crs, script=script)
    rows = stream.DEFAULT_BATCH_ROWS if batch_rows is None else batch_rows
    address = dask_scheduler
    if address is None and parts.source == "dask":
        address = _default_client()
    with cluster.connected(address) as client:
        with streaming.prepare(
            parts, group_by=group_by, weight=weight, setup=setup, batch_rows=rows, client=client
        ) as ready:
            sums = streaming.pair_sums(ready, tolerance=tolerance, method=method)
    return Streamed(sums, ready.groups.keys, setup.units)
