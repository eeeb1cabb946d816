"""Array kernels: sums of pair distances, exact or by projection, for one or many groups.

numpy arrays in, numbers or arrays out. Nothing here reads files, knows about CRS objects or
prints; progress is reported through an optional callback.

The projection estimate rests on the Cauchy–Crofton formula: for a vector v in the plane,
``|v| = 1/2 ∫_0^π |<v, u(θ)>| dθ``. With ``m`` equally spaced directions and ``x = π/(2m)``
the sum ``F`` of projected pair sums satisfies ``F·sin x ≤ D ≤ F·tan x`` for the true total
``D``, and the estimate ``2·tan(x/2)·F`` has relative error at most ``tan²(x/2)``. Along one
direction the projected pair sum is exact after one sort. See ``docs/method.md``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.spatial.distance import cdist

from .errors import ParameterError

__all__ = [
    "METHODS",
    "GroupPairSums",
    "PairSum",
    "directions_for_tolerance",
    "projection_factors",
    "projection_error",
    "exact_pair_sum",
    "pair_distance_sum",
    "grouped_pair_sums",
]

METHODS = ("auto", "exact", "projection")

#: unit roundoff of float64
_UNIT_ROUNDOFF = np.finfo(np.float64).eps / 2
#: elements per block of the exact kernels and per chunk of the padded projection layout;
#: keeps temporary arrays near 16-32 MB whatever the group sizes
_BLOCK_ELEMENTS = 1 << 21
#: groups up to this size are summed exactly all at once in a padded (groups, s, s) block
_SMALL_EXACT = 64

Progress = Callable[[int, int], None]


def projection_error(directions: int) -> float:
    """Guaranteed relative error of the projection estimate with ``directions`` directions.

    Parameters
    ----------
    directions : int
        Number of equally spaced directions ``m`` (at least 1).

    Returns
    -------
    float
        ``tan²(π / (4m))``.

    Examples
    --------
    >>> round(projection_error(8), 5)
    0.0097
    """
    if directions < 1:
        raise ParameterError(f"directions must be at least 1. Got {directions} instead.")
    return math.tan(math.pi / (4 * directions)) ** 2


def directions_for_tolerance(tolerance: float) -> int:
    """Fewest directions whose guaranteed relative error does not exceed ``tolerance``.

    Parameters
    ----------
    tolerance : float
        Relative error bound, in (0, 0.5].

    Returns
    -------
    int
        The smallest ``m`` with ``tan²(π/(4m)) ≤ tolerance``, i.e. ``ceil(π / (4·arctan √ε))``.
        A margin of one part in a million is kept for the rounding terms the kernels add.

    Examples
    --------
    >>> directions_for_tolerance(0.01), directions_for_tolerance(1e-6)
    (8, 786)
    """
    if not (0 < tolerance <= 0.5) or math.isnan(tolerance):
        raise ParameterError(
            f"The tolerance must be in (0, 0.5] for the projection estimate. Got {tolerance!r} "
            "instead; use 0 with the exact method."
        )
    target = tolerance * (1 - 1e-6)
    m = max(2, math.ceil(math.pi / (4 * math.atan(math.sqrt(target)))))
    while projection_error(m) > target:
        m += 1
    while m > 2 and projection_error(m - 1) <= target:
        m -= 1
    return m


def projection_factors(directions: int) -> tuple[float, float, float]:
    """Factors turning the summed projections ``F`` into bounds and the estimate.

    Parameters
    ----------
    directions : int
        Number of equally spaced directions ``m``.

    Returns
    -------
    lower, upper, estimate : float
        ``sin x``, ``tan x`` and ``2 tan(x/2)`` with ``x = π/(2m)``: the true total lies in
        ``[lower·F, upper·F]`` and ``estimate·F`` is the estimate.

    Examples
    --------
    >>> [round(f, 6) for f in projection_factors(2)]
    [0.707107, 1.0, 0.828427]
    """
    x = math.pi / (2 * directions)
    return math.sin(x), math.tan(x), 2 * math.tan(x / 2)


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
    ``method`` code -1 and 0 directions.
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


def _check_points(x, y, weights):
    x = np.ascontiguousarray(x, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    if x.ndim != 1 or x.shape != y.shape:
        raise ParameterError(
            f"x and y must be 1-D arrays of the same length. Got shapes {x.shape} and {y.shape}."
        )
    bad = ~(np.isfinite(x) & np.isfinite(y))
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
        bad = ~np.isfinite(weights) | (weights < 0)
        if bad.any():
            raise ParameterError(
                f"{int(bad.sum())} weight(s) are negative, NaN or infinite (first at index "
                f"{int(np.flatnonzero(bad)[0])}); weights must be finite and non-negative."
            )
    return x, y, weights


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
    x, y, weights = _check_points(x, y, weights)
    return float(_exact_one(*_centred(x, y), weights))


def _centred(x, y):
    # Subtracting a point of the set first is exact for nearby values and keeps digits that
    # a mean of 5e6-sized northings would lose; the mean of the differences then centres it.
    if x.size == 0:
        return x, y
    dx = x - x[0]
    dy = y - y[0]
    return dx - dx.mean(), dy - dy.mean()


def _exact_one(x, y, w) -> float:
    """Exact weighted pair sum of one centred group (blocks of rows against the rest)."""
    n = x.size
    if n < 2:
        return 0.0
    pts = np.column_stack([x, y])
    w = np.ones(n) if w is None else w
    block = max(1, min(n, _BLOCK_ELEMENTS // n))
    total = 0.0
    for a in range(0, n, block):
        b = min(n, a + block)
        d = cdist(pts[a:b], pts[a:])
        # pairs inside the block appear twice in d[:, :b-a]; pairs with later rows once
        total += 0.5 * float(w[a:b] @ d[:, : b - a] @ w[a:b])
        if b < n:
            total += float(w[a:b] @ d[:, b - a :] @ w[b:])
    return total


def _exact_padded(px, py, pw, valid) -> np.ndarray:
    """Exact pair sums of many small groups laid out as padded rows (padding has weight 0)."""
    dx = px[:, :, None] - px[:, None, :]
    dy = py[:, :, None] - py[:, None, :]
    d = np.sqrt(dx * dx + dy * dy)
    w = np.where(valid, pw, 0.0)
    return 0.5 * np.einsum("gi,gij,gj->g", w, d, w)


def _cost_exact(n):
    # measured on the project's 2-core machines: about 2.5 ns per ordered pair with cdist blocks
    return 2.5e-9 * n * n


def _cost_projection(n, m, weighted):
    # per point and direction: projection, row sort (argsort and gathers when weighted), sums
    per = (25e-9 if weighted else 12e-9) + (2.5e-9 if weighted else 1e-9) * np.log2(n + 1)
    return 2e-5 + m * n * per


def _size_classes(counts, members):
    """Split the groups ``members`` into classes of similar size (powers of two)."""
    sizes = counts[members]
    klass = np.floor(np.log2(np.maximum(sizes, 1))).astype(np.int64)
    order = np.argsort(klass, kind="stable")
    members, klass = members[order], klass[order]
    bounds = np.flatnonzero(np.diff(klass)) + 1
    return np.split(members, bounds)


def _padded(starts, counts, groups):
    """Index matrix (groups, s) into the group-sorted arrays, plus its validity mask."""
    s = int(counts[groups].max())
    offsets = np.arange(s)
    valid = offsets[None, :] < counts[groups][:, None]
    index = np.where(valid, starts[groups][:, None] + offsets[None, :], 0)
    return index, valid


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
    if method not in METHODS:
        raise ParameterError(f"method must be one of {', '.join(METHODS)}. Got {method!r} instead.")
    if not (0 <= tolerance <= 0.5) or math.isnan(tolerance):
        raise ParameterError(f"The tolerance must be in [0, 0.5]. Got {tolerance!r} instead.")
    if method == "projection" and tolerance == 0:
        raise ParameterError(
            "The projection method needs a tolerance above 0; use method 'exact' for exact sums."
        )
    x, y, weights = _check_points(x, y, weights)
    groups = np.asarray(groups)
    if groups.shape != x.shape or (groups.size and not np.issubdtype(groups.dtype, np.integer)):
        raise ParameterError("groups must be one integer code per point.")
    if n_groups is None:
        n_groups = int(groups.max()) + 1 if groups.size else 0
    if groups.size and (groups.min() < 0 or groups.max() >= n_groups):
        raise ParameterError(f"group codes must lie in [0, {n_groups}).")

    order = np.argsort(groups, kind="stable")
    codes = groups[order]
    counts = np.bincount(codes, minlength=n_groups).astype(np.int64)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
    xs, ys = x[order], y[order]
    ws = None if weights is None else weights[order]

    # centre every group on itself (see _centred for why a member point comes first)
    if xs.size:
        first = np.minimum(starts, xs.size - 1)
        xs = xs - xs[first][codes]
        ys = ys - ys[first][codes]
        safe = np.maximum(counts, 1)
        xs -= (np.bincount(codes, xs, n_groups) / safe)[codes]
        ys -= (np.bincount(codes, ys, n_groups) / safe)[codes]

    wpt = np.ones(xs.size) if ws is None else ws
    weight_sum = np.bincount(codes, wpt, n_groups)
    pair_weight = 0.5 * np.bincount(codes, wpt * (weight_sum[codes] - wpt), n_groups)
    pair_weight = np.maximum(pair_weight, 0.0)

    total = np.full(n_groups, np.nan)
    lower = np.full(n_groups, np.nan)
    upper = np.full(n_groups, np.nan)
    rel_bound = np.full(n_groups, np.nan)
    exact = np.zeros(n_groups, dtype=bool)
    dirs = np.zeros(n_groups, dtype=np.int64)

    live = np.flatnonzero((counts >= 2) & (pair_weight > 0))
    m = 0 if tolerance == 0 else directions_for_tolerance(tolerance)
    if method == "exact" or tolerance == 0:
        use_exact = np.ones(live.size, dtype=bool)
    elif method == "projection":
        use_exact = np.zeros(live.size, dtype=bool)
    else:
        n = counts[live].astype(np.float64)
        use_exact = _cost_exact(n) <= _cost_projection(n, m, ws is not None)
    exact_groups, proj_groups = live[use_exact], live[~use_exact]

    work_total = int(counts[exact_groups].sum() + m * counts[proj_groups].sum())
    done = 0

    def tick(units):
        nonlocal done
        done += int(units)
        if progress is not None:
            progress(done, work_total)

    # exact sums: many small groups at once, larger ones in blocks
    small = exact_groups[counts[exact_groups] <= _SMALL_EXACT]
    for klass in _size_classes(counts, small) if small.size else []:
        s = int(counts[klass].max())
        step = max(1, _BLOCK_ELEMENTS // (s * s))
        for a in range(0, klass.size, step):
            chunk = klass[a : a + step]
            index, valid = _padded(starts, counts, chunk)
            cw = np.ones(index.shape) if ws is None else ws[index]
            total[chunk] = _exact_padded(xs[index], ys[index], cw, valid)
            tick(counts[chunk].sum())
    for g in exact_groups[counts[exact_groups] > _SMALL_EXACT]:
        sl = slice(starts[g], starts[g] + counts[g])
        total[g] = _exact_one(xs[sl], ys[sl], None if ws is None else ws[sl])
        tick(counts[g])
    # Brute force is exact up to float rounding: every term is non-negative, so the computed
    # sum is within (n_g + 8)·u of the exact one (summation plus the distance itself).
    rounding = (counts[exact_groups] + 8) * _UNIT_ROUNDOFF
    lower[exact_groups] = total[exact_groups] * (1 - rounding)
    upper[exact_groups] = total[exact_groups] * (1 + rounding)
    rel_bound[exact_groups] = rounding
    exact[exact_groups] = True

    if proj_groups.size:
        summed = np.zeros(n_groups)
        # Rounding: |c_i| ≤ w_i W_g and |p_i| ≤ r_i, so each direction's computed sum is within
        # (4 n_g + 2)·u·W_g·Σ w_i r_i of the exact projected sum (local cumulative sums only).
        radius_sum = np.bincount(codes, wpt * np.hypot(xs, ys), n_groups)
        slack = (4 * counts + 2) * _UNIT_ROUNDOFF * weight_sum * radius_sum
        angles = np.arange(m) * (math.pi / m)
        cos_t, sin_t = np.cos(angles), np.sin(angles)
        for klass in _size_classes(counts, proj_groups):
            s = int(counts[klass].max())
            step = max(1, _BLOCK_ELEMENTS // s)
            for a in range(0, klass.size, step):
                chunk = klass[a : a + step]
                index, valid = _padded(starts, counts, chunk)
                cx, cy = xs[index], ys[index]
                cw = None if ws is None else np.where(valid, ws[index], 0.0)
                summed[chunk] = _projected_rows(cx, cy, cw, valid, counts[chunk], cos_t, sin_t)
                tick(m * counts[chunk].sum())
        lo_f, hi_f, est_f = projection_factors(m)
        F = summed[proj_groups]
        E = m * slack[proj_groups]
        total[proj_groups] = est_f * F
        lower[proj_groups] = lo_f * np.maximum(F - E, 0.0)
        upper[proj_groups] = hi_f * (F + E)
        dirs[proj_groups] = m
        est, lo, hi = total[proj_groups], lower[proj_groups], upper[proj_groups]
        with np.errstate(divide="ignore", invalid="ignore"):
            rb = np.maximum(np.where(lo > 0, est / lo - 1, np.inf), 1 - est / hi)
        rel_bound[proj_groups] = np.where(hi > 0, rb, 0.0)

    return GroupPairSums(
        n_points=counts,
        weight_sum=weight_sum,
        pair_weight=pair_weight,
        total=total,
        lower=lower,
        upper=upper,
        rel_bound=rel_bound,
        exact=exact,
        directions=dirs,
    )


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
        x, y, np.zeros(x.shape, dtype=np.int64), 1, weights, tolerance=tolerance, method=method
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
