"""Per-group pair sums of planar points that come in batches, in one pass with no survey first.

The passes of :mod:`.state` fix every group's bins from a survey of its extent, so a layer is
read at least twice. Here each (group, direction) gets a window of power-of-two bins
(:mod:`toolbox.kernels.dyadic`) that follows the values as they come: shifted or coarsened in
place when a value falls outside it, so the bins end up as fine as the group's final extent
allows, within a factor of four. Pairs in different bins are summed exactly (the arithmetic
of ``state._bin_sums``, here compiled) and pairs in one bin bounded by its width, through
:func:`.interval.interval`; a group of up to ``gather`` points keeps its points and gets the
exact sums the in-memory path would give it.

Windows use about twice the bins the planned state gives a group, so that coarsening by a
factor of two still leaves the bins the tolerance needs; when a group's in-bin uncertainty is
still above its budget (a dense cluster in a wide group), or the windows would take too much
memory, :meth:`OnePass.finish` says so and the caller falls back to the planned passes. The
values are projections of the layer's own coordinates (not centred: there is no centre before
the end), so the rounding allowance uses ``Σ w (|x| + |y|)`` where the planned state uses the
distance from the centre.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..kernels import UNIT_ROUNDOFF, Raw, check_points, costs
from ..kernels._common import by_group, compiled_module, directions_unit_vectors
from .interval import bin_budget, check_method, interval, projection_directions
from .points import Points
from .results import GroupPairSums

__all__ = ["OnePass", "TooLarge", "WINDOW_BYTES"]

#: most memory the windows may take before the caller is told to use the planned passes
WINDOW_BYTES = 2 * 2**30
#: most points kept for exact sums (x, y, weight, group: 32 bytes each)
GATHER_POINTS = 16 * 2**20
#: windows get this many times the bins the planned state would give a group (coarsening by
#: a power of two can leave a window's values in half its bins)
BIN_FACTOR = 4
#: most bins per window
MAX_BINS = 1 << 14
#: a group whose first binned points leave more than this share of its budget uncertain keeps
#: its points instead (summed as in memory at the end), if they fit
DENSE_SHARE = 0.5
#: windows are allocated for this many groups at a time (growing one array would copy it)
ARENA_WINDOWS = 64


class TooLarge(Exception):
    """The windows or the kept points would take more memory than allowed."""


def _gather_limit(m: int, method: str) -> int:
    """Largest group kept for exact sums: where exact sums cost less than the projection."""
    if method == "projection":
        return 1
    n = np.arange(2, 4097)
    cheap = costs.exact(n) <= costs.projection(n, m, True)
    return int(n[cheap].max()) if cheap.any() else 1


def _window_bins(tolerance: float, m: int) -> int:
    """Bins per window: uniform values then leave ≈ 3/B² of the projected total uncertain,
    a tenth of the budget, and a factor for the coarsening."""
    wanted = BIN_FACTOR * math.sqrt(3 / (0.1 * bin_budget(tolerance, m)))
    return int(min(max(16, 2 ** math.ceil(math.log2(wanted))), MAX_BINS))


def _grow(values: np.ndarray, size: int, fill) -> np.ndarray:
    if values.size >= size:
        return values
    return np.concatenate([values, np.full(size - values.size, fill, dtype=values.dtype)])


def _in_group_order(x, y, w, groups, n_groups: int):
    """Points sorted by group: x, y, w (or None), the count of every group, the groups present
    and where each present group's points start (and the last one ends)."""
    x, y, w, counts, _ = by_group(groups, n_groups, x, y, w)
    present = np.flatnonzero(counts)
    starts = np.concatenate([[0], np.cumsum(counts[present])]).astype(np.int64)
    return x, y, w, counts, present, starts


