"""A geometry per group (``--group-shape``): the convex hull of its points, or its centre.

The hull is shapely's convex hull of the group's points (a Point or a LineString for groups of
one point or of points on a line). For longitudes and latitudes the hull is taken after
unwrapping each longitude to within 180° of the group's centre, so a group across the
antimeridian gets a small polygon around it (with longitudes beyond ±180°), not one around the
whole Earth; the hull's edges are straight in longitude and latitude, not geodesics.
"""

from __future__ import annotations

import numpy as np
import shapely

__all__ = ["SHAPES", "group_shapes"]

#: the choices of ``--group-shape``
SHAPES = ("none", "hull", "centre")


def group_shapes(x, y, codes, n_groups: int, shape: str, centres: np.ndarray, *, degrees: bool = False) -> np.ndarray:
    """One shapely geometry per group code (None for a group without points).

    Parameters
    ----------
    x, y : numpy.ndarray
        Point coordinates (longitudes and latitudes in degrees when ``degrees``).
    codes : numpy.ndarray
        Group code of each point, in ``[0, n_groups)``.
    n_groups : int
        Number of groups.
    shape : {"hull", "centre"}
        Convex hull of the group's points, or its centre (``centres``).
    centres : numpy.ndarray
        ``(n_groups, 2)`` centres, e.g. from :func:`toolbox.estimate.group_centres`.
    degrees : bool
        Coordinates are longitudes and latitudes.

    Examples
    --------
    >>> x, y = np.array([0.0, 2.0, 0.0, 1.0, 5.0]), np.array([0.0, 0.0, 2.0, 0.5, 5.0])
    >>> hulls = group_shapes(x, y, np.array([0, 0, 0, 0, 1]), 2, "hull", np.zeros((2, 2)))
    >>> [g.wkt for g in hulls]
    ['POLYGON ((0 0, 0 2, 2 0, 0 0))', 'POINT (5 5)']
    """
    codes = np.asarray(codes)
    out = np.full(n_groups, None, dtype=object)
    filled = np.bincount(codes, minlength=n_groups) > 0
    if shape == "centre":
        out[filled] = shapely.points(centres[filled])
        return out
    if shape != "hull":
        raise ValueError(f"shape must be 'hull' or 'centre', not {shape!r}")
    x = np.asarray(x, dtype=np.float64)
    if degrees:  # longitudes within 180° of the group's centre: no hull around the whole Earth
        lon0 = np.nan_to_num(centres[codes, 0])
        x = lon0 + (x - lon0 + 180.0) % 360.0 - 180.0
    order = np.argsort(codes, kind="stable")
    dense = np.cumsum(filled) - 1  # group code -> position among the filled groups
    parts = shapely.multipoints(np.column_stack([x, y])[order], indices=dense[codes[order]])
    out[filled] = shapely.convex_hull(parts)
    return out
