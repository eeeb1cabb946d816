"""Cross sums between groups from the mergeable state: every group binned on common bins.

For two groups A ≠ B the cross total ``C_AB = Σ_{a∈A, b∈B} w_a w_b d_ab`` needs, along each
direction, the order of A's points among B's. When both are binned on the *same* bins, pairs
in different bins are ordered, so their sum comes from the bin arrays alone:
``Σ_b S_A,b W_B,<b − W_A,b S_B,<b`` (A's point later) plus the same with A and B swapped, for
every pair of groups at once by two matrix products per direction. Pairs in one bin lie at
most the bin's spread of values apart: ``W_A,b·W_B,b·spread_b`` of uncertainty, as for the pair
state. So :func:`cross_plan` gives every group the same frame (one centre, one radius, one set
of bins per direction, from the survey of all the points together), :meth:`Plan.accumulate`
fills an ordinary :class:`~.state.State` batch by batch or partition by partition, states merge
by addition, and :func:`cross_finish` turns the merged state into G × G intervals through the
shared interval arithmetic (:mod:`.interval`), with the frame's distortion folded in for
geodesic points (one local projection for all, as the in-memory path does).

An entry whose in-bin uncertainty leaves its bound above the tolerance (two groups packed into
the same few bins) is recomputed in a further pass from just those groups' points, when they
are few enough to gather (:func:`gather_groups`); the in-memory estimator then sums them.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, replace

import numpy as np

from ..kernels import UNIT_ROUNDOFF, Raw
from .interval import fold_distortion, forward_slack, interval
from .points import Points
from .results import CrossPairSums, GroupPairSums
from .state import (
    MAX_BINS,
    ROUTE_BINS,
    ROUTE_GATHER,
    ROUTE_NONE,
    Plan,
    State,
    Survey,
    _fingerprint,
    _Gathered,
    _prefix,
)

__all__ = [
    "CrossPlan",
    "cross_plan",
    "cross_finish",
    "gather_groups",
    "table",
    "cross_result",
    "CROSS_STATE_CELLS",
    "GATHER_PAIRS",
]

#: most cells (groups × directions × bins) of a cross state: 48 bytes each, about 200 MB
CROSS_STATE_CELLS = 1 << 22
#: an entry over its tolerance is recomputed from its groups' points if they make at most this
#: many pairs (the in-memory estimator's limit for exact cross sums of two groups)
GATHER_PAIRS = 10**8
#: and if the gathered points of all such groups number at most this many
GATHER_POINTS = 5_000_000


def _together(survey: Survey) -> Survey:
    """The survey of all the points as one group."""
    filled = survey.count > 0
    lo = survey.lo[filled].min(axis=0) if filled.any() else np.full(3, np.inf)
    hi = survey.hi[filled].max(axis=0) if filled.any() else np.full(3, -np.inf)
    weight = float(survey.weight_sum.sum())
    pair = float(survey.pair_weight.sum()) + (weight**2 - float((survey.weight_sum**2).sum())) / 2
    return replace(
        survey,
        n_groups=1,
        count=np.array([int(survey.count.sum())]),
        weight_sum=np.array([weight]),
        pair_weight=np.array([max(pair, 0.0)]),
        sums=survey.sums.sum(axis=0, keepdims=True),
        lo=lo[None, :],
        hi=hi[None, :],
    )


@dataclass(frozen=True)
class CrossPlan:
    """The common frame of every group: a :class:`~.state.Plan` whose groups share one centre,
    radius, directions and bins (``plan``; ``route`` is 2 for every group with points), or,
    when ``gather`` is set, every point gathered for the in-memory estimator (tolerance 0,
    ``exact``, or a geodesic set too wide for one local projection but small enough for exact
    sums). ``note`` says why no entry can be computed (a geodesic set too wide and too large)."""

    plan: Plan
    gather: bool
    note: str

    @property
    def binned(self) -> bool:
        return not self.gather and not self.note


def cross_plan(survey: Survey, *, tolerance: float, method: str = "projection") -> CrossPlan:
    """The common bins for the cross sums of the surveyed groups.

    The frame and the directions are those the pair state would give all the points as one
    group (:meth:`Survey.plan`); the bins per direction are at least as many as that group
    would get, up to two per point, at most :data:`~.state.MAX_BINS` and at most
    :data:`CROSS_STATE_CELLS` over all groups and directions (but never fewer than 16).

    Examples
    --------
    >>> pts = Points.build([0, 1, 5, 6], [0, 0, 0, 0], [0, 0, 1, 1])
    >>> cp = cross_plan(Survey.of(pts), tolerance=0.01)
    >>> int(cp.plan.directions[0]), int(cp.plan.bins[0]) == int(cp.plan.bins[1]), cp.binned
    (8, True, True)
    """
    method = "exact" if method == "exact" or tolerance == 0 else "projection"
    one = _together(survey).plan(
        tolerance=tolerance, method=method, names=lambda g: "the combined set of points"
    )
    n_groups = survey.n_groups
    route = int(one.route[0])
    if route != ROUTE_BINS:
        plan = _spread(one, survey, np.zeros(n_groups, np.int8), 0)
        return CrossPlan(plan, route == ROUTE_GATHER, str(one.note[0]))
    m = int(one.directions[0])
    # the common frame is coarse for a group much smaller than all the points together: as many
    # bins as the cap allows (up to two per point), not just those the tolerance asks for
    cap = 2 ** int(np.floor(np.log2(max(CROSS_STATE_CELLS // max(n_groups * m, 1), 16))))
    wanted = max(int(one.bins[0]), 2 ** int(np.ceil(np.log2(max(2 * int(survey.count.sum()), 16)))))
    bins = int(min(wanted, cap, MAX_BINS))
    routes = np.where(survey.count > 0, ROUTE_BINS, ROUTE_NONE).astype(np.int8)
    return CrossPlan(_spread(one, survey, routes, bins), False, "")


def _spread(one: Plan, survey: Survey, route: np.ndarray, bins: int) -> Plan:
    """The one-group plan ``one`` given to every group of ``survey`` (the same frame for all)."""
    n = survey.n_groups
    live = route == ROUTE_BINS

    def each(values):
        return np.repeat(values[:1], n, axis=0)

    directions = np.where(live, one.directions[0], 0).astype(np.int64)
    per_group = np.where(live, bins, 0).astype(np.int64)
    cells = directions * per_group
    plan = Plan(
        survey, one.tolerance, one.method, route, np.full(n, "", dtype=object), each(one.centre),
        each(one.radius), each(one.k_min), each(one.k_max), each(one.planar), directions, per_group,
        np.concatenate([[0], np.cumsum(cells)[:-1]]).astype(np.int64), int(cells.sum()),
    )  # fmt: skip
    return replace(plan, key=_fingerprint(plan))


def _layout(plan: Plan, state: State):
    """W, S and the common spread of values per direction and bin: (G, m, B), (G, m, B), (m, B)."""
    live = np.flatnonzero(plan.route == ROUTE_BINS)
    m, b = int(plan.directions[live[0]]), int(plan.bins[live[0]])
    n = plan.n_groups
    W, S, C = (np.zeros((n, m, b)) for _ in range(3))
    lo, hi = np.full((n, m, b), np.inf), np.full((n, m, b), -np.inf)
    for k, target in enumerate((W, S, None, C)):
        if target is not None:
            target[live] = state.cells[k].reshape(live.size, m, b)
    lo[live] = state.bounds[0].reshape(live.size, m, b)
    hi[live] = state.bounds[1].reshape(live.size, m, b)
    low, high = lo.min(axis=0), hi.max(axis=0)
    spread = np.where(np.isfinite(low) & np.isfinite(high), high - low, 0.0)
    return W, S, C, spread


def cross_finish(state: State, cross: CrossPlan) -> tuple[np.ndarray, ...]:
    """G × G estimates, bounds and relative bounds of the cross totals between different groups.

    Returns ``(total, lower, upper, rel_bound, directions)``; the diagonal is NaN (a group's own
    pair total comes from the pair state), as are entries of groups without points.
    """
    plan = cross.plan
    survey = plan.survey
    n = plan.n_groups
    nan = np.full((n, n), np.nan)
    live = plan.route == ROUTE_BINS
    if not live.any():
        return nan, nan.copy(), nan.copy(), nan.copy(), np.zeros((n, n), np.int64)
    W, S, C, spread = _layout(plan, state)
    m, b = spread.shape
    exact, uncertain = np.zeros((n, n)), np.zeros((n, n))
    for d in range(m):
        w, s = W[:, d, :], S[:, d, :]
        # [A, B]: pairs with A's point in a later bin than B's, each w_a w_b (p_a − p_b) ≥ 0
        half = s @ _prefix(w).T - w @ _prefix(s).T
        exact += half + half.T
        uncertain += (w * spread[d]) @ w.T  # pairs sharing a bin: 0 to its spread apart
    # Rounding: each entry's sums are bounded by W_A·Σ_B w r + W_B·Σ_A w r per direction and
    # built from chains of at most 2B + 8 + (points in a bin) additions, as in the pair state.
    chain = 2.0 * b + 8.0 + float(C.sum(axis=0).max())
    ws, rs = survey.weight_sum, state.radius_sum
    slack = m * (2 * chain + 6) * UNIT_ROUNDOFF * (np.outer(ws, rs) + np.outer(rs, ws))
    uncertain *= 1 + 2 * (b + 8) * UNIT_ROUNDOFF
    est, lo, hi, bound = interval(Raw(exact, m, absolute=slack, uncertain=uncertain))
    if plan.geodesic:
        slack = forward_slack(survey.a, np.outer(ws, ws))
        est, lo, hi, bound = fold_distortion(est, lo, hi, plan.k_min[0], plan.k_max[0], slack)
    both = live[:, None] & live[None, :] & ~np.eye(n, dtype=bool)
    out = [np.where(both, v, np.nan) for v in (est, lo, hi, bound)]
    return (*out, np.where(both, m, 0).astype(np.int64))


def groups_to_gather(survey: Survey, rel_bound: np.ndarray, tolerance: float) -> np.ndarray:
    """Groups of the entries over ``tolerance`` whose points are few enough to sum in memory."""
    count = survey.count.astype(np.float64)
    over = np.argwhere(np.triu(rel_bound > tolerance, 1))
    chosen: set[int] = set()
    total = 0.0
    for a, b in over:
        new = {int(a), int(b)} - chosen
        extra = float(sum(count[g] for g in new))
        if count[a] * count[b] > GATHER_PAIRS or total + extra > GATHER_POINTS:
            continue
        chosen |= new
        total += extra
    return np.array(sorted(chosen), dtype=np.int64)


def _gather(points: Points, into: _Gathered | None = None, *, groups: np.ndarray) -> _Gathered:
    mine = _Gathered.of(points, np.isin(points.groups, groups))
    return mine if into is None else into.merge(mine)


def gather_groups(groups: np.ndarray):
    """An ``accumulate(points, into=...)`` keeping the points of ``groups`` (pickles)."""
    return functools.partial(_gather, groups=np.asarray(groups, dtype=np.int64))


def gathered_points(kept: _Gathered, survey: Survey, setup) -> Points:
    """Gathered points as estimator points (groups coded as in the survey)."""
    return Points.build(kept.x, kept.y, kept.groups, survey.n_groups, kept.w, distance=setup)


def table(n_groups: int):
    """Empty G × G result columns (NaN until entries are put)."""
    from .sums import _Table

    return _Table((n_groups, n_groups))


def cross_result(survey: Survey, columns: dict, within: GroupPairSums | None) -> CrossPairSums:
    """The G × G result; the diagonal from ``within`` (each group's own pair sums) if given,
    else NaN."""
    ws = survey.weight_sum
    pair_weight = np.outer(ws, ws)
    diag = np.arange(ws.size)
    pair_weight[diag, diag] = survey.pair_weight
    if within is not None:
        for name in ("total", "lower", "upper", "rel_bound", "exact", "directions", "note"):
            columns[name][diag, diag] = getattr(within, name)
    empty = ~(pair_weight > 0)
    for name in ("total", "lower", "upper", "rel_bound"):
        columns[name][empty] = np.nan
    return CrossPairSums(n_points=survey.count, weight_sum=ws, pair_weight=pair_weight, **columns)
