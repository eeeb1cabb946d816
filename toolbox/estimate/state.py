"""The mergeable estimator state: per-group pair sums from batches, partitions or a whole layer.

Three passes over the points, each of which any number of workers can do on any split of them
(batches of a file, Dask partitions), with results that add up:

1. :meth:`Survey.of` a batch gives per group the count, weight, pair weight, centre sums and
   extent; surveys :meth:`~Survey.merge`. :meth:`Survey.plan` turns the merged survey into a
   :class:`Plan`: per group exact sums (small groups gather their points), fixed bins over the
   group's projected range (``directions × bins``, bins chosen from the tolerance), or a note
   (a geodesic group too wide for its local projection and too large for exact sums). Geodesic
   groups get their local AEQD frame here, from the survey alone.
2. :meth:`Plan.accumulate` a batch gives a :class:`State`: per group, direction and bin the
   weight ``W``, weighted position ``S``, squared weights ``Q``, count ``C`` and the smallest
   and largest projected value. States of the same plan :meth:`~State.merge` element-wise.
   :meth:`State.finish` gives every group's total and guaranteed interval: pairs in different
   bins exactly (``Σ_b S_b W_<b − W_b S_<b``), pairs in one bin bounded by its spread of values,
   through the same interval arithmetic as the in-memory path (:mod:`.interval`).
3. Only if some group's in-bin uncertainty is too large for its tolerance (a dense cluster in
   one bin): :meth:`State.refinement` names the heavy ``(group, direction, bin)`` cells and
   splits each into finer sub-bins over its own range; :meth:`Refinement.select` picks the
   points that fall in them, :meth:`Refinement.accumulate` bins just those, refinement states
   merge, and :meth:`State.finish` takes the merged one.

Everything here is numpy arrays and numbers: surveys, plans and states pickle, so a batch or a
partition is just another state to add. State size scales with groups × directions × bins,
plus the points of the small groups gathered for exact sums, never with the layer.
"""

from __future__ import annotations

import functools
import hashlib
import math
from dataclasses import dataclass, field, replace

import numpy as np

from .. import kernels
from ..errors import ParameterError
from ..kernels import UNIT_ROUNDOFF, GroupLayout, Raw, costs
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
from .results import GroupPairSums

__all__ = [
    "Survey",
    "Plan",
    "State",
    "Refinement",
    "RefinementState",
    "merge_all",
    "pair_sums_from",
    "point_sums_of",
    "MAX_BINS",
    "REFINE_BINS",
]

#: most bins per group and direction
MAX_BINS = 1 << 16
#: at most this many sub-bins for one heavy bin in the refinement pass
REFINE_BINS = 1 << 12
#: bins are chosen so that uniform data leave about this share of the bin budget uncertain
#: (B equal bins leave ≈ 3/B² of the projected total)
BIN_MARGIN = 0.1
#: groups up to this many points gather their points for exact sums under ``auto``
#: (exact sums cost less than the projection there; see kernels/costs.py)
ROUTE_NONE, ROUTE_GATHER, ROUTE_BINS, ROUTE_REFUSED = 0, 1, 2, 3
#: projected values of a group's points lie within its radius; the bins span a little more
RADIUS_MARGIN = 1e-9


def _wrap(lon, start):
    """Longitudes in [start − 360, start)."""
    return np.mod(np.asarray(lon) - start, 360.0) + (start - 360.0)


def _weights(points: Points) -> np.ndarray:
    return points.weight_array()


# --------------------------------------------------------------------------------------------
# pass 1: the survey


@dataclass(frozen=True)
class Survey:
    """Per-group count, weights, centre sums and extent of some points; surveys add up.

    ``lo`` and ``hi`` hold per group the smallest and largest coordinates: planar x, y, or for
    geodesic points the longitude in [-180, 180), the longitude in [0, 360) and the latitude
    (a group that straddles one cut of the longitude does not straddle the other). ``sums``
    holds per group Σx, Σy (the unit normals' Σx, Σy, Σz for geodesic points) and Σwx, Σwy for
    the weighted centre.
    """

    kind: str
    a: float
    f: float
    n_groups: int
    count: np.ndarray
    weight_sum: np.ndarray
    pair_weight: np.ndarray
    sums: np.ndarray  # (groups, 5): Σx, Σy, Σz (geodesic), Σwx, Σwy (planar)
    lo: np.ndarray  # (groups, 3)
    hi: np.ndarray  # (groups, 3)

    @classmethod
    def of(cls, points: Points) -> Survey:
        """The survey of one batch of points.

        Examples
        --------
        >>> s = Survey.of(Points.build([0, 3, 0], [0, 0, 4]))
        >>> s.count.tolist(), s.pair_weight.tolist()
        ([3], [3.0])
        """
        g, n_groups = points.groups, points.n_groups
        w = _weights(points)
        zeros = np.zeros(points.x.size)
        lay = GroupLayout.build(zeros, zeros, g, n_groups, points.weights, centred=False)
        if points.distance.kind == "geodesic":
            lam, phi = np.radians(points.x), np.radians(points.y)
            cos_phi = np.cos(phi)
            normals = [cos_phi * np.cos(lam), cos_phi * np.sin(lam), np.sin(phi)]
            sums = [np.bincount(g, v, n_groups) for v in normals] + [np.zeros(n_groups)] * 2
            # longitude twice, in [-180, 180) and in [0, 360): one of them has no wrap inside a group
            coords = [_wrap(points.x, 180.0), _wrap(points.x, 360.0), points.y]
        else:
            coords = [points.x, points.y, zeros]
            sums = [
                np.bincount(g, points.x, n_groups),
                np.bincount(g, points.y, n_groups),
                np.zeros(n_groups),
            ]
            sums += [np.bincount(g, w * points.x, n_groups), np.bincount(g, w * points.y, n_groups)]
        lo = np.full((n_groups, 3), np.inf)
        hi = np.full((n_groups, 3), -np.inf)
        for k, v in enumerate(coords):
            np.minimum.at(lo[:, k], g, v)
            np.maximum.at(hi[:, k], g, v)
        d = points.distance
        return cls(
            d.kind,
            d.a,
            d.f,
            n_groups,
            lay.counts,
            lay.weight_sum,
            lay.pair_weight(),
            np.column_stack(sums),
            lo,
            hi,
        )

    def merge(self, other: Survey) -> Survey:
        """The survey of both sets of points."""
        if (self.kind, self.n_groups) != (other.kind, other.n_groups):
            raise ParameterError("Surveys of different distance kinds or group counts cannot be merged.")
        # pairs across the two sets: W1·W2 more pair weight, no cancellation
        return replace(
            self,
            count=self.count + other.count,
            weight_sum=self.weight_sum + other.weight_sum,
            pair_weight=self.pair_weight + other.pair_weight + self.weight_sum * other.weight_sum,
            sums=self.sums + other.sums,
            lo=np.minimum(self.lo, other.lo),
            hi=np.maximum(self.hi, other.hi),
        )

    def plan(self, *, tolerance: float = 0.01, method: str = "auto", names=None) -> Plan:
        """Plan the bins of every group for ``tolerance`` (see :class:`Plan`)."""
        return _make_plan(self, tolerance, method, names)


