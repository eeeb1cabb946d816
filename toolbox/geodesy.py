"""Geographic coordinates: which distance a layer gets, and geodesic sums with honest bounds.

Two jobs, both between the scripts and the array kernels:

* :func:`distance_setup` decides, from a layer's CRS and the ``distance``/``crs`` parameters,
  whether distances are planar (in the layer's CRS, or in a CRS the user names) or geodesic (on
  the CRS's ellipsoid), and turns coordinates into what the kernels take.
* :func:`grouped_geodesic_pair_sums`, :func:`grouped_geodesic_point_sums` and
  :func:`geodesic_cross_pair_sums` compute geodesic sums. Each group is mapped to an azimuthal
  equidistant (AEQD) projection centred on it; the projection's scale distortion over the
  region the group covers, read from the Tissot semi-axes PROJ reports, bounds the ratio of
  projected to geodesic length of every pair, and that factor is folded into the planar
  kernels' interval. Groups whose distortion leaves too little of the tolerance, or that reach
  more than ``MAX_RADIUS_DEG`` from their centre, get exact geodesic sums when they are small
  enough and a clear error otherwise. The argument is in docs/method.md ("Geographic
  coordinates").
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from functools import cache

import numpy as np

from . import grouping
from .errors import InputError, ParameterError
from .kernels import (
    CrossPairSums,
    GroupPairSums,
    PointSums,
    cross_pair_sums,
    directions_for_tolerance,
    grouped_pair_sums,
    grouped_point_sums,
)
from .kernels._common import UNIT_ROUNDOFF, check_groups, check_method, weights_of_others
from .kernels.geodesic import (
    WGS84_A,
    WGS84_F,
    check_lonlat,
    exact_geodesic_cross_sums,
    exact_geodesic_pair_sums,
    exact_geodesic_point_sums,
)

__all__ = [
    "DISTANCES",
    "MAX_RADIUS_DEG",
    "EXACT_FALLBACK_POINTS",
    "DistanceSetup",
    "LocalFrame",
    "distance_setup",
    "local_frame",
    "planar_tolerance",
    "fold_distortion",
    "grouped_geodesic_pair_sums",
    "grouped_geodesic_point_sums",
    "geodesic_cross_pair_sums",
]

DISTANCES = ("planar", "geodesic")
#: farthest a group may reach from its centre (degrees of arc, measured as a share of the
#: quarter meridian) and still use a local projection; below the convexity radius of the
#: Earth's ellipsoid (about 89.8°, see docs/method.md), so geodesics stay inside the region
MAX_RADIUS_DEG = 80.0
#: largest group that gets exact geodesic sums when no local projection is good enough
#: (about 2e8 pairs, a few minutes at ~1 µs per pair)
EXACT_FALLBACK_POINTS = 20_000
#: samples of the Tissot semi-axes on the group's boundary circle, and at its farthest points
BOUNDARY_SAMPLES = 360
POINT_SAMPLES = 64
#: safety margin on the sampled scale factors: a share of the distortion plus an absolute term
#: for PROJ's numerical derivatives (observed errors below 1e-8)
SCALE_MARGIN_REL = 0.01
SCALE_MARGIN_ABS = 5e-8
#: error of one projected coordinate (metres, for an Earth-sized ellipsoid): PROJ's AEQD takes
#: the geodesic distance and azimuth from the centre (Karney 2013: 15 nm) and rounds x and y
FORWARD_ALLOWANCE = 5e-8
#: a local projection is used only if it leaves at least this share of the tolerance to the
#: planar estimate (otherwise its directions would grow without limit)
MIN_PLANAR_SHARE = 0.01
#: cost model (seconds, measured on the project's 2-core machines): one geodesic ~1 µs; one
#: local projection (PROJ set-up, forward, ~425 scale-factor samples at ~6 µs each) ~4 ms
GEODESIC_PAIR_COST = 1.0e-6
FRAME_COST = 4.0e-3


# --------------------------------------------------------------------------------------------
# which distance


@dataclass(frozen=True)
class DistanceSetup:
    """How a layer's coordinates become distances.

    ``kind`` is ``"planar"`` (straight lines in ``crs``, or in the layer's own units when
    ``crs`` is None) or ``"geodesic"`` (shortest paths on the ellipsoid ``a``, ``f``, with
    ``crs`` the geographic CRS whose longitudes and latitudes the kernels get). ``units`` is
    what the output's ``units`` column says.
    """

    kind: str
    units: str
    crs: object = None
    a: float = math.nan
    f: float = math.nan

    def coordinates(self, x, y, crs, label: str, *, note: bool = False):
        """Coordinates of points in ``crs`` as the kernels need them (planar x, y or lon, lat).

        With ``note``, a transformation between two different CRSs is reported in a warning
        (for the second layer of ``cross-spread``).
        """
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if self.kind == "planar":
            if self.crs is None or crs is self.crs or crs == self.crs:
                return x, y
            out = _transform(x, y, crs, self.crs, label)
            if note:
                warnings.warn(
                    f"{label} was reprojected from {crs.name} to {self.crs.name} (the first "
                    "layer's CRS) before computing distances.",
                    UserWarning,
                    stacklevel=3,
                )
            return out
        if crs is self.crs or crs == self.crs:
            lon, lat = x, y
        else:
            lon, lat = _transform(x, y, crs, self.crs, label)
            if note:
                warnings.warn(
                    f"{label} was transformed from {crs.name} to longitude and latitude in "
                    f"{self.crs.name} (the first layer's) before computing geodesic distances.",
                    UserWarning,
                    stacklevel=3,
                )
        factor = _degrees_per_unit(self.crs)
        if factor != 1.0:
            lon, lat = lon * factor, lat * factor
        beyond = np.abs(lat) > 90 * (1 + 1e-12)
        if beyond.any():
            first = int(np.flatnonzero(beyond)[0])
            raise InputError(
                f"{int(beyond.sum())} point(s) of {label} have a latitude beyond ±90° (first at "
                f"index {first}: {lat[first]!r}) in {self.crs.name}, so its coordinates are not "
                "longitude and latitude in that CRS; check the CRS the layer declares."
            )
        return lon, np.clip(lat, -90.0, 90.0)


def _degrees_per_unit(crs) -> float:
    axes = [a for a in crs.axis_info if a.unit_name]
    if not axes or axes[0].unit_name.startswith("degree"):
        return 1.0
    return axes[0].unit_conversion_factor * 180 / math.pi


def _transform(x, y, source, target, label):
    import pyproj

    transformer = pyproj.Transformer.from_crs(source, target, always_xy=True)
    tx, ty = transformer.transform(x, y)
    tx, ty = np.asarray(tx, dtype=np.float64), np.asarray(ty, dtype=np.float64)
    bad = ~(np.isfinite(tx) & np.isfinite(ty))
    if bad.any():
        raise InputError(
            f"{int(bad.sum())} point(s) of {label} cannot be transformed from {source.name} to "
            f"{target.name} (first at index {int(np.flatnonzero(bad)[0])}); they lie outside the "
            "area where the transformation is defined. Choose another CRS or filter them out "
            "with --where."
        )
    return tx, ty


def _planar_on_geographic(crs, label: str) -> InputError:
    return InputError(
        f"--distance planar cannot be used on {label}: it is in a geographic CRS ({crs.name}), so "
        "its coordinates are degrees of longitude and latitude, and a straight line between "
        "them has no length in metres (a degree of longitude shrinks from 111 km at the equator "
        "to nothing at the poles). Leave --distance out (or pass --distance geodesic) for "
        "ellipsoidal distances in metres, or pass --crs with a projected CRS suited to the area "
        "(a UTM zone or a national grid) for planar distances there."
    )


def distance_setup(
    crs,
    label: str,
    *,
    distance: str | None = None,
    target: str | None = None,
    script: str = "this script",
) -> DistanceSetup:
    """Decide how the distances of a layer in ``crs`` are computed.

    Parameters
    ----------
    crs : pyproj.CRS or None
        The layer's CRS.
    label : str
        How messages name the layer.
    distance : {"planar", "geodesic"}, optional
        Asked for by the user; default geodesic for a geographic CRS, planar otherwise.
    target : str, optional
        A projected CRS (any text pyproj accepts) to reproject to; distances are then planar
        in it.
    script : str
        Script name, for messages.

    Returns
    -------
    DistanceSetup

    Examples
    --------
    >>> import pyproj
    >>> distance_setup(pyproj.CRS("EPSG:4326"), "a layer").kind
    'geodesic'
    >>> distance_setup(pyproj.CRS("EPSG:4326"), "a layer", target="EPSG:32633").units
    'metre'
    """
    if distance is not None and distance not in DISTANCES:
        raise ParameterError(
            f"The --distance parameter of {script} must be one of {', '.join(DISTANCES)}. Got "
            f"{distance!r} instead."
        )
    if target is not None:
        if distance == "geodesic":
            raise ParameterError(
                f"--crs and --distance geodesic cannot be combined in {script}: --crs reprojects "
                "the input and computes planar distances in that CRS. Leave out one of them."
            )
        chosen = _parse_crs(target, script)
        if crs is None:
            raise InputError(
                f"{label} has no CRS, so it cannot be reprojected to --crs {target!r}; assign its CRS first."
            )
        axes = chosen.axis_info
        return DistanceSetup("planar", axes[0].unit_name if axes else "unknown", chosen)
    if crs is None:
        if distance == "geodesic":
            raise InputError(
                f"{label} has no CRS, so its ellipsoid is unknown and geodesic distances cannot be "
                "computed; assign its CRS first."
            )
        return DistanceSetup("planar", grouping.planar_units(crs, label), None)
    geographic = bool(crs.is_geographic)
    if distance is None:
        distance = "geodesic" if geographic else "planar"
    if distance == "planar":
        if geographic:
            raise _planar_on_geographic(crs, label)
        return DistanceSetup("planar", grouping.planar_units(crs, label), crs)
    ellipsoid = crs.ellipsoid
    geodetic = crs if geographic else crs.geodetic_crs
    if ellipsoid is None or geodetic is None:
        raise InputError(
            f"The CRS of {label} ({crs.name}) has no ellipsoid, so geodesic distances cannot be "
            "computed; use --distance planar."
        )
    a = float(ellipsoid.semi_major_metre)
    rf = float(ellipsoid.inverse_flattening)
    f = 1 / rf if rf > 0 else 1 - float(ellipsoid.semi_minor_metre) / a
    return DistanceSetup("geodesic", "metre", geodetic, a, f)


def _parse_crs(text, script):
    import pyproj

    try:
        chosen = pyproj.CRS.from_user_input(text)
    except (pyproj.exceptions.CRSError, TypeError) as exc:
        raise ParameterError(
            f"The --crs parameter of {script} must be a CRS pyproj accepts (for example "
            f"EPSG:32633, a WKT string or a PROJ string). Got {text!r} instead: {exc}"
        ) from exc
    if not chosen.is_projected:
        raise ParameterError(
            f"The --crs parameter of {script} must be a projected CRS, since distances are then "
            f"planar in it. Got {text!r} instead ({chosen.name}, "
            f"{'a geographic CRS' if chosen.is_geographic else 'not a projected CRS'}); leave "
            "--crs out for geodesic distances."
        )
    return chosen


# --------------------------------------------------------------------------------------------
# one local projection


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
def _geod(a: float, f: float):
    import pyproj

    return pyproj.Geod(a=a, f=f)


@cache
def _quarter_meridian(a: float, f: float) -> float:
    return float(_geod(a, f).inv(0.0, 0.0, 0.0, 90.0)[2])


def _unusable(reason, radius_m=math.nan, radius_deg=math.nan, lon0=math.nan, lat0=math.nan):
    return LocalFrame(False, reason, lon0, lat0, radius_m, radius_deg, math.nan, math.nan, None, None)


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
    lam, phi = np.radians(lon), np.radians(lat)
    cos_phi = np.cos(phi)
    vx, vy, vz = (cos_phi * np.cos(lam)).mean(), (cos_phi * np.sin(lam)).mean(), np.sin(phi).mean()
    norm = math.sqrt(vx * vx + vy * vy + vz * vz)
    if norm < 1e-6:
        return _unusable("has points all around the Earth, with no common centre", radius_deg=180.0)
    lat0 = math.degrees(math.atan2(vz, math.hypot(vx, vy)))
    lon0 = math.degrees(math.atan2(vy, vx))
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
    radius_deg = 90 * radius_m / _quarter_meridian(a, f)
    if radius_deg > MAX_RADIUS_DEG:
        return _unusable(
            f"reaches {radius_deg:.0f}° from its centre, more than {MAX_RADIUS_DEG:.0f}°",
            radius_m,
            radius_deg,
            lon0,
            lat0,
        )
    # Scale factors: at the centre, on the boundary circle (where, by the argument in
    # docs/method.md, the largest one lies) and at the farthest points, as a check of it.
    azimuths = np.arange(BOUNDARY_SAMPLES) * (360.0 / BOUNDARY_SAMPLES)
    ones = np.ones(BOUNDARY_SAMPLES)
    blon, blat, _ = _geod(a, f).fwd(lon0 * ones, lat0 * ones, azimuths, radius_m * (1 + 1e-9) * ones)
    far = np.argsort(r)[-POINT_SAMPLES:]
    slon = np.concatenate([[lon0], np.asarray(blon), lon[far]])
    slat = np.concatenate([[lat0], np.asarray(blat), lat[far]])
    factors = proj.get_factors(slon, slat)
    big = np.asarray(factors.tissot_semimajor, dtype=np.float64)
    small = np.asarray(factors.tissot_semiminor, dtype=np.float64)
    if not (np.isfinite(big).all() and np.isfinite(small).all()):
        return _unusable("has no scale factors from PROJ", radius_m, radius_deg, lon0, lat0)
    k_max = max(float(big.max()), 1.0)
    k_min = min(float(small.min()), 1.0)
    k_max += SCALE_MARGIN_REL * (k_max - 1) + SCALE_MARGIN_ABS
    k_min -= SCALE_MARGIN_REL * (1 - k_min) + SCALE_MARGIN_ABS
    return LocalFrame(True, "", lon0, lat0, radius_m, radius_deg, k_min, k_max, x, y)


def distortion_error(k_min: float, k_max: float) -> float:
    """Relative error left by the distortion alone, with the best estimate: ``(K−1)/(K+1)``."""
    ratio = k_max / k_min
    return (ratio - 1) / (ratio + 1)


def planar_tolerance(tolerance: float, k_min: float, k_max: float) -> float:
    """Tolerance for the planar estimate so that, with the distortion, the total meets ``tolerance``.

    With a planar estimate of symmetric relative error e and ``K = k_max/k_min``, the folded
    interval gives a relative bound ``((1+e)K − (1−e)) / ((1+e)K + (1−e))``; it equals
    ``tolerance`` for ``e = (Q − 1)/(Q + 1)`` with ``Q = (1 + tolerance) / (K (1 − tolerance))``.
    A result ≤ 0 means the distortion alone exceeds the tolerance.

    Examples
    --------
    >>> round(planar_tolerance(0.01, 1.0, 1.0), 12)
    0.01
    >>> planar_tolerance(0.01, 1.0, 1.03) < 0
    True
    """
    q = (1 + tolerance) / ((k_max / k_min) * (1 - tolerance))
    return (q - 1) / (q + 1)


def fold_distortion(estimate, lower, upper, k_min, k_max, slack=0.0):
    """Interval and estimate of geodesic totals from those of projected totals.

    Every pair's projected length lies in ``[k_min, k_max]`` times its geodesic length, so a
    projected total in ``[lower, upper]`` puts the geodesic one in
    ``[lower / k_max, upper / k_min]``; ``slack`` (metres, ≥ 0) first widens the projected
    interval on both sides, for the rounding of the projected coordinates. The estimate is the
    point that minimises the worst relative error over the interval, ``2·lo·hi / (lo + hi)``,
    and the relative bound is ``max(est/lo − 1, 1 − est/hi)``. Returns
    ``(estimate, lower, upper, rel_bound)``.

    Examples
    --------
    >>> [round(float(v), 6) for v in fold_distortion(1.0, 0.99, 1.01, 1.0, 1.001)]
    [0.999395, 0.989011, 1.01, 0.0105]
    """
    estimate = np.asarray(estimate, dtype=np.float64)
    lower = np.maximum(np.asarray(lower, dtype=np.float64) - slack, 0.0)
    upper = np.asarray(upper, dtype=np.float64) + slack
    # each operation rounds by at most half an ulp; stepping outwards by 2u keeps the interval
    lo = lower / k_max * (1 - 2 * UNIT_ROUNDOFF)
    hi = upper / k_min * (1 + 2 * UNIT_ROUNDOFF)
    with np.errstate(divide="ignore", invalid="ignore"):
        est = np.where(lo > 0, 2 * lo * hi / (lo + hi), estimate * 2 / (k_min + k_max))
        est = np.clip(est, lo, hi)
        bound = np.maximum(np.where(lo > 0, est / lo - 1, np.inf), 1 - est / hi)
        bound = np.where(hi > 0, bound + 4 * UNIT_ROUNDOFF, 0.0)
    return est, lo, hi, bound


def _forward_slack(a: float, pair_weight):
    """Allowance for PROJ's rounding of the projected coordinates, ``2δ`` per pair distance."""
    return FORWARD_ALLOWANCE * 2 * (a / WGS84_A) * np.asarray(pair_weight, dtype=np.float64)


