"""Compiled kernel: the group layout (points sorted by group, each group centred) and the
per-group sums the other kernels need, in a counting sort and two passes over pieces.

numpy's route (:meth:`toolbox.kernels.GroupLayout.build` without numba) sorts the group codes,
gathers every array through the order, and then makes a dozen passes (means, ranges, the
subtraction, distances from the centre and their sums per group). Here a stable counting sort
scatters each point, as one record, straight into its group, and the rest is two parallel
passes over pieces of at most ``PIECE`` points of one group, so that even one group of millions
of points keeps every thread busy.

The parallel functions hold prange loops and nothing else: numba would turn an array
expression (``np.zeros``, ``astype``) inside them into a parallel loop of its own, handed out
element by element under ``thread_limit``'s chunk size of 1. Allocations and the short serial
steps live in plain compiled helpers.
"""

from __future__ import annotations

import numba
import numpy as np
from numba import njit, prange

__all__ = ["in_order", "group_records", "group_order", "centre_pieces", "slices", "PIECE"]

#: points per piece of the parallel passes (two arrays of it stay in a core's cache)
PIECE = 1 << 16


def slices() -> int:
    """Slices of the input for :func:`group_records`: a few per thread, handed out one at a time
    as threads free up (a thread that lost its core holds up one slice, not half the input)."""
    return 4 * numba.get_num_threads()


@njit(cache=True, nogil=True)
def in_order(codes):
    """Whether the group codes never decrease; stops at the first that does (codes in no
    order are told after a few, where numpy's comparison would read them all)."""
    for i in range(1, codes.size):
        if codes[i] < codes[i - 1]:
            return False
    return True


@njit(cache=True, nogil=True)
def _slices(n, parts, n_groups):
    """Bounds of ``parts`` equal slices of n points, and a zeroed (parts, groups) count table."""
    bounds = np.empty(parts + 1, dtype=np.int64)
    for p in range(parts + 1):
        bounds[p] = n * p // parts
    return bounds, np.zeros((parts, n_groups), dtype=np.int64)


@njit(cache=True, nogil=True)
def _slice_offsets(fill):
    """Turn per-slice counts into where each slice's points of each group begin, in place
    (group by group, slice after slice); returns the count of every group."""
    parts, n_groups = fill.shape
    counts = np.zeros(n_groups, dtype=np.int64)
    at = 0
    for g in range(n_groups):
        for p in range(parts):
            k = fill[p, g]
            fill[p, g] = at
            at += k
            counts[g] += k
    return counts


@njit(parallel=True, cache=True, nogil=True)
def group_records(codes, n_groups, parts, x, y, w, weighted, indexed):
    """Stable counting sort by group: one record (x, y, [w,] [original index]) per point, in
    group order, and the count of every group.

    The input is cut into ``parts`` consecutive slices, counted and scattered in parallel:
    each slice writes its points of a group after those of the slices before it, so the order
    within a group stays the input's. One record per point keeps the scattered writes to one
    stream per group (a thousand groups then fit a core's cache), several times faster than
    gathering each array through an index. The index (``indexed``) is stored as a float64,
    exact below 2**53; without it the records are a third smaller and twice as fast to write
    (:func:`group_order` gives the order when it is wanted after all).
    """
    bounds, fill = _slices(codes.size, parts, n_groups)
    for p in prange(parts):
        for i in range(bounds[p], bounds[p + 1]):
            fill[p, codes[i]] += 1
    counts = _slice_offsets(fill)
    rec = np.empty((codes.size, 2 + weighted + indexed))
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
            if indexed:
                rec[j, last] = i
    return rec, counts


@njit(parallel=True, cache=True, nogil=True)
def group_order(codes, n_groups, parts):
    """The original index of every point in group order: :func:`group_records`'s stable
    counting sort, of the indices alone."""
    bounds, fill = _slices(codes.size, parts, n_groups)
    for p in prange(parts):
        for i in range(bounds[p], bounds[p + 1]):
            fill[p, codes[i]] += 1
    _slice_offsets(fill)
    order = np.empty(codes.size, dtype=np.int64)
    for p in prange(parts):
        for i in range(bounds[p], bounds[p + 1]):
            g = codes[i]
            j = fill[p, g]
            fill[p, g] = j + 1
            order[j] = i
    return order


@njit(cache=True, nogil=True, inline="always")
def _centre(sums, count, box):
    """A group's centre from its sums (Σw, Σwx, Σwy, Σx, Σy) and box (min x, max x, min y,
    max y): the weighted mean, or the plain one when the weights are all zero, clamped into the
    box (so identical points centre to exact zeros)."""
    sw, swx, swy, sx, sy = sums
    if sw > 0:
        cx, cy = swx / sw, swy / sw
    else:
        cx, cy = sx / count, sy / count
    return min(max(cx, box[0]), box[1]), min(max(cy, box[2]), box[3])


@njit(cache=True, nogil=True, inline="always")
def _subtract(xo, yo, w, weighted, first, stop, cx, cy):
    """Centre points first:stop in place; (largest distance from the centre, Σ w r)."""
    top = 0.0
    swr = 0.0
    for i in range(first, stop):
        xi = xo[i] - cx
        yi = yo[i] - cy
        xo[i] = xi
        yo[i] = yi
        r = np.sqrt(xi * xi + yi * yi)
        top = max(top, r)
        swr += (w[i] if weighted else 1.0) * r
    return top, swr


