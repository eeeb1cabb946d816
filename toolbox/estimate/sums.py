"""Points in, sums with guaranteed intervals out; the planar / geodesic choice is made here once.

:func:`pair_sums` (per group), :func:`point_sums` (per point) and :func:`cross_sums` (per pair of
groups) take :class:`~toolbox.estimate.Points`. Planar points go to the kernels directly: per
group, exact sums where they are cheaper (``auto``), else the projection estimate. Geodesic
points get, per group, exact geodesic sums or a local AEQD projection whose distortion is folded
into the planar interval (:mod:`toolbox.estimate.frames`). A group that cannot be computed as
asked gets NaN sums and a note saying why and what to do; the others are computed as usual.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from .. import kernels
from ..errors import ParameterError, spell
from ..kernels import GroupLayout, Raw, Ticker, costs
from . import pieces
from .frames import local_frame
from .interval import (
    bin_budget,
    check_method,
    directions_for_tolerance,
    fold_distortion,
    forward_slack,
    interval,
    planar_tolerance,
    projection_directions,
)
from .points import Points
from .results import CrossPairSums, GroupPairSums, PointSums

__all__ = [
    "EXACT_FALLBACK_POINTS",
    "MIN_PLANAR_SHARE",
    "pair_sums",
    "point_sums",
    "cross_sums",
    "check_cross_groups",
]

#: largest group that gets exact geodesic sums when no local projection is good enough
#: (about 2e8 pairs, a few minutes at ~1 µs per pair)
EXACT_FALLBACK_POINTS = 20_000
#: a local projection is used only if it leaves at least this share of the tolerance to the
#: planar estimate (otherwise its directions would grow without limit)
MIN_PLANAR_SHARE = 0.01


class _Table:
    """Result columns under construction, NaN (no pairs) until an entry is put."""

    def __init__(self, shape):
        self.total, self.lower, self.upper, self.rel_bound = (np.full(shape, np.nan) for _ in range(4))
        self.exact = np.zeros(shape, dtype=bool)
        self.directions = np.zeros(shape, dtype=np.int64)
        self.note = np.full(shape, "", dtype=object)

    def put(self, index, est, lo, hi, bound, *, exact, directions) -> None:
        self.total[index], self.lower[index], self.upper[index], self.rel_bound[index] = est, lo, hi, bound
        self.exact[index], self.directions[index] = exact, directions

    def put_raw(self, index, raw: Raw) -> None:
        self.put(index, *interval(raw), exact=raw.directions == 0, directions=raw.directions)

    def clear(self, mask) -> None:
        for column in (self.total, self.lower, self.upper, self.rel_bound):
            column[mask] = np.nan
        self.exact[mask] = False

    def columns(self, unsort=lambda v: v) -> dict:
        names = ("total", "lower", "upper", "rel_bound", "exact", "directions", "note")
        return {name: unsort(getattr(self, name)) for name in names}


class _Stages:
    """Progress over several kernel calls: each call reports into its own share of the total."""

    def __init__(self, progress, total):
        self.progress, self.total, self.base = progress, max(int(total), 1), 0

    def stage(self, span):
        base, span = self.base, int(span)
        self.base += span
        if self.progress is None:
            return None

        def report(done, total):
            self.progress(base + (span * done // total if total else span), self.total)

        return report


def _split(counts, live, m, method, weighted):
    """Which live groups get exact planar sums (m == 0 means exact)."""
    if m == 0:
        use_exact = np.ones(live.size, dtype=bool)
    elif method == "projection":
        use_exact = np.zeros(live.size, dtype=bool)
    else:
        n = counts[live].astype(np.float64)
        use_exact = costs.exact(n) <= costs.projection(n, m, weighted)
    return live[use_exact], live[~use_exact]


# --------------------------------------------------------------------------------------------
# planar


def _planar_pairs(lay, live, tolerance, method, progress, threads) -> _Table:
    m = check_method(method, tolerance)
    if m and kernels.has_compiled():
        m = projection_directions(tolerance)
    exact, projected = _split(lay.counts, live, m, method, lay.w is not None)
    tick = Ticker(progress, lay.counts[exact].sum() + m * lay.counts[projected].sum())
    out = _Table(lay.n_groups)
    if exact.size:
        out.put_raw(exact, kernels.exact_pair_raw(lay, exact, tick))
    if projected.size:
        out.put_raw(projected, kernels.projected_pair_raw(lay, projected, m, bin_budget(tolerance, m), tick, threads))
        # The rounding allowance is written for the worst case; should it still push a bound
        # over the tolerance, those groups are summed again with a wider margin.
        over = projected[out.rel_bound[projected] > tolerance]
        if over.size:
            m2 = directions_for_tolerance(tolerance * 0.9)
            raw = kernels.projected_pair_raw(lay, over, m2, bin_budget(tolerance, m2), Ticker(None, 0), threads)
            out.put_raw(over, raw)
    return out


def _planar_points(lay, live, tolerance, method, progress) -> _Table:
    m = check_method(method, tolerance)
    exact, projected = _split(lay.counts, live, m, method, lay.w is not None)
    tick = Ticker(progress, lay.counts[exact].sum() + m * lay.counts[projected].sum())
    out = _Table(lay.x.size)
    if exact.size:
        mask = np.isin(lay.codes, exact)
        out.put_raw(mask, kernels.exact_point_raw(lay, exact, tick).take(mask))
    if projected.size:
        mask = np.isin(lay.codes, projected)
        out.put_raw(mask, kernels.projected_point_raw(lay, projected, m, tick).take(mask))
    return out


# --------------------------------------------------------------------------------------------
# geodesic: a plan of exact groups, projected groups and refused ones


def _too_wide(what, n, frame, tolerance, smaller=None) -> str:
    """The note of a group (or set) refused: why, and what to do, in the caller's words."""
    smaller = smaller or f"split it into smaller groups ({spell('group_by')})"
    if not frame.usable:
        why = f"{what} {frame.reason}, so no local projection gives it a useful bound"
        fix = smaller
    else:
        needed = 2 * frame.distortion
        why = (
            f"the local projection of {what} ({frame.radius_m / 1000:.0f} km from its centre to "
            f"its farthest point) alone distorts distances by up to {frame.distortion:.2g}, which "
            f"leaves too little of the tolerance {tolerance:g}"
        )
        fix = (f"use a tolerance of at least {needed:.2g} or " if needed <= 0.5 else "") + smaller
    return (
        f"Geodesic sums: {why}, and its {n} points are too many for exact geodesic sums (at most "
        f"{EXACT_FALLBACK_POINTS}); {fix}, or pass {spell('method', 'exact')} (about {n * (n - 1) / 2e6:.3g} s "
        "at ~1 µs per pair)."
    )


