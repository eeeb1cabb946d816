"""Each group's weighted mean centre: planar coordinates, or a point on the ellipsoid.

Planar groups get the weighted mean of their coordinates. Geodesic groups (longitude and
latitude) get the normalised weighted mean of their points' unit normals
(:func:`toolbox.estimate.frames.mean_direction`, the centre the local projections use too), so a
group across the antimeridian is centred near ±180°, not near 0° as a mean of longitudes would
put it. A group whose weights are all zero is centred on its points unweighted; a group with no
points, or spread all around the Earth, gets NaN.
"""

from __future__ import annotations

import numpy as np

from .frames import mean_direction
from .points import Points

__all__ = ["group_centres"]


def group_centres(points: Points) -> np.ndarray:
    """Per group, its weighted mean centre as ``(x, y)`` (longitude, latitude when geodesic).

    Examples
    --------
    >>> p = Points.build([0.0, 4.0, 10.0], [0.0, 0.0, 10.0], [0, 0, 1], weights=[3.0, 1.0, 2.0])
    >>> group_centres(p).tolist()
    [[1.0, 0.0], [10.0, 10.0]]
    """
    g, n = points.groups, points.n_groups
    w = points.weight_array()
    weight_sum = np.bincount(g, w, n)
    # a group of zero weights is centred on its points as if unweighted
    w = np.where(weight_sum[g] > 0, w, 1.0)
    if points.distance.kind != "geodesic":
        with np.errstate(invalid="ignore", divide="ignore"):
            total = np.bincount(g, w, n)
            return np.column_stack([np.bincount(g, w * points.x, n), np.bincount(g, w * points.y, n)]) / total[:, None]
    centres = np.full((n, 2), np.nan)
    order = np.argsort(g, kind="stable")
    starts = np.searchsorted(g[order], np.arange(n + 1))
    for code in range(n):
        rows = order[starts[code] : starts[code + 1]]
        if rows.size:
            centres[code] = mean_direction(points.x[rows], points.y[rows], w[rows])
    return centres
