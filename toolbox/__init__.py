"""pairspread: total and mean distances between points, per group, with guaranteed bounds.

The scripts of the pack are declared in ``toolbox/manifest.toml``; each is a Python function here
(``group_spread``), a subcommand of the ``pairspread`` command line, and reachable through
:func:`run`. The array kernels (numpy in, numbers out) are public too.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .api import script_function as _script_function
from .chain import run_chain
from .errors import (
    GeometryError,
    InputError,
    ManifestError,
    OutputError,
    PairspreadError,
    ParameterError,
)
from .geodesy import geodesic_cross_pair_sums, grouped_geodesic_pair_sums, grouped_geodesic_point_sums
from .kernels import (
    CrossPairSums,
    GroupPairSums,
    PairSum,
    PointSums,
    cross_pair_sums,
    directions_for_tolerance,
    exact_geodesic_cross_sums,
    exact_geodesic_pair_sums,
    exact_geodesic_point_sums,
    exact_pair_sum,
    grouped_pair_sums,
    grouped_point_sums,
    pair_distance_sum,
    projection_directions,
    projection_error,
    projection_factors,
)
from .runner import run

group_spread = _script_function("group-spread")
point_remoteness = _script_function("point-remoteness")
cross_spread = _script_function("cross-spread")
keep_rows = _script_function("keep-rows")
spread_contrast = _script_function("spread-contrast")

__all__ = [
    "__version__",
    "run",
    "run_chain",
    "keep_rows",
    "group_spread",
    "point_remoteness",
    "cross_spread",
    "spread_contrast",
    "grouped_point_sums",
    "cross_pair_sums",
    "PointSums",
    "CrossPairSums",
    "grouped_geodesic_pair_sums",
    "grouped_geodesic_point_sums",
    "geodesic_cross_pair_sums",
    "exact_geodesic_pair_sums",
    "exact_geodesic_point_sums",
    "exact_geodesic_cross_sums",
    "pair_distance_sum",
    "grouped_pair_sums",
    "exact_pair_sum",
    "directions_for_tolerance",
    "projection_error",
    "projection_directions",
    "projection_factors",
    "PairSum",
    "GroupPairSums",
    "PairspreadError",
    "ParameterError",
    "InputError",
    "GeometryError",
    "OutputError",
    "ManifestError",
]