# --------------------------------------------------------------------------------------------
# the plan


@dataclass(frozen=True)
class Plan:
    """What pass 2 does with each group, and the fixed bins of the binned ones.

    Per group: ``route`` (0 no pairs, 1 gather for exact sums, 2 bins, 3 refused with a note),
    the centre (planar x, y, or the AEQD frame's longitude and latitude), the radius the bins
    span (projected values lie in ``[-radius, radius]``), the frame's scale bounds ``k_min``,
    ``k_max`` (1 for planar groups), the planar tolerance, ``directions`` and ``bins``, and
    the offset of its ``directions × bins`` cells in the state's flat arrays.
    """

    survey: Survey
    tolerance: float
    method: str
    route: np.ndarray
    note: np.ndarray
    centre: np.ndarray  # (groups, 2)
    radius: np.ndarray
    k_min: np.ndarray
    k_max: np.ndarray
    planar: np.ndarray
    directions: np.ndarray
    bins: np.ndarray
    offset: np.ndarray
    size: int
    key: str = field(default="", compare=False)

    @property
    def n_groups(self) -> int:
        return self.survey.n_groups

    @property
    def geodesic(self) -> bool:
        return self.survey.kind == "geodesic"

    def empty(self) -> State:
        """A state with nothing added (the neutral element of :meth:`State.merge`)."""
        cells = np.zeros((4, self.size))  # pages are only touched when a point lands in them
        return State(self.key, cells, _no_bounds(self.size), np.zeros(self.n_groups), _Gathered.empty(), 0)

    def accumulate(self, points: Points, into: State | None = None) -> State:
        """The state of one batch of points (its groups coded as in the survey).

        With ``into`` (a state of this plan that the caller owns), the points are added to it
        in place and the updated state is returned: a stream of batches then costs no new
        state, and no merge, per batch.

        Examples
        --------
        >>> pts = Points.build([0, 1, 2, 3], [0, 0, 0, 0])
        >>> plan = Survey.of(pts).plan(method="projection")
        >>> r = plan.accumulate(pts).finish(plan)
        >>> bool(r.lower[0] <= 10 <= r.upper[0])
        True
        """
        _check_points(self, points)
        w = _weights(points)
        g = points.groups
        gathered = np.isin(g, np.flatnonzero(self.route == ROUTE_GATHER))
        state = self.empty() if into is None else into
        if into is not None and into.key != self.key:
            raise ParameterError("This state was accumulated with another plan.")
        kept = _Gathered.of(points, gathered)
        state = replace(
            state,
            gathered=state.gathered.merge(kept) if into is not None else kept,
            count=state.count + points.x.size,
        )
        binned = np.flatnonzero(self.route == ROUTE_BINS)
        sel = np.isin(g, binned)
        if not sel.any():
            return state
        px, py = self.frame_coordinates(points.x[sel], points.y[sel], g[sel])
        gs, ws = g[sel], w[sel]
        radius = np.hypot(px, py)  # AEQD: the geodesic distance from the frame's centre
        beyond = radius > self.radius[gs] * (1 + 1e-6) + 1e-300
        if beyond.any():
            first = int(gs[np.flatnonzero(beyond)[0]])
            raise ParameterError(
                f"A point of group {first} lies outside the extent its survey recorded; survey "
                "every batch (Survey.of and merge) before planning, and accumulate the same points."
            )
        state.radius_sum[:] += np.bincount(gs, ws * radius, self.n_groups)
        for m in np.unique(self.directions[binned]):
            members = np.isin(gs, binned[self.directions[binned] == m])
            _accumulate_cells(self, state, px[members], py[members], gs[members], ws[members], int(m))
        return state

    def frame_coordinates(self, x, y, groups):
        """Coordinates in each group's frame: centred planar, or the group's AEQD projection."""
        if not self.geodesic:
            return x - self.centre[groups, 0], y - self.centre[groups, 1]
        px, py = np.empty(x.size), np.empty(x.size)
        order = np.argsort(groups, kind="stable")
        codes = groups[order]
        starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
        for a, b in zip(starts, np.r_[starts[1:], codes.size], strict=True):
            g = int(codes[a])
            idx = order[a:b]
            proj = _aeqd(float(self.centre[g, 0]), float(self.centre[g, 1]), self.survey.a, self.survey.f)
            fx, fy = proj(x[idx], y[idx])
            px[idx], py[idx] = fx, fy
        return px, py


