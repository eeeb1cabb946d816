"""Compiled kernel: the group layout (points sorted by group, each group centred) and the
per-group sums the other kernels need, in a counting sort and two passes over pieces.

numpy's route (:meth:`toolbox.kernels.GroupLayout.build` without numba) sorts the group codes,
gathers every array through the order, and then makes a dozen passes (means, ranges, the
subtraction, distances from the centre and their sums per group). Here a stable counting sort
scatters each point, as one record, straight into its group, and the rest is two parallel
passes over pieces of at most ``PIECE`` points of one group, so that even one group of millions
of points keeps every thread busy.
"""

from __future__ import annotations

import numba
import numpy as np
from numba import njit, prange

__all__ = ["group_records", "centre_pieces", "slices", "PIECE"]

#: points per piece of the parallel passes (two arrays of it stay in a core's cache)
PIECE = 1 << 16


def slices() -> int:
    """Slices of the input for :func:`group_records`: a few per thread, handed out one at a time
    as threads free up (a thread that lost its core holds up one slice, not half the input)."""
    return 4 * numba.get_num_threads()


@njit(parallel=True, cache=True, nogil=True)
def group_records(codes, n_groups, parts, x, y, w, weighted):
    """Stable counting sort by group: one record (x, y, [w,] original index) per point, in
    group order, and the count of every group.

    The input is cut into ``parts`` consecutive slices, counted and scattered in parallel:
    each slice writes its points of a group after those of the slices before it, so the order
    within a group stays the input's. One record per point keeps the scattered writes to one
    stream per group (a thousand groups then fit a core's cache), several times faster than
    gathering each array through an index. The index is stored as a float64, exact below 2**53.
    """
    n = codes.size
    bounds = np.linspace(0, n, parts + 1).astype(np.int64)
    fill = np.zeros((parts, n_groups), dtype=np.int64)
    for p in prange(parts):
        for i in range(bounds[p], bounds[p + 1]):
            fill[p, codes[i]] += 1
    counts = np.zeros(n_groups, dtype=np.int64)
    at = 0
    for g in range(n_groups):  # where each slice's points of group g begin
        for p in range(parts):
            k = fill[p, g]
            fill[p, g] = at
            at += k
            counts[g] += k
    rec = np.empty((n, 4 if weighted else 3))
    last = rec.shape[1] - 1
    for p in prange(parts):
        for i in range(bounds[p], bounds[p + 1]):
            g = codes[i]
            j = fill[p, g]
            fill[p, g] = j + 1
            rec[j, 0] = x[i]
            rec[j, 1] = y[i]
            if weighted:
                rec[j, 2] = w[i]
            rec[j, last] = i
    return rec, counts


@njit(parallel=True, cache=True, nogil=True)
def centre_pieces(x, y, w, weighted, index, centred, piece_group, piece_start, piece_stop, n_groups, out):
    """Centre every group on its (weighted) mean; per-group sums.

    ``x``, ``y``, ``w`` are in group order (columns of :func:`group_records`, or the inputs
    themselves when they are in order already); ``index`` (empty when in order already) is each
    point's original index. ``out`` is (x, y, w, order): the coordinates are copied into it
    (``w`` and ``order`` only with an ``index`` and, for ``w``, weights), then centred in place.
    Returns, per group: Σw, Σ_{i<j} w_i w_j (as Σ_i w_i·(weight before i)), the largest
    distance of a point from the centre and Σ w_i r_i (``r`` those distances). The mean
    is weighted unless the group's weights are all zero, and clamped into the group's range of
    values, so identical points centre to exact zeros. With ``centred`` False the coordinates
    are only copied (and the sums of distances are zeros).
    """
    xo, yo, wo, order = out
    gathered = index.size > 0
    pieces = piece_group.size
    # pass 1, per piece: Σw, Σw·before, Σwx, Σwy, Σx, Σy, min x, max x, min y, max y
    part = np.zeros((pieces, 10))
    for k in prange(pieces):
        sw = 0.0
        pair = 0.0
        swx = 0.0
        swy = 0.0
        sx = 0.0
        sy = 0.0
        lo_x = np.inf
        hi_x = -np.inf
        lo_y = np.inf
        hi_y = -np.inf
        for i in range(piece_start[k], piece_stop[k]):
            xi, yi = x[i], y[i]
            wi = w[i] if weighted else 1.0
            xo[i] = xi
            yo[i] = yi
            if gathered:
                order[i] = np.int64(index[i])
                if weighted:
                    wo[i] = wi
            pair += wi * sw
            sw += wi
            swx += wi * xi
            swy += wi * yi
            sx += xi
            sy += yi
            lo_x = min(lo_x, xi)
            hi_x = max(hi_x, xi)
            lo_y = min(lo_y, yi)
            hi_y = max(hi_y, yi)
        row = part[k]
        row[0], row[1], row[2], row[3], row[4], row[5] = sw, pair, swx, swy, sx, sy
        row[6], row[7], row[8], row[9] = lo_x, hi_x, lo_y, hi_y
    # per group, pieces in order: the pair weight adds each piece's weight times the weight
    # of the pieces before it (non-negative terms only)
    weight_sum = np.zeros(n_groups)
    pair_weight = np.zeros(n_groups)
    sums = np.zeros((n_groups, 4))  # Σwx, Σwy, Σx, Σy
    box = np.empty((n_groups, 4))
    box[:, 0] = np.inf
    box[:, 1] = -np.inf
    box[:, 2] = np.inf
    box[:, 3] = -np.inf
    count = np.zeros(n_groups)
    for k in range(pieces):
        g = piece_group[k]
        row = part[k]
        pair_weight[g] += row[1] + row[0] * weight_sum[g]
        weight_sum[g] += row[0]
        for j in range(4):
            sums[g, j] += row[2 + j]
        box[g, 0] = min(box[g, 0], row[6])
        box[g, 1] = max(box[g, 1], row[7])
        box[g, 2] = min(box[g, 2], row[8])
        box[g, 3] = max(box[g, 3], row[9])
        count[g] += piece_stop[k] - piece_start[k]
    mx = np.zeros(n_groups)
    my = np.zeros(n_groups)
    for g in range(n_groups):
        if count[g] == 0 or not centred:
            continue
        if weight_sum[g] > 0:
            mx[g], my[g] = sums[g, 0] / weight_sum[g], sums[g, 1] / weight_sum[g]
        else:
            mx[g], my[g] = sums[g, 2] / count[g], sums[g, 3] / count[g]
        mx[g] = min(max(mx[g], box[g, 0]), box[g, 1])
        my[g] = min(max(my[g], box[g, 2]), box[g, 3])
    # pass 2, per piece: subtract, distances from the centre and their sums
    dist = np.zeros((pieces, 2))  # max r, Σ w r
    for k in prange(pieces):
        g = piece_group[k]
        cx, cy = mx[g], my[g]
        top = 0.0
        swr = 0.0
        if not centred:
            continue
        for i in range(piece_start[k], piece_stop[k]):
            xi = xo[i] - cx
            yi = yo[i] - cy
            xo[i] = xi
            yo[i] = yi
            r = np.sqrt(xi * xi + yi * yi)
            top = max(top, r)
            swr += (1.0 if not weighted else wo[i] if gathered else w[i]) * r
        dist[k, 0], dist[k, 1] = top, swr
    radius_max = np.zeros(n_groups)
    radius_sum = np.zeros(n_groups)
    for k in range(pieces):
        g = piece_group[k]
        radius_max[g] = max(radius_max[g], dist[k, 0])
        radius_sum[g] += dist[k, 1]
    return weight_sum, pair_weight, radius_max, radius_sum
