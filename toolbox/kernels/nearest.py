"""Exact distance from each point to its nearest point of another set (``cross-spread --nearest``).

Planar: one k-d tree query per point (scipy's cKDTree), exact.

Geodesic (coordinates in degrees on an ellipsoid): a geodesic between two points of the surface
is never shorter than the straight chord through the ellipsoid between them. So with the
chord-nearest candidate at geodesic distance s, every point that could be nearer on the surface
lies within chord distance s; all of those are measured with Karney's geodesic algorithm
(pyproj.Geod) and the least is the answer. Nothing is approximated beyond that algorithm's
round-off.
"""

from __future__ import annotations

import numpy as np

__all__ = ["nearest_planar", "nearest_geodesic"]


def nearest_planar(qx, qy, tx, ty, *, same: bool = False) -> np.ndarray:
    """Distance from every query point to the nearest target point (planar, exact).

    Parameters
    ----------
    qx, qy : numpy.ndarray
        Query coordinates.
    tx, ty : numpy.ndarray
        Target coordinates (at least one point; two when ``same``).
    same : bool
        The query points are the target points: each one's own entry is skipped (another point
        at the same place still counts, at distance 0).

    Returns
    -------
    numpy.ndarray
        One distance per query point.

    Examples
    --------
    >>> nearest_planar(np.array([0.0, 10]), np.array([0.0, 0]), np.array([3.0, 9]), np.array([4.0, 0]))
    array([5., 1.])
    """
    from scipy.spatial import cKDTree

    target = np.column_stack([tx, ty])
    tree = cKDTree(target)
    query = np.column_stack([qx, qy])
    if same:
        distances, _ = tree.query(query, k=2)
        return distances[:, 1]
    distances, _ = tree.query(query, k=1)
    return distances


def _surface_xyz(lon, lat, a: float, f: float) -> np.ndarray:
    """Earth-centred coordinates of points on the ellipsoid surface (height 0)."""
    e2 = f * (2 - f)
    phi, lam = np.radians(lat), np.radians(lon)
    n = a / np.sqrt(1 - e2 * np.sin(phi) ** 2)
    return np.column_stack(
        [n * np.cos(phi) * np.cos(lam), n * np.cos(phi) * np.sin(lam), n * (1 - e2) * np.sin(phi)]
    )


def nearest_geodesic(qlon, qlat, tlon, tlat, *, a: float, f: float, same: bool = False) -> np.ndarray:
    """Geodesic distance (metres) from every query point to the nearest target point, exact.

    Parameters
    ----------
    qlon, qlat, tlon, tlat : numpy.ndarray
        Longitudes and latitudes in degrees.
    a, f : float
        Semi-major axis (metres) and flattening of the ellipsoid.
    same : bool
        As in :func:`nearest_planar`.

    Examples
    --------
    >>> d = nearest_geodesic(np.array([0.0]), np.array([0.0]), np.array([1.0, 0.0]),
    ...                      np.array([0.0, 2.0]), a=6378137.0, f=1 / 298.257223563)
    >>> round(float(d[0]), 3)  # one degree of longitude on the WGS84 equator
    111319.491
    """
    from pyproj import Geod
    from scipy.spatial import cKDTree

    geod = Geod(a=a, f=f)
    target = _surface_xyz(tlon, tlat, a, f)
    query = _surface_xyz(qlon, qlat, a, f)
    tree = cKDTree(target)
    k = 2 if same else 1
    _, index = tree.query(query, k=k)
    first = index[:, 1] if same else index
    own = np.arange(len(query))
    _, _, best = geod.inv(qlon, qlat, tlon[first], tlat[first])
    best = np.asarray(best, dtype=np.float64)
    # any point nearer on the surface is nearer by chord too (chord ≤ geodesic); widen the
    # radius by a relative 1e-12 for the rounding of the Earth-centred coordinates
    candidates = tree.query_ball_point(query, best * (1 + 1e-12) + 1e-6)
    rows = np.repeat(own, [len(c) for c in candidates])
    cols = np.fromiter((j for c in candidates for j in c), dtype=np.int64, count=rows.size)
    if same:
        keep = cols != rows
        rows, cols = rows[keep], cols[keep]
    if rows.size:
        _, _, length = geod.inv(qlon[rows], qlat[rows], tlon[cols], tlat[cols])
        np.minimum.at(best, rows, np.asarray(length, dtype=np.float64))
    return best
