"""``cross-spread``: mean distance between every pair of groups, or between two layers."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import geodesy, grouping, kernels, layers, tables
from ..errors import InputError, ParameterError


def _read(data, layer, group_by, weight, where, engine):
    points = layers.read_points(
        data, layer=layer, fields=[*group_by, *([weight] if weight else [])], where=where, engine=engine
    )
    groups = grouping.group_features(points.attributes, group_by)
    weights = grouping.feature_weights(points.attributes, weight, points.label)
    w = np.ones(points.x.size) if weights is None else weights[points.feature]
    return points, groups, w


def cross_spread(
    data,
    *,
    layer=None,
    group_by=(),
    weight=None,
    to=None,
    to_layer=None,
    to_group_by=(),
    to_weight=None,
    tolerance=0.01,
    method="auto",
    distance=None,
    crs=None,
    where=None,
    engine="pyogrio",
    wide=False,
    progress=None,
) -> pd.DataFrame:
    """Mean distance between groups: every pair of one layer's groups, or groups of two layers."""
    group_by, to_group_by = list(group_by or ()), list(to_group_by or ())
    if to is None:
        if not group_by:
            raise ParameterError(
                "cross-spread on one layer needs --group-by (the groups to compare); "
                "or give a second layer with --to."
            )
        if to_layer or to_group_by or to_weight:
            raise ParameterError("--to-layer, --to-group-by and --to-weight need --to.")
    first, first_groups, first_w = _read(data, layer, group_by, weight, where, engine)
    setup = geodesy.distance_setup(
        first.crs, first.label, distance=distance, target=crs, script="cross-spread"
    )
    units = setup.units
    x, y = setup.coordinates(first.x, first.y, first.crs, first.label)
    codes, w = first_groups.codes[first.feature], first_w
    n_from = first_groups.count
    if to is not None:
        second, second_groups, second_w = _read(to, to_layer, to_group_by, to_weight, None, engine)
        sx, sy = _to_crs(second, first, setup, explicit=crs is not None)
        x, y = np.concatenate([x, sx]), np.concatenate([y, sy])
        codes = np.concatenate([codes, n_from + second_groups.codes[second.feature]])
        w = np.concatenate([w, second_w])
        n_groups = n_from + second_groups.count
        from_keys, to_keys = first_groups.keys, second_groups.keys
    else:
        n_groups = n_from
        from_keys = to_keys = first_groups.keys
    if setup.kind == "geodesic":
        sums = geodesy.geodesic_cross_pair_sums(
            x,
            y,
            codes,
            n_groups,
            w,
            a=setup.a,
            f=setup.f,
            tolerance=tolerance,
            method=method,
            progress=progress,
        )
    else:
        sums = kernels.cross_pair_sums(
            x, y, codes, n_groups, w, tolerance=tolerance, method=method, progress=progress
        )
    rows = np.arange(n_from)
    cols = np.arange(n_from, n_groups) if to is not None else rows
    a, b = np.meshgrid(rows, cols, indexing="ij")
    a, b = a.ravel(), b.ravel()
    has_pairs = ~np.isnan(sums.total[a, b])
    table = pd.DataFrame(
        {
            "from_group": tables.group_labels(from_keys)[a],
            "to_group": tables.group_labels(to_keys)[b - (n_from if to is not None else 0)],
            "n_from": sums.n_points[a],
            "n_to": sums.n_points[b],
            "total_dist": sums.total[a, b],
            "total_lo": sums.lower[a, b],
            "total_hi": sums.upper[a, b],
            "mean_dist": sums.mean[a, b],
            "rel_bound": sums.rel_bound[a, b],
            "method": pd.array(
                np.where(has_pairs, np.where(sums.exact[a, b], "exact", "projection"), None),
                dtype="string",
            ),
            "directions": sums.directions[a, b],
            "units": units,
        }
    )
    if not wide:
        return table
    return tables.wide_matrix(table)


def _to_crs(second, first, setup, *, explicit):
    """Coordinates of the second layer in the frame the first layer's are computed in.

    That is the first layer's CRS (planar; reprojected with a warning if they differ), its
    longitude and latitude (geodesic), or the CRS of --crs (``explicit``; no warning, since the
    user asked for it).
    """
    if first.crs is None and second.crs is None:
        return second.x, second.y
    if first.crs is None or second.crs is None:
        raise InputError(
            f"Only one of {first.label} and {second.label} has a CRS, so their coordinates cannot "
            "be related; assign the missing CRS first."
        )
    return setup.coordinates(second.x, second.y, second.crs, second.label, note=not explicit)
