"""Per-point sums of distances to the rest of the point's group, exact or projected.

For point i of group g, ``R_i = Σ_j w_j d_ij``. Along one direction, with the group's projected
values sorted, ``Σ_j w_j |p_i − p_j| = p_i (2 W_<i + w_i − W) − (2 P_<i + w_i p_i − P)`` where
``W_<i`` and ``P_<i`` are the weight and weighted position sums of the points before i. Every
term of ``R_i`` is one pair's distance times a non-negative weight, so the per-pair interval of
the projection estimate holds for ``R_i`` as it does for the group total.
"""

from __future__ import annotations

import numpy as np

from ._common import BLOCK_ELEMENTS, SMALL_EXACT, UNIT_ROUNDOFF, Raw, directions_unit_vectors, exact_rounding
from .pairs import padded_distances

__all__ = ["exact_point_raw", "projected_point_raw", "exact_against_raw"]


def exact_point_raw(lay, groups, tick) -> Raw:
    """Exact ``Σ_j w_j d_ij`` of every point of ``groups`` (centred layout, group order).

    The Raw record has one entry per point of the layout; points of other groups get 0.
    """
    counts = lay.counts
    total = np.zeros(lay.x.size)
    small = groups[counts[groups] <= SMALL_EXACT]
    for chunk, index, valid in lay.chunks(small, lambda s: s * s):
        w = lay.padded_weights(index, valid)
        sums = np.einsum("gij,gj->gi", padded_distances(lay.x[index], lay.y[index]), w)
        total[index[valid]] = sums[valid]
        tick(counts[chunk].sum())
    for g in groups[counts[groups] > SMALL_EXACT]:
        sl = slice(lay.starts[g], lay.starts[g] + counts[g])
        total[sl] = _exact_rows(lay.x[sl], lay.y[sl], lay.wpt[sl])
        tick(counts[g])
    codes = lay.codes
    rounding = exact_rounding(2 * counts[codes])  # one row of n terms, plus cdist
    # centring: Σ_j w_j (r_i + r_j) = W r_i + A
    mass = lay.weight_sum[codes] * lay.radius + lay.radius_sum()[codes]
    return Raw(total, 0, relative=rounding, radius_mass=mass)


def projected_point_raw(lay, groups, m, tick) -> Raw:
    """Summed projections of every point's distance sum over ``m`` directions (group order)."""
    counts = lay.counts
    summed = np.zeros(lay.x.size)
    cos_t, sin_t = directions_unit_vectors(m)
    for chunk, index, valid in lay.chunks(groups, lambda s: 4 * s):
        rows = _projected_point_rows(
            lay.x[index], lay.y[index], lay.padded_weights(index, valid), valid, cos_t, sin_t
        )
        summed[index[valid]] = rows[valid]
        tick(m * counts[chunk].sum())
    # Rounding: the prefix sums of one group are bounded by W_g·r_i and A_g = Σ w_j r_j, so
    # each direction's computed sum is within (4 n_g + 6)·u·(W_g r_i + A_g) of the exact one
    # (centring included).
    codes = lay.codes
    slack = m * (4 * counts[codes] + 6) * UNIT_ROUNDOFF * (
        lay.weight_sum[codes] * lay.radius + lay.radius_sum()[codes]
    )
    return Raw(summed, m, absolute=slack)


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


def exact_against_raw(ax, ay, bx, by, bw) -> Raw:
    """Exact ``Σ_j w_j |a_i − b_j|`` of every point a_i against the set b (centred coordinates)."""
    from scipy.spatial.distance import cdist  # imported here: a start-up cost only exact sums pay

    a = np.column_stack([ax, ay])
    b = np.column_stack([bx, by])
    out = np.empty(ax.size)
    block = max(1, BLOCK_ELEMENTS // max(bx.size, 1))
    for start in range(0, ax.size, block):
        out[start : start + block] = cdist(a[start : start + block], b) @ bw
    rounding = exact_rounding(2 * bx.size)  # one row of n terms, plus cdist
    # centring: Σ_j w_j (r_i + r_j) = W r_i + A
    mass = bw.sum() * np.hypot(ax, ay) + (bw * np.hypot(bx, by)).sum()
    return Raw(out, 0, relative=rounding, radius_mass=mass)
