"""Local projections for geodesic sums: an AEQD frame per group and bounds of its distortion.

Each group is mapped to an azimuthal equidistant (AEQD) projection centred on it; the
projection's scale distortion over the region the group covers, read from the Tissot
semi-axes PROJ reports, bounds the ratio of projected to geodesic length of every pair, and
:func:`toolbox.estimate.interval.fold_distortion` folds that factor into the planar interval.
The argument is in docs/method.md ("Geographic coordinates").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import cache

import numpy as np

from ..kernels import WGS84_A, WGS84_F, geod
from .interval import distortion_error

__all__ = ["MAX_RADIUS_DEG", "LocalFrame", "local_frame", "frame_from_centre", "mean_direction"]

#: farthest a group may reach from its centre (degrees of arc, measured as a share of the
#: quarter meridian) and still use a local projection; below the convexity radius of the
#: Earth's ellipsoid (about 89.8°, see docs/method.md), so geodesics stay inside the region
MAX_RADIUS_DEG = 80.0
#: samples of the Tissot semi-axes on the group's boundary circle, and at its farthest points
BOUNDARY_SAMPLES = 360
POINT_SAMPLES = 64
#: safety margin on the sampled scale factors: a share of the distortion plus an absolute term
#: for PROJ's numerical derivatives (observed errors below 1e-8)
SCALE_MARGIN_REL = 0.01
SCALE_MARGIN_ABS = 5e-8


@dataclass(frozen=True)
class LocalFrame:
    """An AEQD projection centred on a set of points and the bounds of its distortion.

    For every pair, ``k_min ≤ (projected straight-line distance) / (geodesic distance) ≤
    k_max``. ``usable`` is False (with ``reason``) when the points reach more than
    ``MAX_RADIUS_DEG`` from their centre or the projection fails.
    """

    usable: bool
    reason: str
    lon0: float
    lat0: float
    radius_m: float
    radius_deg: float
    k_min: float
    k_max: float
    x: np.ndarray | None
    y: np.ndarray | None

    @property
    def distortion(self) -> float:
        """Relative error the distortion alone allows: ``(K − 1)/(K + 1)``, K = k_max/k_min."""
        return distortion_error(self.k_min, self.k_max)


@cache
def _quarter_meridian(a: float, f: float) -> float:
    return float(geod(a, f).inv(0.0, 0.0, 0.0, 90.0)[2])


def _unusable(reason, radius_m=math.nan, radius_deg=math.nan, lon0=math.nan, lat0=math.nan):
    return LocalFrame(False, reason, lon0, lat0, radius_m, radius_deg, math.nan, math.nan, None, None)


def mean_direction(lon, lat, weights=None) -> tuple[float, float]:
    """Longitude and latitude of the (weighted) mean of the points' unit normals, normalised.

    This is the centre of points on the ellipsoid: it needs no special case at the antimeridian
    or the poles, unlike a mean of longitudes. NaN, NaN when the mean vanishes (points all
    around the Earth, with no common centre).

    Examples
    --------
    >>> lon0, lat0 = mean_direction([179.0, -179.0], [0.0, 0.0])  # across the antimeridian
    >>> round(abs(lon0), 9), round(lat0, 9)
    (180.0, 0.0)
    >>> [round(v, 9) for v in mean_direction([0.0, 10.0], [0.0, 0.0], [1.0, 0.0])]
    [0.0, 0.0]
    """
    lam, phi = np.radians(np.asarray(lon, dtype=np.float64)), np.radians(np.asarray(lat, dtype=np.float64))
    w = np.ones(lam.size) if weights is None else np.asarray(weights, dtype=np.float64)
    cos_phi = np.cos(phi)
    total = w.sum()
    if not total > 0:
        return math.nan, math.nan
    vx, vy, vz = (w * cos_phi * np.cos(lam)).sum() / total, (w * cos_phi * np.sin(lam)).sum() / total, (w * np.sin(phi)).sum() / total
    if math.sqrt(vx * vx + vy * vy + vz * vz) < 1e-6:
        return math.nan, math.nan
    return math.degrees(math.atan2(vy, vx)), math.degrees(math.atan2(vz, math.hypot(vx, vy)))


def local_frame(lon, lat, a: float = WGS84_A, f: float = WGS84_F) -> LocalFrame:
    """AEQD projection centred on the points, with bounds of its scale over their region.

    The centre is the normalised mean of the points' unit vectors (so the antimeridian and the
    poles need no special case). The region is the geodesic disc around the centre through the
    farthest point; the Tissot semi-axes are sampled at the centre, on the disc's boundary and
    at the farthest points, and widened by a small margin.

    Parameters
    ----------
    lon, lat : array_like
        Longitudes and latitudes in degrees.
    a, f : float
        Semi-major axis (metres) and flattening of the ellipsoid.

    Returns
    -------
    LocalFrame

    Examples
    --------
    >>> frame = local_frame([0.0, 1.0], [0.0, 0.0])  # 0.5° from the centre: c²/6 ≈ 1.3e-5
    >>> bool(frame.k_min <= 1 < frame.k_max < 1 + 2e-5)
    True
    """
    import pyproj

    lon = np.asarray(lon, dtype=np.float64)
    lat = np.asarray(lat, dtype=np.float64)
    lon0, lat0 = mean_direction(lon, lat)
    if math.isnan(lon0):
        return _unusable("has points all around the Earth, with no common centre", radius_deg=180.0)
    try:
        proj = pyproj.Proj(proj="aeqd", lat_0=lat0, lon_0=lon0, a=a, f=f, units="m")
        x, y = proj(lon, lat)
    except pyproj.exceptions.ProjError as exc:  # pragma: no cover - PROJ refusing an ellipsoid
        return _unusable(f"cannot be projected by PROJ ({exc})", lon0=lon0, lat0=lat0)
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        return _unusable("has points PROJ could not project", lon0=lon0, lat0=lat0)
    r = np.hypot(x, y)
    radius_m = float(r.max()) if r.size else 0.0
    far = np.argsort(r)[-POINT_SAMPLES:]
    frame = frame_from_centre(lon0, lat0, radius_m, a, f, lon[far], lat[far], proj=proj)
    return replace(frame, x=x, y=y) if frame.usable else frame


def frame_from_centre(
    lon0: float,
    lat0: float,
    radius_m: float,
    a: float = WGS84_A,
    f: float = WGS84_F,
    lon=(),
    lat=(),
    *,
    proj=None,
) -> LocalFrame:
    """The AEQD frame centred on (lon0, lat0) over the geodesic disc of ``radius_m`` metres.

    The Tissot semi-axes are sampled at the centre, on the disc's boundary circle (where, by
    the argument in docs/method.md, the largest one lies) and at the given points (a check of
    it), and widened by a small margin. The frame carries no projected points.

    Examples
    --------
    >>> frame = frame_from_centre(0.0, 0.0, 55_660.0)  # about 0.5°: c²/6 ≈ 1.3e-5
    >>> bool(frame.k_min <= 1 < frame.k_max < 1 + 2e-5)
    True
    """
    import pyproj

    radius_deg = 90 * radius_m / _quarter_meridian(a, f)
    if radius_deg > MAX_RADIUS_DEG:
        return _unusable(
            f"reaches {radius_deg:.0f}° from its centre, more than {MAX_RADIUS_DEG:.0f}°",
            radius_m,
            radius_deg,
            lon0,
            lat0,
        )
    if proj is None:
        proj = pyproj.Proj(proj="aeqd", lat_0=lat0, lon_0=lon0, a=a, f=f, units="m")
    azimuths = np.arange(BOUNDARY_SAMPLES) * (360.0 / BOUNDARY_SAMPLES)
    ones = np.ones(BOUNDARY_SAMPLES)
    blon, blat, _ = geod(a, f).fwd(lon0 * ones, lat0 * ones, azimuths, radius_m * (1 + 1e-9) * ones)
    slon = np.concatenate([[lon0], np.asarray(blon), np.asarray(lon, dtype=np.float64)])
    slat = np.concatenate([[lat0], np.asarray(blat), np.asarray(lat, dtype=np.float64)])
    factors = proj.get_factors(slon, slat)
    big = np.asarray(factors.tissot_semimajor, dtype=np.float64)
    small = np.asarray(factors.tissot_semiminor, dtype=np.float64)
    if not (np.isfinite(big).all() and np.isfinite(small).all()):
        return _unusable("has no scale factors from PROJ", radius_m, radius_deg, lon0, lat0)
    k_max = max(float(big.max()), 1.0)
    k_min = min(float(small.min()), 1.0)
    k_max += SCALE_MARGIN_REL * (k_max - 1) + SCALE_MARGIN_ABS
    k_min -= SCALE_MARGIN_REL * (1 - k_min) + SCALE_MARGIN_ABS
    return LocalFrame(True, "", lon0, lat0, radius_m, radius_deg, k_min, k_max, None, None)
