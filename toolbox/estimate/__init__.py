"""The estimator layer: points in, per-group, per-point and cross-group sums with intervals out.

Every script asks here for its sums. :class:`Points` carries coordinates, group codes, weights
and the distance kind (:func:`distance_setup` decides it from a layer's CRS); :func:`pair_sums`,
:func:`point_sums` and :func:`cross_sums` return the estimate, the guaranteed interval, the
relative bound, the method, the directions and a note per entry. The interval arithmetic lives
in :mod:`toolbox.estimate.interval`, the local projections of geodesic groups in
:mod:`toolbox.estimate.frames`.
"""

from .arrays import cross_pair_sums, exact_pair_sum, grouped_pair_sums, grouped_point_sums, pair_distance_sum
from .centres import group_centres
from .contrast import EnergyTest, energy_test
from .distance import DISTANCES, DistanceSetup, distance_setup
from .frames import MAX_RADIUS_DEG, LocalFrame, local_frame
from .interval import (
    METHODS,
    directions_for_tolerance,
    fold_distortion,
    planar_tolerance,
    projection_directions,
    projection_error,
    projection_factors,
)
from .nearest import NearestMeans, nearest_means
from .pieces import feature_sums
from .points import Points
from .results import CrossPairSums, GroupPairSums, PairSum, PointSums, raise_for_notes
from .sums import EXACT_FALLBACK_POINTS, check_cross_groups, cross_sums, pair_sums, point_sums

__all__ = [
    "DISTANCES",
    "METHODS",
    "MAX_RADIUS_DEG",
    "EXACT_FALLBACK_POINTS",
    "DistanceSetup",
    "distance_setup",
    "Points",
    "pair_sums",
    "point_sums",
    "cross_sums",
    "check_cross_groups",
    "feature_sums",
    "group_centres",
    "nearest_means",
    "NearestMeans",
    "energy_test",
    "EnergyTest",
    "GroupPairSums",
    "PointSums",
    "CrossPairSums",
    "PairSum",
    "raise_for_notes",
    "LocalFrame",
    "local_frame",
    "fold_distortion",
    "planar_tolerance",
    "directions_for_tolerance",
    "projection_directions",
    "projection_error",
    "projection_factors",
    "grouped_pair_sums",
    "grouped_point_sums",
    "cross_pair_sums",
    "pair_distance_sum",
    "exact_pair_sum",
]
