"""The estimator's passes over a layer read in batches: in this process, or on a Dask cluster.

The estimator's mergeable state (:mod:`toolbox.estimate.state`) is planned from a survey of
every group (count, weight, extent), filled batch by batch, refined where bins are too heavy and
finished once. This module runs those passes over a layer in parts
(:func:`toolbox.layers.stream.layer_parts`):

1. **Survey** (:func:`prepare`): every batch is read once, its weights and geometries checked,
   its coordinates turned into the estimator's (planar in the layer's CRS or in ``--crs``, or
   longitude and latitude), its groups coded, and surveyed. No batch sees every group, so
   group keys are merged by value (:mod:`toolbox.batchkeys`) and each batch's survey is recoded
   to the merged codes; the result is the same survey, with the same group order, as a
   whole-layer read gives.
2. **Sums** (:func:`pair_sums`): with the plan fixed, every batch gives a state and the states
   are merged; a third pass runs only if some bins need refining; then the state is finished.

In this process the survey pass also writes each batch's decoded columns (coordinates, weight,
batch-local group code: 28 bytes a point) to a spill file in the temporary folder, when there
is room for twice that; the later passes read it back instead of decoding the source again. On
a cluster each worker reads and summarises its own parts, the summaries are merged in a tree on
the workers, and only surveys and states reach the client, never coordinates. Memory holds one
batch (and one read ahead), the key table and the state, whatever the layer's size.
"""

from __future__ import annotations

import contextlib
import functools
import os
import queue
import shutil
import tempfile
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from . import estimate, grouping
from .batchkeys import KeyRegistry, KeyTable, merge_key_tables
from .cluster import reduce_parts
from .errors import InputError, spell
from .estimate import cross_state
from .estimate.state import Survey
from .layers import PointLayer
from .layers.stream import LayerParts, prefetched

__all__ = [
    "Prepared",
    "prepare",
    "binned",
    "pair_sums",
    "pair_sums_of_binned",
    "one_pass_sums",
    "cross_sums",
    "coded_points",
    "SPILL_BYTES_PER_POINT",
]

#: bytes a point takes in the spill: x, y and weight as float64, its batch-local group code
SPILL_BYTES_PER_POINT = 28


# --------------------------------------------------------------------------------------------
# pass 1: decode, code and survey every batch


@dataclass(frozen=True)
class _Surveyed:
    """Group keys and the survey of some batches, its groups coded as the keys' rows."""

    keys: KeyTable
    survey: Survey


@dataclass
class _Coded:
    """One batch in the estimator's coordinates with the running group code of every point
    (:meth:`KeyRegistry.code`) and the number of groups registered once it was coded."""

    x: np.ndarray
    y: np.ndarray
    w: np.ndarray | None
    codes: np.ndarray
    n_groups: int


def _coded(batch: PointLayer, weight, setup, keys: KeyRegistry | KeyTable) -> _Coded:
    """A batch decoded, its groups coded by a registry (new groups added) or by a fixed key
    table (a group it lacks means the layer changed since the table was made)."""
    weights = grouping.feature_weights(batch.attributes, weight, batch.label)
    x, y = setup.coordinates(batch.x, batch.y, batch.crs, batch.label)
    codes = keys.code(batch.attributes) if isinstance(keys, KeyRegistry) else keys.codes(batch.attributes)
    if codes.size and codes.min() < 0:
        raise _changed(batch.label)
    if batch.feature.size != len(batch.attributes):  # MultiPoints: a feature's code for each point
        codes = codes[batch.feature]
        weights = None if weights is None else weights[batch.feature]
    return _Coded(x, y, weights, codes, keys.count)


def _points_of(coded: _Coded, setup) -> estimate.Points:
    return estimate.Points.build(coded.x, coded.y, coded.codes, coded.n_groups, coded.w, distance=setup)


