"""Exact sums of ellipsoidal geodesic distances, in bounded-memory blocks of pairs.

Every distance comes from ``pyproj.Geod(a=..., f=...).inv``, which implements C. F. F. Karney,
"Algorithms for geodesics", Journal of Geodesy 87 (2013) 43-55: the distance of every pair of
points on the ellipsoid, accurate to round-off (about 15 nm on the Earth) for any two points,
antipodal ones included. Points are longitudes and latitudes in degrees; the ellipsoid is given
by its semi-major axis ``a`` (metres) and flattening ``f``. Nothing here knows about CRS objects.

Work is done over pairs ``i < j`` of each group, generated in blocks of about ``BLOCK_PAIRS``
pairs, so memory stays at a few tens of MB whatever the group sizes. The cost is about 1 µs per
pair, so exact geodesic sums are for groups of up to some tens of thousands of points.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np

from ..errors import ParameterError
from ._common import (
    UNIT_ROUNDOFF,
    Progress,
    Ticker,
    check_groups,
    check_points,
    weights_of_others,
)
from .cross import MAX_CROSS_GROUPS, CrossPairSums
from .pairs import GroupPairSums
from .points import PointSums

__all__ = [
    "BLOCK_PAIRS",
    "WGS84_A",
    "WGS84_F",
    "check_lonlat",
    "exact_geodesic_pair_sums",
    "exact_geodesic_point_sums",
    "exact_geodesic_cross_sums",
]

#: pairs per block: the seven arrays pyproj reads and writes stay near 15 MB
BLOCK_PAIRS = 1 << 18
#: WGS 84 semi-major axis (metres) and flattening, the defaults of the public functions
WGS84_A = 6378137.0
WGS84_F = 1 / 298.257223563
#: absolute allowance for one computed distance, in metres for an ellipsoid the size of the
#: Earth (scaled by a / WGS84_A): Karney (2013) bounds the error of the algorithm by 15 nm
DISTANCE_ALLOWANCE = 2e-8
#: flattening beyond which the series of Karney (2013) are no longer accurate to round-off
MAX_FLATTENING = 0.02


def check_lonlat(lon, lat, weights):
    """Validated float arrays of longitudes and latitudes (degrees) and optional weights."""
    lon, lat, weights = check_points(lon, lat, weights)
    bad = np.abs(lat) > 90
    if bad.any():
        raise ParameterError(
            f"{int(bad.sum())} latitude(s) lie outside [-90, 90] degrees (first at index "
            f"{int(np.flatnonzero(bad)[0])}: {lat[bad][0]!r}); geodesic distances need longitude and "
            "latitude in degrees."
        )
    return lon, lat, weights


def _geod(a: float, f: float):
    import pyproj

    if not (math.isfinite(a) and a > 0):
        raise ParameterError(f"The semi-major axis must be a positive number of metres. Got {a!r} instead.")
    if not (math.isfinite(f) and abs(f) <= MAX_FLATTENING):
        raise ParameterError(
            f"The flattening must lie in [-{MAX_FLATTENING}, {MAX_FLATTENING}], where the geodesic "
            f"series are accurate to round-off. Got {f!r} instead."
        )
    return pyproj.Geod(a=a, f=f)


def _pair_blocks(counts, starts, members, block: int = BLOCK_PAIRS) -> Iterator[tuple]:
    """Pairs ``i < j`` inside each group of ``members``, in blocks of about ``block`` pairs.

    Yields ``(i, j, code)``: indices into the group-sorted arrays and the group of each pair.
    Groups with at most ``block`` pairs are batched by size (one ``triu_indices`` per size);
    larger groups are cut into runs of rows, every row paired with all the later rows.
    """
    members = np.asarray(members, dtype=np.int64)
    sizes = counts[members]
    pairs = sizes * (sizes - 1) // 2
    small = members[(pairs > 0) & (pairs <= block)]
    for size in np.unique(counts[small]):
        same = small[counts[small] == size]
        first, second = np.triu_indices(int(size), 1)
        step = max(1, block // first.size)
        for a in range(0, same.size, step):
            chunk = same[a : a + step]
            base = starts[chunk][:, None]
            yield (
                (base + first).ravel(),
                (base + second).ravel(),
                np.repeat(chunk, first.size),
            )
    for g in members[pairs > block]:
        n, start = int(counts[g]), int(starts[g])
        per_row = n - 1 - np.arange(n - 1)
        ends = np.cumsum(per_row)
        row = 0
        while row < n - 1:
            done = ends[row - 1] if row else 0
            stop = max(row + 1, int(np.searchsorted(ends, done + block, side="right")))
            rows = np.arange(row, stop)
            cnt = per_row[row:stop]
            i = np.repeat(rows, cnt)
            offset = np.arange(i.size) - np.repeat(np.cumsum(cnt) - cnt, cnt)
            j = i + 1 + offset
            yield start + i, start + j, np.full(i.size, g, dtype=np.int64)
            row = stop


class _Compensated:
    """Running sums with Neumaier's compensation, so adding many blocks costs no digits."""

    def __init__(self, size: int):
        self.sum = np.zeros(size)
        self.comp = np.zeros(size)

    def add(self, index, values) -> None:
        """Add ``values`` at the distinct positions ``index``."""
        s = self.sum[index]
        t = s + values
        self.comp[index] += np.where(np.abs(s) >= np.abs(values), (s - t) + values, (values - t) + s)
        self.sum[index] = t

    def result(self) -> np.ndarray:
        return self.sum + self.comp


