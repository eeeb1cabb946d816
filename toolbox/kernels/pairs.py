"""Sums of pair distances within groups, exact or by projection, with guaranteed intervals.

The projection estimate rests on the Cauchy–Crofton formula: for a vector v in the plane,
``|v| = 1/2 ∫_0^π |<v, u(θ)>| dθ``. With ``m`` equally spaced directions and ``x = π/(2m)``
the sum ``F`` of projected pair sums satisfies ``F·sin x ≤ D ≤ F·tan x`` for the true total
``D``, and the estimate ``2·tan(x/2)·F`` has relative error at most ``tan²(x/2)``. Along one
direction the projected pair sum is exact after one sort. See ``docs/method.md``.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from ._common import (
    BLOCK_ELEMENTS,
    SMALL_EXACT,
    UNIT_ROUNDOFF,
    GroupLayout,
    Progress,
    Ticker,
    centring_slack,
    check_groups,
    check_method,
    check_points,
    crofton_interval,
    directions_for_tolerance,
    directions_unit_vectors,
    exact_rounding,
    projection_directions,
    projection_error,
    split_methods,
    thread_limit,
)


@functools.cache
def _compiled():
    """The numba kernel module, imported on first use (numba is slow to import); None without."""
    try:
        from . import _bucketed
    except ImportError:  # numba missing: sort rows with numpy instead (same results, slower)
        return None
    return _bucketed


#: point-directions per call of the compiled kernel, so that progress can be reported
_TASK_POINTS = 1 << 24
#: below this many point-directions the compiled kernel runs on one thread
_SERIAL_POINTS = 1 << 20

__all__ = ["GroupPairSums", "PairSum", "exact_pair_sum", "pair_distance_sum", "grouped_pair_sums"]


@dataclass(frozen=True)
class PairSum:
    """Total of pair distances of one set of points, with its guaranteed interval."""

    total: float
    lower: float
    upper: float
    rel_bound: float
    method: str
    directions: int
    pair_weight: float

    @property
    def mean(self) -> float:
        """Weighted mean pair distance ``total / pair_weight`` (NaN without pairs)."""
        return self.total / self.pair_weight if self.pair_weight > 0 else math.nan


@dataclass(frozen=True)
class GroupPairSums:
    """Per-group results of :func:`grouped_pair_sums`; every array has one entry per group.

    Groups with fewer than two points or zero pair weight have NaN totals and bounds,
    ``exact`` False and 0 directions.
    """

    n_points: np.ndarray
    weight_sum: np.ndarray
    pair_weight: np.ndarray
    total: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    rel_bound: np.ndarray
    exact: np.ndarray
    directions: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean pair distance per group."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.pair_weight > 0, self.total / self.pair_weight, np.nan)


def exact_pair_sum(x, y, weights=None) -> float:
    """Exact ``Σ_{i<j} w_i w_j |p_i − p_j|`` by brute force in bounded-memory blocks.

    Parameters
    ----------
    x, y : array_like
        Coordinates of the points.
    weights : array_like, optional
        Non-negative weights; all ones if omitted.

    Returns
    -------
    float
        The weighted sum over unordered pairs.

    Examples
    --------
    >>> exact_pair_sum([0, 3, 0], [0, 0, 4])  # a 3-4-5 triangle
    12.0
    """
    r = grouped_pair_sums(x, y, np.zeros(np.shape(x), dtype=np.int8), 1, weights, tolerance=0)
    return float(np.nan_to_num(r.total[0]))


def _exact_one(x, y, w) -> float:
    """Exact weighted pair sum of one centred group (blocks of rows against the rest)."""
    from scipy.spatial.distance import cdist  # imported here: a start-up cost only exact sums pay

    n = x.size
    if n < 2:
        return 0.0
    pts = np.column_stack([x, y])
    w = np.ones(n) if w is None else w
    block = max(1, min(n, BLOCK_ELEMENTS // n))
    total = 0.0
    for a in range(0, n, block):
        b = min(n, a + block)
        d = cdist(pts[a:b], pts[a:])
        # pairs inside the block appear twice in d[:, :b-a]; pairs with later rows once
        total += 0.5 * float(w[a:b] @ d[:, : b - a] @ w[a:b])
        if b < n:
            total += float(w[a:b] @ d[:, b - a :] @ w[b:])
    return total


def _padded_distances(px, py) -> np.ndarray:
    """Distance matrices (groups, s, s) of padded rows of points."""
    dx = px[:, :, None] - px[:, None, :]
    dy = py[:, :, None] - py[:, None, :]
    return np.sqrt(dx * dx + dy * dy)


def _exact_padded(px, py, w) -> np.ndarray:
    """Exact pair sums of many small groups laid out as padded rows (padding has weight 0)."""
    return 0.5 * np.einsum("gi,gij,gj->g", w, _padded_distances(px, py), w)


def grouped_pair_sums(
    x,
    y,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    tolerance: float = 0.01,
    method: str = "auto",
    progress: Progress | None = None,
    threads: int | None = None,
) -> GroupPairSums:
    """Total pair distance of every group, each with a guaranteed interval.

    Parameters
    ----------
    x, y : array_like
        Planar coordinates of the points.
    groups : array_like of int
        Group code of every point, in ``[0, n_groups)``.
    n_groups : int, optional
        Number of groups (default ``groups.max() + 1``); groups without points are reported.
    weights : array_like, optional
        Non-negative weight of every point; the weighted total is ``Σ_{i<j} w_i w_j d_ij``.
    tolerance : float
        Guaranteed relative error of each total, in [0, 0.5]. 0 means exact.
    method : {"auto", "exact", "projection"}
        ``auto`` picks, per group, exact sums when they are cheaper than the projection.
    progress : callable, optional
        Called as ``progress(done, total)`` in work units as groups are finished.
    threads : int, optional
        Threads for the projection estimate (default: every core).

    Returns
    -------
    GroupPairSums
        Arrays with one entry per group.

    Examples
    --------
    >>> r = grouped_pair_sums([0, 1, 0, 0, 3], [0, 0, 0, 4, 0], [0, 0, 1, 1, 1])
    >>> r.total.tolist(), r.exact.tolist()
    ([1.0, 12.0], [True, True])
    """
    x, y, weights = check_points(x, y, weights)
    groups, n_groups = check_groups(groups, x.size, n_groups)
    m = check_method(method, tolerance)
    if m and _compiled() is not None:
        m = projection_directions(tolerance)
    lay = GroupLayout.build(x, y, groups, n_groups, weights)
    counts = lay.counts
    pair_weight = lay.pair_weight()

    total = np.full(n_groups, np.nan)
    lower = np.full(n_groups, np.nan)
    upper = np.full(n_groups, np.nan)
    rel_bound = np.full(n_groups, np.nan)
    exact = np.zeros(n_groups, dtype=bool)
    dirs = np.zeros(n_groups, dtype=np.int64)

    live = np.flatnonzero((counts >= 2) & (pair_weight > 0))
    exact_groups, proj_groups = split_methods(counts, live, m, method, lay.w is not None)
    tick = Ticker(progress, counts[exact_groups].sum() + m * counts[proj_groups].sum())
    radius_sum = lay.radius_sum()

    # exact sums: many small groups at once, larger ones in blocks
    small = exact_groups[counts[exact_groups] <= SMALL_EXACT]
    for chunk, index, valid in lay.chunks(small, lambda s: s * s):
        total[chunk] = _exact_padded(lay.x[index], lay.y[index], lay.padded_weights(index, valid))
        tick(counts[chunk].sum())
    for g in exact_groups[counts[exact_groups] > SMALL_EXACT]:
        sl = slice(lay.starts[g], lay.starts[g] + counts[g])
        total[g] = _exact_one(lay.x[sl], lay.y[sl], None if lay.w is None else lay.w[sl])
        tick(counts[g])
    # padded batches add all s² terms in one chain; row blocks chain about 3n additions
    sizes = counts[exact_groups]
    rounding = exact_rounding(np.where(sizes <= SMALL_EXACT, sizes * sizes, 3 * sizes))
    g = exact_groups
    shift = centring_slack(lay.weight_sum[g], radius_sum[g])
    lower[g] = np.maximum(total[g] * (1 - rounding) - shift, 0.0)
    upper[g] = total[g] * (1 + rounding) + shift
    with np.errstate(divide="ignore", invalid="ignore"):
        rel_bound[g] = np.where(total[g] > 0, rounding + shift / total[g], np.where(shift > 0, np.inf, 0.0))
    exact[exact_groups] = True

    if proj_groups.size:
        g = proj_groups
        total[g], lower[g], upper[g], rel_bound[g] = _projection(lay, g, m, tolerance, tick, threads)
        dirs[g] = m
        # The rounding allowance is written for the worst case; should it still push a bound
        # over the tolerance, those groups are summed again with a wider margin.
        over = g[rel_bound[g] > tolerance]
        if over.size:
            m2 = directions_for_tolerance(tolerance * 0.9)
            retry = Ticker(None, 0)
            total[over], lower[over], upper[over], rel_bound[over] = _projection(
                lay, over, m2, tolerance, retry, threads
            )
            dirs[over] = m2

    return GroupPairSums(
        n_points=counts,
        weight_sum=lay.weight_sum,
        pair_weight=pair_weight,
        total=total,
        lower=lower,
        upper=upper,
        rel_bound=rel_bound,
        exact=exact,
        directions=dirs,
    )


def _projection(lay, groups, m, tolerance, tick, threads):
    """Estimate, bounds and rel_bound of the projected sums of ``groups`` with m directions."""
    cos_t, sin_t = directions_unit_vectors(m)
    radius_sum = lay.radius_sum()[groups]
    weight_sum = lay.weight_sum[groups]
    # Buckets beat sorting except for tight tolerances on unweighted layers, where numpy's
    # vectorised sort with nothing to gather is the faster exact route.
    tight = _bucket_budget(tolerance, m) < 1e-7
    if _compiled() is not None and not (tight and lay.w is None):
        source = _spatially_ordered(lay) if m >= _LOCALITY_DIRECTIONS else lay
        exact_part, uncertain, chain = _bucketed_sums(source, groups, cos_t, sin_t, tolerance, tick, threads)
    else:
        exact_part, uncertain = np.zeros(lay.n_groups), np.zeros(lay.n_groups)
        workers = max(1, min(threads or _default_threads(), m))
        with ThreadPoolExecutor(workers) as pool:  # numpy's sort lets go of the GIL
            for chunk, index, valid in lay.chunks(groups, lambda s: s):
                cw = None if lay.w is None else lay.padded_weights(index, valid)
                cx, cy, n = lay.x[index], lay.y[index], lay.counts[chunk]
                jobs = [
                    pool.submit(_projected_rows, cx, cy, cw, valid, n, cos_t[k::workers], sin_t[k::workers])
                    for k in range(workers)
                ]
                exact_part[chunk] = np.sum([job.result() for job in jobs], axis=0)
                tick(m * lay.counts[chunk].sum())
        chain = 2.0 * lay.counts  # cumulative sums over a row of n_g
    # Rounding: every sum of one direction is bounded by W_g·Σ w_i r_i (|p_i| ≤ r_i, each
    # coefficient at most w_i·W_g) and built from chains of at most `chain` additions, so it is
    # within (2·chain + 6)·u·W_g·Σ w_i r_i of the exact projected sum of the exact
    # coordinates (centring included).
    slack = m * (2 * chain[groups] + 6) * UNIT_ROUNDOFF * weight_sum * radius_sum
    part, spread = exact_part[groups], uncertain[groups]
    return crofton_interval(part + spread / 2, slack + spread / 2, m)


#: from this many directions on, points are first put in a space-filling-curve order
_LOCALITY_DIRECTIONS = 64


def _spread_bits(v):
    """Spread the 16 low bits of v over the even bits of a 32-bit word."""
    v = v.astype(np.uint64) & 0xFFFF
    v = (v | (v << 8)) & 0x00FF00FF
    v = (v | (v << 4)) & 0x0F0F0F0F
    v = (v | (v << 2)) & 0x33333333
    return (v | (v << 1)) & 0x55555555


def _spatially_ordered(lay):
    """The layout with each group's points in Morton (Z-curve) order.

    Points near each other land in nearby buckets on every direction, so the bucket rows the
    kernel touches stay in cache; with hundreds of directions that repays the one extra sort.
    """
    radius = lay.radius_max()
    per_group = np.divide(32767.0, radius, out=np.zeros_like(radius), where=radius > 0)
    scale = per_group[0] if lay.n_groups == 1 else per_group[lay.codes]
    qx = np.clip((lay.x * scale + 32768.0), 0, 65535)
    qy = np.clip((lay.y * scale + 32768.0), 0, 65535)
    key = _spread_bits(qx) | (_spread_bits(qy) << 1)
    key |= lay.codes.astype(np.uint64) << 32
    order = np.argsort(key)
    return dataclasses.replace(
        lay, x=lay.x[order], y=lay.y[order], w=None if lay.w is None else lay.w[order], order=None
    )


def _default_threads() -> int:
    """Threads when none are asked for: numba's current setting (the runner's --threads)."""
    compiled = _compiled()
    if compiled is not None:
        import numba

        return numba.get_num_threads()
    return os.cpu_count() or 1


def _bucket_budget(tolerance, m):
    """In-bucket uncertainty allowed per direction, relative to the exact part.

    The directions leave ``tolerance − tan²(π/4m)`` unused (at least 1 % of the tolerance, see
    projection_directions); an uncertainty U beside an exact part F moves the estimate by U/2,
    so U/F up to twice that margin keeps rel_bound within the tolerance. Half of it is kept
    back for the rounding allowances.
    """
    return 0.5 * 2 * (tolerance - projection_error(m)) / (1 + tolerance)


def _bucketed_sums(lay, groups, cos_t, sin_t, tolerance, tick, threads):
    """Exact part and uncertainty of the projected sums of ``groups``, with the compiled kernel."""
    m = cos_t.size
    radius = lay.radius_max()
    exact_part, uncertain = np.zeros(lay.n_groups), np.zeros(lay.n_groups)
    chain = np.zeros(lay.n_groups)
    work = lay.counts[groups] * m
    batches = np.cumsum(work) // _TASK_POINTS
    if work.sum() < _SERIAL_POINTS:  # starting the thread pool would cost more than it saves
        threads = 1
    with thread_limit(threads):
        for batch in np.split(groups, np.flatnonzero(np.diff(batches)) + 1):
            e, u, c = _compiled().bucketed_group_sums(
                lay.x,
                lay.y,
                lay.w,
                lay.starts,
                lay.counts,
                batch,
                cos_t,
                sin_t,
                radius,
                _bucket_budget(tolerance, m),
            )
            exact_part[batch], uncertain[batch], chain[batch] = e, u, c
            tick(m * lay.counts[batch].sum())
    return exact_part, uncertain, chain


def _projected_rows(cx, cy, cw, valid, n, cos_t, sin_t) -> np.ndarray:
    """Σ over directions of the exact projected pair sums, one padded row per group.

    Rows are sorted independently, so every cumulative sum stays inside its group.
    """
    s = cx.shape[1]
    rank = np.arange(s, dtype=np.float64)[None, :]
    tail = ~(rank < n[:, None])  # after sorting, padding sits at the end of each row
    out = np.zeros(cx.shape[0])
    if cw is None:
        coef = np.where(tail, 0.0, 2 * rank - n[:, None] + 1)
    else:
        wsum = cw.sum(axis=1)[:, None]
    for c, s_ in zip(cos_t, sin_t, strict=True):
        p = cx * c + cy * s_
        p[~valid] = np.inf
        if cw is None:
            p.sort(axis=1)
            p[tail] = 0.0
            out += np.einsum("gi,gi->g", coef, p)
        else:
            order = np.argsort(p, axis=1)
            p = np.take_along_axis(p, order, axis=1)
            p[tail] = 0.0
            w = np.take_along_axis(cw, order, axis=1)
            before = np.cumsum(w, axis=1) - w
            out += np.einsum("gi,gi->g", w * (2 * before + w - wsum), p)
    return out


def pair_distance_sum(x, y, weights=None, *, tolerance: float = 0.01, method: str = "auto") -> PairSum:
    """Total of all pair distances of one set of points, with a guaranteed interval.

    Parameters
    ----------
    x, y : array_like
        Planar coordinates.
    weights : array_like, optional
        Non-negative weights; the total is ``Σ_{i<j} w_i w_j d_ij``.
    tolerance : float
        Guaranteed relative error of ``total``; 0 means exact.
    method : {"auto", "exact", "projection"}
        How to compute it; ``auto`` takes the cheaper of the two.

    Returns
    -------
    PairSum
        ``total``, ``lower`` ≤ true total ≤ ``upper``, ``rel_bound``, ``method``,
        ``directions`` (0 when exact) and ``pair_weight``.

    Examples
    --------
    >>> r = pair_distance_sum([0, 1, 1, 0], [0, 0, 1, 1], tolerance=0)  # unit square corners
    >>> round(r.total, 10), r.method
    (6.8284271247, 'exact')
    >>> r = pair_distance_sum([0, 1, 1, 0], [0, 0, 1, 1], method="projection")
    >>> r.lower <= 4 + 2 * 2 ** 0.5 <= r.upper, r.directions
    (True, 8)
    """
    x = np.asarray(x, dtype=np.float64)
    r = grouped_pair_sums(
        x, y, np.zeros(x.shape, dtype=np.int8), 1, weights, tolerance=tolerance, method=method
    )
    if np.isnan(r.total[0]):
        return PairSum(0.0, 0.0, 0.0, 0.0, "exact", 0, float(r.pair_weight[0]))
    return PairSum(
        total=float(r.total[0]),
        lower=float(r.lower[0]),
        upper=float(r.upper[0]),
        rel_bound=float(r.rel_bound[0]),
        method="exact" if r.exact[0] else "projection",
        directions=int(r.directions[0]),
        pair_weight=float(r.pair_weight[0]),
    )
