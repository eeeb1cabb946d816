"""Which distance a layer gets: planar in its CRS (or in a CRS the user names) or geodesic.

Decided once, from the layer's CRS and the ``distance`` / ``crs`` parameters, by
:func:`distance_setup`; :meth:`DistanceSetup.coordinates` turns a layer's coordinates into what
the estimator takes (planar x, y, or longitude and latitude in degrees).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from .. import grouping
from ..errors import InputError, ParameterError, spell

__all__ = ["DISTANCES", "DistanceSetup", "distance_setup"]

DISTANCES = ("planar", "geodesic")


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
            f"with {spell('where')}."
        )
    return tx, ty


def _planar_on_geographic(crs, label: str) -> InputError:
    return InputError(
        f"{spell('distance', 'planar')} cannot be used on {label}: it is in a geographic CRS ({crs.name}), so "
        "its coordinates are degrees of longitude and latitude, and a straight line between "
        "them has no length in metres (a degree of longitude shrinks from 111 km at the equator "
        f"to nothing at the poles). Leave {spell('distance')} out (or pass {spell('distance', 'geodesic')}) for "
        f"ellipsoidal distances in metres, or pass {spell('crs')} with a projected CRS suited to the area "
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
            f"The {spell('distance')} parameter of {script} must be one of {', '.join(DISTANCES)}. Got "
            f"{distance!r} instead."
        )
    if target is not None:
        if distance == "geodesic":
            raise ParameterError(
                f"{spell('crs')} and {spell('distance', 'geodesic')} cannot be combined in {script}: {spell('crs')} reprojects "
                "the input and computes planar distances in that CRS. Leave out one of them."
            )
        chosen = _parse_crs(target, script)
        if crs is None:
            raise InputError(
                f"{label} has no CRS, so it cannot be reprojected to {spell('crs', target)}; assign its CRS first."
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
            f"computed; use {spell('distance', 'planar')}."
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
            f"The {spell('crs')} parameter of {script} must be a CRS pyproj accepts (for example "
            f"EPSG:32633, a WKT string or a PROJ string). Got {text!r} instead: {exc}"
        ) from exc
    if not chosen.is_projected:
        raise ParameterError(
            f"The {spell('crs')} parameter of {script} must be a projected CRS, since distances are then "
            f"planar in it. Got {text!r} instead ({chosen.name}, "
            f"{'a geographic CRS' if chosen.is_geographic else 'not a projected CRS'}); leave "
            f"{spell('crs')} out for geodesic distances."
        )
    return chosen
