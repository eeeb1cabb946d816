"""Points that stand for pieces of features (``--as-points fill``): the model's allowances.

The model is "each feature's weight spread uniformly over its area or length". A feature is cut
into pieces, each piece k carries weight w_k and is represented by one sample point c_k, and
``shift`` s_k bounds the mean distance from c_k to the points of the piece. With m_kl the mean
distance between a uniform point of piece k and one of piece l:

- ``m_kl ≤ |c_k − c_l| + s_k + s_l`` (triangle inequality), and ``0 ≤ m_kk ≤ 2 s_k``;
- for planar distances, whose samples are the pieces' centroids, ``m_kl ≥ |c_k − c_l|``
  (Jensen: the distance is convex); for geodesic distances only the triangle inequality holds,
  ``m_kl ≥ |c_k − c_l| − s_k − s_l``.

A group's model total counts every pair of weight elements once, ``T = Σ_{k<l} w_k w_l m_kl +
½ Σ_k w_k² m_kk`` over the pair weight ``W²/2`` (the pairs inside one feature included), so its
mean is E|X − Y| for X, Y drawn independently from the spread weight. Summing the bounds above
with the weights gives, around the discrete total D of the samples,
``D − (W·A − Q) ≤ T ≤ D + W·A`` with ``A = Σ w_k s_k`` and ``Q = Σ w_k² s_k`` (the lower side
is ``D`` itself for planar distances). Between two groups g and h (no shared pieces) the pair
weight stays ``W_g W_h`` and the allowance is ``W_h A_g + W_g A_h``. The estimate adds the middle
of the within-piece range, ``Q/2``. docs/method.md gives the derivation in full.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from ..errors import InputError
from .interval import widen
from .results import CrossPairSums, GroupPairSums, PointSums

__all__ = ["degree_scale", "shift_in_distance_units", "widen_pairs", "widen_cross", "feature_sums"]


def degree_scale(a: float, f: float) -> float:
    """Metres per unit of straight-line length in (longitude, latitude) degrees, at most.

    On the ellipsoid ds² = M² dφ² + (N cos φ)² dλ², and both M and N cos φ are at most the polar
    radius of curvature a/√(1 − e²); so a path of Euclidean length L in degrees is at most
    ``L · π/180 · a/√(1 − e²)`` metres long, and the geodesic between its ends no longer.

    Examples
    --------
    >>> round(degree_scale(6378137.0, 1 / 298.257223563))
    111694
    """
    e2 = f * (2 - f)
    return math.pi / 180 * a / math.sqrt(1 - e2)


def shift_in_distance_units(setup, crs, shift, label: str) -> np.ndarray:
    """Shifts measured in ``crs`` units, as bounds in the unit of the distances ``setup`` gives.

    Planar distances must be measured in the CRS the pieces were cut in (a reprojection would
    bend them); geodesic distances need pieces cut in the setup's longitude and latitude, whose
    degrees are scaled by :func:`degree_scale` (an upper bound everywhere on the ellipsoid).
    """
    shift = np.asarray(shift, dtype=np.float64)
    same = crs is setup.crs or crs == setup.crs or (crs is not None and setup.crs is not None and crs.equals(setup.crs))
    if setup.kind == "planar":
        if setup.crs is not None and not same:
            raise InputError(
                f"The features of {label} were cut into pieces in {crs.name}, not in "
                f"{setup.crs.name} where distances are measured; reproject the layer first."
            )
        return shift
    if not same:
        raise InputError(
            f"The features of {label} must be cut into pieces in longitude and latitude for "
            "geodesic distances; reproject the layer to its geographic CRS first, or pass --crs "
            "with a projected CRS for planar distances."
        )
    from .distance import _degrees_per_unit

    return shift * degree_scale(setup.a, setup.f) * _degrees_per_unit(setup.crs)


def _per_group(points):
    """Weight W, Σ w·s (A) and Σ w²·s (Q) of every group."""
    w, s, codes, n = points.weight_array(), points.shift_array(), points.groups, points.n_groups
    return np.bincount(codes, w, n), np.bincount(codes, w * s, n), np.bincount(codes, w * w * s, n)


def _own(sums, count, weight, spread, spread_sq, metric, index=...):
    """Model total, bounds and relative bound of groups' own pairs (arrays over the groups)."""
    total, lower, upper = sums.total[index], sums.lower[index], sums.upper[index]
    # one piece alone has no discrete pair, but the model's pairs inside it are there
    alone = (count == 1) & (weight > 0) & np.isnan(total) & (np.asarray(sums.note[index], dtype=object) == "")
    total, lower, upper = (np.where(alone, 0.0, v) for v in (total, lower, upper))
    above = weight * spread
    below = above - spread_sq if metric else np.zeros_like(above)
    return alone, widen(total + spread_sq / 2, lower, upper, below, above)