def _coded_batches(parts: LayerParts, fields, weight, setup, batch_rows: int, keys: KeyRegistry | KeyTable):
    """Every batch of the layer decoded and its groups coded by ``keys``, in order.

    Meant to run in the reading thread (:func:`~toolbox.layers.stream.prefetched`), which then
    reads, checks weights, transforms and codes while the caller computes; a registry is then
    that thread's until the batches are used up (the caller takes counts from each batch).
    """
    for batch in parts.batches(fields, batch_rows):
        yield _coded(batch, weight, setup, keys)


def _survey_batch(batch: PointLayer, group_by, weight, setup) -> _Surveyed:
    """On a worker: a batch's groups (coded by a registry of its own) and their survey."""
    registry = KeyRegistry(tuple(group_by))
    coded = _coded(batch, weight, setup, registry)
    keys, order = registry.table()  # sorted as a whole-layer read sorts its groups
    coded.codes, coded.n_groups = order[coded.codes], max(coded.n_groups, 1)  # no rows: one empty group
    return _Surveyed(keys, Survey.of(_points_of(coded, setup)))


def recode_survey(survey: Survey, mapping: np.ndarray, n_groups: int) -> Survey:
    """The survey with group ``i`` renumbered ``mapping[i]``, among ``n_groups`` groups.

    Groups without points get the neutral values (zero sums, empty extents), so recoded surveys
    of different batches merge as surveys of the same groups.
    """

    def spread(values, fill):
        out = np.full((n_groups, *values.shape[1:]), fill, dtype=values.dtype)
        out[mapping] = values
        return out

    return replace(
        survey,
        n_groups=n_groups,
        count=spread(survey.count, 0),
        weight_sum=spread(survey.weight_sum, 0.0),
        pair_weight=spread(survey.pair_weight, 0.0),
        sums=spread(survey.sums, 0.0),
        lo=spread(survey.lo, np.inf),
        hi=spread(survey.hi, -np.inf),
    )


def _merge_surveyed(parts: list[_Surveyed]) -> _Surveyed:
    keys = merge_key_tables([p.keys for p in parts])
    survey = None
    for part in parts:
        mapping = keys.codes(part.keys.keys) if keys.fields else np.zeros(1, dtype=np.int64)
        recoded = recode_survey(part.survey, mapping, keys.count)
        survey = recoded if survey is None else survey.merge(recoded)
    return _Surveyed(keys, survey)


# --------------------------------------------------------------------------------------------
# the spill


@dataclass
class _Spill:
    """Decoded batches written one after the other to a file, read back batch by batch."""

    folder: str
    weighted: bool
    batches: list = field(default_factory=list)  # (offset, points) of every batch

    @property
    def path(self) -> str:
        return os.path.join(self.folder, "points.bin")

    def write(self, x, y, w, codes) -> None:
        offset = os.path.getsize(self.path) if os.path.exists(self.path) else 0
        with open(self.path, "ab") as handle:
            for column in (x, y, *([w] if self.weighted else []), codes.astype(np.int32)):
                handle.write(memoryview(np.ascontiguousarray(column)))
        self.batches.append((offset, x.size))

    def read(self) -> Iterator[tuple]:
        """``(x, y, weights or None, codes)`` of every batch, in the order written."""
        with open(self.path, "rb") as handle:
            for offset, n in self.batches:
                handle.seek(offset)
                x = np.fromfile(handle, np.float64, n)
                y = np.fromfile(handle, np.float64, n)
                w = np.fromfile(handle, np.float64, n) if self.weighted else None
                yield x, y, w, np.fromfile(handle, np.int32, n)

    def close(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)


def _spill_folder(parts: LayerParts) -> str | None:
    """A new folder for the spill when the temporary folder has room for twice its size."""
    if parts.rows is None:
        return None
    base = tempfile.gettempdir()
    if shutil.disk_usage(base).free < 2 * SPILL_BYTES_PER_POINT * parts.rows:
        return None
    return tempfile.mkdtemp(prefix="pairspread-spill-", dir=base)


