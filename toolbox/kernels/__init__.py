"""Array kernels: sums of pair distances, exact or by projection, with guaranteed intervals.

numpy arrays in, numbers or arrays out. Nothing here reads files, knows about CRS objects or
prints; progress is reported through an optional callback ``progress(done, total)``. The
geodesic kernels take longitudes, latitudes and an ellipsoid's ``a`` and ``f`` as numbers.
"""

from ._common import (
    METHODS,
    directions_for_tolerance,
    projection_directions,
    projection_error,
    projection_factors,
    thread_limit,
)
from .cross import CrossPairSums, cross_pair_sums
from .geodesic import exact_geodesic_cross_sums, exact_geodesic_pair_sums, exact_geodesic_point_sums
from .pairs import GroupPairSums, PairSum, exact_pair_sum, grouped_pair_sums, pair_distance_sum
from .points import PointSums, grouped_point_sums

__all__ = [
    "METHODS",
    "GroupPairSums",
    "PairSum",
    "directions_for_tolerance",
    "projection_error",
    "projection_directions",
    "projection_factors",
    "thread_limit",
    "exact_pair_sum",
    "pair_distance_sum",
    "grouped_pair_sums",
    "PointSums",
    "grouped_point_sums",
    "CrossPairSums",
    "cross_pair_sums",
    "exact_geodesic_pair_sums",
    "exact_geodesic_point_sums",
    "exact_geodesic_cross_sums",
]
