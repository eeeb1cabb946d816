"""Compiled kernel: projected pair sums of many groups by bucketing instead of sorting.

Along one direction, a group's projected values are dropped into B equal buckets spanning its
radius. Pairs in different buckets are ordered, so their sum is exact from each bucket's weight
``W_b`` and weighted position sum ``S_b`` alone (``Σ_b S_b·W_<b − W_b·S_<b``). A pair inside
one bucket contributes between 0 and the bucket's spread of values times the pair weight (exactly
the spread when the bucket holds two points); that uncertainty is reported. Buckets carrying too much of it (a dense cluster) are sorted and summed
exactly, heaviest first, until what is left fits the budget. Bucket index and sums use the same
float projection, and the index is a monotone function of it, so the ordering is exact.

One (group, direction) pair is one task; tasks run in parallel threads. This module needs
numba; without it the kernels fall back to sorting rows with numpy (same results).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ["bucketed_group_sums"]

#: most buckets per group and direction: 3 arrays of 64 Ki doubles stay in a core's L2 cache
MAX_BUCKETS = 1 << 16


@njit(cache=True, nogil=True)
def _sorted_pair_sum(p, w):
    """Exact Σ_{i<j} w_i w_j |p_i − p_j| of a small set, sorting it in place.

    Buckets are small: insertion sort needs no allocation, which matters when a task resolves
    thousands of them; larger sets are sorted with an index sort.
    """
    n = p.size
    if n > 32:
        order = np.argsort(p)
        p[:] = p[order]
        w[:] = w[order]
    else:
        for i in range(1, n):
            pi, wi = p[i], w[i]
            j = i - 1
            while j >= 0 and p[j] > pi:
                p[j + 1], w[j + 1] = p[j], w[j]
                j -= 1
            p[j + 1], w[j + 1] = pi, wi
    total_w = 0.0
    for i in range(n):
        total_w += w[i]
    before = 0.0
    out = 0.0
    for i in range(n):
        out += w[i] * p[i] * (2.0 * before + w[i] - total_w)
        before += w[i]
    return out


@njit(cache=True, nogil=True)
def _one_task(x, y, w, weighted, start, n, c, s, radius, budget):
    """(exact part, remaining uncertainty) of one group's projected pair sum on one direction."""
    if n < 2 or radius <= 0.0:
        return 0.0, 0.0
    buckets = 16
    while buckets < 2 * n and buckets < MAX_BUCKETS:  # mostly one point or none per bucket
        buckets *= 2
    scale = buckets / (2.0 * radius)
    wb = np.zeros(buckets)
    sb = np.zeros(buckets)
    w2b = np.zeros(buckets)
    lo = np.full(buckets, np.inf)
    hi = np.full(buckets, -np.inf)
    count = np.zeros(buckets, dtype=np.int64)
    for i in range(start, start + n):
        p = x[i] * c + y[i] * s
        b = int((p + radius) * scale)
        b = min(max(b, 0), buckets - 1)
        wi = w[i] if weighted else 1.0
        wb[b] += wi
        sb[b] += wi * p
        w2b[b] += wi * wi
        count[b] += 1
        lo[b] = min(lo[b], p)
        hi[b] = max(hi[b], p)
    exact = 0.0
    acc_w = 0.0
    acc_s = 0.0
    spread = np.zeros(buckets)
    for b in range(buckets):
        if count[b] == 0:
            continue
        exact += sb[b] * acc_w - wb[b] * acc_s
        acc_w += wb[b]
        acc_s += sb[b]
        if count[b] > 1:
            pairs = max(0.5 * (wb[b] * wb[b] - w2b[b]), 0.0)
            if count[b] == 2:  # its one pair is exactly the bucket's spread apart
                exact += (hi[b] - lo[b]) * pairs
            else:
                spread[b] = (hi[b] - lo[b]) * pairs
    uncertain = spread.sum()
    crowded = 0  # points in buckets of three or more
    for b in range(buckets):
        if count[b] > 2:
            crowded += count[b]
    cheap = 4 * crowded <= n or crowded <= 4096  # resolving them all costs little
    if uncertain == 0.0 or (not cheap and uncertain <= budget * exact):
        return exact, uncertain
    # resolve buckets exactly, heaviest first, until the rest fits the budget (all, if cheap)
    if cheap:
        chosen = spread > 0.0
        uncertain = 0.0
    else:
        chosen = np.zeros(buckets, dtype=np.bool_)
        heavy = np.argsort(-spread)
        k = 0
        while k < buckets and spread[heavy[k]] > 0.0 and uncertain > budget * exact:
            chosen[heavy[k]] = True
            uncertain -= spread[heavy[k]]
            k += 1
    offsets = np.zeros(buckets + 1, dtype=np.int64)
    for b in range(buckets):
        offsets[b + 1] = offsets[b] + (count[b] if chosen[b] else 0)
    fill = offsets[:-1].copy()
    pv = np.empty(offsets[-1])
    wv = np.empty(offsets[-1])
    for i in range(start, start + n):
        p = x[i] * c + y[i] * s
        b = int((p + radius) * scale)
        b = min(max(b, 0), buckets - 1)
        if chosen[b]:
            pv[fill[b]] = p
            wv[fill[b]] = w[i] if weighted else 1.0
            fill[b] += 1
    for b in range(buckets):
        if chosen[b]:
            exact += _sorted_pair_sum(pv[offsets[b] : offsets[b + 1]], wv[offsets[b] : offsets[b + 1]])
    return exact, max(uncertain, 0.0)


@njit(parallel=True, cache=True, nogil=True)
def _all_tasks(x, y, w, weighted, starts, counts, groups, cos_t, sin_t, radius, budget):
    m = cos_t.size
    exact = np.zeros(groups.size * m)
    uncertain = np.zeros(groups.size * m)
    for task in prange(groups.size * m):
        g = groups[task // m]
        k = task % m
        e, u = _one_task(x, y, w, weighted, starts[g], counts[g], cos_t[k], sin_t[k], radius[g], budget)
        exact[task] = e
        uncertain[task] = u
    return exact.reshape(groups.size, m).sum(axis=1), uncertain.reshape(groups.size, m).sum(axis=1)


def bucketed_group_sums(x, y, w, starts, counts, groups, cos_t, sin_t, radius, budget):
    """Summed over directions: exact part and uncertainty of each listed group's projected sums.

    ``x``, ``y`` (and ``w``, or None) are group-sorted and centred; ``radius`` bounds every
    point's distance from its group's centre; ``budget`` is the uncertainty allowed per
    direction relative to the exact part before heavy buckets are resolved.
    """
    weighted = w is not None
    wv = w if weighted else np.zeros(1)
    return _all_tasks(
        x, y, wv, weighted, starts, counts, np.asarray(groups, dtype=np.int64), cos_t, sin_t, radius, budget
    )