def _no_bounds(size: int) -> np.ndarray:
    """Smallest and largest values of empty cells: +inf and -inf (filled in place, no copies)."""
    bounds = np.empty((2, size))
    bounds[0].fill(np.inf)
    bounds[1].fill(-np.inf)
    return bounds


@functools.cache
def _aeqd(lon0: float, lat0: float, a: float, f: float):
    import pyproj

    return pyproj.Proj(proj="aeqd", lat_0=lat0, lon_0=lon0, a=a, f=f, units="m")


def _check_points(plan: Plan, points: Points) -> None:
    if points.n_groups != plan.n_groups or points.distance.kind != plan.survey.kind:
        raise ParameterError(
            f"These points ({points.distance.kind}, {points.n_groups} groups) do not match the plan "
            f"({plan.survey.kind}, {plan.n_groups} groups); code every batch's groups the same way."
        )


def _bins_for(budget: float, n: np.ndarray) -> np.ndarray:
    """Bins per direction: uniform data then leave ≈ 3/B² ≤ BIN_MARGIN·budget uncertain;
    never more than about two per point (sparser bins hold at most one point anyway)."""
    safe = np.maximum(budget, 1e-300)
    wanted = np.where(budget > 0, np.sqrt(3 / (BIN_MARGIN * safe)), MAX_BINS)
    bins = 2 ** np.ceil(np.log2(np.minimum(wanted, 2 * np.maximum(n, 8))))
    return np.clip(bins, 16, MAX_BINS).astype(np.int64)


def _make_plan(survey: Survey, tolerance: float, method: str, names) -> Plan:
    m0 = check_method(method, tolerance)
    n_groups = survey.n_groups
    count = survey.count
    name = names or (lambda g: f"group {g}")
    route = np.where((count >= 2) & (survey.pair_weight > 0), ROUTE_BINS, ROUTE_NONE).astype(np.int8)
    note = np.full(n_groups, "", dtype=object)
    centre = np.zeros((n_groups, 2))
    radius, k_min, k_max = np.zeros(n_groups), np.ones(n_groups), np.ones(n_groups)
    planar = np.full(n_groups, float(tolerance))
    live = route == ROUTE_BINS
    if m0 == 0:
        route[live] = ROUTE_GATHER
    elif survey.kind == "planar":
        centre, radius = _planar_extent(survey)
        if method == "auto":  # exact sums where they cost less than the projection
            m = projection_directions(tolerance) if kernels.has_compiled() else m0
            cheap = costs.exact(count) <= costs.projection(count, m, True)
            route[live & cheap] = ROUTE_GATHER
    else:
        _geodesic_frames(
            survey, tolerance, method, m0, route, note, centre, radius, k_min, k_max, planar, name
        )
    binned = route == ROUTE_BINS
    directions = np.zeros(n_groups, dtype=np.int64)
    bins = np.zeros(n_groups, dtype=np.int64)
    for g in np.flatnonzero(binned):
        directions[g] = projection_directions(float(planar[g]))
    if binned.any():
        budget = np.array([bin_budget(float(planar[g]), int(directions[g])) for g in np.flatnonzero(binned)])
        bins[binned] = _bins_for(budget, count[binned]) if budget.size else 0
    cells = directions * bins
    offset = np.concatenate([[0], np.cumsum(cells)[:-1]]).astype(np.int64)
    plan = Plan(
        survey, float(tolerance), method, route, note, centre, radius, k_min, k_max, planar, directions, bins,
        offset, int(cells.sum()),
    )  # fmt: skip
    return replace(plan, key=_fingerprint(plan))


def _fingerprint(plan: Plan) -> str:
    digest = hashlib.sha1()
    for array in (plan.route, plan.centre, plan.radius, plan.directions, plan.bins, plan.k_min, plan.k_max):
        digest.update(np.ascontiguousarray(array).tobytes())
    digest.update(
        repr((plan.tolerance, plan.method, plan.survey.kind, plan.survey.a, plan.survey.f)).encode()
    )
    return digest.hexdigest()


def _planar_extent(survey: Survey):
    """Each group's centre (its weighted mean, clamped into its extent) and the radius of the
    disc around it that holds the extent's corners."""
    count = np.maximum(survey.count, 1)
    weighted = survey.weight_sum > 0
    safe = np.where(weighted, survey.weight_sum, 1.0)
    cx = np.where(weighted, survey.sums[:, 3] / safe, survey.sums[:, 0] / count)
    cy = np.where(weighted, survey.sums[:, 4] / safe, survey.sums[:, 1] / count)
    filled = survey.count > 0
    lo, hi = np.where(filled[:, None], survey.lo, 0.0), np.where(filled[:, None], survey.hi, 0.0)
    cx, cy = np.clip(cx, lo[:, 0], hi[:, 0]), np.clip(cy, lo[:, 1], hi[:, 1])
    dx = np.maximum(cx - lo[:, 0], hi[:, 0] - cx)
    dy = np.maximum(cy - lo[:, 1], hi[:, 1] - cy)
    radius = np.hypot(dx, dy) * (1 + RADIUS_MARGIN)
    return np.column_stack([cx, cy]), radius


