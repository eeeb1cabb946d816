"""Pieces every kernel shares: checks, the one group layout, directions, the raw-sums record."""

from __future__ import annotations

import functools
import importlib
import math
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError

#: unit roundoff of float64
UNIT_ROUNDOFF = np.finfo(np.float64).eps / 2
#: elements per block of the exact kernels and per chunk of the padded projection layout;
#: keeps temporary arrays near 16-32 MB whatever the group sizes
BLOCK_ELEMENTS = 1 << 21
#: points per block of the radius computation (two 512 KiB blocks stay in cache)
_RADIUS_BLOCK = 1 << 16
#: groups up to this size are summed exactly all at once in a padded (groups, s, s) block
SMALL_EXACT = 64
#: layouts of fewer points are built on one thread
_PARALLEL_POINTS = 1 << 18

Progress = Callable[[int, int], None]


@functools.cache
def compiled_module(name: str):
    """A numba kernel module of this package, imported on first use (numba is slow to import).

    None without numba: the caller then takes its numpy route (same results, slower).
    """
    try:
        return importlib.import_module(f"{__package__}.{name}")
    except ImportError:
        return None


def directions_unit_vectors(m: int) -> tuple[np.ndarray, np.ndarray]:
    """Unit vectors of ``m`` equally spaced directions over half a turn."""
    angles = np.arange(m) * (math.pi / m)
    return np.cos(angles), np.sin(angles)


@dataclass(frozen=True)
class Raw:
    """A kernel's sums before their interval (``toolbox.estimate.interval`` makes that).

    ``value`` holds exact sums (``directions`` 0) or the summed projections ``F`` over
    ``directions`` directions, of which the true ones lie in ``[value, value + uncertain]``
    (pairs sharing a bin) up to rounding. ``relative`` and ``absolute`` bound the rounding of
    the kernel's own arithmetic; ``radius_mass`` bounds ``Σ w_i w_j (r_i + r_j)`` over the
    pairs summed, ``r`` the points' distances from the centre subtracted, for the centring
    allowance (0 when ``absolute`` already covers it).
    """

    value: np.ndarray | float
    directions: int
    relative: np.ndarray | float = 0.0
    absolute: np.ndarray | float = 0.0
    uncertain: np.ndarray | float = 0.0
    radius_mass: np.ndarray | float = 0.0

    def take(self, index) -> Raw:
        """The entries ``index`` of every per-entry array."""

        def pick(v):
            return v[index] if np.ndim(v) else v

        return Raw(
            pick(self.value),
            self.directions,
            pick(self.relative),
            pick(self.absolute),
            pick(self.uncertain),
            pick(self.radius_mass),
        )


def exact_rounding(n_terms):
    """Relative rounding allowance of a brute-force sum of ``n_terms`` non-negative terms.

    Every term is non-negative, so a sum accumulated through chains of at most n additions is
    within (n + 8)·u of the exact one (the additions plus the rounding of each distance).
    """
    return (np.asarray(n_terms, dtype=np.float64) + 8) * UNIT_ROUNDOFF