def widen_pairs(sums: GroupPairSums, points) -> GroupPairSums:
    """A group's pair sums of piece samples as the model's: pair weight W²/2, widened interval."""
    weight, spread, spread_sq = _per_group(points)
    alone, (est, lo, hi, bound) = _own(
        sums, sums.n_points, weight, spread, spread_sq, points.distance.kind != "planar"
    )
    return replace(
        sums, pair_weight=weight**2 / 2, total=est, lower=lo, upper=hi, rel_bound=bound,
        exact=sums.exact | alone, directions=np.where(alone, 0, sums.directions),
    )  # fmt: skip


def widen_cross(sums: CrossPairSums, points) -> CrossPairSums:
    """Cross sums of piece samples as the model's: the diagonal as :func:`widen_pairs`."""
    weight, spread, spread_sq = _per_group(points)
    metric = points.distance.kind != "planar"
    above = np.outer(spread, weight) + np.outer(weight, spread)
    est, lo, hi, bound = widen(sums.total, sums.lower, sums.upper, above if metric else 0.0, above)
    pair_weight, exact, directions = sums.pair_weight.copy(), sums.exact.copy(), sums.directions.copy()
    diag = np.diag_indices(weight.size)
    alone, own = _own(sums, sums.n_points, weight, spread, spread_sq, metric, diag)
    for array, values in zip((est, lo, hi, bound), own, strict=True):
        array[diag] = values
    pair_weight[diag] = weight**2 / 2
    exact[diag] |= alone
    directions[diag] = np.where(alone, 0, directions[diag])
    return replace(
        sums, pair_weight=pair_weight, total=est, lower=lo, upper=hi, rel_bound=bound, exact=exact,
        directions=directions,
    )  # fmt: skip


def feature_sums(
    points, features, n_features: int, share, *, tolerance, method, progress=None, threads=None
) -> PointSums:  # fmt: skip
    """Per feature, the model's mean distance to the rest of its group (``point-remoteness``).

    ``features`` numbers the feature each point (piece) belongs to, ``share`` is each piece's
    share of its feature (the shares of a feature add up to 1); every feature lies in one group.
    Entry f is ``Σ_{k∈f} share_k Σ_{l∈g∖f} w_l m_kl`` with its interval, and ``other_weight`` is
    ``W_g − w_f``, so that ``mean`` is the mean distance from a uniform point of the feature to
    the spread weight of the rest of its group (as :func:`~toolbox.estimate.point_sums` gives for
    a point). It is the pieces' sums to their whole group less the feature's own pairs (twice its
    pair total with the shares as weights, times w_f), whose bounds are subtracted crosswise so
    that the interval stays guaranteed; then the model's allowance widens it (module docstring:
    ``Σ_k share_k s_k (W_g − w_f) + (A_g − A_f)`` above, the same below for geodesic distances).
    Half the tolerance goes to the sums, as in :func:`~toolbox.estimate.pair_sums`.
    """
    from .sums import pair_sums, point_sums

    features = np.asarray(features, dtype=np.int64)
    share = np.asarray(share, dtype=np.float64)
    plain = replace(points, shift=None)
    tolerance = tolerance / 2
    per_point = point_sums(plain, tolerance=tolerance, method=method, progress=progress, threads=threads)
    own = pair_sums(
        replace(plain, groups=features, n_groups=n_features, weights=share), tolerance=tolerance, method=method,
        threads=threads,
    )  # fmt: skip
    w, s = points.weight_array(), points.shift_array()
    group_of = np.zeros(n_features, dtype=np.int64)
    group_of[features] = points.groups
    weight = np.bincount(features, w, n_features)
    group_weight, group_spread, _ = _per_group(points)

    def summed(values, by=share):
        return np.bincount(features, by * values, n_features)

    single = own.n_points < 2  # no pairs of its own: nothing to take away
    own_total, own_lo, own_hi = (np.where(single, 0.0, v) for v in (own.total, own.lower, own.upper))
    rest = group_weight[group_of] - weight
    above = summed(s) * rest + (group_spread[group_of] - summed(s, w))
    with np.errstate(invalid="ignore"):
        est, lo, hi, bound = widen(
            summed(per_point.total) - 2 * weight * own_total,
            np.maximum(summed(per_point.lower) - 2 * weight * own_hi, 0.0),
            summed(per_point.upper) - 2 * weight * own_lo,
            above if points.distance.kind != "planar" else 0.0,
            above,
        )
    note = np.full(n_features, "", dtype=object)
    for source, index in ((per_point.note, features), (own.note, np.arange(n_features))):
        for k in np.flatnonzero(np.asarray(source, dtype=object) != ""):
            note[index[k]] = source[k]
    none = ~(rest > 0) | (note != "")
    est, lo, hi, bound = (np.where(none, np.nan, v) for v in (est, lo, hi, bound))
    directions = np.zeros(n_features, dtype=np.int64)
    np.maximum.at(directions, features, per_point.directions)
    exact = (np.bincount(features, ~per_point.exact, n_features) == 0) & (own.exact | single)
    return PointSums(
        total=est, lower=lo, upper=hi, rel_bound=bound, other_weight=rest, exact=exact & ~none,
        directions=directions, note=note,
    )  # fmt: skip