def _exact_geodesic_cheaper(n, m, cost_factor):
    """Whether exact geodesic sums cost less than a local projection plus the planar kernel."""
    return costs.exact_geodesic(n) <= costs.FRAME + cost_factor * costs.planar(n, m)


class _GeodesicPlan:
    """Per live group: exact geodesic sums, a local projection, or a note (refused)."""

    def __init__(self, points, lay, live, tolerance, method, cost_factor):
        a, f = points.distance.a, points.distance.f
        counts = lay.counts
        n_groups = lay.n_groups
        self.k_min, self.k_max = np.ones(n_groups), np.ones(n_groups)
        self.planar = np.zeros(n_groups)
        self.x, self.y = np.full(lay.x.size, np.nan), np.full(lay.x.size, np.nan)
        self.notes: dict[int, str] = {}
        m0 = check_method(method, tolerance)
        if m0 == 0:
            self.exact, self.projected = live, live[:0]
            return
        cheap = np.zeros(live.size, dtype=bool)
        if method == "auto":  # exact is cheaper even before the (larger) directions are known
            cheap = _exact_geodesic_cheaper(counts[live], m0, cost_factor)
        exact, projected = list(live[cheap]), []
        for g in live[~cheap]:
            sl = slice(lay.starts[g], lay.starts[g] + counts[g])
            frame = local_frame(lay.x[sl], lay.y[sl], a, f)
            planar = planar_tolerance(tolerance, frame.k_min, frame.k_max) if frame.usable else 0.0
            if not frame.usable or planar < MIN_PLANAR_SHARE * tolerance:
                if counts[g] <= EXACT_FALLBACK_POINTS:
                    exact.append(g)
                else:
                    self.notes[int(g)] = _too_wide(points.name(g), int(counts[g]), frame, tolerance)
                continue
            m = directions_for_tolerance(planar)
            if method == "auto" and _exact_geodesic_cheaper(counts[g], m, cost_factor):
                exact.append(g)
                continue
            self.x[sl], self.y[sl] = frame.x, frame.y
            self.k_min[g], self.k_max[g], self.planar[g] = frame.k_min, frame.k_max, planar
            projected.append(g)
        self.exact = np.array(sorted(exact), dtype=np.int64)
        self.projected = np.array(projected, dtype=np.int64)

    def buckets(self, lay, threads=None):
        """Projected groups by the directions their planar tolerance needs: (members, tolerance,
        the planar layout of their projected points, the mask of those points in ``lay``);
        ``threads`` bounds the threads of those layouts."""
        if self.projected.size == 0:
            return
        dirs = np.array([directions_for_tolerance(float(self.planar[g])) for g in self.projected])
        for m in np.unique(dirs):
            members = self.projected[dirs == m]
            sel = np.isin(lay.codes, members)
            w = None if lay.w is None else lay.w[sel]
            sub = GroupLayout.build(self.x[sel], self.y[sel], lay.codes[sel], lay.n_groups, w, threads=threads)
            yield members, float(self.planar[members].min()), sub, sel

    def refuse(self, out: _Table, index_of) -> None:
        for g, note in self.notes.items():
            out.note[index_of(g)] = note


