"""Array kernels: sums of pair distances, exact or projected onto directions.

numpy arrays in, :class:`Raw` records out: the sums and the rounding allowance of the kernel's
own arithmetic. Nothing here reads files, knows about CRS objects or prints, and nothing here
makes intervals: ``toolbox.estimate`` does that, in one place. Progress is reported through a
callback. The geodesic kernels take longitudes, latitudes and an ellipsoid's ``a`` and ``f``.
"""

from . import costs
from ._common import (
    UNIT_ROUNDOFF,
    GroupLayout,
    Progress,
    Raw,
    Ticker,
    centre,
    check_groups,
    check_points,
    thread_limit,
    weights_of_others,
)
from .cross import MAX_CROSS_GROUPS, exact_cross_raw, projected_cross_raw
from .geodesic import (
    WGS84_A,
    WGS84_F,
    check_lonlat,
    exact_geodesic_against_raw,
    exact_geodesic_cross_raw,
    exact_geodesic_pair_raw,
    exact_geodesic_point_raw,
    geod,
)
from .pairs import exact_pair_raw, has_compiled, projected_pair_raw
from .points import exact_against_raw, exact_point_raw, projected_point_raw

__all__ = [
    "UNIT_ROUNDOFF",
    "MAX_CROSS_GROUPS",
    "WGS84_A",
    "WGS84_F",
    "costs",
    "GroupLayout",
    "Progress",
    "Raw",
    "Ticker",
    "centre",
    "check_groups",
    "check_points",
    "check_lonlat",
    "geod",
    "thread_limit",
    "weights_of_others",
    "has_compiled",
    "exact_pair_raw",
    "projected_pair_raw",
    "exact_point_raw",
    "projected_point_raw",
    "exact_cross_raw",
    "projected_cross_raw",
    "exact_geodesic_pair_raw",
    "exact_geodesic_point_raw",
    "exact_geodesic_cross_raw",
    "exact_against_raw",
    "exact_geodesic_against_raw",
]