@dataclass
class OnePass:
    """Per-group sums of planar points added batch by batch (groups coded 0, 1, … as they come).

    Examples
    --------
    >>> s = OnePass(tolerance=0.01, method="projection")
    >>> s.add(np.array([0.0, 3.0]), np.array([0.0, 0.0]), None, np.array([0, 0]), 1)
    >>> s.add(np.array([0.0]), np.array([4.0]), None, np.array([0]), 1)
    >>> r = s.finish()
    >>> bool(r.lower[0] <= 12 <= r.upper[0]), s.over_budget.tolist()
    (True, [False])
    """

    tolerance: float
    method: str = "auto"
    m: int = field(init=False)
    bins: int = field(init=False)
    gather: int = field(init=False)
    count: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    weight_sum: np.ndarray = field(default_factory=lambda: np.zeros(0))
    pair_weight: np.ndarray = field(default_factory=lambda: np.zeros(0))
    size_sum: np.ndarray = field(default_factory=lambda: np.zeros(0))  # Σ w (|x| + |y|)
    slot: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    kept: list = field(default_factory=list)  # (x, y, w, group) of groups not (yet) binned
    used: int = 0  # windows handed out
    free: list = field(default_factory=list)  # windows handed back, emptied
    dense: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))  # kept for good
    over_budget: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    weighted: bool | None = None  # set by the first batch

    def __post_init__(self) -> None:
        if check_method(self.method, self.tolerance) == 0:
            raise ValueError("one pass needs a projection: a tolerance above 0 and no exact method")
        self.m = projection_directions(self.tolerance)
        self.bins = _window_bins(self.tolerance, self.m)
        self.gather = _gather_limit(self.m, self.method)
        self._kernel = compiled_module("dyadic")
        self.arenas = []  # (cells, exponents, origins) of ARENA_WINDOWS groups each
        self.cos_t, self.sin_t = directions_unit_vectors(self.m)

    @property
    def n_groups(self) -> int:
        return self.count.size

    def add(self, x, y, w, groups, n_groups: int) -> None:
        """Add a batch of points; ``groups`` are codes below ``n_groups`` (which may grow)."""
        x, y, w = check_points(x, y, w)  # a NaN would fall in no window
        if self.weighted is None:  # the windows' columns follow the first batch
            self.weighted = w is not None
        elif w is None and self.weighted:
            w = np.ones(x.size)
        elif w is not None and not self.weighted:
            raise ValueError("weights came after unweighted batches: give every batch weights or none")
        self._grow_groups(n_groups)
        x, y, w, counts, present, starts = _in_group_order(x, y, w, groups, n_groups)
        self._survey(x, y, w, present, counts, starts)
        promoted = np.flatnonzero((self.slot < 0) & ~self.dense & (self.count > self.gather))
        moved = self._promote(promoted)
        self._bin(x, y, w, starts, self.slot[present])
        self._demote(self._too_dense(promoted), moved)
        unbinned = self.slot[present] < 0
        if unbinned.any():
            left = np.repeat(unbinned, counts[present])
            g = np.repeat(present[unbinned], counts[present[unbinned]])
            self.kept.append((x[left], y[left], None if w is None else w[left], g))
            if sum(part[0].size for part in self.kept) > GATHER_POINTS:
                raise TooLarge("too many points kept for exact sums")

    def _grow_groups(self, n_groups: int) -> None:
        self.count = _grow(self.count, n_groups, 0)
        self.weight_sum = _grow(self.weight_sum, n_groups, 0.0)
        self.pair_weight = _grow(self.pair_weight, n_groups, 0.0)
        self.size_sum = _grow(self.size_sum, n_groups, 0.0)
        self.slot = _grow(self.slot, n_groups, -1)
        self.dense = _grow(self.dense, n_groups, False)

    def _survey(self, x, y, w, present, counts, starts) -> None:
        weighted = w is not None
        batch_w, pairs, size = np.zeros(self.n_groups), np.zeros(self.n_groups), np.zeros(self.n_groups)
        sums = self._kernel.segment_sums(x, y, w if weighted else np.zeros(1), weighted, starts)
        batch_w[present], pairs[present], size[present] = sums
        # pairs across batches: W_before·W_batch more pair weight, no cancellation
        self.pair_weight += pairs + self.weight_sum * batch_w
        self.weight_sum += batch_w
        self.count += counts
        self.size_sum += size

    def _promote(self, groups: np.ndarray):
        """Give ``groups`` windows and move their kept points into them; returns those points."""
        if groups.size == 0:
            return None
        reused = min(len(self.free), groups.size)
        used = self.used + groups.size - reused
        if used * self.m * self.bins * 8 * self._kernel.columns(self.weighted) > WINDOW_BYTES:
            raise TooLarge("the windows would take too much memory")
        while len(self.arenas) * ARENA_WINDOWS < used:  # new arenas; the old ones stay put
            self.arenas.append(self._kernel.new_windows(ARENA_WINDOWS, self.m, self.bins, self.weighted))
        self.slot[groups] = [*self.free[:reused], *range(self.used, used)]
        del self.free[:reused]
        self.used = used
        if not self.kept:
            return None
        moved = self._take_kept(groups)
        if moved[0].size:
            x, y, w, _, present, starts = _in_group_order(*moved, self.n_groups)
            self._bin(x, y, w, starts, self.slot[present])
        return moved

    def _too_dense(self, groups: np.ndarray) -> np.ndarray:
        """Those of newly binned ``groups`` whose first points already leave more than
        ``DENSE_SHARE`` of their budget uncertain: clusters narrower than their bins."""
        if groups.size == 0:
            return groups
        exact, uncertain, _ = self._window_sums(groups)
        budget = bin_budget(self.tolerance, self.m)
        return groups[uncertain.sum(axis=1) > DENSE_SHARE * budget * exact.sum(axis=1)]

    def _window_sums(self, groups: np.ndarray):
        """Exact part, in-bin uncertainty and fullest bin's count of the windows of ``groups``,
        (groups, directions) each."""
        out = tuple(np.zeros((groups.size, self.m)) for _ in range(3))
        arena, slot = np.divmod(self.slot[groups], ARENA_WINDOWS)
        for a in np.unique(arena):
            mine = arena == a
            cells, expo, _ = self.arenas[a]
            for part, values in zip(out, self._kernel.window_sums(cells, expo, slot[mine], UNIT_ROUNDOFF), strict=True):
                part[mine] = values
        return out

    def _demote(self, groups: np.ndarray, moved) -> None:
        """Keep the points of ``groups`` from now on (the windows' points come back from
        ``moved`` and the batch's kept points); their windows are emptied for reuse."""
        if groups.size == 0:
            return
        for group in groups:
            arena, slot = divmod(int(self.slot[group]), ARENA_WINDOWS)
            cells, expo, origin = self.arenas[arena]
            cells[slot] = 0.0
            expo[slot] = self._kernel.EMPTY
            origin[slot] = 0
            self.free.append(int(self.slot[group]))
        self.slot[groups] = -1
        self.dense[groups] = True
        if moved is not None:
            x, y, w, g = moved
            back = np.isin(g, groups)
            self.kept.append((x[back], y[back], None if w is None else w[back], g[back]))

    def _take_kept(self, groups):
        """The kept points of ``groups``, removed from the kept ones."""
        x, y, w, g = self._kept_arrays()
        moving = np.isin(g, groups)
        rest = ~moving
        self.kept = [(x[rest], y[rest], None if w is None else w[rest], g[rest])] if rest.any() else []
        return x[moving], y[moving], None if w is None else w[moving], g[moving]

    def _kept_arrays(self):
        if not self.kept:
            empty = np.zeros(0)
            return empty, empty, None, np.zeros(0, dtype=np.int64)
        x, y, w, g = (list(column) for column in zip(*self.kept, strict=True))
        weights = None if w[0] is None else np.concatenate(w)
        return np.concatenate(x), np.concatenate(y), weights, np.concatenate(g)

    def _bin(self, x, y, w, starts, slots) -> None:
        weighted = w is not None  # x, y, w: columns of by_group's records, read in place
        for arena in np.unique(slots[slots >= 0] // ARENA_WINDOWS):
            cells, expo, origin = self.arenas[arena]
            mine = np.where(slots // ARENA_WINDOWS == arena, slots % ARENA_WINDOWS, -1)
            self._kernel.add_segments(
                x, y, w if weighted else np.zeros(1), weighted, starts, mine.astype(np.int64),
                cells, expo, origin, self.cos_t, self.sin_t,
            )  # fmt: skip

    def merge(self, other: OnePass, codes: np.ndarray, n_groups: int) -> OnePass:
        """Add ``other``'s points into this state (which it changes and returns).

        ``other`` (same tolerance and method) coded its groups its own way: its group ``i`` is
        group ``codes[i]`` here, among ``n_groups`` (the union of both; distinct codes). Per
        group, counts and weights add and pair weight gains the pairs across the two,
        ``W_here·W_there``. Windows merge on common bins (:func:`dyadic.merge_windows`); a
        group binned in one state and kept in the other gets a window here and its kept points
        binned; kept in both, its points join, and it is binned when that makes it larger than
        the exact-sums size, as :meth:`add` does. The result is the state of all the points
        added in one run, up to the window's exponent and the order of additions, and keeps
        the same guarantee (docs/scale.md section 2).

        Raises :class:`TooLarge` when the windows or the kept points outgrow their limits.
        """
        if (other.tolerance, other.method) != (self.tolerance, self.method):
            raise ValueError("only states of the same tolerance and method merge")
        codes = np.asarray(codes, dtype=np.int64)[: other.n_groups]
        self._grow_groups(n_groups)
        if other.weighted is None:  # no point added there
            return self
        if self.weighted is None:
            self.weighted = other.weighted
        elif self.weighted != other.weighted:
            raise ValueError("only states of weighted points, or of unweighted ones, merge")
        self.pair_weight[codes] += other.pair_weight + self.weight_sum[codes] * other.weight_sum
        self.weight_sum[codes] += other.weight_sum
        self.count[codes] += other.count
        self.size_sum[codes] += other.size_sum
        # groups binned there: a window here (taking the points kept here), then the windows add
        there = np.flatnonzero(other.slot >= 0)
        here = codes[there]
        opened = here[self.slot[here] < 0]
        self.dense[opened] = False
        self._promote(opened)
        self._merge_windows(self.slot[here], other, other.slot[there])
        # points kept there: into the windows here, else kept here too
        dense = codes[other.dense & (other.slot < 0)]
        self.dense[dense[self.slot[dense] < 0]] = True
        x, y, w, g = other._kept_arrays()
        if x.size:
            x, y, w, counts, present, starts = _in_group_order(x, y, w, codes[g], self.n_groups)
            self._bin(x, y, w, starts, self.slot[present])
            unbinned = self.slot[present] < 0
            left = np.repeat(unbinned, counts[present])
            g = np.repeat(present[unbinned], counts[present[unbinned]])
            self.kept.append((x[left], y[left], None if w is None else w[left], g))
        promoted = np.flatnonzero((self.slot < 0) & ~self.dense & (self.count > self.gather))
        moved = self._promote(promoted)
        self._demote(self._too_dense(promoted), moved)
        if sum(part[0].size for part in self.kept) > GATHER_POINTS:
            raise TooLarge("too many points kept for exact sums")
        return self

    def _merge_windows(self, slots: np.ndarray, other: OnePass, other_slots: np.ndarray) -> None:
        """Add the windows of ``other_slots`` there into those of ``slots`` here (read in
        place: a copy of every window would cost as much as the merge)."""
        if slots.size == 0:
            return
        if other.bins != self.bins:
            raise ValueError("only windows of the same number of bins merge")
        here, there = slots // ARENA_WINDOWS, other_slots // ARENA_WINDOWS
        for a in np.unique(here):
            for b in np.unique(there[here == a]):
                pair = (here == a) & (there == b)
                self._kernel.merge_windows(
                    *self.arenas[a], np.where(pair, slots % ARENA_WINDOWS, -1),
                    *other.arenas[b], np.where(pair, other_slots % ARENA_WINDOWS, -1),
                )  # fmt: skip

    def __getstate__(self) -> dict:
        """What travels between processes: the bins that hold points, of the windows handed out
        (a bin with no point holds zeros; most bins are empty until a group has several points
        per bin), the kept points as one array each, and no compiled module."""
        state = {k: v for k, v in vars(self).items() if k not in ("_kernel", "arenas", "cos_t", "sin_t")}
        state["arenas"] = [self._packed(a) for a in range(len(self.arenas)) if a * ARENA_WINDOWS < self.used]
        state["kept"] = [self._kept_arrays()] if self.kept else []
        return state

    def _packed(self, a: int) -> tuple:
        """Arena ``a`` up to the last window handed out: exponents, origins, which bins hold
        points (one bit each) and those bins' sums."""
        cells, expo, origin = (part[: min(ARENA_WINDOWS, self.used - a * ARENA_WINDOWS)] for part in self.arenas[a])
        held = cells[..., cells.shape[-1] - 1 if cells.shape[-1] == 4 else 0] > 0.0
        return expo, origin, held.shape, np.packbits(held, axis=None), cells[held]

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._kernel = compiled_module("dyadic")
        self.cos_t, self.sin_t = directions_unit_vectors(self.m)
        for a, (expo, origin, shape, bits, sums) in enumerate(state["arenas"]):
            arena = self._kernel.new_windows(ARENA_WINDOWS, self.m, self.bins, bool(self.weighted))
            held = np.unpackbits(bits, count=int(np.prod(shape))).reshape(shape).view(bool)
            arena[0][: shape[0]][held] = sums
            arena[1][: shape[0]], arena[2][: shape[0]] = expo, origin
            self.arenas[a] = arena

    def finish(self) -> GroupPairSums:
        """Every group's total and guaranteed interval (groups in code order).

        Marks in :attr:`over_budget` the binned groups whose in-bin uncertainty is above their
        budget: their intervals are still guaranteed, but wider than the tolerance asked for.
        """
        from .sums import _Table, pair_sums

        n = self.n_groups
        self.over_budget = np.zeros(n, dtype=bool)
        out = _Table(n)
        kept = self.slot < 0
        x, y, w, g = self._kept_arrays()
        if x.size:
            method = "exact" if self.method == "exact" else "auto"
            r = pair_sums(Points.build(x, y, g, n, w), tolerance=self.tolerance, method=method)
            for name in ("total", "lower", "upper", "rel_bound", "exact", "directions"):
                getattr(out, name)[kept] = getattr(r, name)[kept]
        budget = bin_budget(self.tolerance, self.m)
        live = np.flatnonzero((~kept) & (self.pair_weight > 0))
        exact, uncertain, fullest = self._window_sums(live)
        exact, uncertain = exact.sum(axis=1), np.maximum(uncertain.sum(axis=1), 0.0)
        self.over_budget[live] = uncertain > budget * exact
        for k, group in enumerate(live):
            # rounding as in the planned state, with |p| ≤ |x| + |y| for the uncentred values,
            # and each value's own rounding (≤ 2u(|x| + |y|)) added per direction
            chain = 2.0 * self.bins + 8.0 + float(fullest[k].max())
            slack = self.m * (2 * chain + 8) * UNIT_ROUNDOFF * self.weight_sum[group] * self.size_sum[group]
            raw = Raw(float(exact[k]), self.m, absolute=slack, uncertain=float(uncertain[k]))
            out.put(group, *interval(raw), exact=False, directions=self.m)
        return GroupPairSums(
            n_points=self.count.copy(),
            weight_sum=self.weight_sum.copy(),
            pair_weight=self.pair_weight.copy(),
            **out.columns(),
        )