@njit(cache=True, nogil=True)
def _sum_piece(x, y, w, weighted, moved, index, centred, whole, first, stop, out, row):
    """Pass 1 over points first:stop of one group: copy them into ``out`` (with their weight
    when ``moved``, their original index when ``index`` is given) and put in ``row`` Σw, Σw·before, Σwx, Σwy, Σx,
    Σy, min x, max x, min y, max y; for a ``whole`` group, centre it too, with its largest
    distance from the centre and Σ w r (else zeros there, for pass 2)."""
    xo, yo, wo, order = out
    indexed = index.size > 0
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
    for i in range(first, stop):
        xi, yi = x[i], y[i]
        wi = w[i] if weighted else 1.0
        xo[i] = xi
        yo[i] = yi
        if indexed:
            order[i] = np.int64(index[i])
        if moved and weighted:
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
    row[0], row[1], row[2], row[3], row[4], row[5] = sw, pair, swx, swy, sx, sy
    row[6], row[7], row[8], row[9] = lo_x, hi_x, lo_y, hi_y
    row[10], row[11] = 0.0, 0.0
    if centred and whole:
        cx, cy = _centre((sw, swx, swy, sx, sy), stop - first, (lo_x, hi_x, lo_y, hi_y))
        row[10], row[11] = _subtract(xo, yo, wo if moved else w, weighted, first, stop, cx, cy)


@njit(cache=True, nogil=True)
def _pieces_per_group(piece_group, n_groups):
    alone = np.zeros(n_groups, dtype=np.int64)
    for k in range(piece_group.size):
        alone[piece_group[k]] += 1
    return alone


@njit(cache=True, nogil=True)
def _any_split(alone):
    """Whether some group has several pieces."""
    for g in range(alone.size):
        if alone[g] > 1:
            return True
    return False


@njit(cache=True, nogil=True)
def _group_totals(part, piece_group, piece_start, piece_stop, n_groups):
    """Per group, from its pieces in order: Σw, Σ_{i<j} w_i w_j (each piece's own pairs plus
    its weight times the weight of the pieces before it: non-negative terms only), the centre
    (from all the pieces' sums and boxes), the largest distance from it and Σ w r (of pieces
    already centred; pass 2 adds the others')."""
    weight_sum = np.zeros(n_groups)
    pair_weight = np.zeros(n_groups)
    sums = np.zeros((n_groups, 4))  # Σwx, Σwy, Σx, Σy
    box = np.empty((n_groups, 4))
    for g in range(n_groups):
        box[g, 0], box[g, 1], box[g, 2], box[g, 3] = np.inf, -np.inf, np.inf, -np.inf
    count = np.zeros(n_groups)
    radius_max = np.zeros(n_groups)
    radius_sum = np.zeros(n_groups)
    for k in range(piece_group.size):
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
        radius_max[g] = max(radius_max[g], row[10])
        radius_sum[g] += row[11]
        count[g] += piece_stop[k] - piece_start[k]
    centres = np.zeros((n_groups, 2))
    for g in range(n_groups):
        if count[g] > 0:
            s = (weight_sum[g], sums[g, 0], sums[g, 1], sums[g, 2], sums[g, 3])
            centres[g, 0], centres[g, 1] = _centre(s, count[g], (box[g, 0], box[g, 1], box[g, 2], box[g, 3]))
    return weight_sum, pair_weight, centres, radius_max, radius_sum


@njit(parallel=True, cache=True, nogil=True)
def centre_pieces(x, y, w, weighted, moved, index, centred, piece_group, piece_start, piece_stop, blocks, n_groups, out):
    """Centre every group on its (weighted) mean; per-group sums.

    ``x``, ``y``, ``w`` are in group order (columns of :func:`group_records`, ``moved``, or the
    inputs themselves when they are in order already); ``index`` (empty when not wanted) is
    each point's original index. ``out`` is (x, y, w, order): the coordinates are copied into
    it (``w`` only when ``moved`` and weighted, ``order`` only with an ``index``), then centred
    in place.
    Returns, per group: Σw, Σ_{i<j} w_i w_j (as Σ_i w_i·(weight before i)), the largest
    distance of a point from the centre and Σ w_i r_i (``r`` those distances). The centre is
    that of :func:`_centre`. With ``centred`` False the coordinates are only copied (and the
    sums of distances are zeros). A group of one piece is centred as soon as it is summed,
    while its points are still in cache; the others once all their pieces are summed. Pieces
    ``blocks[j]:blocks[j + 1]`` go to one thread at a time (a thousand small groups would
    otherwise cost a thousand hand-outs).
    """
    xo, yo, wo, order = out
    w_out = wo if moved else w  # the weights in group order
    alone = _pieces_per_group(piece_group, n_groups)
    part = np.empty((piece_group.size, 12))
    for j in prange(blocks.size - 1):
        for k in range(blocks[j], blocks[j + 1]):
            whole = alone[piece_group[k]] == 1
            first, stop = piece_start[k], piece_stop[k]
            _sum_piece(x, y, w, weighted, moved, index, centred, whole, first, stop, out, part[k])
    # pass 2, pieces of groups of several: subtract, distances from the centre and their sums
    weight_sum, pair_weight, centres, radius_max, radius_sum = _group_totals(
        part, piece_group, piece_start, piece_stop, n_groups
    )
    if centred and _any_split(alone):
        # (no such pieces, as with a thousand small groups: no parallel region to wait for)
        for j in prange(blocks.size - 1):
            for k in range(blocks[j], blocks[j + 1]):
                g = piece_group[k]
                if alone[g] > 1:
                    first, stop = piece_start[k], piece_stop[k]
                    top, swr = _subtract(xo, yo, w_out, weighted, first, stop, centres[g, 0], centres[g, 1])
                    part[k, 10], part[k, 11] = top, swr
        _, _, _, radius_max, radius_sum = _group_totals(part, piece_group, piece_start, piece_stop, n_groups)
    return weight_sum, pair_weight, radius_max, radius_sum
