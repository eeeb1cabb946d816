"""Compiled kernel: projected values of streamed points into windows of power-of-two bins.

One window per (group, direction) holds ``B`` bins of width ``2^e`` whose edges are the
multiples of ``2^e`` on the projection axis: bin ``k`` (absolute index) holds the values ``p``
with ``floor(p·2^-e) = k``. Multiplying by a power of two is exact in floating point, so a
value's bin is exact, and the bins are ordered exactly as the values are. The window starts as
fine as its first points allow and, when a later value falls outside it, is shifted or
coarsened in place (``2^d`` neighbours merge: weights and sums add, extremes take the min and
max), so one pass over the points needs no survey of their extent first.

Per bin: weight ``W``, weighted position ``S``, squared weights ``Q``, count ``C`` and the
smallest and largest value: one row of six, so a point touches one cache line.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from ._bucketed import _clear  # the same six columns: weight, Σwp, Σw², count, min, max

__all__ = ["add_segments", "new_windows", "EMPTY"]

#: exponent of a window that holds no value yet
EMPTY = -(1 << 20)


@njit(cache=True, nogil=True, inline="always")
def _index(p, e):
    return int(np.floor(math.ldexp(p, -e)))


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
    if e == EMPTY:  # a window's memory is first touched here (fresh pages cost much)
        window = cells[slot, d]
        for j in range(bins):
            window[j, 4] = np.inf
            window[j, 5] = -np.inf
        e = _fit(lo, hi, bins)
        a, b = _index(lo, e), _index(hi, e)
        expo[slot, d] = e
        origin[slot, d] = a - (bins - (b - a + 1)) // 2
        return
    o = origin[slot, d]
    # compared as floats first: a far value at a fine exponent would overflow an integer
    if np.floor(math.ldexp(lo, -e)) >= o and np.floor(math.ldexp(hi, -e)) <= o + bins - 1:
        return
    window = cells[slot, d]
    for j in range(bins):  # the values held so far join the new ones
        if window[j, 3] > 0.0:
            lo = min(lo, window[j, 4])
            hi = max(hi, window[j, 5])
    e = max(e, _fit(lo, hi, bins))
    a, b = _index(lo, e), _index(hi, e)
    new_o = a - (bins - (b - a + 1)) // 2
    old = window.copy()
    _clear(window, bins)
    for j in range(bins):
        if old[j, 3] == 0.0:
            continue
        # an old bin lies inside one new bin (both are aligned to powers of two): any of its
        # values names it
        t = _index(old[j, 4], e) - new_o
        window[t, 0] += old[j, 0]
        window[t, 1] += old[j, 1]
        window[t, 2] += old[j, 2]
        window[t, 3] += old[j, 3]
        window[t, 4] = min(window[t, 4], old[j, 4])
        window[t, 5] = max(window[t, 5], old[j, 5])
    expo[slot, d] = e
    origin[slot, d] = new_o


@njit(parallel=True, cache=True, nogil=True)
def add_segments(x, y, w, weighted, starts, slots, cells, expo, origin, cos_t, sin_t):
    """Add the points of every segment ``[starts[s], starts[s+1])`` to the windows of slot
    ``slots[s]`` (segments with slot -1 are skipped). Segments of different slots run in
    parallel; each slot appears in one segment only."""
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
        wi = w[i] if weighted else 1.0
        window[j, 0] += wi
        window[j, 1] += wi * p
        window[j, 2] += wi * wi
        window[j, 3] += 1.0
        if p < window[j, 4]:
            window[j, 4] = p
        if p > window[j, 5]:
            window[j, 5] = p
        i += 1
    return stop


@njit(cache=True, nogil=True)
def segment_pair_weight(w, starts):
    """Σ_{i<j} w_i w_j of every segment, as Σ_i w_i·(weight before i): no cancellation."""
    out = np.zeros(starts.size - 1)
    for s in range(starts.size - 1):
        before = 0.0
        total = 0.0
        for i in range(starts[s], starts[s + 1]):
            total += w[i] * before
            before += w[i]
        out[s] = total
    return out


def new_windows(slots: int, directions: int, bins: int):
    """Unopened windows: cells (slots, directions, bins, 6), exponents and origins."""
    cells = np.zeros((slots, directions, bins, 6))  # extremes are set when a window opens
    expo = np.full((slots, directions), EMPTY, dtype=np.int64)
    origin = np.zeros((slots, directions), dtype=np.int64)
    return cells, expo, origin


@njit(parallel=True, cache=True, nogil=True)
def window_sums(cells, slots, roundoff):
    """Exact part and in-bin uncertainty of every window of ``slots``, (slots, directions) each.

    The arithmetic of ``toolbox.estimate.state._bin_sums`` in one pass over the bins: pairs in
    different bins ``Σ_b S_b·W_<b − W_b·S_<b``; pairs in one bin between 0 and its spread of
    values apart, with pair weight ``(W_b² − Q_b)/2`` up to ``2u·W_b²`` of rounding, at most
    ``W_b²/2``; a bin of two points holds one pair exactly its spread apart.
    """
    m, bins = cells.shape[1], cells.shape[2]
    exact = np.zeros((slots.size, m))
    uncertain = np.zeros((slots.size, m))
    for t in prange(slots.size * m):
        k, d = t // m, t % m
        window = cells[slots[k], d]
        before_w, before_s, e, u = 0.0, 0.0, 0.0, 0.0
        for j in range(bins):
            count = window[j, 3]
            if count == 0.0:
                continue
            wb, sb = window[j, 0], window[j, 1]
            e += sb * before_w - wb * before_s
            before_w += wb
            before_s += sb
            if count >= 2.0:
                spread = window[j, 5] - window[j, 4]
                pair = 0.5 * (wb * wb - window[j, 2])
                slack = 2.0 * roundoff * wb * wb
                pair_hi = min(0.5 * wb * wb, pair + slack)
                pair_lo = max(pair - slack, 0.0) if count == 2.0 else 0.0
                e += spread * pair_lo
                u += spread * (pair_hi - pair_lo)
        exact[k, d] = e
        uncertain[k, d] = u
    return exact, uncertain