def _geodesic_frames(survey, tolerance, method, m0, route, note, centre, radius, k_min, k_max, planar, name):
    """Per live geodesic group: exact sums (gathered), or an AEQD frame from the survey alone.

    The frame's centre is the normalised mean of the points' unit normals, as in the in-memory
    path; the radius is bounded from the survey's longitude-latitude box (:func:`_reach`). The
    Tissot scales are then sampled on the boundary circle of that radius (docs/method.md).
    """
    from .frames import frame_from_centre
    from .sums import EXACT_FALLBACK_POINTS, MIN_PLANAR_SHARE, _too_wide

    a, f = survey.a, survey.f
    count = survey.count
    for g in np.flatnonzero(route == ROUTE_BINS):
        n = int(count[g])
        if method == "auto" and costs.exact_geodesic(n) <= costs.FRAME + costs.planar(n, m0):
            route[g] = ROUTE_GATHER
            continue
        v = survey.sums[g, :3] / n
        norm = float(np.linalg.norm(v))
        frame = None
        if norm >= 1e-6:
            lat0 = math.degrees(math.atan2(v[2], math.hypot(v[0], v[1])))
            lon0 = math.degrees(math.atan2(v[1], v[0]))
            reach = _reach(survey, g, lon0, lat0)
            if reach is not None:
                frame = frame_from_centre(lon0, lat0, reach, a, f)
        usable = frame is not None and frame.usable
        share = planar_tolerance(tolerance, frame.k_min, frame.k_max) if usable else 0.0
        if not usable or share < MIN_PLANAR_SHARE * tolerance:
            if n <= EXACT_FALLBACK_POINTS:
                route[g] = ROUTE_GATHER
            else:
                route[g] = ROUTE_REFUSED
                note[g] = _too_wide(name(int(g)), n, frame if frame is not None else _everywhere(), tolerance)
            continue
        if method == "auto" and costs.exact_geodesic(n) <= costs.FRAME + costs.planar(
            n, directions_for_tolerance(share)
        ):
            route[g] = ROUTE_GATHER
            continue
        centre[g] = frame.lon0, frame.lat0
        radius[g], k_min[g], k_max[g], planar[g] = frame.radius_m, frame.k_min, frame.k_max, share


#: samples along each edge of a group's longitude-latitude box when bounding its reach
EDGE_SAMPLES = 256


def _reach(survey: Survey, g: int, lon0: float, lat0: float) -> float | None:
    """An upper bound of the geodesic distance from (lon0, lat0) to every point of group g.

    The points lie in the survey's longitude-latitude box (in whichever longitude range has the
    narrower span). Away from the antipode the distance from a point has no local maximum, so
    its largest value over the box lies on the box's boundary; sampled along the four edges,
    any boundary point is within half a sample spacing of a sample, and by the triangle
    inequality its distance exceeds the sample's by at most that. None when the box spans
    more than half the longitudes (no useful bound).
    """
    from ..kernels import geod

    spans = survey.hi[g, :2] - survey.lo[g, :2]
    k = int(np.argmin(spans))
    if spans[k] > 180.0:
        return None
    lon_lo, lon_hi = survey.lo[g, k], survey.hi[g, k]
    lat_lo, lat_hi = survey.lo[g, 2], survey.hi[g, 2]
    t = np.linspace(0.0, 1.0, EDGE_SAMPLES)
    lons = np.concatenate(
        [
            lon_lo + (lon_hi - lon_lo) * t,
            np.full(t.size, lon_hi),
            lon_hi - (lon_hi - lon_lo) * t,
            np.full(t.size, lon_lo),
        ]
    )
    lats = np.concatenate(
        [
            np.full(t.size, lat_lo),
            lat_lo + (lat_hi - lat_lo) * t,
            np.full(t.size, lat_hi),
            lat_hi - (lat_hi - lat_lo) * t,
        ]
    )
    ellipsoid = geod(survey.a, survey.f)
    ones = np.ones(lons.size)
    far = np.asarray(ellipsoid.inv(lon0 * ones, lat0 * ones, lons, lats)[2])
    step = np.asarray(ellipsoid.inv(lons[:-1], lats[:-1], lons[1:], lats[1:])[2])
    return float(far.max() + step.max() / 2) * (1 + 1e-9) + 1e-6


def _everywhere():
    from .frames import LocalFrame

    reason = "has points all around the Earth, with no common centre"
    return LocalFrame(False, reason, math.nan, math.nan, math.nan, 180.0, math.nan, math.nan, None, None)


# --------------------------------------------------------------------------------------------
# pass 2: binning


def _cells(plan: Plan, x, y, groups, m, sub=None):
    """Flat cell index and projected value of every point on every one of the m directions."""
    from ..kernels.cells import cells_and_positions  # every pass locates points this one way

    angles = np.arange(m) * (math.pi / m)
    return cells_and_positions(
        x, y, groups, plan.offset, plan.bins, plan.radius, np.cos(angles), np.sin(angles)
    )


def _accumulate_cells(plan, state, px, py, groups, w, m) -> None:
    cell, p = _cells(plan, px, py, groups, m)
    _add_to_cells(state.cells, state.bounds, cell.ravel(), p.ravel(), np.tile(w, m))


def _add_to_cells(cells, bounds, cell, p, w) -> None:
    from ..kernels.cells import add_to_cells  # one compiled pass instead of six numpy ones

    add_to_cells(cells, bounds, cell, p, w)


