"""The estimator on plain arrays: one call per sum kind, for either distance kind."""

from __future__ import annotations

import numpy as np

from ..kernels import WGS84_A, WGS84_F
from .points import Points
from .results import CrossPairSums, GroupPairSums, PairSum, PointSums
from .sums import cross_sums, pair_sums, point_sums

__all__ = ["grouped_pair_sums", "grouped_point_sums", "cross_pair_sums", "pair_distance_sum", "exact_pair_sum"]


def _points(x, y, groups, n_groups, weights, distance, a, f):
    return Points.build(x, y, groups, n_groups, weights, distance=distance, a=a, f=f)


def grouped_pair_sums(
    x,
    y,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    distance: str = "planar",
    a: float = WGS84_A,
    f: float = WGS84_F,
    tolerance: float = 0.01,
    method: str = "auto",
    progress=None,
    threads: int | None = None,
) -> GroupPairSums:
    """Total pair distance of every group, each with a guaranteed interval.

    Parameters
    ----------
    x, y : array_like
        Planar coordinates, or longitudes and latitudes in degrees (``distance="geodesic"``).
    groups : array_like of int
        Group code of every point, in ``[0, n_groups)``.
    n_groups : int, optional
        Number of groups (default ``groups.max() + 1``); groups without points are reported.
    weights : array_like, optional
        Non-negative weight of every point; the weighted total is ``Σ_{i<j} w_i w_j d_ij``.
    distance : {"planar", "geodesic"}
        Straight lines in the plane, or geodesics on the ellipsoid ``a``, ``f`` (WGS 84).
    tolerance, method, progress, threads
        As for :func:`toolbox.estimate.pair_sums`.

    Returns
    -------
    GroupPairSums

    Examples
    --------
    >>> r = grouped_pair_sums([0, 1, 0, 0, 3], [0, 0, 0, 4, 0], [0, 0, 1, 1, 1])
    >>> r.total.tolist(), r.exact.tolist()
    ([1.0, 12.0], [True, True])
    """
    points = _points(x, y, groups, n_groups, weights, distance, a, f)
    return pair_sums(points, tolerance=tolerance, method=method, progress=progress, threads=threads)


def grouped_point_sums(
    x,
    y,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    distance: str = "planar",
    a: float = WGS84_A,
    f: float = WGS84_F,
    tolerance: float = 0.01,
    method: str = "auto",
    progress=None,
) -> PointSums:
    """Weighted sum of distances from every point to the other points of its group.

    Parameters are those of :func:`grouped_pair_sums`; point i's sum is ``Σ_j w_j d_ij``.

    Examples
    --------
    >>> r = grouped_point_sums([0, 3, 0], [0, 0, 4], [0, 0, 0], tolerance=0)
    >>> r.total.tolist()  # 3-4-5 triangle: each vertex's two sides
    [7.0, 8.0, 9.0]
    """
    points = _points(x, y, groups, n_groups, weights, distance, a, f)
    return point_sums(points, tolerance=tolerance, method=method, progress=progress)


def cross_pair_sums(
    x,
    y,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    distance: str = "planar",
    a: float = WGS84_A,
    f: float = WGS84_F,
    tolerance: float = 0.01,
    method: str = "auto",
    progress=None,
) -> CrossPairSums:
    """Total distance between the points of every pair of groups, with guaranteed bounds.

    Parameters are those of :func:`grouped_pair_sums`.

    Examples
    --------
    >>> r = cross_pair_sums([0, 1, 4, 4], [0, 0, 0, 3], [0, 0, 1, 1], tolerance=0)
    >>> r.total[0, 1].round(6)
    np.float64(16.242641)
    """
    points = _points(x, y, groups, n_groups, weights, distance, a, f)
    return cross_sums(points, tolerance=tolerance, method=method, progress=progress)


def exact_pair_sum(x, y, weights=None) -> float:
    """Exact ``Σ_{i<j} w_i w_j |p_i − p_j|`` of one set of planar points.

    Examples
    --------
    >>> exact_pair_sum([0, 3, 0], [0, 0, 4])  # a 3-4-5 triangle
    12.0
    """
    r = grouped_pair_sums(x, y, np.zeros(np.shape(x), dtype=np.int8), 1, weights, tolerance=0)
    return float(np.nan_to_num(r.total[0]))


def pair_distance_sum(x, y, weights=None, *, tolerance: float = 0.01, method: str = "auto") -> PairSum:
    """Total of all pair distances of one set of planar points, with a guaranteed interval.

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
    r = grouped_pair_sums(x, y, np.zeros(x.shape, dtype=np.int8), 1, weights, tolerance=tolerance, method=method)
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
