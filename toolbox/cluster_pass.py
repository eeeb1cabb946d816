"""``group-spread`` on a Dask cluster in one pass over the files: one-pass windows merged in a tree.

In one process :func:`toolbox.streaming.one_pass_sums` reads a layer once into a
:class:`~toolbox.estimate.single_pass.OnePass`. On a cluster every task of
:func:`toolbox.cluster.reduce_parts` (a few files) builds a :class:`Sketch` of its own: a
``OnePass`` whose groups are coded by the task's own :class:`~toolbox.batchkeys.KeyRegistry`,
so the sketch carries its key table. Sketches merge in the reduction tree on the workers: the
key tables are united, each ``OnePass``'s groups recoded to the union's and the states merged
(:meth:`OnePass.merge`). The client finishes the merged state. Groups still over their budget
are read again, their points alone, and summed as in memory, when they are few enough
(``GATHER_POINTS``); otherwise, and for what the windows cannot do (geodesic distances, exact
sums, windows or kept points over their limits), the caller runs the planned passes.

What reaches the client: the windows of binned groups (``directions × bins`` sums each), the
key table, and the points of groups kept for exact sums or read again (at most
``GATHER_POINTS``); never the other coordinates.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from . import streaming
from .batchkeys import KeyRegistry, KeyTable
from .cluster import reduce_parts
from .estimate.single_pass import GATHER_POINTS, OnePass, TooLarge
from .layers import PointLayer

__all__ = ["Sketch", "pair_sums", "TASKS_PER_THREAD"]

#: tasks per worker thread: one, since a task's windows take as much room (and network) for a
#: few files as for many
TASKS_PER_THREAD = 1


@dataclass
class Sketch:
    """A task's one-pass state, its groups coded by its own key registry.

    Batches are held back (``pending``) until they make a chunk of
    ``streaming.ONE_PASS_CHUNK`` points, so that each group's windows take many points per
    visit, as in one process; :meth:`settle` adds what is left before the sketch leaves its task.
    """

    registry: KeyRegistry
    state: OnePass
    pending: list = field(default_factory=list)  # (x, y, w, running codes) of held batches
    held: int = 0

    def settle(self) -> Sketch:
        """Add the held batches to the state; returns the sketch."""
        if self.pending:
            x, y, w, codes = _joined(self.pending)
            self.pending, self.held = [], 0
            self.state.add(x, y, w, codes, self.registry.count)
        return self


def _joined(batches: list) -> tuple:
    """Batches ``(x, y, w or None, codes)`` as one."""
    x, y, w, codes = (list(column) for column in zip(*batches, strict=True))
    return np.concatenate(x), np.concatenate(y), None if w[0] is None else np.concatenate(w), np.concatenate(codes)


def _add_batch(batch: PointLayer, into: Sketch | None = None, *, group_by, weight, setup, tolerance, method) -> Sketch:
    """On a worker: decode a batch, code its groups by the sketch's registry, hold it (and add
    the held batches once they make a chunk)."""
    if into is None:
        into = Sketch(KeyRegistry(tuple(group_by)), OnePass(tolerance=tolerance, method=method))
    coded = streaming._coded(batch, weight, setup, into.registry)
    if coded.codes.size:
        into.pending.append((coded.x, coded.y, coded.w, coded.codes))
        into.held += coded.codes.size
    if into.held >= streaming.ONE_PASS_CHUNK:
        into.settle()
    return into


def _settle(sketch: Sketch) -> Sketch:
    return sketch.settle()


def _merge(sketches: list[Sketch]) -> Sketch:
    """One sketch from several (the first one is changed and returned: each sketch of the tree
    is merged once)."""
    out = sketches[0].settle()
    for other in sketches[1:]:
        other.settle()
        codes = out.registry.add(other.registry.running_table().keys)
        out.state.merge(other.state, codes, out.registry.count)
    return out


def _pick(batch: PointLayer, into: list | None = None, *, keys: KeyTable, code_of, weight, setup) -> list:
    """On a worker: the points of a batch whose groups ``code_of`` names (code ≥ 0), with those
    codes. ``keys`` holds every group of the first pass: a group it lacks means the layer changed."""
    coded = streaming._coded(batch, weight, setup, keys)
    codes = code_of[coded.codes]
    keep = codes >= 0
    out = [] if into is None else into
    if keep.any():
        out.append((coded.x[keep], coded.y[keep], None if coded.w is None else coded.w[keep], codes[keep]))
    return out


def _concat(lists: list[list]) -> list:
    return [item for part in lists for item in part]


def pair_sums(parts, *, group_by, weight, setup, batch_rows, tolerance, method, client):
    """Every group's pair total from one read of the layer on the cluster, or None when the
    planned passes are needed (see the module's description).

    Returns ``(sums, keys)``: the sums with groups in the order of ``keys`` (a
    :class:`~toolbox.batchkeys.KeyTable`), as :func:`toolbox.streaming.one_pass_sums` gives them.
    """
    if not streaming.one_pass_suits(setup, tolerance, method):
        return None
    group_by = tuple(group_by or ())
    fields = streaming.one_pass_fields(parts, group_by, weight)
    common = dict(group_by=group_by, weight=weight, setup=setup)
    summarise = functools.partial(_add_batch, **common, tolerance=tolerance, method=method)
    try:
        sketch = reduce_parts(
            parts, fields, batch_rows, summarise, _merge, in_place=True, settle=_settle,
            tasks_per_thread=TASKS_PER_THREAD, client=client,
        )  # fmt: skip
    except TooLarge:
        return None
    if sketch is None or sketch.state.n_groups == 0:
        raise streaming._empty(parts)
    state = sketch.state
    sums = state.finish()
    again = np.flatnonzero(state.over_budget)
    if again.size:  # too dense for their windows: their points, read again, summed as in memory
        if state.count[again].sum() > GATHER_POINTS:
            return None
        code_of = np.full(state.n_groups, -1, dtype=np.int64)
        code_of[again] = np.arange(again.size)
        keys = sketch.registry.running_table()
        pick = functools.partial(_pick, keys=keys, code_of=code_of, weight=weight, setup=setup)
        picked = reduce_parts(parts, fields, batch_rows, pick, _concat, in_place=True, client=client)
        streaming.sum_again(sums, again, picked, setup, tolerance, method)
    return streaming.in_key_order(sums, sketch.registry)
