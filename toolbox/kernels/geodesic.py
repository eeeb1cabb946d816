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

import functools
import math
from collections.abc import Iterator

import numpy as np

from ..errors import ParameterError
from ._common import UNIT_ROUNDOFF, Raw, Ticker, check_points

__all__ = [
    "BLOCK_PAIRS",
    "WGS84_A",
    "WGS84_F",
    "check_lonlat",
    "geod",
    "exact_geodesic_pair_raw",
    "exact_geodesic_point_raw",
    "exact_geodesic_cross_raw",
    "exact_geodesic_against_raw",
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


@functools.cache
def geod(a: float, f: float):
    """The ``pyproj.Geod`` of the ellipsoid (a, f), checked, made once per ellipsoid."""
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


def _distances(geodesic, lay, i, j):
    _, _, s = geodesic.inv(lay.x[i], lay.y[i], lay.x[j], lay.y[j])
    return np.asarray(s, dtype=np.float64)


def _allowance(a):
    return DISTANCE_ALLOWANCE * (a / WGS84_A)


def exact_geodesic_pair_raw(lay, groups, a: float, f: float, tick: Ticker) -> Raw:
    """Exact ``Σ_{i<j} w_i w_j s_ij`` of ``groups`` of a layout of longitudes and latitudes.

    One entry per group of ``groups``; the allowance covers the summation's rounding and
    20 nm per distance (Karney's bound is 15 nm).
    """
    geodesic = geod(a, f)
    counts = lay.counts
    total = _Compensated(lay.n_groups)
    apart = _Compensated(lay.n_groups)  # weight of the pairs at a positive distance
    for i, j, code in _pair_blocks(counts, lay.starts, groups):
        s = _distances(geodesic, lay, i, j)
        ww = lay.wpt[i] * lay.wpt[j]
        total.add(*_bin(code, ww * s))
        apart.add(*_bin(code, ww * (s > 0)))
        tick(i.size)
    chain = np.minimum(counts * (counts - 1) // 2, BLOCK_PAIRS) + 16
    return Raw(
        total.result()[groups],
        0,
        relative=chain[groups] * UNIT_ROUNDOFF,
        absolute=_allowance(a) * apart.result()[groups],
    )


def exact_geodesic_point_raw(lay, groups, a: float, f: float, tick: Ticker) -> Raw:
    """Exact ``Σ_j w_j s_ij`` of every point of ``groups`` (one entry per point, group order)."""
    geodesic = geod(a, f)
    n = lay.x.size
    total = _Compensated(n)
    apart = _Compensated(n)
    for i, j, _ in _pair_blocks(lay.counts, lay.starts, groups):
        s = _distances(geodesic, lay, i, j)
        both = np.concatenate([i, j])
        total.add(*_bin(both, np.concatenate([lay.wpt[j] * s, lay.wpt[i] * s])))
        positive = s > 0
        apart.add(*_bin(both, np.concatenate([lay.wpt[j] * positive, lay.wpt[i] * positive])))
        tick(i.size)
    chain = np.minimum(2 * lay.counts[lay.codes], BLOCK_PAIRS) + 16
    return Raw(total.result(), 0, relative=chain * UNIT_ROUNDOFF, absolute=_allowance(a) * apart.result())


def exact_geodesic_cross_raw(lay, a: float, f: float, tick: Ticker) -> Raw:
    """Exact G × G geodesic cross sums; the diagonal holds each group's own pair total.

    Every pair ``i < j`` of the whole set is visited once: its weighted distance goes to the
    entry of its two groups.
    """
    geodesic = geod(a, f)
    n, n_groups = lay.x.size, lay.n_groups
    cells = n_groups * n_groups
    total = _Compensated(cells)
    apart = _Compensated(cells)
    every = np.array([n], dtype=np.int64)
    for i, j, _ in _pair_blocks(every, np.zeros(1, dtype=np.int64), [0]):
        s = _distances(geodesic, lay, i, j)
        cell = lay.codes[i] * n_groups + lay.codes[j]  # sorted by group, so codes[i] <= codes[j]
        ww = lay.wpt[i] * lay.wpt[j]
        total.add(*_bin(cell, ww * s))
        apart.add(*_bin(cell, ww * (s > 0)))
        tick(i.size)
    diag = np.arange(n_groups)

    def symmetric(half):
        half = half.reshape(n_groups, n_groups)
        out = half + half.T
        out[diag, diag] = half[diag, diag]
        return out

    chain = min(n * (n - 1) // 2, BLOCK_PAIRS) + 16
    return Raw(
        symmetric(total.result()),
        0,
        relative=chain * UNIT_ROUNDOFF,
        absolute=_allowance(a) * symmetric(apart.result()),
    )


def exact_geodesic_against_raw(alon, alat, blon, blat, bw, a: float, f: float) -> Raw:
    """Exact ``Σ_j w_j s(a_i, b_j)`` of every point a_i against the set b (longitudes, latitudes)."""
    geodesic = geod(a, f)
    n = blon.size
    total = np.zeros(alon.size)
    apart = np.zeros(alon.size)
    rows = max(1, BLOCK_PAIRS // max(n, 1))
    for start in range(0, alon.size, rows):
        i = np.repeat(np.arange(start, min(start + rows, alon.size)), n)
        j = np.tile(np.arange(n), i.size // n if n else 0)
        s = np.asarray(geodesic.inv(alon[i], alat[i], blon[j], blat[j])[2])
        total += np.bincount(i, bw[j] * s, alon.size)
        apart += np.bincount(i, bw[j] * (s > 0), alon.size)
    chain = min(n, BLOCK_PAIRS) + 16
    return Raw(total, 0, relative=chain * UNIT_ROUNDOFF, absolute=_allowance(a) * apart)