def _layout(points, threads=None):
    """Whether the points are geodesic, and their group layout (planar ones centred per group)."""
    geodesic = points.distance.kind == "geodesic"
    lay = GroupLayout.build(
        points.x, points.y, points.groups, points.n_groups, points.weights, centred=not geodesic, threads=threads
    )
    return geodesic, lay


# --------------------------------------------------------------------------------------------
# the three sums


def pair_sums(
    points: Points, *, tolerance: float = 0.01, method: str = "auto", progress=None, threads: int | None = None
) -> GroupPairSums:
    """Total pair distance ``Σ_{i<j} w_i w_j d_ij`` of every group, with guaranteed intervals.

    Parameters
    ----------
    points : Points
        Coordinates, groups, weights and the distance kind.
    tolerance : float
        Guaranteed relative error of each total, in [0, 0.5]; 0 means exact. For geodesic
        distances it covers the local projection too.
    method : {"auto", "exact", "projection"}
        ``auto`` picks, per group, exact sums where they are cheaper.
    progress : callable, optional
        Called as ``progress(done, total)`` as work is finished.
    threads : int, optional
        Threads for the projection estimate (default: every core).

    Returns
    -------
    GroupPairSums
        One entry per group; a group that cannot be computed as asked has NaN sums and a note.

    Examples
    --------
    >>> r = pair_sums(Points.build([0, 1, 0, 0, 3], [0, 0, 0, 4, 0], [0, 0, 1, 1, 1]))
    >>> r.total.tolist(), r.method.tolist()
    ([1.0, 12.0], ['exact', 'exact'])
    >>> r = pair_sums(Points.build([0, 0, 0.01], [0, 0.01, 0], distance="geodesic"), tolerance=0)
    >>> round(float(r.total[0]), 3)
    3787.972
    """
    if points.shift is not None:  # samples of pieces of features: the model's allowance widens them
        # half the tolerance for the samples' sums, half for the allowance (the default fill
        # spacing is chosen for that)
        plain = pair_sums(replace(points, shift=None), tolerance=tolerance / 2, method=method, progress=progress, threads=threads)
        return pieces.widen_pairs(plain, points)
    check_method(method, tolerance)
    geodesic, lay = _layout(points, threads)
    counts = lay.counts
    pair_weight = lay.pair_weight()
    live = np.flatnonzero((counts >= 2) & (pair_weight > 0))
    if not geodesic:
        out = _planar_pairs(lay, live, tolerance, method, progress, threads)
    else:
        out = _Table(lay.n_groups)
        plan = _GeodesicPlan(points, lay, live, tolerance, method, 1.0)
        plan.refuse(out, lambda g: g)
        stages = _Stages(progress, counts[live].sum())
        a, f = points.distance.a, points.distance.f
        if plan.exact.size:
            n = counts[plan.exact]
            tick = Ticker(stages.stage(n.sum()), int((n * (n - 1) // 2).sum()))
            out.put_raw(plan.exact, kernels.exact_geodesic_pair_raw(lay, plan.exact, a, f, tick))
        for g, planar, sub, _ in plan.buckets(lay, threads):
            r = _planar_pairs(sub, g, planar, method, stages.stage(counts[g].sum()), threads)
            slack = forward_slack(a, pair_weight[g])
            folded = fold_distortion(r.total[g], r.lower[g], r.upper[g], plan.k_min[g], plan.k_max[g], slack)
            out.put(g, *folded, exact=False, directions=r.directions[g])
    return GroupPairSums(n_points=counts, weight_sum=lay.weight_sum, pair_weight=pair_weight, **out.columns())


def point_sums(
    points: Points, *, tolerance: float = 0.01, method: str = "auto", progress=None, threads: int | None = None
) -> PointSums:
    """Weighted distance sum ``Σ_j w_j d_ij`` from every point to the rest of its group.

    Parameters are those of :func:`pair_sums` (``threads`` bounds the threads of the group
    layout; the per-point sums are numpy's).

    Returns
    -------
    PointSums
        One entry per point, in input order.

    Examples
    --------
    >>> r = point_sums(Points.build([0, 3, 0], [0, 0, 4]), tolerance=0)
    >>> r.total.tolist()  # 3-4-5 triangle: each vertex's two sides
    [7.0, 8.0, 9.0]
    """
    if points.shift is not None:
        raise ParameterError("Samples of pieces of features have no per-point sums of their own; use feature_sums.")
    check_method(method, tolerance)
    geodesic, lay = _layout(points, threads)
    counts = lay.counts
    other = lay.other_weight()
    # a zero-weight point beside one weighted point still has a distance to it
    live = np.flatnonzero((counts >= 2) & (lay.weight_sum > 0))
    if not geodesic:
        out = _planar_points(lay, live, tolerance, method, progress)
    else:
        out = _Table(lay.x.size)
        plan = _GeodesicPlan(points, lay, live, tolerance, method, 2.0)
        plan.refuse(out, lambda g: lay.codes == g)
        stages = _Stages(progress, counts[live].sum())
        a, f = points.distance.a, points.distance.f
        if plan.exact.size:
            n = counts[plan.exact]
            tick = Ticker(stages.stage(n.sum()), int((n * (n - 1) // 2).sum()))
            mask = np.isin(lay.codes, plan.exact)
            out.put_raw(mask, kernels.exact_geodesic_point_raw(lay, plan.exact, a, f, tick).take(mask))
        for g, planar, sub, sel in plan.buckets(lay, threads):
            r = _planar_points(sub, g, planar, method, stages.stage(counts[g].sum()))
            codes = sub.codes
            slack = forward_slack(a, sub.other_weight())
            folded = fold_distortion(r.total, r.lower, r.upper, plan.k_min[codes], plan.k_max[codes], slack)
            out.put(sel, *folded, exact=False, directions=r.directions)
    out.clear(~(other > 0))  # a point with no other weighted point has no mean distance
    return PointSums(other_weight=lay.unsort(other), **out.columns(lay.unsort))


def cross_sums(
    points: Points, *, tolerance: float = 0.01, method: str = "auto", progress=None, threads: int | None = None
) -> CrossPairSums:
    """Total distance between the points of every pair of groups, with guaranteed intervals.

    Parameters are those of :func:`pair_sums`; ``auto`` takes exact sums when they are cheaper
    for the whole set.

    Returns
    -------
    CrossPairSums
        G × G matrices; the diagonal holds each group's own pair total.

    Examples
    --------
    >>> r = cross_sums(Points.build([0, 1, 4, 4], [0, 0, 0, 3], [0, 0, 1, 1]), tolerance=0)
    >>> r.total[[0, 1, 0], [1, 0, 0]].round(6).tolist()  # 4 + 5 + 3 + √18 both ways; group 0's pair
    [16.242641, 16.242641, 1.0]
    """
    if points.shift is not None:  # samples of pieces of features: the model's allowance widens them
        # half the tolerance for the samples' sums, half for the allowance (the default fill
        # spacing is chosen for that)
        plain = cross_sums(replace(points, shift=None), tolerance=tolerance / 2, method=method, progress=progress, threads=threads)
        return pieces.widen_cross(plain, points)
    m = check_method(method, tolerance)
    n_groups, n = points.n_groups, points.x.size
    check_cross_groups(n_groups)
    w = points.weight_array()
    if points.distance.kind == "geodesic":
        return _geodesic_cross(points, tolerance, method, m, progress, threads)
    within = pair_sums(points, tolerance=tolerance, method=method, threads=threads)
    use_exact = m == 0 or (method == "auto" and costs.exact(n) <= costs.cross_projection(n, n_groups, m, kernels.has_compiled()))
    cx, cy = kernels.centre(points.x, points.y, np.zeros(n, dtype=np.int64), 1, w)
    tick = Ticker(progress, n if use_exact else m * n)
    out = _Table((n_groups, n_groups))
    if use_exact:
        out.put_raw(..., kernels.exact_cross_raw(cx, cy, points.groups, n_groups, w, tick))
    else:
        out.put_raw(..., kernels.projected_cross_raw(cx, cy, points.groups, n_groups, w, m, tick, threads))
        _exact_where_rounding_dominates(points, w, tolerance, out)
    return _cross_result(within, out)


def check_cross_groups(n_groups: int) -> None:
    """Refuse more groups than a G × G result can hold comfortably."""
    if n_groups > kernels.MAX_CROSS_GROUPS:
        raise ParameterError(
            f"{n_groups} groups would make a {n_groups} × {n_groups} result; at most "
            f"{kernels.MAX_CROSS_GROUPS} groups are supported. Group by fewer or coarser fields."
        )


def _exact_where_rounding_dominates(points, w, tolerance, out: _Table) -> None:
    """Recompute exactly the entries whose rounding allowance pushed them over the tolerance.

    The allowance is written in the radius of the whole set, so two tight clusters far from
    the rest can get a bound above the tolerance although their estimate is fine; an exact
    sum over just those two groups settles it (when it costs under 1e8 pairs).
    """
    groups = points.groups
    counts = np.bincount(groups, minlength=points.n_groups)
    for a, b in np.argwhere(np.triu(out.rel_bound > tolerance, 1)):
        if counts[a] * counts[b] > 1e8:
            continue
        ia, ib = np.flatnonzero(groups == a), np.flatnonzero(groups == b)
        sub = np.concatenate([ia, ib])
        codes = np.concatenate([np.zeros(ia.size, np.int64), np.ones(ib.size, np.int64)])
        cx, cy = kernels.centre(points.x[sub], points.y[sub], np.zeros(sub.size, np.int64), 1, w[sub])
        raw = kernels.exact_cross_raw(cx, cy, codes, 2, w[sub], Ticker(None, 0)).take((0, 1))
        for index in ((a, b), (b, a)):
            out.put_raw(index, raw)


def _geodesic_cross(points, tolerance, method, m0, progress, threads) -> CrossPairSums:
    """One local projection covers all the points; its distortion is folded into every entry."""
    n, n_groups = points.x.size, points.n_groups
    a, f = points.distance.a, points.distance.f
    use_exact = m0 == 0 or (
        method == "auto" and costs.exact_geodesic(n) <= costs.cross_geodesic_projection(n, m0)
    )
    out = _Table((n_groups, n_groups))
    if not use_exact:
        frame = local_frame(points.x, points.y, a, f)
        planar = planar_tolerance(tolerance, frame.k_min, frame.k_max) if frame.usable else 0.0
        if not frame.usable or planar < MIN_PLANAR_SHARE * tolerance:
            if n > EXACT_FALLBACK_POINTS:
                out.note[...] = _too_wide(
                    "the combined set of points",
                    n,
                    frame,
                    tolerance,
                    smaller=f"compare groups that lie closer together ({spell('where')})",
                )
                # each group on its own may still be fine: the diagonal comes from its own frame
                within = pair_sums(points, tolerance=tolerance, method=method, threads=threads)
                _without_refused(points, within, out, tolerance, method, m0, threads)
                return _cross_result(within, out)
            use_exact = True
    if use_exact:
        _, lay = _layout(points, threads)
        tick = Ticker(progress, n * (n - 1) // 2)
        out.put_raw(..., kernels.exact_geodesic_cross_raw(lay, a, f, tick))
        return _cross_result(None, out, points, threads)
    planar_points = Points.build(frame.x, frame.y, points.groups, n_groups, points.weights)
    r = cross_sums(planar_points, tolerance=planar, method=method, progress=progress, threads=threads)
    folded = fold_distortion(r.total, r.lower, r.upper, frame.k_min, frame.k_max, forward_slack(a, r.pair_weight))
    out.put(..., *folded, exact=False, directions=r.directions)
    out.clear(np.isnan(r.total))
    return _cross_result(None, out, points, threads)


def _without_refused(points, within, out: _Table, tolerance, method, m0, threads) -> None:
    """Groups refused on their own sink only their own rows: the others are compared without them.

    Their rows get their own note; the pairs of the other groups come from the same geodesic
    cross sums over those groups alone (which may still be too wide together: then they keep
    the note of the combined set).
    """
    refused = np.flatnonzero(np.asarray(within.note, dtype=bool))
    kept = np.setdiff1d(np.arange(points.n_groups), refused)
    for g in refused:
        out.note[g, :] = out.note[:, g] = within.note[g]
    if refused.size == 0 or kept.size == 0:
        return
    code_of = np.full(points.n_groups, -1, dtype=np.int64)
    code_of[kept] = np.arange(kept.size)
    sel = np.isin(points.groups, kept)
    sub = Points.build(
        points.x[sel], points.y[sel], code_of[points.groups[sel]], kept.size,
        None if points.weights is None else points.weights[sel], distance=points.distance,
        names=lambda code: points.name(kept[code]),
    )  # fmt: skip
    r = _geodesic_cross(sub, tolerance, method, m0, None, threads)
    block = np.ix_(kept, kept)
    for name in ("total", "lower", "upper", "rel_bound", "exact", "directions", "note"):
        getattr(out, name)[block] = getattr(r, name)


def _cross_result(within, out: _Table, points=None, threads=None) -> CrossPairSums:
    """The G × G result; the diagonal from ``within`` (each group's own pair sums) if given."""
    if within is None:
        lay = GroupLayout.build(
            np.zeros(points.x.size), np.zeros(points.x.size), points.groups, points.n_groups, points.weights,
            threads=threads,
        )  # fmt: skip
        n_points, weight_sum, own = lay.counts, lay.weight_sum, lay.pair_weight()
    else:
        n_points, weight_sum, own = within.n_points, within.weight_sum, within.pair_weight
    pair_weight = np.outer(weight_sum, weight_sum)
    diag = np.arange(weight_sum.size)
    pair_weight[diag, diag] = own
    if within is not None:
        for name in ("total", "lower", "upper", "rel_bound", "exact", "directions", "note"):
            getattr(out, name)[diag, diag] = getattr(within, name)
    out.clear(~(pair_weight > 0))
    return CrossPairSums(n_points=n_points, weight_sum=weight_sum, pair_weight=pair_weight, **out.columns())