# --------------------------------------------------------------------------------------------
# the prepared layer


def _batch_then(batch: PointLayer, keys: KeyTable, weight, setup, then: Callable, into=None):
    """On a worker: decode a batch, code its groups as ``keys`` does, and add it with ``then``."""
    return then(_points_of(_coded(batch, weight, setup, keys), setup), into=into)


def _changed(label: str) -> InputError:
    return InputError(
        f"{label} changed while it was read (a group appeared that the first pass did not "
        "see); run again when nothing writes to it."
    )


def _merge_states(states: list):
    out = states[0]
    for state in states[1:]:
        out = out.merge(state)
    return out


@dataclass
class Prepared:
    """A layer after the survey pass: its groups, their survey, and its batches to replay.

    ``keys`` holds one row per group (sorted as :func:`toolbox.grouping.group_features` sorts);
    ``survey`` the estimator's survey with groups coded as those rows. Use it as a context
    manager, so that the spill is removed however the computation ends.
    """

    parts: LayerParts
    group_by: tuple[str, ...]
    weight: str | None
    setup: object
    batch_rows: int
    keys: KeyTable
    survey: Survey
    client: object = None
    spill: _Spill | None = None
    order: np.ndarray | None = None  # code in ``keys`` of each running code in the spill

    @property
    def groups(self) -> grouping.Grouping:
        """The groups as a :class:`toolbox.grouping.Grouping` (keys only), for the table's rows."""
        return self.keys.grouping()

    def names(self) -> Callable[[int], str]:
        """How notes name a group."""
        return grouping.group_namer(self.groups.keys)

    def _fields(self) -> list[str]:
        return [*self.group_by, *([self.weight] if self.weight else [])]

    def points(self) -> Iterator[estimate.Points]:
        """Every batch again as estimator points, groups coded as ``keys`` (this process only)."""
        n = self.keys.count
        if self.spill is not None:
            for x, y, w, codes in self.spill.read():
                yield estimate.Points.build(x, y, self.order[codes], n, w, distance=self.setup)
            return
        batches = _coded_batches(self.parts, self._fields(), self.weight, self.setup, self.batch_rows, self.keys)
        for coded in prefetched(batches):
            yield _points_of(coded, self.setup)

    def reduce(self, accumulate: Callable, merge: Callable = _merge_states):
        """One more pass: every batch added with ``accumulate(points, into=state)`` (None for the
        first), parts' states merged with ``merge`` (on the cluster, if any).

        ``accumulate`` must pickle (a bound method of a plan, or a ``functools.partial``) when
        the layer was prepared on a cluster.
        """
        if self.client is None:
            result = None
            for points in self.points():
                result = accumulate(points, into=result)
            return result
        then = functools.partial(
            _batch_then,
            keys=self.keys,
            weight=self.weight,
            setup=self.setup,
            then=accumulate,
        )
        return reduce_parts(
            self.parts, self._fields(), self.batch_rows, then, merge, in_place=True, client=self.client
        )

    def close(self) -> None:
        if self.spill is not None:
            self.spill.close()
            self.spill = None

    def __enter__(self) -> Prepared:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def prepare(
    parts: LayerParts,
    *,
    group_by: Sequence[str],
    weight: str | None,
    setup,
    batch_rows: int,
    client=None,
    spill: bool = True,
) -> Prepared:
    """The survey pass over a layer in parts: its groups, coded and surveyed.

    Parameters
    ----------
    parts : LayerParts
        The layer (:func:`toolbox.layers.stream.layer_parts`).
    group_by : sequence of str
        Key fields.
    weight : str, optional
        Weight field (checked in every batch: finite and non-negative).
    setup : DistanceSetup
        How coordinates become the estimator's (:func:`toolbox.estimate.distance_setup`).
    batch_rows : int
        Most features per batch.
    client : distributed.Client, optional
        Read and survey the parts on this cluster (and run the later passes there too).
    spill : bool
        In this process, keep the decoded batches in a temporary file for the later passes.

    Returns
    -------
    Prepared

    Examples
    --------
    >>> import geopandas, shapely
    >>> from toolbox.estimate import DistanceSetup
    >>> from toolbox.layers.stream import layer_parts
    >>> frame = geopandas.GeoDataFrame({"zone": list("abab")}, geometry=shapely.points([0, 1, 5, 7], 0))
    >>> setup = DistanceSetup("planar", "unknown")
    >>> with prepare(layer_parts(frame), group_by=["zone"], weight=None, setup=setup, batch_rows=3) as ready:
    ...     print(ready.survey.count.tolist(), [p.groups.tolist() for p in ready.points()])
    [2, 2] [[0, 0, 1], [1]]
    """
    group_by = tuple(group_by or ())
    fields = [*group_by, *([weight] if weight else [])]
    parts.check_fields(fields)
    if client is not None:
        summarise = functools.partial(_survey_batch, group_by=group_by, weight=weight, setup=setup)
        surveyed = reduce_parts(parts, fields, batch_rows, summarise, _merge_surveyed, client=client)
        if surveyed is None:
            raise _empty(parts)
        return Prepared(parts, group_by, weight, setup, batch_rows, surveyed.keys, surveyed.survey, client)
    folder = _spill_folder(parts) if spill else None
    store = None if folder is None else _Spill(folder, weight is not None)
    try:
        registry, survey = KeyRegistry(group_by), None
        for coded in prefetched(_coded_batches(parts, fields, weight, setup, batch_rows, registry)):
            running, count = coded.codes, coded.n_groups
            if store is not None:  # in group order: later passes then touch one group's bins at a time
                small = np.uint16 if count <= np.iinfo(np.uint16).max else np.int32
                order = np.argsort(running.astype(small), kind="stable")  # 16 bits: a radix sort
                w = None if coded.w is None else coded.w[order]
                store.write(coded.x[order], coded.y[order], w, running[order])
            mine = Survey.of(_points_of(coded, setup))
            survey = mine if survey is None else recode_survey(survey, _all(survey), count).merge(mine)
        if survey is None:
            raise _empty(parts)
        keys, order = registry.table()
    except BaseException:
        if store is not None:
            store.close()
        raise
    ready = Prepared(
        parts, group_by, weight, setup, batch_rows, keys, recode_survey(survey, order, keys.count)
    )
    ready.spill, ready.order = store, order
    return ready