@dataclass(frozen=True)
class _Gathered:
    """Points of the groups that get exact sums, kept as they came."""

    x: np.ndarray
    y: np.ndarray
    w: np.ndarray
    groups: np.ndarray

    @classmethod
    def empty(cls) -> _Gathered:
        return cls(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64))

    @classmethod
    def of(cls, points: Points, mask) -> _Gathered:
        return cls(
            points.x[mask], points.y[mask], _weights(points)[mask], points.groups[mask].astype(np.int64)
        )

    def merge(self, other: _Gathered) -> _Gathered:
        return _Gathered(
            *(np.concatenate([getattr(self, k), getattr(other, k)]) for k in ("x", "y", "w", "groups"))
        )


@dataclass(frozen=True)
class State:
    """Binned sums of some points under one plan; states of the same plan add up.

    ``cells`` holds per cell (group, direction, bin) the weight, weighted position, squared
    weights and count; ``bounds`` the smallest and largest projected value. ``radius_sum`` is
    Σ w_i r_i per group (r the distance from the group's centre), for the rounding allowance.
    """

    key: str
    cells: np.ndarray  # (4, size)
    bounds: np.ndarray  # (2, size)
    radius_sum: np.ndarray
    gathered: _Gathered
    count: int

    def merge(self, other: State) -> State:
        """The state of both sets of points (element-wise sums, minima and maxima).

        Examples
        --------
        >>> pts = Points.build([0, 1, 2, 3], [0, 0, 0, 0])
        >>> plan = Survey.of(pts).plan(method="projection")
        >>> a, b = plan.accumulate(Points.build([0, 1], [0, 0])), plan.accumulate(Points.build([2, 3], [0, 0]))
        >>> r = a.merge(b).finish(plan)
        >>> bool(r.lower[0] <= 10 <= r.upper[0])
        True
        """
        if self.key != other.key:
            raise ParameterError(
                "States of different plans cannot be merged; accumulate every batch with one plan."
            )
        return State(
            self.key,
            self.cells + other.cells,
            np.vstack(
                [np.minimum(self.bounds[0], other.bounds[0]), np.maximum(self.bounds[1], other.bounds[1])]
            ),
            self.radius_sum + other.radius_sum,
            self.gathered.merge(other.gathered),
            self.count + other.count,
        )

    def finish(self, plan: Plan, refined: RefinementState | None = None) -> GroupPairSums:
        """Every group's pair total with its guaranteed interval (see :func:`finish`)."""
        return finish(self, plan, refined)

    def point_sums_of(self, plan: Plan, points: Points, refined: RefinementState | None = None):
        """Per-point sums of a part's points against their whole group (see :func:`point_sums_of`)."""
        return point_sums_of(self, plan, points, refined)

    def refinement(self, plan: Plan) -> Refinement | None:
        """The heavy cells to split in a further pass, or None when every group meets its tolerance."""
        return _refinement(self, plan)


def merge_all(parts):
    """Merge any number of surveys or states (in any order: the results are equal up to rounding)."""
    parts = list(parts)
    if not parts:
        raise ParameterError("Nothing to merge.")
    out = parts[0]
    for part in parts[1:]:
        out = out.merge(part)
    return out


# --------------------------------------------------------------------------------------------
# finishing


def _bin_sums(W, S, Q, C, lo, hi):
    """Exact part and uncertainty of the pair sum of one set of bins, per row (direction).

    Pairs in different bins are ordered: ``Σ_b S_b W_<b − W_b S_<b`` exactly. Pairs in one bin
    lie at most its spread of values apart; their pair weight is ``(W_b² − Q_b)/2`` up to
    rounding, bounded by ``W_b²/2``. A bin of two points holds one pair exactly its spread apart.
    """
    # exclusive prefix sums as sums of earlier terms (a subtraction could cancel)
    before_w = np.concatenate([np.zeros(W.shape[:-1] + (1,)), np.cumsum(W[..., :-1], axis=-1)], axis=-1)
    before_s = np.concatenate([np.zeros(S.shape[:-1] + (1,)), np.cumsum(S[..., :-1], axis=-1)], axis=-1)
    exact = (S * before_w - W * before_s).sum(axis=-1)
    spread = np.where(C >= 2, hi - lo, 0.0)
    pair = 0.5 * (W * W - Q)
    slack = 2 * UNIT_ROUNDOFF * W * W
    pair_hi = np.minimum(0.5 * W * W, pair + slack)
    pair_lo = np.where(C == 2, np.maximum(pair - slack, 0.0), 0.0)
    exact = exact + (spread * pair_lo).sum(axis=-1)
    uncertain = (spread * (pair_hi - pair_lo)).sum(axis=-1)
    return exact, uncertain


def _group_cells(plan, state, g):
    m, b = int(plan.directions[g]), int(plan.bins[g])
    sl = slice(plan.offset[g], plan.offset[g] + m * b)
    W, S, Q, C = (state.cells[k, sl].reshape(m, b) for k in range(4))
    lo, hi = (state.bounds[k, sl].reshape(m, b) for k in range(2))
    return W, S, Q, C, lo, hi


