"""Passes over a layer in parts: one process (batch after batch) or a Dask cluster (partitions).

A computation over a layer too large for memory is a few *passes*; each pass maps every part of
the layer to a small mergeable summary (group keys and counts, then the estimator's binned
state) and merges those. :class:`Parts` is the layer cut into parts that can each be read on
their own: the files of a GeoParquet dataset, the partitions of a dask-geopandas frame, or a
single stream read in batches. :func:`reduce_parts` runs one pass, either in this process
(batches one after the other, so memory holds one batch and one summary) or on a ``distributed``
cluster, where each partition is read and summarised on a worker and the summaries are merged
in a tree on the workers: only the final summary travels to the client, never coordinates.

Dask, distributed and dask-geopandas are optional (``pip install pairspread[dask]``); they are
imported only when a cluster or a Dask frame is used.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator, Sequence
from typing import Any

from .errors import InputError, ParameterError, spell
from .layers import PointLayer
from .layers.stream import LayerParts, check_batch_rows

__all__ = [
    "reduce_parts",
    "connected",
    "FAN_IN",
    "CONNECT_TIMEOUT",
]

#: summaries merged per task of the reduction tree
FAN_IN = 8
#: tasks per worker thread in a pass on a cluster (each reads several files in turn)
TASKS_PER_THREAD = 2
#: seconds to wait for a scheduler to answer
CONNECT_TIMEOUT = 10


def _summarise_parts(read, parts, fields, batch_rows, summarise, merge, in_place, result=None, settle=None):
    """The summary of some parts, batch after batch (memory: one batch and one summary)."""
    for part in parts:
        for batch in read(part, fields, batch_rows):  # messages name the part (its file, its number)
            if in_place:
                result = summarise(batch, into=result)
                continue
            mine = summarise(batch)
            result = mine if result is None else merge([result, mine])
    return result if settle is None or result is None else settle(result)


def _tasks(parts: LayerParts, client, per_thread: int = TASKS_PER_THREAD) -> list[list]:
    """Parts grouped into about two tasks per worker thread: fewer partial summaries to send and
    merge than one per file. A Dask frame's partitions stay one per task (each is computed where
    its task runs)."""
    if parts.source == "dask":
        return [[part] for part in parts.parts]
    threads = max(1, sum(client.nthreads().values()))
    count = min(len(parts.parts), per_thread * threads)
    return [list(chunk) for chunk in _chunks(parts.parts, count) if chunk]


def _chunks(items, count):
    size, extra = divmod(len(items), count)
    start = 0
    for i in range(count):
        end = start + size + (1 if i < extra else 0)
        yield items[start:end]
        start = end


def _merge_some(merge, *summaries):
    return merge([s for s in summaries if s is not None]) if any(s is not None for s in summaries) else None


def reduce_parts(
    parts: LayerParts,
    fields: Sequence[str],
    batch_rows: int,
    summarise: Callable[[PointLayer], Any],
    merge: Callable[[list], Any],
    *,
    in_place: bool = False,
    settle: Callable[[Any], Any] | None = None,
    tasks_per_thread: int = TASKS_PER_THREAD,
    client=None,
    progress: Callable[[int, int], None] | None = None,
):
    """One pass: ``merge`` of ``summarise(batch)`` over every batch of every part.

    Parameters
    ----------
    parts : LayerParts
        The layer in parts (:func:`toolbox.layers.stream.layer_parts`).
    fields : sequence of str
        Attribute fields each batch needs.
    batch_rows : int
        Most features per batch.
    summarise : callable
        Batch to summary; must pickle (a module-level function or a ``functools.partial`` of
        one) when a client is given.
    merge : callable
        List of summaries to one; associative and commutative.
    in_place : bool
        ``summarise(batch, into=summary)`` adds a batch to the part's summary so far (None
        for the first batch) and returns it, instead of a new summary per batch.
    settle : callable, optional
        ``settle(summary)`` once a task has read its parts, before its summary leaves the
        task (a summary that holds batches back to add them together adds them then).
    tasks_per_thread : int
        On a cluster, about this many tasks per worker thread: more balance the load, fewer
        send fewer summaries (one is better when a summary's size does not shrink with its
        share of the layer).
    client : distributed.Client, optional
        Run on this cluster: parts are read and summarised on the workers (a few files per
        task, about ``TASKS_PER_THREAD`` tasks per worker thread) and merged in a tree of
        ``FAN_IN`` summaries per task; only the final summary comes back.
    progress : callable, optional
        ``progress(done, total)`` in parts, in this process only.

    Returns
    -------
    The merged summary, or None when the layer has no batch.

    Examples
    --------
    >>> import geopandas, shapely
    >>> from toolbox.layers.stream import layer_parts
    >>> frame = geopandas.GeoDataFrame(geometry=shapely.points(range(5), [0] * 5))
    >>> reduce_parts(layer_parts(frame), [], 2, lambda batch: batch.x.size, sum)
    5
    """
    fields = parts.check_fields(fields)
    batch_rows = check_batch_rows(batch_rows)
    if client is not None and not parts.on_workers:
        raise ParameterError(
            f"Only this process can read {parts.label}, not the Dask workers; give "
            f"{spell('dask_scheduler')} a GeoParquet dataset (a .parquet file, a folder or a glob) or, from "
            "Python, a dask-geopandas GeoDataFrame."
        )
    if client is None:
        result = None
        for index, part in enumerate(parts.parts):
            if in_place:  # one running summary through every part
                result = _summarise_parts(
                    parts.reader, [part], fields, batch_rows, summarise, merge, True, result
                )
            else:
                mine = _summarise_parts(parts.reader, [part], fields, batch_rows, summarise, merge, False)
                result = _merge_some(merge, result, mine)
            if progress is not None:
                progress(index + 1, len(parts.parts))
        return result if settle is None or result is None else settle(result)
    import dask

    level = [
        dask.delayed(_summarise_parts, pure=True)(
            parts.reader, task, fields, batch_rows, summarise, merge, in_place, settle=settle
        )
        for task in _tasks(parts, client, tasks_per_thread)
    ]
    while len(level) > 1:
        level = [
            dask.delayed(_merge_some, pure=True)(merge, *level[i : i + FAN_IN])
            for i in range(0, len(level), FAN_IN)
        ]
    if not level:
        return None
    return client.compute(level[0]).result()


# --------------------------------------------------------------------------------------------
# the cluster


@contextlib.contextmanager
def connected(address) -> Iterator[Any]:
    """A ``distributed.Client`` for ``address`` while the block runs (None for None).

    ``address`` is a scheduler address (``tcp://host:8786``), a cluster object (a
    ``LocalCluster``) or a Client, which is used as it is and left open. Raises
    :class:`~toolbox.errors.InputError` in one line when nothing answers.
    """
    if address is None:
        yield None
        return
    if hasattr(address, "compute") and hasattr(address, "submit"):  # a Client: the caller's
        yield address
        return
    try:
        from distributed import Client
    except ImportError as exc:
        raise ParameterError(
            "A Dask scheduler needs Dask's distributed package; install it with `pip install pairspread[dask]`."
        ) from exc
    if hasattr(address, "scheduler_address"):  # a LocalCluster or another cluster object
        address = address.scheduler_address
    text = str(address).strip()
    if not text:
        raise ParameterError(f"{spell('dask_scheduler')} needs an address such as tcp://host:8786.")
    try:
        client = Client(text, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(
            f"No Dask scheduler answered at {text!r} within {CONNECT_TIMEOUT} s ({reason}); "
            f"check {spell('dask_scheduler')} (e.g. tcp://host:8786) or start one with `dask scheduler` "
            "and workers with `dask worker ADDRESS`."
        ) from None
    try:
        yield client
    finally:
        client.close()