def _all(survey: Survey) -> np.ndarray:
    return np.arange(survey.n_groups)


def _empty(parts: LayerParts) -> InputError:
    return InputError(
        f"{parts.label} has no feature to compute with; check the input and any {spell('where')} filter."
    )


# --------------------------------------------------------------------------------------------
# one pass, when no survey is needed


def one_pass_sums(parts: LayerParts, *, group_by, weight, setup, batch_rows, tolerance, method):
    """Every group's pair total from one read of the layer, or None when the planned passes
    are needed (see :mod:`toolbox.estimate.single_pass`): geodesic distances, exact sums, or
    windows that would take too much memory.

    Groups too dense for their windows (in-bin uncertainty above the budget) are read a second
    time, their points alone, and summed as a layer read whole would be, if they fit in
    memory (else None). Returns ``(sums, keys)``: the sums with groups in the order of
    ``keys`` (a :class:`~toolbox.batchkeys.KeyTable`), as :func:`prepare` and
    :func:`pair_sums` give them.
    """
    from .estimate.single_pass import GATHER_POINTS, OnePass, TooLarge

    if not one_pass_suits(setup, tolerance, method):
        return None
    group_by = tuple(group_by or ())
    fields = one_pass_fields(parts, group_by, weight)
    registry, sketch = KeyRegistry(group_by), OnePass(tolerance=tolerance, method=method)
    try:
        for x, y, w, running, n_groups in _coded_chunks(parts, fields, weight, setup, batch_rows, registry):
            sketch.add(x, y, w, running, n_groups)  # keeps no reference to the arrays: they are reused
    except TooLarge:
        return None
    if sketch.n_groups == 0:
        raise _empty(parts)
    sums = sketch.finish()
    again = np.flatnonzero(sketch.over_budget)
    if again.size:
        if sketch.count[again].sum() > GATHER_POINTS:
            return None
        known = registry.count
        picked = []
        for batch in prefetched(_coded_batches(parts, fields, weight, setup, batch_rows, registry)):
            if registry.count != known:
                raise _changed(parts.label)
            keep = np.isin(batch.codes, again)
            w = None if batch.w is None else batch.w[keep]
            picked.append((batch.x[keep], batch.y[keep], w, np.searchsorted(again, batch.codes[keep])))
        sum_again(sums, again, picked, setup, tolerance, method)
    return in_key_order(sums, registry)