def finish(state: State, plan: Plan | None = None, refined: RefinementState | None = None) -> GroupPairSums:
    """Totals and guaranteed intervals of every group from a merged state.

    Gathered groups get exact sums; binned groups their binned sums through the shared
    interval arithmetic (and, for geodesic groups, their frame's distortion folded in); heavy
    cells resolved by ``refined`` use its sub-bins. Refused groups keep their note.
    """
    if plan is None:
        raise ParameterError("finish needs the plan the state was accumulated with.")
    if state.key != plan.key:
        raise ParameterError("This state was accumulated with another plan.")
    from .sums import _Table, pair_sums

    survey = plan.survey
    n_groups = plan.n_groups
    out = _Table(n_groups)
    out.note[:] = plan.note
    gathered = np.flatnonzero(plan.route == ROUTE_GATHER)
    if gathered.size:
        kept = state.gathered
        pts = Points.build(
            kept.x, kept.y, kept.groups, n_groups, kept.w, distance=survey.kind, a=survey.a, f=survey.f
        )
        tolerance = 0.0 if plan.tolerance == 0 or plan.method == "exact" else plan.tolerance
        r = pair_sums(pts, tolerance=tolerance, method="exact" if tolerance == 0 else "auto")
        for name in ("total", "lower", "upper", "rel_bound", "exact", "directions"):
            getattr(out, name)[gathered] = getattr(r, name)[gathered]
    extra = refined.by_cell() if refined is not None else {}
    for g in np.flatnonzero(plan.route == ROUTE_BINS):
        raw = _group_raw(plan, state, int(g), extra)
        est, lo, hi, bound = interval(raw)
        if plan.geodesic:
            slack = forward_slack(survey.a, survey.pair_weight[g])
            est, lo, hi, bound = fold_distortion(est, lo, hi, plan.k_min[g], plan.k_max[g], slack)
        out.put(g, est, lo, hi, bound, exact=False, directions=raw.directions)
    return GroupPairSums(
        n_points=survey.count, weight_sum=survey.weight_sum, pair_weight=survey.pair_weight, **out.columns()
    )


def _group_raw(plan, state, g, extra) -> Raw:
    W, S, Q, C, lo, hi = _group_cells(plan, state, g)
    m, b = W.shape
    exact, uncertain = _bin_sums(W, S, Q, C, lo, hi)
    longest = float(C.max()) if C.size else 0.0
    for (d, k), (e, u, chain) in extra.get(g, {}).items():
        # the cell's in-bin part is replaced by its sub-bins' full pair sum
        _, u_cell = _bin_sums(
            W[d, k : k + 1],
            S[d, k : k + 1],
            Q[d, k : k + 1],
            C[d, k : k + 1],
            lo[d, k : k + 1],
            hi[d, k : k + 1],
        )
        e_cell = _in_bin_lower(W[d, k], Q[d, k], C[d, k], lo[d, k], hi[d, k])
        exact[d] += e - e_cell
        uncertain[d] += u - u_cell
        longest = max(longest, chain)
    # Rounding, as for the in-memory binned kernel: every sum of one direction is bounded by
    # W_g·Σ w_i r_i and built from chains of at most 2B + 8 + (points in a bin) additions
    # (merging adds two partial sums: one addition, as if the points came in one batch).
    chain = 2.0 * b + 8.0 + longest
    slack = m * (2 * chain + 6) * UNIT_ROUNDOFF * plan.survey.weight_sum[g] * state.radius_sum[g]
    return Raw(float(exact.sum()), m, absolute=slack, uncertain=float(max(uncertain.sum(), 0.0)))


def _in_bin_lower(W, Q, C, lo, hi) -> float:
    if C != 2:
        return 0.0
    pair = 0.5 * (W * W - Q)
    return float((hi - lo) * max(pair - 2 * UNIT_ROUNDOFF * W * W, 0.0))


# --------------------------------------------------------------------------------------------
# pass 3: refinement of heavy cells


@dataclass(frozen=True)
class Refinement:
    """The heavy cells of a finished state and the sub-bins each is split into.

    ``group``, ``direction``, ``bin`` name the cells; ``lo``, ``hi`` the range of projected
    values each holds (from the state), split into ``sub_bins`` equal sub-bins.
    """

    plan_key: str
    group: np.ndarray
    direction: np.ndarray
    bin: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    sub_bins: np.ndarray
    offset: np.ndarray
    size: int

    def select(self, plan: Plan, points: Points):
        """Per point, the index of the heavy cell it falls in on that cell's direction (-1: none),
        as an (cells-per-point) list of (point index, cell index) pairs."""
        _check_points(plan, points)
        # heavy cell of every flat cell of the plan (-1: not heavy): one lookup per point and
        # direction, whatever the number of heavy cells
        heavy = np.full(plan.size, -1, dtype=np.int64)
        heavy[plan.offset[self.group] + self.direction * plan.bins[self.group] + self.bin] = np.arange(
            self.group.size
        )
        hits_point, hits_cell, values = [], [], []
        mine = np.flatnonzero(np.isin(points.groups, self.group))
        if mine.size == 0:
            return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
        px, py = plan.frame_coordinates(points.x[mine], points.y[mine], points.groups[mine])
        g = points.groups[mine]
        for m in np.unique(plan.directions[np.unique(g)]):
            same = np.flatnonzero(plan.directions[g] == m)
            cell, p = _cells(plan, px[same], py[same], g[same], int(m))
            found = heavy[cell]  # (m, n)
            d, i = np.nonzero(found >= 0)
            hits_point.append(mine[same][i])
            hits_cell.append(found[d, i])
            values.append(p[d, i])
        return np.concatenate(hits_point), np.concatenate(hits_cell), np.concatenate(values)

    def accumulate(self, plan: Plan, points: Points, into: RefinementState | None = None) -> RefinementState:
        """Sub-bin sums of the points of one batch that fall in the heavy cells (added to
        ``into`` in place, when given)."""
        index, cell, p = self.select(plan, points)
        w = _weights(points)[index]
        width = self.hi[cell] - self.lo[cell]
        scale = np.divide(self.sub_bins[cell], width, out=np.zeros_like(width), where=width > 0)
        sub = np.clip(np.floor((p - self.lo[cell]) * scale).astype(np.int64), 0, self.sub_bins[cell] - 1)
        state = RefinementState.empty(self) if into is None else into
        _add_to_cells(state.cells, state.bounds, self.offset[cell] + sub, p, w)
        return state


