"""Compiled kernel: projected cross sums of every pair of groups by one sweep per direction.

Along one direction the points are taken in the order of their projected values ``p`` (sorted
by numpy, whose vectorised sort is several times faster than a compiled one). The sweep keeps,
per group, the weight ``W_b`` and weighted position sum ``S_b`` of the points passed so far, and
the set of *open* groups: those with some points passed and some to come. A point of group
``a`` at ``p`` adds ``w·(p·W_b − S_b)`` (its pairs with every earlier point of ``b``) to entry
``[a, b]`` for each open ``b`` only. When ``b`` closes (its last point passed), every later
point of any group ``a`` lies after all of ``b``, so their share is settled at once from sums:
``(S_a − S_a,passed)·W_b − (W_a − W_a,passed)·S_b``. Compact groups leave few groups open at
any moment, so a direction costs O(n·open + G²) instead of O(n·G).

Threads take one direction at a time; each adds its directions into its own G × G matrix of
ordered halves. This module needs numba; ``toolbox.kernels.cross`` falls back to numpy block
sums without it.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
from numba import get_thread_id, njit, prange

__all__ = ["swept_cross_halves"]


@njit(cache=True, nogil=True)
def _grown(m, size):
    out = np.zeros((size, size))
    k = m.shape[0]
    out[:k, :k] = m
    return out


@njit(cache=True, nogil=True)
def _one_direction(p, groups, w, order, counts, half):
    """One direction's ordered halves ``Σ_{b before a} w_a w_b (p_a − p_b)``, written to ``half``.

    Pairs of open groups add up in a small dense matrix indexed by *slots* (an open group's
    place), so the inner loop runs over contiguous memory; a group's row and column go to
    ``half`` when it closes and its slot is reused.
    """
    g = half.shape[0]
    half[:] = 0.0
    w_tot, s_tot = np.zeros(g), np.zeros(g)
    for i in range(p.size):
        w_tot[groups[i]] += w[i]
        s_tot[groups[i]] += w[i] * p[i]
    w_run, s_run = np.zeros(g), np.zeros(g)  # per group: passed so far
    seen = np.zeros(g, dtype=np.int64)
    cap = 64
    pair = np.zeros((cap, cap))  # [slot of a, slot of b]: pairs of open groups so far
    slot_w, slot_s = np.zeros(cap), np.zeros(cap)  # w_run, s_run of each slot's group
    owner = np.full(cap, -1, dtype=np.int64)
    slot_of = np.full(g, -1, dtype=np.int64)
    free = np.empty(g, dtype=np.int64)
    n_free = 0
    used = 0  # slots ever used (the inner loop's length)
    # gathered first in a loop of its own, whose cache misses overlap, unlike the sweep's
    ps, gs, ws = np.empty(order.size), np.empty(order.size, dtype=np.int64), np.empty(order.size)
    for t in range(order.size):
        i = order[t]
        ps[t], gs[t], ws[t] = p[i], groups[i], w[i]
    for t in range(order.size):
        a = gs[t]
        pi, wi = ps[t], ws[t]
        sa = slot_of[a]
        if sa < 0:  # a opens: take a free slot, or a new one
            if n_free > 0:
                n_free -= 1
                sa = free[n_free]
            else:
                if used == cap:
                    cap *= 2
                    pair = _grown(pair, cap)
                    slot_w, slot_s = (
                        np.concatenate((slot_w, np.zeros(cap - used))),
                        np.concatenate((slot_s, np.zeros(cap - used))),
                    )
                    owner = np.concatenate((owner, np.full(cap - used, -1, dtype=np.int64)))
                sa = used
                used += 1
            slot_of[a] = sa
            owner[sa] = a
        row = pair[sa]
        wp = wi * pi
        for k in range(used):  # a free slot holds zeros and adds nothing
            row[k] += wp * slot_w[k] - wi * slot_s[k]
        slot_w[sa] += wi
        slot_s[sa] += wp
        w_run[a] += wi
        s_run[a] += wp
        seen[a] += 1
        if seen[a] == counts[a]:  # a closes
            for k in range(used):
                b = owner[k]
                if b >= 0:
                    half[a, b] += pair[sa, k]
                    half[b, a] += pair[k, sa] if b != a else 0.0
                pair[sa, k] = 0.0
                pair[k, sa] = 0.0
            slot_w[sa] = 0.0
            slot_s[sa] = 0.0
            owner[sa] = -1
            slot_of[a] = -1
            free[n_free] = sa
            n_free += 1
            # every later point of any group lies after all of a: settle those pairs from sums
            wa, sums = w_tot[a], s_tot[a]
            for b in range(g):
                if seen[b] < counts[b]:
                    half[b, a] += (s_tot[b] - s_run[b]) * wa - (w_tot[b] - w_run[b]) * sums


@njit(parallel=True, cache=True, nogil=True)
def _all_directions(projections, groups, w, orders, counts, acc):
    n_groups = acc.shape[1]
    for k in prange(orders.shape[0]):  # a thread takes one direction at a time, into its own matrix
        half = np.empty((n_groups, n_groups))
        _one_direction(projections[k], groups, w, orders[k], counts, half)
        # each direction summed apart, then added: rounding grows with a group's size plus the
        # number of directions, not their product
        acc[get_thread_id()] += half


def swept_cross_halves(x, y, groups, w, cos_t, sin_t, acc) -> None:
    """Add the ordered halves of the given directions into ``acc`` (threads × G × G).

    ``x``, ``y`` are centred float64 arrays, ``groups`` int64 codes in ``[0, G)``, ``w`` the
    weights. ``acc`` holds one matrix per thread numba runs (``numba.get_num_threads()``); the
    cross sums are ``H + Hᵀ`` with ``H = acc.sum(axis=0)``.
    """
    m = cos_t.size
    projections = np.empty((m, x.size))
    orders = np.empty((m, x.size), dtype=np.int64)

    def sort(k):
        np.multiply(x, cos_t[k], out=projections[k])
        projections[k] += y * sin_t[k]
        orders[k] = np.argsort(projections[k])

    with ThreadPoolExecutor(acc.shape[0]) as pool:  # numpy's sort lets go of the GIL
        list(pool.map(sort, range(m)))
    counts = np.bincount(groups, minlength=acc.shape[1]).astype(np.int64)
    _all_directions(projections, groups, w, orders, counts, acc)