def one_pass_suits(setup, tolerance, method) -> bool:
    """Whether the one pass can give these sums: planar distances, a projection (tolerance above
    0, not exact sums) and the compiled kernels."""
    return setup.kind == "planar" and tolerance != 0 and method != "exact" and _compiled_kernels()


def one_pass_fields(parts: LayerParts, group_by: tuple, weight) -> list[str]:
    """The fields a one pass reads (checked against the layer)."""
    fields = [*group_by, *([weight] if weight else [])]
    parts.check_fields(fields)
    return fields


def sum_again(sums, again: np.ndarray, picked: list, setup, tolerance, method) -> None:
    """Put into ``sums`` the sums of groups ``again`` (over their budget in one pass) from their
    points read again, ``picked``: (x, y, w or None, index into ``again``) parts, summed as a
    layer read whole would be."""
    x, y, w, codes = (list(column) for column in zip(*picked, strict=True))
    points = estimate.Points.build(
        np.concatenate(x), np.concatenate(y), np.concatenate(codes), again.size,
        None if w[0] is None else np.concatenate(w), distance=setup,
    )  # fmt: skip
    closer = estimate.pair_sums(points, tolerance=tolerance, method=method)
    for name in ("total", "lower", "upper", "rel_bound", "exact", "directions", "note"):
        getattr(sums, name)[again] = getattr(closer, name)


def in_key_order(sums, registry: KeyRegistry):
    """``(sums, keys)``: sums of groups in running-code order put in the order of the
    registry's key table, and that table."""
    keys, order = registry.table()
    position = np.empty_like(order)
    position[order] = np.arange(order.size)  # running code of every row of keys
    return replace(sums, **{k: v[position] for k, v in vars(sums).items()}), keys


#: points binned at a time in one pass: each group's windows then take many points per visit
#: (they stay in cache), not a few scattered ones. At 1,000 groups the windows (524 MB) are
#: streamed from memory once per chunk: 8M points save 3 of 21 CPU seconds at 1e8 over 4M,
#: for 0.3 GiB more
ONE_PASS_CHUNK = 1 << 23