@dataclass(frozen=True)
class RefinementState:
    """Sub-bin sums of the heavy cells; refinement states of the same refinement add up."""

    refinement: Refinement
    cells: np.ndarray
    bounds: np.ndarray

    @classmethod
    def empty(cls, refinement: Refinement) -> RefinementState:
        return cls(refinement, np.zeros((4, refinement.size)), _no_bounds(refinement.size))

    def merge(self, other: RefinementState) -> RefinementState:
        bounds = np.vstack(
            [np.minimum(self.bounds[0], other.bounds[0]), np.maximum(self.bounds[1], other.bounds[1])]
        )
        return RefinementState(self.refinement, self.cells + other.cells, bounds)

    def by_cell(self) -> dict:
        """{group: {(direction, bin): (exact part, uncertainty, longest chain)}} of every heavy cell."""
        ref = self.refinement
        out: dict = {}
        for c in range(ref.group.size):
            sl = slice(ref.offset[c], ref.offset[c] + ref.sub_bins[c])
            W, S, Q, C = (self.cells[k, sl][None, :] for k in range(4))
            lo, hi = self.bounds[0, sl][None, :], self.bounds[1, sl][None, :]
            e, u = _bin_sums(W, S, Q, C, lo, hi)
            chain = 2.0 * ref.sub_bins[c] + 8.0 + float(C.max())
            out.setdefault(int(ref.group[c]), {})[(int(ref.direction[c]), int(ref.bin[c]))] = (
                float(e[0]),
                float(u[0]),
                chain,
            )
        return out


def _refinement(state: State, plan: Plan) -> Refinement | None:
    rows = []
    for g in np.flatnonzero(plan.route == ROUTE_BINS):
        g = int(g)
        W, S, Q, C, lo, hi = _group_cells(plan, state, g)
        m, b = W.shape
        exact, uncertain = _bin_sums(W, S, Q, C, lo, hi)
        tolerance = float(plan.planar[g])
        budget = bin_budget(tolerance, m) * float(exact.sum())
        total_u = float(uncertain.sum())
        if total_u <= budget:
            continue
        spread = np.where(C >= 3, hi - lo, 0.0) * np.minimum(
            0.5 * W * W, 0.5 * (W * W - Q) + 2 * UNIT_ROUNDOFF * W * W
        )
        flat = spread.ravel()
        for k in np.argsort(-flat):
            if total_u <= budget or flat[k] <= 0:
                break
            total_u -= flat[k]
            d, j = divmod(int(k), b)
            sub = int(min(REFINE_BINS, 2 ** math.ceil(math.log2(max(2 * C[d, j], 16)))))
            rows.append((g, d, j, lo[d, j], hi[d, j], sub))
    if not rows:
        return None
    group, direction, bin_, lo, hi, sub = (np.array(v) for v in zip(*rows, strict=True))
    offset = np.concatenate([[0], np.cumsum(sub)[:-1]]).astype(np.int64)
    return Refinement(
        plan.key, group.astype(np.int64), direction.astype(np.int64), bin_.astype(np.int64),
        lo.astype(float), hi.astype(float), sub.astype(np.int64), offset, int(sub.sum()),
    )  # fmt: skip


def pair_sums_from(parts, *, tolerance: float = 0.01, method: str = "auto", names=None) -> GroupPairSums:
    """Per-group pair sums of points that come in parts, read two or three times.

    ``parts()`` returns a fresh iterable of :class:`Points` (batches of a file, say) each time
    it is called: once for the survey, once for the bins, and once more, reading only what
    falls in heavy bins, if some group needs a refinement. A reference driver: a streaming or
    Dask driver does the same passes with its own way of visiting the parts.

    Examples
    --------
    >>> parts = [Points.build([0, 3], [0, 0]), Points.build([0], [4])]
    >>> r = pair_sums_from(lambda: iter(parts), tolerance=0)
    >>> r.total.tolist()
    [12.0]
    """
    plan = merge_all(Survey.of(p) for p in parts()).plan(tolerance=tolerance, method=method, names=names)
    state = merge_all([plan.empty(), *(plan.accumulate(p) for p in parts())])
    refinement = state.refinement(plan)
    refined = None
    if refinement is not None:
        refined = merge_all(
            [RefinementState.empty(refinement), *(refinement.accumulate(plan, p) for p in parts())]
        )
    return state.finish(plan, refined)


# --------------------------------------------------------------------------------------------
# per-point sums: a further pass over the points against the finished bins


def _prefix(a):
    """Exclusive prefix sums along the last axis, as sums of earlier terms."""
    out = np.zeros_like(a)
    np.cumsum(a[..., :-1], axis=-1, out=out[..., 1:])
    return out


def _suffix(a):
    """Exclusive suffix sums along the last axis, as sums of later terms."""
    return _prefix(a[..., ::-1])[..., ::-1]


