"""Per-point sums of distances to the rest of the point's group, with guaranteed intervals.

For point i of group g, ``R_i = Σ_j w_j d_ij``. Along one direction, with the group's projected
values sorted, ``Σ_j w_j |p_i − p_j| = p_i (2 W_<i + w_i − W) − (2 P_<i + w_i p_i − P)`` where
``W_<i`` and ``P_<i`` are the weight and weighted position sums of the points before i. Every
term of ``R_i`` is one pair's distance times a non-negative weight, so the per-pair interval of
the projection estimate holds for ``R_i`` as it does for the group total.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._common import (
    BLOCK_ELEMENTS,
    SMALL_EXACT,
    UNIT_ROUNDOFF,
    GroupLayout,
    Progress,
    Ticker,
    centring_slack,
    check_groups,
    check_method,
    check_points,
    crofton_interval,
    directions_unit_vectors,
    exact_rounding,
    split_methods,
)
from .pairs import _padded_distances

__all__ = ["PointSums", "grouped_point_sums"]


@dataclass(frozen=True)
class PointSums:
    """Per-point results of :func:`grouped_point_sums`, in the order of the input points.

    Points whose group has no other point with positive weight get NaN sums and bounds.
    """

    total: np.ndarray  # Σ_j w_j d_ij
    lower: np.ndarray
    upper: np.ndarray
    rel_bound: np.ndarray
    other_weight: np.ndarray  # Σ_{j≠i} w_j over the point's group
    exact: np.ndarray
    directions: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean distance from each point to the others of its group."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.other_weight > 0, self.total / self.other_weight, np.nan)


def grouped_point_sums(
    x,
    y,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    tolerance: float = 0.01,
    method: str = "auto",
    progress: Progress | None = None,
) -> PointSums:
    """Weighted sum of distances from every point to the other points of its group.

    Parameters
    ----------
    x, y : array_like
        Planar coordinates of the points.
    groups : array_like of int
        Group code of every point, in ``[0, n_groups)``.
    n_groups : int, optional
        Number of groups (default ``groups.max() + 1``).
    weights : array_like, optional
        Non-negative weights; point i's sum is ``Σ_j w_j d_ij``.
    tolerance : float
        Guaranteed relative error of each sum, in [0, 0.5]; 0 means exact.
    method : {"auto", "exact", "projection"}
        ``auto`` picks exact sums per group when they are cheaper.
    progress : callable, optional
        Called as ``progress(done, total)`` in work units.

    Returns
    -------
    PointSums
        One entry per input point, in input order.

    Examples
    --------
    >>> r = grouped_point_sums([0, 3, 0], [0, 0, 4], [0, 0, 0], tolerance=0)
    >>> r.total.tolist()  # 3-4-5 triangle: each vertex's two sides
    [7.0, 8.0, 9.0]
    """
    x, y, weights = check_points(x, y, weights)
    groups, n_groups = check_groups(groups, x.size, n_groups)
    m = check_method(method, tolerance)
    lay = GroupLayout.build(x, y, groups, n_groups, weights)
    counts = lay.counts
    other = lay.other_weight()

    n = x.size
    total = np.full(n, np.nan)
    lower = np.full(n, np.nan)
    upper = np.full(n, np.nan)
    rel_bound = np.full(n, np.nan)
    exact = np.zeros(n, dtype=bool)
    dirs = np.zeros(n, dtype=np.int64)

    # a zero-weight point beside one weighted point still has a distance to it
    live = np.flatnonzero((counts >= 2) & (lay.weight_sum > 0))
    exact_groups, proj_groups = split_methods(counts, live, m, method, lay.w is not None)
    tick = Ticker(progress, counts[exact_groups].sum() + m * counts[proj_groups].sum())
    radius = np.hypot(lay.x, lay.y)
    radius_sum = lay.radius_sum()

    # results are filled in group-sorted order, then put back in input order at the end
    small = exact_groups[counts[exact_groups] <= SMALL_EXACT]
    for chunk, index, valid in lay.chunks(small, lambda s: s * s):
        w = lay.padded_weights(index, valid)
        sums = np.einsum("gij,gj->gi", _padded_distances(lay.x[index], lay.y[index]), w)
        total[index[valid]] = sums[valid]
        tick(counts[chunk].sum())
    for g in exact_groups[counts[exact_groups] > SMALL_EXACT]:
        sl = slice(lay.starts[g], lay.starts[g] + counts[g])
        total[sl] = _exact_rows(lay.x[sl], lay.y[sl], lay.wpt[sl])
        tick(counts[g])
    in_exact = np.isin(lay.codes, exact_groups)
    codes = lay.codes[in_exact]
    rounding = exact_rounding(2 * counts[codes])  # one row of n terms, plus cdist
    # centring: Σ_j w_j d_ij may be off by u·√2·(W r_i + Σ_j w_j r_j)
    shift = centring_slack(1.0, 1.0) * (lay.weight_sum[codes] * radius[in_exact] + radius_sum[codes]) / 2
    t = total[in_exact]
    lower[in_exact] = np.maximum(t * (1 - rounding) - shift, 0.0)
    upper[in_exact] = t * (1 + rounding) + shift
    with np.errstate(divide="ignore", invalid="ignore"):
        rel_bound[in_exact] = np.where(t > 0, rounding + shift / t, np.where(shift > 0, np.inf, 0.0))
    exact[in_exact] = True

    if proj_groups.size:
        summed = np.zeros(n)
        cos_t, sin_t = directions_unit_vectors(m)
        for chunk, index, valid in lay.chunks(proj_groups, lambda s: 4 * s):
            rows = _projected_point_rows(
                lay.x[index], lay.y[index], lay.padded_weights(index, valid), valid, cos_t, sin_t
            )
            summed[index[valid]] = rows[valid]
            tick(m * counts[chunk].sum())
        # Rounding: the prefix sums of one group are bounded by W_g·r_i and A_g = Σ w_j r_j, so
        # each direction's computed sum is within (4 n_g + 6)·u·(W_g r_i + A_g) of the exact one
        # (centring included).
        in_proj = np.isin(lay.codes, proj_groups)
        codes = lay.codes[in_proj]
        slack = (
            m
            * (4 * counts[codes] + 6)
            * UNIT_ROUNDOFF
            * (lay.weight_sum[codes] * radius[in_proj] + radius_sum[codes])
        )
        total[in_proj], lower[in_proj], upper[in_proj], rel_bound[in_proj] = crofton_interval(
            summed[in_proj], slack, m
        )
        dirs[in_proj] = m

    # a point with no other weighted point in its group has no mean distance
    none = ~(other > 0)
    for array in (total, lower, upper, rel_bound):
        array[none] = np.nan

    unsort = lay.unsort

    return PointSums(
        total=unsort(total),
        lower=unsort(lower),
        upper=unsort(upper),
        rel_bound=unsort(rel_bound),
        other_weight=unsort(other),
        exact=unsort(exact),
        directions=unsort(dirs),
    )


def _exact_rows(x, y, w) -> np.ndarray:
    """``Σ_j w_j d_ij`` for every point of one centred group, in blocks of rows."""
    from scipy.spatial.distance import cdist  # imported here: a start-up cost only exact sums pay

    pts = np.column_stack([x, y])
    n = x.size
    block = max(1, min(n, BLOCK_ELEMENTS // n))
    out = np.empty(n)
    for a in range(0, n, block):
        out[a : a + block] = cdist(pts[a : a + block], pts) @ w
    return out


def _projected_point_rows(cx, cy, cw, valid, cos_t, sin_t) -> np.ndarray:
    """Σ over directions of every point's projected distance sum, one padded row per group."""
    out = np.zeros(cx.shape)
    wsum = cw.sum(axis=1)[:, None]
    rows = np.arange(cx.shape[0])[:, None]
    for c, s in zip(cos_t, sin_t, strict=True):
        p = cx * c + cy * s
        p[~valid] = np.inf  # padding sorts to the end of its row, where its weight is 0
        order = np.argsort(p, axis=1)
        p = np.take_along_axis(p, order, axis=1)
        w = np.take_along_axis(cw, order, axis=1)
        p[w == 0] = 0.0  # zero-weight points (and padding) add nothing to the prefix sums
        wp = w * p
        before_w = np.cumsum(w, axis=1) - w
        before_p = np.cumsum(wp, axis=1) - wp
        psum = before_p[:, -1:] + wp[:, -1:]
        sorted_p = np.take_along_axis(cx * c + cy * s, order, axis=1)
        sums = sorted_p * (2 * before_w + w - wsum) - (2 * before_p + wp - psum)
        out[rows, order] += sums
    out[~valid] = 0.0
    return out