def _coded_chunks(parts: LayerParts, fields, weight, setup, batch_rows: int, registry: KeyRegistry):
    """The layer's points in chunks of ``max(batch_rows, ONE_PASS_CHUNK)`` points (the last may
    be smaller), groups coded by ``registry`` as they come: ``(x, y, w, codes, n_groups)``,
    codes below ``n_groups``.

    One background thread reads, decodes, codes and copies the batches into two chunk buffers in
    turn: it fills one while the caller works on the other. A chunk's arrays are overwritten
    once the caller asks for the next chunk, so the caller must not keep them. Reused buffers
    are touched once, not a fresh 32 MiB array per column per chunk (the first touch of fresh
    memory is what a concatenation costs on some machines).
    """
    size = max(batch_rows, ONE_PASS_CHUNK)
    batches = _coded_batches(parts, fields, weight, setup, batch_rows, registry)
    free: queue.Queue = queue.Queue()
    stop = threading.Event()  # set when the caller stops: a fill waiting for a buffer ends

    def fill():
        made, buffer, filled, n_groups = 0, None, 0, 0
        for batch in batches:
            start, n_groups = 0, batch.n_groups
            while start < batch.codes.size:
                if buffer is None:
                    if made < 2:
                        buffer, made = _Chunk(size, batch.w is not None), made + 1
                    else:
                        buffer = _returned(free, stop)
                        if buffer is None:
                            return
                take = min(size - filled, batch.codes.size - start)
                buffer.put(filled, batch, start, take)
                filled, start = filled + take, start + take
                if filled == size:
                    yield buffer, filled, n_groups
                    buffer, filled = None, 0
        if filled:
            yield buffer, filled, n_groups

    held = None
    with contextlib.closing(prefetched(fill(), depth=1, stop=stop)) as chunks:  # closed: reader stopped
        for buffer, filled, n_groups in chunks:
            if held is not None:  # asking for the next chunk says the caller is done with this one
                free.put(held)
            held = buffer
            yield (*buffer.columns(filled), n_groups)


class _Chunk:
    """The columns of one chunk of points, filled batch by batch and reused."""

    __slots__ = ("x", "y", "w", "codes")

    def __init__(self, size: int, weighted: bool):
        self.x, self.y = np.empty(size), np.empty(size)
        self.w = np.empty(size) if weighted else None
        self.codes = np.empty(size, dtype=np.int64)

    def put(self, at: int, batch: _Coded, start: int, count: int) -> None:
        """Copy ``count`` points of ``batch`` from ``start`` into the chunk at ``at``."""
        for mine, theirs in ((self.x, batch.x), (self.y, batch.y), (self.w, batch.w), (self.codes, batch.codes)):
            if mine is not None:
                mine[at : at + count] = theirs[start : start + count]

    def columns(self, filled: int) -> tuple:
        """``(x, y, w, codes)`` of the first ``filled`` points (views, not copies)."""
        return self.x[:filled], self.y[:filled], None if self.w is None else self.w[:filled], self.codes[:filled]


def _returned(free: queue.Queue, stop: threading.Event):
    """The next chunk the caller is done with, or None once the caller has stopped."""
    while not stop.is_set():
        try:
            return free.get(timeout=0.1)
        except queue.Empty:
            continue
    return None


def _compiled_kernels() -> bool:
    from .kernels._common import compiled_module

    return compiled_module("dyadic") is not None


# --------------------------------------------------------------------------------------------
# passes 2 and 3


def pair_sums(ready: Prepared, *, tolerance: float, method: str) -> estimate.GroupPairSums:
    """Every group's pair total with its guaranteed interval, from the prepared layer's passes.

    On a cluster, ``auto`` bins small groups too (gathering their points for exact sums would
    bring coordinates to one place); the guarantee is the same.
    """
    return pair_sums_of_binned(*binned(ready, tolerance=tolerance, method=method))


def pair_sums_of_binned(plan, state, refined: list) -> estimate.GroupPairSums:
    """Every group's pair total from the results of :func:`binned`."""
    if not refined:
        return state.finish(plan)
    resolved = _Resolved()
    for part in refined:
        for group, cells in part.by_cell().items():
            resolved.cells.setdefault(group, {}).update(cells)
    return state.finish(plan, resolved)


def binned(ready: Prepared, *, tolerance: float, method: str):
    """The plan, the merged state and the refinement states (one per refinement pass, none
    when no bin is too heavy) of the prepared layer."""
    if ready.client is not None and method == "auto" and tolerance > 0:
        method = "projection"
    plan = ready.survey.plan(tolerance=tolerance, method=method, names=ready.names())
    state = ready.reduce(plan.accumulate)
    refinement = state.refinement(plan)
    if refinement is None:
        return plan, state, []
    parts = _split(refinement, REFINE_CELLS_PER_PASS)
    return plan, state, [ready.reduce(functools.partial(part.accumulate, plan)) for part in parts]