def _point_parts(W, S, lo, hi, index, p):
    """Exact part and in-bin interval of Σ_j w_j |p − p_j| for values p in bins ``index``.

    Points in other bins are ordered with respect to p: ``p (W_< − W_>) − (S_< − S_>)``.
    Points of p's own bin add at least ``|p W_b − S_b|`` (the triangle inequality) and at most
    ``W_b`` times p's distance to the farther end of the bin's values.
    """
    before_w, after_w = _prefix(W)[index], _suffix(W)[index]
    before_s, after_s = _prefix(S)[index], _suffix(S)[index]
    exact = p * (before_w - after_w) - (before_s - after_s)
    wb, sb = W[index], S[index]
    low = np.abs(p * wb - sb)
    high = wb * np.maximum(p - lo[index], hi[index] - p)
    return exact + low, np.maximum(high - low, 0.0)


def point_sums_of(state: State, plan: Plan, points: Points, refined=None):
    """Σ_j w_j d_ij from every point of ``points`` to all the points of its group.

    A further pass after :meth:`State.finish`: each point is placed in the finished bins of
    every direction (and in the sub-bins of a refined cell: ``refined`` is a RefinementState,
    or a list of them when the refinement came in several passes); points in other bins are
    summed exactly, those of its own bin bounded. Gathered groups are summed exactly against their
    gathered points. Returns a :class:`PointSums` for these points, in their order.
    """
    from .results import PointSums
    from .sums import _Table

    _check_points(plan, points)
    if state.key != plan.key:
        raise ParameterError("This state was accumulated with another plan.")
    survey = plan.survey
    n = points.x.size
    g = points.groups
    w = _weights(points)
    out = _Table(n)
    out.note[:] = plan.note[g]
    other = np.maximum(survey.weight_sum[g] - w, 0.0)
    gathered = np.isin(g, np.flatnonzero(plan.route == ROUTE_GATHER))
    if gathered.any():
        _gathered_point_sums(state, plan, points, np.flatnonzero(gathered), out)
    # the refinement may have come in several passes, each a RefinementState of its own cells
    refined_parts = [] if refined is None else [refined] if isinstance(refined, RefinementState) else list(refined)
    for group in np.unique(g[np.isin(g, np.flatnonzero(plan.route == ROUTE_BINS))]):
        mine = np.flatnonzero(g == group)
        px, py = plan.frame_coordinates(points.x[mine], points.y[mine], g[mine])
        W, S, Q, C, lo, hi = _group_cells(plan, state, int(group))
        m, b = W.shape
        cell, p = _cells(plan, px, py, np.full(mine.size, group), m)
        local = cell - plan.offset[group] - np.arange(m)[:, None] * b  # bin of each point
        value, uncertain = np.zeros(mine.size), np.zeros(mine.size)
        for d in range(m):
            e, u = _point_parts(W[d], S[d], lo[d], hi[d], local[d], p[d])
            for part in refined_parts:
                subcells = part.refinement
                for c in np.flatnonzero((subcells.group == group) & (subcells.direction == d)):
                    inside = local[d] == subcells.bin[c]
                    if not inside.any():
                        continue
                    sl = slice(subcells.offset[c], subcells.offset[c] + subcells.sub_bins[c])
                    sw, ss = part.cells[0, sl], part.cells[1, sl]
                    slo, shi = part.bounds[0, sl], part.bounds[1, sl]
                    width = subcells.hi[c] - subcells.lo[c]
                    scale = subcells.sub_bins[c] / width if width > 0 else 0.0
                    q = p[d, inside]
                    sub = np.clip(np.floor((q - subcells.lo[c]) * scale).astype(np.int64), 0, subcells.sub_bins[c] - 1)
                    # the cell's own points, now by sub-bin, replace its in-bin bound
                    outside_e = e[inside] - np.abs(q * W[d, subcells.bin[c]] - S[d, subcells.bin[c]])
                    se, su = _point_parts(sw, ss, slo, shi, sub, q)
                    e[inside], u[inside] = outside_e + se, su
            value += e
            uncertain += u
        # Rounding, as for the in-memory point kernel: the prefix sums are bounded by W_g·r_i
        # and A_g = Σ w_j r_j, built from chains of at most 2B + 8 + (points in a bin) additions.
        chain = 2.0 * b + 8.0 + float(C.max())
        r = np.hypot(px, py)
        slack = m * (4 * chain + 6) * UNIT_ROUNDOFF * (survey.weight_sum[group] * r + state.radius_sum[group])
        est, low, high, bound = interval(Raw(value, m, absolute=slack, uncertain=uncertain))
        if plan.geodesic:
            est, low, high, bound = fold_distortion(
                est, low, high, plan.k_min[group], plan.k_max[group], forward_slack(survey.a, other[mine])
            )
        out.put(mine, est, low, high, bound, exact=False, directions=m)
    out.clear(~(other > 0))
    return PointSums(other_weight=other, **out.columns())


def _gathered_point_sums(state, plan, points, rows, out) -> None:
    """Exact sums of points of gathered groups against the gathered points of their group."""
    kept = state.gathered
    survey = plan.survey
    for group in np.unique(points.groups[rows]):
        mine = rows[points.groups[rows] == group]
        theirs = kept.groups == group
        bx, by, bw = kept.x[theirs], kept.y[theirs], kept.w[theirs]
        if plan.geodesic:
            raw = kernels.exact_geodesic_against_raw(points.x[mine], points.y[mine], bx, by, bw, survey.a, survey.f)
        else:  # centred on the gathered points (any nearby centre keeps the digits)
            cx, cy = (float(np.mean(bx)), float(np.mean(by))) if bx.size else (0.0, 0.0)
            raw = kernels.exact_against_raw(points.x[mine] - cx, points.y[mine] - cy, bx - cx, by - cy, bw)
        out.put_raw(mine, raw)
