"""Compiled kernel: projected values of streamed points into windows of power-of-two bins.

One window per (group, direction) holds ``B`` bins of width ``2^e`` whose edges are the
multiples of ``2^e`` on the projection axis: bin ``k`` (absolute index) holds the values ``p``
with ``floor(p·2^-e) = k``. Multiplying by a power of two is exact in floating point, so a
value's bin is exact, and the bins are ordered exactly as the values are. The window starts as
fine as its first points allow and, when a later value falls outside it, is shifted or
coarsened in place (``2^d`` neighbours merge: their sums add), so one pass over the points
needs no survey of their extent first.

Per bin, weighted windows hold four sums: weight ``W``, weighted position ``S``, squared
weights ``Q`` and count ``C``; unweighted ones two, count and ``S`` (there ``W = Q = C``). Pairs
in one bin lie less than its width apart, so no extremes are kept: a bin is 32 or 16 bytes, and
a window of a thousand points per visit stays in cache (the windows of all groups are streamed
from memory once per chunk: their size sets the pace).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

__all__ = ["add_segments", "merge_windows", "new_windows", "window_sums", "segment_sums", "columns", "EMPTY"]

#: exponent of a window that holds no value yet
EMPTY = -(1 << 20)


def columns(weighted: bool) -> int:
    """Sums per bin: W, S, Q, C when weighted; C, S when not."""
    return 4 if weighted else 2


@njit(cache=True, nogil=True, inline="always")
def _index(p, e):
    return int(np.floor(math.ldexp(p, -e)))


@njit(cache=True, nogil=True, inline="always")
def _count_column(window):
    return window.shape[1] - 1 if window.shape[1] == 4 else 0


@njit(cache=True, nogil=True)
def _fit(lo, hi, bins):
    """Smallest exponent whose bins hold [lo, hi] in ``bins - 1`` of them, never finer than
    twice the spacing of floats near the values (so indices stay below 2^53)."""
    scale = max(abs(lo), abs(hi))
    finest = math.frexp(scale)[1] - 52 if scale > 0.0 else -1074
    span = hi - lo
    e = finest
    if span > 0.0:
        e = max(e, int(math.ceil(math.log2(span / (bins - 2)))))
    while _index(hi, e) - _index(lo, e) >= bins - 1:
        e += 1
    return e


@njit(cache=True, nogil=True)
def _cover(cells, expo, origin, slot, d, lo, hi):
    """Shift or coarsen window (slot, d) until it holds every value in [lo, hi]."""
    bins = cells.shape[2]
    e = expo[slot, d]
    if e == EMPTY:
        e = _fit(lo, hi, bins)
        a, b = _index(lo, e), _index(hi, e)
        expo[slot, d] = e
        origin[slot, d] = a - (bins - (b - a + 1)) // 2
        return
    o = origin[slot, d]
    # compared as floats first: a far value at a fine exponent would overflow an integer
    if np.floor(math.ldexp(lo, -e)) >= o and np.floor(math.ldexp(hi, -e)) <= o + bins - 1:
        return
    _rebin(cells, expo, origin, slot, d, lo, hi, e)


@njit(cache=True, nogil=True)
def _held_edges(window, o, e, lo, hi):
    """[lo, hi] widened by the left edge of every bin of ``window`` that holds points: at a
    coarser exponent a bin lies inside one new bin, the one its left edge falls in."""
    count = _count_column(window)
    for j in range(window.shape[0]):
        if window[j, count] > 0.0:
            lo = min(lo, math.ldexp(float(o + j), e))
            hi = max(hi, math.ldexp(float(o + j), e))
    return lo, hi


@njit(cache=True, nogil=True)
def _add_bins(window, e, o, src, e_src, o_src):
    """Add every held bin of ``src`` (exponent ``e_src``, origin ``o_src``) to the bin of
    ``window`` (exponent ``e`` ≥ ``e_src``, origin ``o``) its left edge falls in; ``window``
    must hold them all."""
    count = _count_column(src)
    for j in range(src.shape[0]):
        if src[j, count] == 0.0:
            continue
        t = _index(math.ldexp(float(o_src + j), e_src), e) - o
        for c in range(window.shape[1]):
            window[t, c] += src[j, c]


@njit(cache=True, nogil=True)
def _rebin(cells, expo, origin, slot, d, lo, hi, e_min):
    """Re-bin the open window (slot, d) at an exponent of at least ``e_min`` (and at least its
    own) that holds its values and every value in [lo, hi]."""
    bins = cells.shape[2]
    e, o = expo[slot, d], origin[slot, d]
    window = cells[slot, d]
    lo, hi = _held_edges(window, o, e, lo, hi)  # the bins held so far join the new values
    e_new = max(e, e_min, _fit(lo, hi, bins))
    a, b = _index(lo, e_new), _index(hi, e_new)
    new_o = a - (bins - (b - a + 1)) // 2
    old = window.copy()
    window[:, :] = 0.0
    _add_bins(window, e_new, new_o, old, e, o)
    expo[slot, d] = e_new
    origin[slot, d] = new_o


@njit(cache=True, nogil=True)
def merge_windows(cells, expo, origin, slots, src_cells, src_expo, src_origin, src_slots):
    """Add the windows of slot ``src_slots[k]`` of ``src_*`` (every direction) into those of
    slot ``slots[k]`` (slots -1 are skipped).

    Bins nest: a bin of width ``2^e`` lies inside one bin of any coarser exponent, the one its
    left edge falls in. So the target is re-binned (:func:`_rebin`, as when a value falls
    outside it) at an exponent that holds both windows' bins and is no finer than either, and
    each source bin's sums are added to the bin its left edge names; pairs across the two
    windows then sit in different bins exactly when their values are ordered across bins. Not
    parallel: a merge runs a few times per pass, and re-binning copies a window.
    """
    m = cells.shape[1]
    for k in range(slots.size):
        slot, s = slots[k], src_slots[k]
        if slot < 0 or s < 0:
            continue
        for d in range(m):
            e_b = src_expo[s, d]
            if e_b == EMPTY:
                continue
            src = src_cells[s, d]
            o_b = src_origin[s, d]
            lo, hi = _held_edges(src, o_b, e_b, np.inf, -np.inf)
            if lo > hi:
                continue
            if expo[slot, d] == EMPTY:
                cells[slot, d, :, :] = src
                expo[slot, d], origin[slot, d] = e_b, o_b
                continue
            _rebin(cells, expo, origin, slot, d, lo, hi, e_b)
            _add_bins(cells[slot, d], expo[slot, d], origin[slot, d], src, e_b, o_b)


@njit(parallel=True, cache=True, nogil=True)
def add_segments(x, y, w, weighted, starts, slots, cells, expo, origin, cos_t, sin_t):
    """Add the points of every segment ``[starts[s], starts[s+1])`` to the windows of slot
    ``slots[s]`` (segments with slot -1 are skipped). Segments of different slots run in
    parallel; each slot appears in one segment only. ``weighted`` must match the windows'
    columns (:func:`columns`)."""
    m = cos_t.size
    for s in prange(slots.size):
        slot = slots[s]
        if slot < 0:
            continue
        start, stop = starts[s], starts[s + 1]
        if stop <= start:
            continue
        for d in range(m):
            c, sn = cos_t[d], sin_t[d]
            i = start
            while i < stop:
                if expo[slot, d] != EMPTY:
                    i = _add_while_inside(x, y, w, weighted, i, stop, cells[slot, d], expo[slot, d], origin[slot, d], c, sn)
                if i < stop:  # a value outside the window: make it hold every value left
                    lo, hi = np.inf, -np.inf
                    for k in range(i, stop):
                        p = x[k] * c + y[k] * sn
                        lo = min(lo, p)
                        hi = max(hi, p)
                    _cover(cells, expo, origin, slot, d, lo, hi)


@njit(cache=True, nogil=True)
def _add_while_inside(x, y, w, weighted, i, stop, window, e, o, c, sn):
    """Add points from ``i`` on to one window while their values fall inside it; returns the
    first point whose value does not (``stop`` when all did)."""
    bins = window.shape[0]
    # 2^-e is exact where it is a normal float; beyond, ldexp per value
    scaled = -1000 < e < 1000
    scale = math.ldexp(1.0, -e) if scaled else 1.0
    while i < stop:
        p = x[i] * c + y[i] * sn
        k = (np.floor(p * scale) if scaled else np.floor(math.ldexp(p, -e))) - o
        if not (0.0 <= k < bins):  # compared as a float: a far value would overflow an integer
            return i
        j = int(k)
        if weighted:
            wi = w[i]
            window[j, 0] += wi
            window[j, 1] += wi * p
            window[j, 2] += wi * wi
            window[j, 3] += 1.0
        else:
            window[j, 0] += 1.0
            window[j, 1] += p
        i += 1
    return stop


@njit(parallel=True, cache=True, nogil=True)
def segment_sums(x, y, w, weighted, starts):
    """Per segment ``[starts[s], starts[s+1])``: Σw, Σ_{i<j} w_i w_j (as Σ_i w_i·(weight
    before i): no cancellation) and Σ w (|x| + |y|)."""
    n = starts.size - 1
    weight, pairs, size = np.zeros(n), np.zeros(n), np.zeros(n)
    for s in prange(n):
        before, total, extent = 0.0, 0.0, 0.0
        for i in range(starts[s], starts[s + 1]):
            wi = w[i] if weighted else 1.0
            total += wi * before
            before += wi
            extent += wi * (abs(x[i]) + abs(y[i]))
        weight[s], pairs[s], size[s] = before, total, extent
    return weight, pairs, size


def new_windows(slots: int, directions: int, bins: int, weighted: bool):
    """Unopened windows: cells (slots, directions, bins, columns), exponents and origins.
    The cells are zeros not yet touched: memory is mapped as windows fill."""
    cells = np.zeros((slots, directions, bins, columns(weighted)))
    expo = np.full((slots, directions), EMPTY, dtype=np.int64)
    origin = np.zeros((slots, directions), dtype=np.int64)
    return cells, expo, origin


@njit(parallel=True, cache=True, nogil=True)
def window_sums(cells, expo, slots, roundoff):
    """Exact part, in-bin uncertainty and largest bin count of every window of ``slots``,
    (slots, directions) each.

    Pairs in different bins: ``Σ_b S_b·W_<b − W_b·S_<b`` (the arithmetic of
    ``toolbox.estimate.state._bin_sums``). Pairs in one bin lie between 0 and the bin's width
    ``2^e`` apart, with pair weight ``(W_b² − Q_b)/2`` up to ``2u·W_b²`` of rounding, at most
    ``W_b²/2``.
    """
    m, bins = cells.shape[1], cells.shape[2]
    weighted = cells.shape[3] == 4
    exact = np.zeros((slots.size, m))
    uncertain = np.zeros((slots.size, m))
    fullest = np.zeros((slots.size, m))
    for t in prange(slots.size * m):
        k, d = t // m, t % m
        window = cells[slots[k], d]
        width = math.ldexp(1.0, expo[slots[k], d]) if expo[slots[k], d] != EMPTY else 0.0
        before_w, before_s, e, u, top = 0.0, 0.0, 0.0, 0.0, 0.0
        for j in range(bins):
            count = window[j, 3] if weighted else window[j, 0]
            if count == 0.0:
                continue
            top = max(top, count)
            wb, sb = window[j, 0], window[j, 1]
            e += sb * before_w - wb * before_s
            before_w += wb
            before_s += sb
            if count >= 2.0:
                pair = 0.5 * (wb * wb - (window[j, 2] if weighted else wb))
                u += width * min(0.5 * wb * wb, pair + 2.0 * roundoff * wb * wb)
        exact[k, d] = e
        uncertain[k, d] = u
        fullest[k, d] = top
    return exact, uncertain, fullest