def _bin(index, values):
    """Sums of ``values`` by ``index``, over the distinct indices only."""
    unique, inverse = np.unique(index, return_inverse=True)
    return unique, np.bincount(inverse.ravel(), values, unique.size)


class _Layout:
    """Points sorted by group, with the counts and weight sums every kernel needs."""

    def __init__(self, lon, lat, groups, n_groups, weights):
        self.order = np.argsort(groups, kind="stable")
        self.codes = groups[self.order]
        self.counts = np.bincount(self.codes, minlength=n_groups).astype(np.int64)
        self.starts = np.concatenate([[0], np.cumsum(self.counts)[:-1]]).astype(np.int64)
        self.lon, self.lat = lon[self.order], lat[self.order]
        self.weighted = weights is not None
        self.w = np.ones(lon.size) if weights is None else weights[self.order]
        self.weight_sum = np.bincount(self.codes, self.w, n_groups)
        self.other = weights_of_others(self.codes, n_groups, weights if weights is None else self.w)[0]

    def distances(self, geod, i, j):
        _, _, s = geod.inv(self.lon[i], self.lat[i], self.lon[j], self.lat[j])
        return np.asarray(s, dtype=np.float64)


def _interval(total, rel, absolute):
    """``[total(1 − rel) − absolute, total(1 + rel) + absolute]`` and its relative bound."""
    lower = np.maximum(total * (1 - rel) - absolute, 0.0)
    upper = total * (1 + rel) + absolute
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = np.maximum(np.where(lower > 0, total / lower - 1, np.inf), 1 - total / upper)
    return lower, upper, np.where(upper > 0, bound, 0.0)