def coded_points(ready: Prepared, batch: PointLayer) -> estimate.Points:
    """A batch read again (any fields) as estimator points, its groups coded as ``ready.keys``."""
    return _points_of(_coded(batch, ready.weight, ready.setup, ready.keys), ready.setup)


#: most sub-bins refined in one pass: their state (six float64 each) stays under ~400 MB, and a
#: refinement larger than that takes several passes, so memory does not grow with the layer
REFINE_CELLS_PER_PASS = 8_000_000


@dataclass
class _Resolved:
    """Heavy cells resolved over several refinement passes, as ``State.finish`` takes them."""

    cells: dict = field(default_factory=dict)

    def by_cell(self) -> dict:
        return self.cells


def _split(refinement, limit: int) -> list:
    """The refinement cut into parts of at most ``limit`` sub-bins (whole cells; a cell larger
    than the limit is a part of its own)."""
    sizes = refinement.sub_bins
    if refinement.size <= limit:
        return [refinement]
    parts, start, total = [], 0, 0
    for end, size in enumerate(sizes.tolist()):
        if total and total + size > limit:
            parts.append((start, end))
            start, total = end, 0
        total += size
    parts.append((start, sizes.size))
    out = []
    for a, b in parts:
        sub = sizes[a:b]
        offset = np.concatenate([[0], np.cumsum(sub)[:-1]]).astype(np.int64)
        pick = slice(a, b)
        out.append(
            replace(
                refinement,
                group=refinement.group[pick],
                direction=refinement.direction[pick],
                bin=refinement.bin[pick],
                lo=refinement.lo[pick],
                hi=refinement.hi[pick],
                sub_bins=sub,
                offset=offset,
                size=int(sub.sum()),
            )
        )
    return out


# --------------------------------------------------------------------------------------------
# cross sums: every group of one layer, or of two, on common bins


def _shifted(points: estimate.Points, into=None, *, then: Callable, offset: int, n_groups: int):
    """``then`` of the points with their group codes moved ``offset`` up, among ``n_groups``."""
    return then(replace(points, groups=points.groups + offset, n_groups=n_groups), into=into)


def _only(points: estimate.Points, into=None, *, then: Callable, code_of: np.ndarray):
    """``then`` of the points of some groups, recoded: group ``g`` becomes ``code_of[g]``
    (points of groups with code -1 are left out)."""
    codes = code_of[points.groups]
    keep = codes >= 0
    w = None if points.weights is None else points.weights[keep]
    shift = None if points.shift is None else points.shift[keep]
    mine = replace(
        points, x=points.x[keep], y=points.y[keep], groups=codes[keep], n_groups=int(code_of.max()) + 1,
        weights=w, shift=shift,
    )  # fmt: skip
    return then(mine, into=into)


def _survey_of(survey: Survey, groups: np.ndarray) -> Survey:
    """The survey of ``groups`` alone, coded 0, 1, … in their order."""
    return replace(
        survey,
        n_groups=int(groups.size),
        count=survey.count[groups],
        weight_sum=survey.weight_sum[groups],
        pair_weight=survey.pair_weight[groups],
        sums=survey.sums[groups],
        lo=survey.lo[groups],
        hi=survey.hi[groups],
    )