def check_points(x, y, weights):
    x = np.ascontiguousarray(x, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    if x.ndim != 1 or x.shape != y.shape:
        raise ParameterError(
            f"x and y must be 1-D arrays of the same length. Got shapes {x.shape} and {y.shape}."
        )
    # a finite sum means finite terms (NaN and inf carry through a sum); only a sum that is
    # not finite (bad values, or an overflow) needs the per-point check
    with np.errstate(over="ignore", invalid="ignore"):
        finite = np.isfinite(x.sum() + y.sum())
    bad = np.zeros(0, dtype=bool) if finite else ~(np.isfinite(x) & np.isfinite(y))
    if bad.any():
        raise ParameterError(
            f"{int(bad.sum())} point(s) have NaN or infinite coordinates (first at index "
            f"{int(np.flatnonzero(bad)[0])}); drop or repair them first."
        )
    if weights is not None:
        weights = np.ascontiguousarray(weights, dtype=np.float64)
        if weights.shape != x.shape:
            raise ParameterError(
                f"weights must have one value per point. Got shape {weights.shape} for {x.shape[0]} points."
            )
        with np.errstate(over="ignore", invalid="ignore"):  # NaN fails both tests
            fine = weights.size == 0 or (weights.min() >= 0 and np.isfinite(weights.sum()))
        bad = np.zeros(0, dtype=bool) if fine else ~np.isfinite(weights) | (weights < 0)
        if bad.any():
            raise ParameterError(
                f"{int(bad.sum())} weight(s) are negative, NaN or infinite (first at index "
                f"{int(np.flatnonzero(bad)[0])}); weights must be finite and non-negative."
            )
    return x, y, weights


def check_groups(groups, n, n_groups):
    groups = np.asarray(groups)
    if groups.shape != (n,) or (groups.size and not np.issubdtype(groups.dtype, np.integer)):
        raise ParameterError("groups must be one integer code per point.")
    if n_groups is None:
        n_groups = int(groups.max()) + 1 if groups.size else 0
    if groups.size and (groups.min() < 0 or groups.max() >= n_groups):
        raise ParameterError(f"group codes must lie in [0, {n_groups}).")
    return groups if groups.dtype.kind in "iu" else groups.astype(np.int64), int(n_groups)


def centre(x, y, codes, n_groups, w=None):
    """Coordinates minus their group's (weighted) mean.

    UTM northings are ~6e6 m, so sums of raw coordinates lose the digits of a 1 m spread.
    Any float centre near the points will do: subtracting it errs by at most u·r_i, r_i the
    distance of point i from it, and the kernels' rounding allowances are written in those
    r_i. The weighted mean keeps far zero-weight points from pulling the centre away from the
    points that count; a group whose weights are all zero uses the plain mean.
    """
    if n_groups == 1:  # one group: subtract scalars, no per-point temporaries
        weights = w if w is not None and w.sum() > 0 else None
        if x.size == 0:
            return x.copy(), y.copy()
        # a mean is clamped into the values' range, so identical points centre to exact zeros
        cx = min(max(np.average(x, weights=weights), x.min()), x.max())
        cy = min(max(np.average(y, weights=weights), y.min()), y.max())
        return x - cx, y - cy
    counts = np.bincount(codes, minlength=n_groups).astype(np.float64)
    if w is None:
        wsum, wx, wy = counts, np.bincount(codes, x, n_groups), np.bincount(codes, y, n_groups)
    else:
        wsum = np.bincount(codes, w, n_groups)
        wx, wy = np.bincount(codes, w * x, n_groups), np.bincount(codes, w * y, n_groups)
        plain = ~(wsum > 0)
        if plain.any():
            wsum = np.where(plain, counts, wsum)
            wx = np.where(plain, np.bincount(codes, x, n_groups), wx)
            wy = np.where(plain, np.bincount(codes, y, n_groups), wy)
    safe = np.maximum(wsum, np.finfo(np.float64).tiny)
    mx, my = wx / safe, wy / safe
    filled = counts > 0
    if filled.any():  # clamp each mean into its group's range: identical points give zeros
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)[filled]
        for mean, v in ((mx, x), (my, y)):
            lo, hi = np.minimum.reduceat(v, starts), np.maximum.reduceat(v, starts)
            mean[filled] = np.clip(mean[filled], lo, hi)
    return x - mx[codes], y - my[codes]


def _before(w: np.ndarray) -> np.ndarray:
    """Exclusive cumulative sums along rows (0, w0, w0 + w1, ...): no subtraction, no cancellation."""
    out = np.zeros_like(w)
    np.cumsum(w[:, :-1], axis=1, out=out[:, 1:])
    return out


@dataclass(frozen=True)
class GroupSums:
    """Per-group sums of a centred layout: Σ_{i<j} w_i w_j, the largest distance of a point from
    the centre and Σ w_i r_i (``r`` those distances)."""

    pair_weight: np.ndarray
    radius_max: np.ndarray
    radius_sum: np.ndarray