def exact_geodesic_pair_sums(
    lon,
    lat,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    a: float = WGS84_A,
    f: float = WGS84_F,
    progress: Progress | None = None,
) -> GroupPairSums:
    """Exact ``Σ_{i<j} w_i w_j s_ij`` of geodesic distances within every group.

    Parameters
    ----------
    lon, lat : array_like
        Longitudes and latitudes in degrees.
    groups : array_like of int
        Group code of every point, in ``[0, n_groups)``.
    n_groups : int, optional
        Number of groups (default ``groups.max() + 1``).
    weights : array_like, optional
        Non-negative weights; all ones if omitted.
    a, f : float
        Semi-major axis (metres) and flattening of the ellipsoid; WGS 84 by default.
    progress : callable, optional
        Called as ``progress(done, total)`` in pairs.

    Returns
    -------
    GroupPairSums
        One entry per group; distances in metres. The interval allows for the summation's
        rounding and 20 nm per distance (Karney's bound is 15 nm).

    Examples
    --------
    >>> r = exact_geodesic_pair_sums([0, 0], [0, 90], [0, 0])  # a meridian quadrant of WGS 84
    >>> round(float(r.total[0]), 3)
    10001965.729
    """
    lon, lat, weights = check_lonlat(lon, lat, weights)
    groups, n_groups = check_groups(groups, lon.size, n_groups)
    geod = _geod(a, f)
    lay = _Layout(lon, lat, groups, n_groups, weights)
    counts = lay.counts
    pair_weight = np.maximum(0.5 * np.bincount(lay.codes, lay.w * lay.other, n_groups), 0.0)
    live = np.flatnonzero((counts >= 2) & (pair_weight > 0))
    tick = Ticker(progress, int((counts[live] * (counts[live] - 1) // 2).sum()))
    total = _Compensated(n_groups)
    apart = _Compensated(n_groups)  # weight of the pairs at a positive distance
    for i, j, code in _pair_blocks(counts, lay.starts, live):
        s = lay.distances(geod, i, j)
        ww = lay.w[i] * lay.w[j]
        index, sums = _bin(code, ww * s)
        total.add(index, sums)
        apart.add(*_bin(code, ww * (s > 0)))
        tick(i.size)

    out = np.full(n_groups, np.nan)
    lower, upper, bound = out.copy(), out.copy(), out.copy()
    chain = np.minimum(counts * (counts - 1) // 2, BLOCK_PAIRS) + 16
    rel = chain * UNIT_ROUNDOFF
    absolute = DISTANCE_ALLOWANCE * (a / WGS84_A) * apart.result()
    sums = total.result()
    out[live] = sums[live]
    lower[live], upper[live], bound[live] = _interval(sums[live], rel[live], absolute[live])
    exact = np.zeros(n_groups, dtype=bool)
    exact[live] = True
    return GroupPairSums(
        n_points=counts,
        weight_sum=lay.weight_sum,
        pair_weight=pair_weight,
        total=out,
        lower=lower,
        upper=upper,
        rel_bound=bound,
        exact=exact,
        directions=np.zeros(n_groups, dtype=np.int64),
    )


def exact_geodesic_point_sums(
    lon,
    lat,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    a: float = WGS84_A,
    f: float = WGS84_F,
    progress: Progress | None = None,
) -> PointSums:
    """Exact ``Σ_j w_j s_ij`` from every point to the other points of its group.

    Parameters are those of :func:`exact_geodesic_pair_sums`.

    Returns
    -------
    PointSums
        One entry per input point, in input order; distances in metres.

    Examples
    --------
    >>> r = exact_geodesic_point_sums([0, 0, 90], [0, 90, 0], [0, 0, 0])
    >>> [round(float(v) / 1e3, 3) for v in r.total]  # two quadrants each (meridian, equator)
    [20020.72, 20003.931, 20020.72]
    """
    lon, lat, weights = check_lonlat(lon, lat, weights)
    groups, n_groups = check_groups(groups, lon.size, n_groups)
    geod = _geod(a, f)
    lay = _Layout(lon, lat, groups, n_groups, weights)
    counts = lay.counts
    pair_weight = np.bincount(lay.codes, lay.w * lay.other, n_groups)
    live = np.flatnonzero((counts >= 2) & (pair_weight > 0))
    n = lon.size
    tick = Ticker(progress, int((counts[live] * (counts[live] - 1) // 2).sum()))
    total = _Compensated(n)
    apart = _Compensated(n)
    for i, j, _ in _pair_blocks(counts, lay.starts, live):
        s = lay.distances(geod, i, j)
        both = np.concatenate([i, j])
        total.add(*_bin(both, np.concatenate([lay.w[j] * s, lay.w[i] * s])))
        positive = s > 0
        apart.add(*_bin(both, np.concatenate([lay.w[j] * positive, lay.w[i] * positive])))
        tick(i.size)

    in_live = np.isin(lay.codes, live) & (lay.other > 0)
    sums = np.where(in_live, total.result(), np.nan)
    chain = np.minimum(2 * counts[lay.codes], BLOCK_PAIRS) + 16
    lower, upper, bound = _interval(
        sums, chain * UNIT_ROUNDOFF, DISTANCE_ALLOWANCE * (a / WGS84_A) * apart.result()
    )
    for array in (lower, upper, bound):
        array[~in_live] = np.nan

    def unsort(values):
        out = np.empty_like(values)
        out[lay.order] = values
        return out

    return PointSums(
        total=unsort(sums),
        lower=unsort(lower),
        upper=unsort(upper),
        rel_bound=unsort(bound),
        other_weight=unsort(lay.other),
        exact=unsort(in_live),
        directions=np.zeros(n, dtype=np.int64),
    )


def exact_geodesic_cross_sums(
    lon,
    lat,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    a: float = WGS84_A,
    f: float = WGS84_F,
    progress: Progress | None = None,
) -> CrossPairSums:
    """Exact geodesic totals between every pair of groups, and of each group with itself.

    Every pair of points ``i < j`` of the whole set is visited once: its weighted distance goes
    to the entry of its two groups. Off the diagonal, ``total[A, B]`` is
    ``Σ_{a∈A, b∈B} w_a w_b s_ab``; on it, the group's own pair total, as in
    :func:`~toolbox.kernels.cross_pair_sums`. Parameters are those of
    :func:`exact_geodesic_pair_sums`.

    Returns
    -------
    CrossPairSums
        G × G matrices; distances in metres.

    Examples
    --------
    >>> r = exact_geodesic_cross_sums([0, 0, 90], [0, 90, 0], [0, 1, 1])
    >>> round(float(r.total[0, 1]) / 1e3, 3)  # from (0, 0): a meridian and an equatorial quadrant
    20020.72
    """
    lon, lat, weights = check_lonlat(lon, lat, weights)
    groups, n_groups = check_groups(groups, lon.size, n_groups)
    if n_groups > MAX_CROSS_GROUPS:
        raise ParameterError(
            f"{n_groups} groups would make a {n_groups} × {n_groups} result; at most "
            f"{MAX_CROSS_GROUPS} groups are supported. Group by fewer or coarser fields."
        )
    geod = _geod(a, f)
    lay = _Layout(lon, lat, groups, n_groups, weights)
    n = lon.size
    every = np.array([n], dtype=np.int64)
    tick = Ticker(progress, n * (n - 1) // 2)
    cells = n_groups * n_groups
    total = _Compensated(cells)
    apart = _Compensated(cells)
    for i, j, _ in _pair_blocks(every, np.zeros(1, dtype=np.int64), [0]):
        s = lay.distances(geod, i, j)
        cell = lay.codes[i] * n_groups + lay.codes[j]  # sorted by group, so codes[i] <= codes[j]
        ww = lay.w[i] * lay.w[j]
        total.add(*_bin(cell, ww * s))
        apart.add(*_bin(cell, ww * (s > 0)))
        tick(i.size)
    half = total.result().reshape(n_groups, n_groups)
    half_apart = apart.result().reshape(n_groups, n_groups)
    diag = np.arange(n_groups)
    sums = half + half.T
    sums[diag, diag] = half[diag, diag]
    positive = half_apart + half_apart.T
    positive[diag, diag] = half_apart[diag, diag]

    weight_sum = lay.weight_sum
    pair_weight = np.outer(weight_sum, weight_sum)
    pair_weight[diag, diag] = np.maximum(0.5 * np.bincount(lay.codes, lay.w * lay.other, n_groups), 0.0)
    chain = min(n * (n - 1) // 2, BLOCK_PAIRS) + 16
    lower, upper, bound = _interval(
        sums, chain * UNIT_ROUNDOFF, DISTANCE_ALLOWANCE * (a / WGS84_A) * positive
    )
    missing = ~(pair_weight > 0)
    for matrix in (sums, lower, upper, bound):
        matrix[missing] = np.nan
    return CrossPairSums(
        n_points=lay.counts,
        weight_sum=weight_sum,
        pair_weight=pair_weight,
        total=sums,
        lower=lower,
        upper=upper,
        rel_bound=bound,
        exact=~missing,
        directions=np.zeros((n_groups, n_groups), dtype=np.int64),
    )