def cross_sums(
    ready: Prepared, other: Prepared | None = None, *, tolerance: float, method: str
) -> estimate.CrossPairSums:
    """Totals between every pair of groups with their guaranteed intervals, from the passes.

    With ``other`` (a second layer, prepared with the first one's distance setup) its groups
    follow the first's, as :meth:`toolbox.estimate.Points.join` codes them, and the diagonal is
    NaN (no group's own pair total is needed); otherwise the diagonal holds each group's own
    pair total (:func:`pair_sums`). Every group is binned on common bins
    (:mod:`toolbox.estimate.cross_state`); entries still over the tolerance are recomputed from
    their groups' points in one more pass when they are few enough.
    """
    layers = [ready] if other is None else [ready, other]
    offsets = [0, ready.keys.count]
    total = sum(r.keys.count for r in layers)
    estimate.check_cross_groups(total)
    survey = None
    for r, offset in zip(layers, offsets, strict=False):
        mine = recode_survey(r.survey, offset + _all(r.survey), total)
        survey = mine if survey is None else survey.merge(mine)

    def one_pass(accumulate, only=None):
        if only is not None:  # the points of some groups only, recoded 0, 1, …
            code_of = np.full(total, -1, dtype=np.int64)
            code_of[only] = np.arange(only.size)
            accumulate = functools.partial(_only, then=accumulate, code_of=code_of)
        result = None
        for r, offset in zip(layers, offsets, strict=False):
            then = functools.partial(_shifted, then=accumulate, offset=offset, n_groups=total)
            part = r.reduce(then)
            result = part if result is None else result if part is None else result.merge(part)
        return result

    def in_memory(groups):
        kept = one_pass(cross_state.gather_groups(groups))
        points = cross_state.gathered_points(kept, survey, ready.setup)
        return estimate.cross_sums(points, tolerance=tolerance, method=method)

    def binned(groups):
        """Entries among ``groups`` (all of them, or those left when some are refused) on
        common bins; entries over the tolerance then from their groups' points."""
        sub = survey if groups is None else _survey_of(survey, groups)
        cross = cross_state.cross_plan(sub, tolerance=tolerance, method=method)
        names = np.arange(total) if groups is None else groups
        block = np.ix_(names, names)
        if cross.gather:  # too few points for a common frame: from their points
            r = in_memory(names)
            for name in ("total", "lower", "upper", "rel_bound", "exact", "directions", "note"):
                getattr(columns, name)[block] = getattr(r, name)[block]
            return
        if cross.note:
            columns.note[block] = cross.note
            return
        state = one_pass(cross.plan.accumulate, groups)
        est, lo, hi, bound, directions = cross_state.cross_finish(state, cross)
        for name, value in zip(("total", "lower", "upper", "rel_bound"), (est, lo, hi, bound), strict=True):
            getattr(columns, name)[block] = value
        columns.exact[block], columns.directions[block] = False, directions
        again = names[cross_state.groups_to_gather(sub, bound, tolerance)]
        if again.size:  # groups packed into the same bins: their entries from their points
            r = in_memory(again)
            pick = np.ix_(again, again)
            keep = ~np.eye(again.size, dtype=bool) & ~np.isnan(r.total[pick])
            for name in ("total", "lower", "upper", "rel_bound", "exact", "directions"):
                target = getattr(columns, name)
                block = target[pick]
                block[keep] = getattr(r, name)[pick][keep]
                target[pick] = block

    cross = cross_state.cross_plan(survey, tolerance=tolerance, method=method)
    if cross.gather:  # exact sums asked for, or too few points for a common frame
        return in_memory(np.arange(total))
    columns = cross_state.table(total)
    within = pair_sums(ready, tolerance=tolerance, method=method) if other is None else None
    if not cross.note:
        binned(None)
    elif within is None:
        columns.note[...] = cross.note
    else:  # too wide together: groups refused on their own sink only their own rows
        refused = np.flatnonzero(np.asarray(within.note, dtype=bool))
        columns.note[...] = cross.note
        for g in refused:
            columns.note[g, :] = columns.note[:, g] = within.note[g]
        kept = np.setdiff1d(np.arange(total), refused)
        if refused.size and kept.size:
            binned(kept)
    return cross_state.cross_result(survey, columns.columns(), within)