# --------------------------------------------------------------------------------------------
# grouped sums


def _planar_cost(n, m):
    # the planar kernels' cost (projection or exact, whichever is cheaper), in seconds
    n = np.asarray(n, dtype=np.float64)
    return np.minimum(2e-5 + m * n * (25e-9 + 2.5e-9 * np.log2(n + 1)), 2.5e-9 * n * n)


def _exact_is_cheaper(n, m, cost_factor):
    """Whether exact geodesic sums cost less than a local projection plus the planar kernel."""
    n = np.asarray(n, dtype=np.float64)
    return GEODESIC_PAIR_COST * n * (n - 1) / 2 <= FRAME_COST + cost_factor * _planar_cost(n, m)


class _Stages:
    """Progress over several kernel calls: each call reports into its own share of the total."""

    def __init__(self, progress, total):
        self.progress, self.total, self.base = progress, max(int(total), 1), 0

    def stage(self, span):
        base, span = self.base, int(span)
        self.base += span
        if self.progress is None:
            return None

        def report(done, total):
            self.progress(base + (span * done // total if total else span), self.total)

        return report


@dataclass
class _Plan:
    """Which live groups get exact geodesic sums and which a local projection."""

    order: np.ndarray
    counts: np.ndarray
    starts: np.ndarray
    weight_sum: np.ndarray
    live: np.ndarray
    exact: np.ndarray
    projected: np.ndarray
    x: np.ndarray
    y: np.ndarray
    k_min: np.ndarray
    k_max: np.ndarray
    tolerance: np.ndarray  # planar tolerance per group

    def buckets(self):
        """Projected groups by the directions their planar tolerance needs, with its value."""
        if self.projected.size == 0:
            return []
        dirs = np.array([directions_for_tolerance(float(self.tolerance[g])) for g in self.projected])
        out = []
        for m in np.unique(dirs):
            members = self.projected[dirs == m]
            out.append((members, float(self.tolerance[members].min())))
        return out


def _describe(label_of, g):
    return label_of(int(g)) if label_of is not None else f"group {int(g)}"


def _too_wide(what, n, frame, tolerance, smaller="split it into smaller groups (--group-by)"):
    if not frame.usable:
        why = f"{what} {frame.reason}, so no local projection gives it a useful bound"
        fix = smaller
    else:
        needed = 2 * frame.distortion
        why = (
            f"the local projection of {what} ({frame.radius_m / 1000:.0f} km from its centre to "
            f"its farthest point) alone distorts distances by up to {frame.distortion:.2g}, which "
            f"leaves too little of the tolerance {tolerance:g}"
        )
        fix = (f"use a tolerance of at least {needed:.2g} or " if needed <= 0.5 else "") + smaller
    return InputError(
        f"Geodesic sums: {why}, and its {n} points are too many for exact geodesic sums (at most "
        f"{EXACT_FALLBACK_POINTS}); {fix}, or pass --method exact (about {n * (n - 1) / 2e6:.3g} s "
        "at ~1 µs per pair)."
    )


def _plan(lon, lat, groups, n_groups, weights, a, f, tolerance, method, m0, label_of, cost_factor):
    order = np.argsort(groups, kind="stable")
    codes = groups[order]
    counts = np.bincount(codes, minlength=n_groups).astype(np.int64)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
    w = np.ones(lon.size) if weights is None else weights
    weight_sum = np.bincount(groups, w, n_groups)
    pair_weight = np.bincount(groups, w * (weight_sum[groups] - w), n_groups)
    live = np.flatnonzero((counts >= 2) & (pair_weight > 0))
    k_min, k_max, planar_tol = np.ones(n_groups), np.ones(n_groups), np.zeros(n_groups)
    x, y = np.full(lon.size, np.nan), np.full(lon.size, np.nan)
    if m0 == 0:
        return _Plan(order, counts, starts, weight_sum, live, live, live[:0], x, y, k_min, k_max, planar_tol)
    if method == "auto":  # exact is cheaper even before the (larger) directions are known
        cheap = _exact_is_cheaper(counts[live], m0, cost_factor)
    else:
        cheap = np.zeros(live.size, dtype=bool)
    exact, projected = list(live[cheap]), []
    for g in live[~cheap]:
        members = order[starts[g] : starts[g] + counts[g]]
        frame = local_frame(lon[members], lat[members], a, f)
        planar = planar_tolerance(tolerance, frame.k_min, frame.k_max) if frame.usable else 0.0
        if not frame.usable or planar < MIN_PLANAR_SHARE * tolerance:
            if counts[g] <= EXACT_FALLBACK_POINTS:
                exact.append(g)
                continue
            raise _too_wide(_describe(label_of, g), int(counts[g]), frame, tolerance)
        if method == "auto" and _exact_is_cheaper(counts[g], directions_for_tolerance(planar), cost_factor):
            exact.append(g)
            continue
        x[members], y[members] = frame.x, frame.y
        k_min[g], k_max[g], planar_tol[g] = frame.k_min, frame.k_max, planar
        projected.append(g)
    return _Plan(
        order,
        counts,
        starts,
        weight_sum,
        live,
        np.array(sorted(exact), dtype=np.int64),
        np.array(projected, dtype=np.int64),
        x,
        y,
        k_min,
        k_max,
        planar_tol,
    )


def _subset(weights, sel):
    return None if weights is None else weights[sel]


def _run_stages(
    plan, lon, lat, groups, n_groups, weights, a, f, method, progress, exact_kernel, planar_kernel
):
    """Run a plan: exact geodesic sums for its exact groups, then each bucket of planar groups.

    Yields ``(members, point mask, result, projected)``; the caller folds projected results.
    """
    stages = _Stages(progress, plan.counts[plan.live].sum())
    if plan.exact.size:
        sel = np.isin(groups, plan.exact)
        r = exact_kernel(
            lon[sel],
            lat[sel],
            groups[sel],
            n_groups,
            _subset(weights, sel),
            a=a,
            f=f,
            progress=stages.stage(plan.counts[plan.exact].sum()),
        )
        yield plan.exact, sel, r, False
    for members, planar in plan.buckets():
        sel = np.isin(groups, members)
        r = planar_kernel(
            plan.x[sel],
            plan.y[sel],
            groups[sel],
            n_groups,
            _subset(weights, sel),
            tolerance=planar,
            method=method,
            progress=stages.stage(plan.counts[members].sum()),
        )
        yield members, sel, r, True


def grouped_geodesic_pair_sums(
    lon,
    lat,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    a: float = WGS84_A,
    f: float = WGS84_F,
    tolerance: float = 0.01,
    method: str = "auto",
    progress=None,
    label_of: Callable[[int], str] | None = None,
) -> GroupPairSums:
    """Total geodesic pair distance of every group, each with a guaranteed interval.

    Parameters
    ----------
    lon, lat : array_like
        Longitudes and latitudes in degrees.
    groups : array_like of int
        Group code of every point, in ``[0, n_groups)``.
    n_groups : int, optional
        Number of groups (default ``groups.max() + 1``).
    weights : array_like, optional
        Non-negative weights; the total is ``Σ_{i<j} w_i w_j s_ij``.
    a, f : float
        Semi-major axis (metres) and flattening of the ellipsoid; WGS 84 by default.
    tolerance : float
        Guaranteed relative error of each total (projection and estimate together), in
        [0, 0.5]; 0 means exact geodesic sums.
    method : {"auto", "exact", "projection"}
        ``exact``: geodesic distance of every pair; ``projection``: the local projection and
        the planar estimate; ``auto``: exact where it is cheaper.
    progress : callable, optional
        Called as ``progress(done, total)``.
    label_of : callable, optional
        ``label_of(code)`` names a group in error messages.

    Returns
    -------
    GroupPairSums
        One entry per group; totals in metres. ``exact`` is True only for exact geodesic sums.

    Raises
    ------
    InputError
        For a group too wide for a local projection at this tolerance and too large
        (more than ``EXACT_FALLBACK_POINTS``) for exact sums.

    Examples
    --------
    >>> r = grouped_geodesic_pair_sums([0, 0, 0.01], [0, 0.01, 0], [0, 0, 0], tolerance=0)
    >>> round(float(r.total[0]), 3), bool(r.exact[0])
    (3787.972, True)
    """
    lon, lat, weights = check_lonlat(lon, lat, weights)
    groups, n_groups = check_groups(groups, lon.size, n_groups)
    m0 = check_method(method, tolerance)
    plan = _plan(lon, lat, groups, n_groups, weights, a, f, tolerance, method, m0, label_of, 1.0)
    counts = plan.counts
    pair_weight = weights_of_others(groups, n_groups, weights)[1]
    total, lower, upper, bound = (np.full(n_groups, np.nan) for _ in range(4))
    exact = np.zeros(n_groups, dtype=bool)
    dirs = np.zeros(n_groups, dtype=np.int64)
    stages = _run_stages(
        plan, lon, lat, groups, n_groups, weights, a, f, method, progress,
        exact_geodesic_pair_sums, grouped_pair_sums,
    )  # fmt: skip
    for members, _, r, projected in stages:
        g = members
        if not projected:
            total[g], lower[g], upper[g], bound[g] = r.total[g], r.lower[g], r.upper[g], r.rel_bound[g]
            exact[g] = r.exact[g]
            continue
        total[g], lower[g], upper[g], bound[g] = fold_distortion(
            r.total[g],
            r.lower[g],
            r.upper[g],
            plan.k_min[g],
            plan.k_max[g],
            _forward_slack(a, r.pair_weight[g]),
        )
        dirs[g] = r.directions[g]
    return GroupPairSums(
        n_points=counts,
        weight_sum=plan.weight_sum,
        pair_weight=pair_weight,
        total=total,
        lower=lower,
        upper=upper,
        rel_bound=bound,
        exact=exact,
        directions=dirs,
    )


def grouped_geodesic_point_sums(
    lon,
    lat,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    a: float = WGS84_A,
    f: float = WGS84_F,
    tolerance: float = 0.01,
    method: str = "auto",
    progress=None,
    label_of: Callable[[int], str] | None = None,
) -> PointSums:
    """Geodesic distance sum from every point to the rest of its group, with guaranteed bounds.

    Parameters are those of :func:`grouped_geodesic_pair_sums`; each point's sum
    ``Σ_j w_j s_ij`` is bounded with its group's local projection.

    Returns
    -------
    PointSums
        One entry per input point, in input order; sums in metres.

    Examples
    --------
    >>> r = grouped_geodesic_point_sums([0, 0, 0.01], [0, 0.01, 0], [0, 0, 0], tolerance=0)
    >>> [round(float(v), 3) for v in r.total]
    [2218.938, 2674.777, 2682.23]
    """
    lon, lat, weights = check_lonlat(lon, lat, weights)
    groups, n_groups = check_groups(groups, lon.size, n_groups)
    m0 = check_method(method, tolerance)
    plan = _plan(lon, lat, groups, n_groups, weights, a, f, tolerance, method, m0, label_of, 2.0)
    n = lon.size
    other = weights_of_others(groups, n_groups, weights)[0]
    total, lower, upper, bound = (np.full(n, np.nan) for _ in range(4))
    exact = np.zeros(n, dtype=bool)
    dirs = np.zeros(n, dtype=np.int64)
    stages = _run_stages(
        plan, lon, lat, groups, n_groups, weights, a, f, method, progress,
        exact_geodesic_point_sums, grouped_point_sums,
    )  # fmt: skip
    for _, sel, r, projected in stages:
        if not projected:
            total[sel], lower[sel], upper[sel], bound[sel] = r.total, r.lower, r.upper, r.rel_bound
            exact[sel] = r.exact
            continue
        codes = groups[sel]
        total[sel], lower[sel], upper[sel], bound[sel] = fold_distortion(
            r.total, r.lower, r.upper, plan.k_min[codes], plan.k_max[codes], _forward_slack(a, r.other_weight)
        )
        dirs[sel] = r.directions
    none = ~(other > 0)
    for array in (total, lower, upper, bound):
        array[none] = np.nan
    return PointSums(
        total=total,
        lower=lower,
        upper=upper,
        rel_bound=bound,
        other_weight=other,
        exact=exact & ~none,
        directions=dirs,
    )


def geodesic_cross_pair_sums(
    lon,
    lat,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    a: float = WGS84_A,
    f: float = WGS84_F,
    tolerance: float = 0.01,
    method: str = "auto",
    progress=None,
) -> CrossPairSums:
    """Geodesic totals between every pair of groups, with guaranteed bounds.

    One local projection covers all the points (centred on all of them); its distortion is
    folded into every entry, the diagonal (each group's own pair total) included. When no
    projection is good enough, exact geodesic sums are used for up to
    ``EXACT_FALLBACK_POINTS`` points, else an error says why. Parameters are those of
    :func:`grouped_geodesic_pair_sums`.

    Returns
    -------
    CrossPairSums
        G × G matrices, in metres.

    Examples
    --------
    >>> r = geodesic_cross_pair_sums([0, 0, 0.01], [0, 0.01, 0], [0, 1, 1], tolerance=0)
    >>> round(float(r.total[0, 1]), 3)
    2218.938
    """
    lon, lat, weights = check_lonlat(lon, lat, weights)
    groups, n_groups = check_groups(groups, lon.size, n_groups)
    m0 = check_method(method, tolerance)
    n = lon.size
    use_exact = m0 == 0
    if not use_exact and method == "auto":
        use_exact = GEODESIC_PAIR_COST * n * (n - 1) / 2 <= FRAME_COST + m0 * n * 1e-7
    frame = None
    planar = 0.0
    if not use_exact:
        frame = local_frame(lon, lat, a, f)
        planar = planar_tolerance(tolerance, frame.k_min, frame.k_max) if frame.usable else 0.0
        if not frame.usable or planar < MIN_PLANAR_SHARE * tolerance:
            if n > EXACT_FALLBACK_POINTS:
                raise _too_wide(
                    "the combined set of points",
                    n,
                    frame,
                    tolerance,
                    smaller="compare groups that lie closer together (--where)",
                )
            use_exact = True
    if use_exact:
        return exact_geodesic_cross_sums(lon, lat, groups, n_groups, weights, a=a, f=f, progress=progress)
    r = cross_pair_sums(
        frame.x, frame.y, groups, n_groups, weights, tolerance=planar, method=method, progress=progress
    )
    total, lower, upper, bound = fold_distortion(
        r.total, r.lower, r.upper, frame.k_min, frame.k_max, _forward_slack(a, r.pair_weight)
    )
    missing = np.isnan(r.total)
    for matrix in (total, lower, upper, bound):
        matrix[missing] = np.nan
    return CrossPairSums(
        n_points=r.n_points,
        weight_sum=r.weight_sum,
        pair_weight=r.pair_weight,
        total=total,
        lower=lower,
        upper=upper,
        rel_bound=bound,
        exact=np.zeros(r.exact.shape, dtype=bool),
        directions=r.directions,
    )
