"""Distance from every point of a group to the nearest point of another group, exact.

The planar / geodesic choice is made here, once, as for the pair sums; the kernels
(:mod:`toolbox.kernels.nearest`) do the searching: a k-d tree for planar points, and for
longitudes and latitudes a chord k-d tree whose candidates are all measured along geodesics
(exact up to the round-off of Karney's algorithm).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..kernels.nearest import nearest_geodesic, nearest_planar
from .points import Points

__all__ = ["NearestMeans", "nearest_means"]


@dataclass(frozen=True)
class NearestMeans:
    """Per (from-group, to-group) pair: the weighted mean and the largest nearest distance.

    ``mean[a, b]`` is Σ_i w_i d_i / Σ_i w_i over the points i of group ``a``, with d_i the
    distance from i to the nearest point of group ``b`` (to the nearest *other* point when
    ``a == b``); ``largest[a, b]`` is the largest d_i. NaN where ``b`` has no point to be
    nearest (no points, or ``a == b`` with a single point) or ``a`` has no weight.
    """

    mean: np.ndarray
    largest: np.ndarray


def _nearest(points: Points, query: np.ndarray, target: np.ndarray, same: bool) -> np.ndarray:
    x, y = points.x, points.y
    if points.distance.kind == "geodesic":
        d = points.distance
        return nearest_geodesic(x[query], y[query], x[target], y[target], a=d.a, f=d.f, same=same)
    return nearest_planar(x[query], y[query], x[target], y[target], same=same)


def nearest_means(points: Points, from_groups, to_groups) -> NearestMeans:
    """Nearest-point distances from every group in ``from_groups`` to every one in ``to_groups``.

    One search structure per to-group, queried with the points of every from-group at once.

    Examples
    --------
    >>> p = Points.build([0.0, 1.0, 10.0, 13.0], [0.0, 0.0, 0.0, 0.0], [0, 0, 1, 1])
    >>> r = nearest_means(p, [0, 1], [0, 1])
    >>> r.mean.tolist(), r.largest.tolist()
    ([[1.0, 9.5], [10.5, 3.0]], [[1.0, 10.0], [12.0, 3.0]])
    """
    from_groups, to_groups = np.asarray(from_groups), np.asarray(to_groups)
    g, w, n = points.groups, points.weight_array(), points.n_groups
    asked = np.isin(g, from_groups)
    weight = np.bincount(g[asked], w[asked], n)
    mean = np.full((from_groups.size, to_groups.size), np.nan)
    largest = np.full_like(mean, np.nan)
    for j, b in enumerate(to_groups):
        target = np.flatnonzero(g == b)
        d = np.full(g.size, np.nan)  # each asked point's distance to the nearest point of b
        if target.size:
            others = np.flatnonzero(asked & (g != b))
            d[others] = _nearest(points, others, target, False)
        if target.size > 1 and asked[target[0]]:  # b is a from-group too: the nearest other point
            d[target] = _nearest(points, target, target, True)
        filled = asked & ~np.isnan(d)
        sums = np.bincount(g[filled], w[filled] * d[filled], n)
        top = np.full(n, np.nan)
        np.fmax.at(top, g[filled], d[filled])
        counted = np.bincount(g[filled], minlength=n) > 0
        with np.errstate(invalid="ignore", divide="ignore"):
            mean[:, j] = np.where(counted & (weight > 0), sums / weight, np.nan)[from_groups]
        largest[:, j] = top[from_groups]
    return NearestMeans(mean, largest)