@dataclass(frozen=True)
class GroupLayout:
    """Points sorted by group, each group centred on its (weighted) mean (see :func:`centre`)."""

    n_groups: int
    #: original index of each sorted point (None: already in order), or the (codes, n_groups)
    #: it is made from on first use (see :attr:`order`)
    _order: np.ndarray | tuple | None
    _codes: np.ndarray | None  # group of each sorted point (None: made from the counts on use)
    counts: np.ndarray
    starts: np.ndarray
    x: np.ndarray
    y: np.ndarray
    w: np.ndarray | None  # None: unweighted
    wpt: np.ndarray  # weights, ones when unweighted
    weight_sum: np.ndarray
    #: per-group sums computed with the layout (compiled route), else on first use
    sums: GroupSums | None = None

    @classmethod
    def build(
        cls, x, y, groups, n_groups, weights, *, centred: bool = True, threads: int | None = None
    ) -> GroupLayout:
        """Sort the points by group; ``centred`` False keeps the coordinates as they are
        (longitudes and latitudes for the geodesic kernels). ``threads`` bounds the threads of
        the compiled route (None: numba's current setting)."""
        # points already in group order (one group, say) are not copied into a new order
        compiled = compiled_module("_layout")
        if compiled is not None:
            ordered = n_groups == 1
            if not ordered:
                groups = _read_only(np.ascontiguousarray(groups, dtype=np.int64))
                ordered = compiled.in_order(groups)
            # a few milliseconds of work would not repay waking the other threads
            with thread_limit(threads if x.size >= _PARALLEL_POINTS else 1):
                return cls._build_compiled(compiled, x, y, groups, n_groups, weights, centred, ordered)
        order = None
        ordered = n_groups == 1 or bool(np.all(groups[1:] >= groups[:-1]))
        if not ordered:
            # a stable sort of 16-bit codes is a radix sort in numpy: linear time
            small = groups.astype(np.int16) if n_groups <= np.iinfo(np.int16).max else groups
            order = np.argsort(small, kind="stable")
            groups, x, y = groups[order], x[order], y[order]
            weights = None if weights is None else weights[order]
        counts = np.bincount(groups, minlength=n_groups).astype(np.int64)
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
        xs, ys = centre(x, y, groups, n_groups, weights) if centred else (x, y)
        # unweighted: a read-only view of ones, not an array of them
        wpt = np.broadcast_to(1.0, xs.shape) if weights is None else weights
        weight_sum = counts.astype(np.float64) if weights is None else np.bincount(groups, weights, n_groups)
        return cls(n_groups, order, groups, counts, starts, xs, ys, weights, wpt, weight_sum)

    @classmethod
    def _build_compiled(cls, compiled, x, y, groups, n_groups, weights, centred, ordered) -> GroupLayout:
        """:meth:`build` with the compiled kernels: a counting sort, then two parallel passes
        that centre the groups and sum what the other kernels need per group."""
        weighted = weights is not None
        w = weights if weighted else np.zeros(1)
        if ordered:
            counts = np.array([x.size]) if n_groups == 1 else np.bincount(groups, minlength=n_groups)
        else:
            # records without the original index: the order is made only if asked for (unsort)
            rec, counts = compiled.group_records(
                groups, n_groups, compiled.slices(), _read_only(x), _read_only(y), _read_only(w), weighted, False
            )
            x, y, w = rec[:, 0], rec[:, 1], rec[:, 2] if weighted else w
        counts = counts.astype(np.int64)
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
        # pieces of at most PIECE points of one group, so that one large group is shared out too
        per_group = -(-counts // compiled.PIECE)
        piece_group = np.repeat(np.arange(n_groups), per_group)
        first = np.cumsum(per_group) - per_group
        offset = np.arange(piece_group.size) - first[piece_group]
        piece_start = starts[piece_group] + offset * compiled.PIECE
        piece_stop = np.minimum(piece_start + compiled.PIECE, (starts + counts)[piece_group])
        n, moved = x.size, not ordered
        out = (np.empty(n), np.empty(n), np.empty(n if moved and weighted else 0), np.empty(0, dtype=np.int64))
        # consecutive pieces in blocks of about PIECE points, one hand-out to a thread each
        size = piece_stop - piece_start
        block = (np.cumsum(size) - size) // compiled.PIECE
        blocks = np.concatenate([[0], np.flatnonzero(np.diff(block)) + 1, [block.size]]).astype(np.int64)
        pieces = (piece_group, piece_start, piece_stop, blocks)
        index = np.zeros(0)
        weight_sum, pair_weight, radius_max, radius_sum = compiled.centre_pieces(
            _read_only(x), _read_only(y), _read_only(w), weighted, moved, _read_only(index), centred, *pieces, n_groups, out
        )
        xs, ys = out[0], out[1]
        # points moved: their sorted codes and original order are made only if a kernel asks
        # for them (pair sums do not), from the codes as given (``_order``)
        order = (groups, n_groups) if moved else None
        weights = None if not weighted else out[2] if moved else weights
        if not weighted:
            weight_sum = counts.astype(np.float64)
        wpt = np.broadcast_to(1.0, xs.shape) if weights is None else weights
        sums = GroupSums(pair_weight, radius_max, radius_sum) if centred else None
        return cls(n_groups, order, None if moved else groups, counts, starts, xs, ys, weights, wpt, weight_sum, sums)

    @functools.cached_property
    def order(self) -> np.ndarray | None:
        """Original index of each sorted point; None when the points were in order already."""
        if not isinstance(self._order, tuple):
            return self._order
        codes, n_groups = self._order
        compiled = compiled_module("_layout")
        with thread_limit(None if codes.size >= _PARALLEL_POINTS else 1):
            return compiled.group_order(codes, n_groups, compiled.slices())

    @functools.cached_property
    def codes(self) -> np.ndarray:
        """Group of each sorted point."""
        if self._codes is not None:
            return self._codes
        return np.repeat(np.arange(self.n_groups, dtype=np.int64), self.counts)

    def unsort(self, values: np.ndarray) -> np.ndarray:
        """Per-point values in group order put back in input order."""
        if self.order is None:
            return values
        out = np.empty_like(values)
        out[self.order] = values
        return out

    def pair_weight(self) -> np.ndarray:
        """Σ_{i<j} w_i w_j per group, as Σ_i w_i·(weight before i): no cancellation."""
        if self.w is None:
            return self.counts * (self.counts - 1) / 2.0
        if self.sums is not None:
            return self.sums.pair_weight
        out = np.zeros(self.n_groups)
        for chunk, index, valid in self.chunks(np.flatnonzero(self.counts > 1), lambda s: s):
            w = self.padded_weights(index, valid)
            out[chunk] = (w * _before(w)).sum(axis=1)
        return out

    def other_weight(self) -> np.ndarray:
        """Σ_{j≠i} w_j of every point's group (group order), from sums before and after it."""
        if self.w is None:
            return (self.counts[self.codes] - 1).astype(np.float64)
        out = np.zeros(self.x.size)
        for _, index, valid in self.chunks(np.flatnonzero(self.counts > 0), lambda s: s):
            w = self.padded_weights(index, valid)
            after = _before(w[:, ::-1])[:, ::-1]
            out[index[valid]] = (_before(w) + after)[valid]
        return out

    @functools.cached_property
    def radius(self) -> np.ndarray:
        """Distance of every point from its group's centre (computed once, then kept).

        In blocks that stay in cache: whole-array temporaries of x² and y² would cost more (in
        fresh memory) than the arithmetic.
        """
        x, y = self.x, self.y
        out = np.empty_like(x)
        part = np.empty(min(x.size, _RADIUS_BLOCK))
        for a in range(0, x.size, _RADIUS_BLOCK):
            b = min(x.size, a + _RADIUS_BLOCK)
            r, t = out[a:b], part[: b - a]
            np.multiply(x[a:b], x[a:b], out=r)
            r += np.multiply(y[a:b], y[a:b], out=t)
            np.sqrt(r, out=r)
        return out

    def radius_max(self) -> np.ndarray:
        """Largest distance of a point from its group's centre, per group (0 when empty)."""
        if self.sums is not None:
            return self.sums.radius_max
        out = np.zeros(self.n_groups)
        filled = self.counts > 0
        if filled.any():
            out[filled] = np.maximum.reduceat(self.radius, self.starts[filled])
        return out

    def padded(self, groups):
        """Index matrix (groups, s) into the sorted arrays, plus its validity mask."""
        s = int(self.counts[groups].max())
        offsets = np.arange(s)
        valid = offsets[None, :] < self.counts[groups][:, None]
        index = np.where(valid, self.starts[groups][:, None] + offsets[None, :], 0)
        return index, valid

    def size_classes(self, members):
        """Split the groups ``members`` into classes of similar size (powers of two)."""
        if members.size == 0:
            return []
        sizes = self.counts[members]
        klass = np.floor(np.log2(np.maximum(sizes, 1))).astype(np.int64)
        order = np.argsort(klass, kind="stable")
        members, klass = members[order], klass[order]
        return np.split(members, np.flatnonzero(np.diff(klass)) + 1)

    def chunks(self, members, per_row_elements):
        """Padded chunks of similar-size groups, each about BLOCK_ELEMENTS in size."""
        for klass in self.size_classes(members):
            s = int(self.counts[klass].max())
            step = max(1, BLOCK_ELEMENTS // per_row_elements(s))
            for a in range(0, klass.size, step):
                chunk = klass[a : a + step]
                yield chunk, *self.padded(chunk)

    def padded_weights(self, index, valid):
        return np.where(valid, self.wpt[index], 0.0)

    @functools.cached_property
    def _radius_sum(self) -> np.ndarray:
        weighted = self.radius if self.w is None else self.radius * self.w
        if self.n_groups == 1:
            return np.array([weighted.sum()])
        return np.bincount(self.codes, weighted, self.n_groups)

    def radius_sum(self) -> np.ndarray:
        """Σ w_i r_i per group, r_i the distance of point i from its group's centre."""
        return self._radius_sum if self.sums is None else self.sums.radius_sum


def by_group(groups, n_groups: int, x, y, weights=None, compiled=None):
    """Points in group order by a stable counting sort (compiled, ``kernels/_layout.py``).

    Returns x, y, the weights (None when unweighted), the count of every group and every
    point's original index (as float64, exact below 2**53); the arrays are columns of one
    record per point.
    """
    compiled = compiled or compiled_module("_layout")
    weighted = weights is not None
    codes = _read_only(np.ascontiguousarray(groups, dtype=np.int64))
    w = _read_only(weights if weighted else np.zeros(1))  # one compiled version for both
    rec, counts = compiled.group_records(
        codes, n_groups, compiled.slices(), _read_only(x), _read_only(y), w, weighted, True
    )
    return rec[:, 0], rec[:, 1], rec[:, 2] if weighted else None, counts, rec[:, -1]


def _read_only(values: np.ndarray) -> np.ndarray:
    """A read-only view (no copy). numba compiles one version of a kernel per argument type,
    and whether an array is writable is part of its type: layers read from Arrow buffers give
    read-only arrays, numpy's arithmetic writable ones. Passing every input read-only keeps
    one version per kernel, the one ``toolbox.precompile`` caches, instead of compiling
    another on a user's first run of a new kind of input."""
    view = values.view()
    view.flags.writeable = False
    return view


def weights_of_others(groups, n_groups: int, weights) -> tuple[np.ndarray, np.ndarray]:
    """Σ_{j≠i} w_j for every point (input order) and Σ_{i<j} w_i w_j for every group.

    Sums of non-negative terms only (no W − w_i), so one dominant weight cancels nothing.
    """
    n = np.asarray(groups).size
    lay = GroupLayout.build(np.zeros(n), np.zeros(n), np.asarray(groups), n_groups, weights)
    return lay.unsort(lay.other_weight()), lay.pair_weight()


class Ticker:
    """Cumulative progress in work units, reported through an optional callback."""

    def __init__(self, progress: Progress | None, total: int):
        self.progress, self.total, self.done = progress, int(total), 0
        if progress is not None:  # the work starts now (a long first group reports late)
            progress(0, self.total)

    def __call__(self, units) -> None:
        self.done += int(units)
        if self.progress is not None:
            self.progress(self.done, self.total)


@contextmanager
def thread_limit(threads: int | None) -> Iterator[None]:
    """Run the compiled kernels on at most ``threads`` threads inside the block (None: all)."""
    try:
        import numba
    except ImportError:
        yield
        return
    previous = numba.get_num_threads()
    if threads:
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
    try:
        # hand tasks out one at a time: a thread that lost its core to another process then
        # holds up only its current task, not a fixed half of them
        with numba.parallel_chunksize(1):
            yield
    finally:
        numba.set_num_threads(previous)
