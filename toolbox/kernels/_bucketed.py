"""Compiled kernel: projected pair sums of many groups by bucketing instead of sorting.

Along one direction, a group's projected values are dropped into B buckets spanning its radius:
equal ones over a core of ± twice the group's mean distance from its centre, holding three
quarters of them, and coarser equal ones over the two tails beyond (a few remote points would
otherwise stretch every bucket and leave the dense core in few of them). B is what the budget
needs (a few hundred at tolerance 0.01, however many points; :func:`bucket_counts`); groups too
large for a core get a cap that grows as the budget shrinks (:func:`bucket_cap`).
Pairs in different buckets are ordered, so their sum is exact from each bucket's weight
``W_b`` and weighted position sum ``S_b`` alone (``Σ_b S_b·W_<b − W_b·S_<b``). The pairs inside
one bucket contribute between 0 and the bucket's spread of values times ``W_b²/4`` (exactly
the spread times the pair weight when the bucket holds two points); that uncertainty is
reported. Buckets carrying too much of it (a dense cluster) are resolved, heaviest first, until
what is left fits the budget: split again into sub-buckets over their own range, whose crowded
ones are sorted, so their pairs are summed exactly. Bucket index and sums use the same float projection, and the
index is a monotone function of it (each of the three pieces is linear and clamped to its own
buckets), so the ordering is exact.

One (group, direction) pair is one task. Consecutive tasks (a group's directions, then the
next group's) form runs of about the same work; runs go to parallel threads one at a time, and
the tasks of a run share one scratch accumulator, which each task leaves empty for the next, so
a thousand small groups cost no more bookkeeping than their points. This module needs
numba; without it the kernels fall back to sorting rows with numpy (exact along each
direction, so the results differ only within the same guaranteed bounds).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

__all__ = ["bucketed_group_sums"]

#: most buckets per group and direction (crowded ones are split again, see _resolve)
MAX_BUCKETS = 1 << 16
#: fewest buckets a large group may be capped to, and the constant of bucket_cap
MIN_CAP = 1 << 12
CAP_SCALE = 280.0
#: the uncertainty of a crowded bucket is at most its width times W_b² times this: points of
#: weights w_i in [lo, hi] give Σ_{i<j} w_i w_j |p_i − p_j| ≤ (hi − lo)·W_A·W_B for some split
#: of the bucket's weight W_b = W_A + W_B (the sum is convex in each p_i, so its largest value
#: puts every point at lo or hi), and W_A·W_B ≤ W_b²/4. A hair above 1/4, so that rounding (of
#: the products, and of sums over at most 64 Ki buckets: relative error below 1e-11) cannot
#: take the reported uncertainty under the bound.
_BOUND = 0.25 * (1 + 1e-9)
#: point-directions per run of tasks sharing one scratch accumulator (a few hundred µs of work)
RUN_POINTS = 1 << 16
#: points per bucket of the probe of a group's first direction (see _crowds)
_PROBE = 4
#: heaviest buckets picked one by one before a task sorts the rest by their uncertainty
_PICKS = 16


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


@njit(cache=True, nogil=True, inline="always")
def _frame(buckets, radius, core):
    """How a group is bucketed: (buckets, radius, core, q, mid, tail and core scales).

    q coarse buckets per tail beyond ±core, mid dense ones between; tails only when they are
    wide, since a narrow one would scale its index by a huge factor.
    """
    q = buckets // 8 if core < 0.5 * radius else 0  # buckets of each tail
    core = core if q > 0 else radius
    mid = buckets - 2 * q
    s_tail = q / (radius - core) if q > 0 else 0.0
    s_core = mid / (2.0 * core) if core > 0.0 else 0.0
    return buckets, radius, core, q, mid, s_tail, s_core


@njit(cache=True, nogil=True, inline="always")
def _bin(p, frame):
    """Bucket of projected value p; each piece of the frame is clamped to its own buckets, so
    the index never decreases as p grows."""
    buckets, radius, core, q, mid, s_tail, s_core = frame
    if q > 0 and p < -core:
        return min(max(int((p + radius) * s_tail), 0), q - 1)
    if q > 0 and p > core:
        return min(max(q + mid + int((p - core) * s_tail), q + mid), buckets - 1)
    return min(max(q + int((p + core) * s_core), q), q + mid - 1)


@njit(cache=True, nogil=True)
def _clear(acc, buckets):
    """Put the first ``buckets`` rows of a scratch accumulator in their empty state."""
    for b in range(buckets):
        acc[b, 0] = 0.0
        acc[b, 1] = 0.0
        acc[b, 2] = 0.0
        acc[b, 3] = 0.0
        acc[b, 4] = np.inf
        acc[b, 5] = -np.inf


@njit(cache=True, nogil=True, inline="always")
def _bucket_count(n, cap):
    """Buckets of a group of n points when its budget's own count left too much uncertainty:
    1.5 to 3 points per bucket, 16 to ``cap``."""
    buckets = 16
    while 3 * buckets < n and buckets < cap:
        buckets *= 2
    return buckets


@njit(cache=True, nogil=True)
def _fill(x, y, w, weighted, start, n, c, s, frame, acc):
    """Drop points start:start + n, projected on (c, s), into the buckets of ``frame``."""
    # one row per bucket (weight, weighted position, pair weight, count, min, max): a point
    # touches one cache line, not six arrays
    for i in range(start, start + n):
        p = x[i] * c + y[i] * s
        b = _bin(p, frame)
        wi = w[i] if weighted else 1.0
        # column 2: the first point's weight, then the product of the first two weights. With
        # a few points per bucket a branch on the count mispredicts half the time, so this
        # is arithmetic: every product below is by 0 or 1 (exact) but for the one by wi
        k = acc[b, 3]
        first, second = np.float64(k == 0.0), np.float64(k == 1.0)
        acc[b, 2] = first * wi + (1.0 - first) * acc[b, 2] * (second * wi + (1.0 - second))
        acc[b, 0] += wi
        acc[b, 1] += wi * p
        acc[b, 3] = k + 1.0
        acc[b, 4] = min(acc[b, 4], p)
        acc[b, 5] = max(acc[b, 5], p)


@njit(cache=True, nogil=True)
def _scan(acc, buckets):
    """One pass over the buckets: (exact part, uncertainty, points in buckets of three or more,
    most points in one bucket) from pairs in different buckets, pairs of two-point buckets,
    and the bound of the crowded ones (see _BOUND)."""
    exact = 0.0
    acc_w = 0.0
    acc_s = 0.0
    uncertain = 0.0
    crowded = 0.0
    most = 0.0
    for b in range(buckets):
        # arithmetic rather than branches, as in _fill: an empty bucket adds exact zeros (its
        # width, inf below -inf, is clamped to 0), and a factor 0 or 1 picks each case
        k = acc[b, 3]
        wb, sb = acc[b, 0], acc[b, 1]
        exact += sb * acc_w - wb * acc_s
        acc_w += wb
        acc_s += sb
        width = max(acc[b, 5] - acc[b, 4], 0.0)
        pair, many = np.float64(k == 2.0), np.float64(k > 2.0)
        exact += (width * acc[b, 2]) * pair  # its one pair is exactly the width apart
        uncertain += (width * _BOUND * wb * wb) * many
        crowded += k * many
        most = max(most, k)
    return exact, uncertain, crowded, most


@njit(cache=True, nogil=True)
def _scratch(rows):
    """An empty scratch accumulator of ``rows`` buckets. Allocated here, in a plain compiled
    function: inside a parallel loop numba would make a parallel loop of an array expression,
    handed out one element at a time under ``thread_limit``."""
    acc = np.empty((rows, 6))
    _clear(acc, rows)
    return acc


@njit(cache=True, nogil=True)
def _crowds(x, y, w, weighted, start, c, s, radius, core, budget, buckets, acc):
    """Whether a group's leading ``_PROBE * buckets`` points, bucketed alone on (c, s), leave
    more than half the budget: then they crowd (a dense cluster, whose buckets would cost a
    chain of dependent updates per point and a resolution). Their uncertainty relative to
    their exact part is about that of the whole group: both grow as the points squared."""
    frame = _frame(buckets, radius, core)
    _fill(x, y, w, weighted, start, _PROBE * buckets, c, s, frame, acc)
    exact, uncertain, _, _ = _scan(acc, buckets)
    _clear(acc, buckets)
    return uncertain > 0.5 * budget * exact


@njit(cache=True, nogil=True)
def _one_task(x, y, w, weighted, start, n, c, s, radius, core, budget, buckets, cap, acc):
    """(exact part, remaining uncertainty, longest addition chain) of one group's projected
    pair sum on one direction.

    ``acc`` is the thread's scratch, at least as many rows as this task may use (``buckets``,
    or :func:`_bucket_count` of n and ``cap``), all empty (see :func:`_clear`); they are left
    empty again, so the next task reuses them as they are. A task that leaves more uncertainty
    than its budget with ``buckets`` is bucketed again with :func:`_bucket_count`'s.
    """
    if n < 2 or radius <= 0.0:
        return 0.0, 0.0, 0.0
    frame = _frame(buckets, radius, core)
    _fill(x, y, w, weighted, start, n, c, s, frame, acc)
    exact, uncertain, crowded, most = _scan(acc, buckets)
    more = _bucket_count(n, cap)
    if uncertain > budget * exact and more > buckets:
        # points packed more tightly than the budget's count assumed (a dense cluster): once
        # more with a bucket per few points, which costs a pass, where resolving the crowded
        # buckets would cost several
        _clear(acc, buckets)
        buckets = more
        frame = _frame(buckets, radius, core)
        _fill(x, y, w, weighted, start, n, c, s, frame, acc)
        exact, uncertain, crowded, most = _scan(acc, buckets)
    # longest chain of additions behind any sum: a bucket's points, then the buckets twice
    chain = 2.0 * buckets + 8.0 + most
    cheap = 4 * crowded <= n  # few collisions: resolving them all costs little
    if uncertain > 0.0 and (cheap or uncertain > budget * exact):
        # resolve buckets exactly, heaviest first, until the rest fits the budget (all, if cheap)
        chosen = _choose(acc, buckets, exact, uncertain, budget, cheap)
        exact, uncertain = _resolve_chosen(x, y, w, weighted, start, n, c, s, frame, acc, chosen, exact)
    _clear(acc, buckets)
    return exact, max(uncertain, 0.0), chain


@njit(cache=True, nogil=True)
def _choose(acc, buckets, exact, uncertain, budget, cheap):
    """Crowded buckets to resolve: all if ``cheap``, else the heaviest until the rest fits."""
    spread = np.zeros(buckets)
    for b in range(buckets):
        if acc[b, 3] > 2.0:
            spread[b] = (acc[b, 5] - acc[b, 4]) * _BOUND * acc[b, 0] * acc[b, 0]
    if cheap:
        return spread > 0.0
    # a few picks of the largest usually suffice: cheaper than sorting every bucket
    chosen = np.zeros(buckets, dtype=np.bool_)
    picks = 0
    while picks < _PICKS and uncertain > budget * exact:
        b = np.argmax(spread)
        if spread[b] <= 0.0:
            return chosen
        chosen[b] = True
        uncertain -= spread[b]
        spread[b] = 0.0
        picks += 1
    if picks == _PICKS:
        heavy = np.argsort(-spread)
        k = 0
        while k < buckets and spread[heavy[k]] > 0.0 and uncertain > budget * exact:
            chosen[heavy[k]] = True
            uncertain -= spread[heavy[k]]
            k += 1
    return chosen


@njit(cache=True, nogil=True)
def _resolve_chosen(x, y, w, weighted, start, n, c, s, frame, acc, chosen, exact):
    """(exact part, uncertainty) of one task once its ``chosen`` buckets are resolved.

    The uncertainty left is summed afresh over the other crowded buckets (non-negative terms,
    no cancellation).
    """
    buckets = frame[0]
    uncertain = 0.0
    offsets = np.zeros(buckets + 1, dtype=np.int64)
    for b in range(buckets):
        k = acc[b, 3]
        if chosen[b]:
            offsets[b + 1] = offsets[b] + int(k)
        else:
            offsets[b + 1] = offsets[b]
            if k > 2.0:
                uncertain += (acc[b, 5] - acc[b, 4]) * _BOUND * acc[b, 0] * acc[b, 0]
    fill = offsets[:-1].copy()
    pv = np.empty(offsets[-1])
    wv = np.empty(offsets[-1])
    for i in range(start, start + n):
        p = x[i] * c + y[i] * s
        b = _bin(p, frame)
        if chosen[b]:
            pv[fill[b]] = p
            wv[fill[b]] = w[i] if weighted else 1.0
            fill[b] += 1
    for b in range(buckets):
        if chosen[b]:
            part, rest = _resolve(pv[offsets[b] : offsets[b + 1]], wv[offsets[b] : offsets[b + 1]])
            exact += part
            uncertain += rest
    return exact, uncertain


@njit(cache=True, nogil=True)
def _resolve(p, w):
    """(exact part, uncertainty) of the pair sum of one crowded bucket's points.

    Up to 32 points are sorted; more are split once more into sub-buckets over their own
    range (about two per point), whose crowded ones are then sorted: cheaper than sorting a
    dense cluster's bucket of thousands, and exact but for sub-buckets sharing equal values.
    """
    n = p.size
    if n <= 32:
        return _sorted_pair_sum(p, w), 0.0
    lo, hi = p.min(), p.max()
    if hi <= lo:
        return 0.0, 0.0
    k = 16
    while k < 2 * n:
        k *= 2
    scale = k / (hi - lo)
    sub = np.empty(n, dtype=np.int64)
    acc = np.zeros((k, 3))  # weight, weighted position, count
    for i in range(n):
        b = min(int((p[i] - lo) * scale), k - 1)
        sub[i] = b
        acc[b, 0] += w[i]
        acc[b, 1] += w[i] * p[i]
        acc[b, 2] += 1.0
    exact = 0.0
    acc_w = 0.0
    acc_s = 0.0
    for b in range(k):
        if acc[b, 2] > 0:
            exact += acc[b, 1] * acc_w - acc[b, 0] * acc_s
            acc_w += acc[b, 0]
            acc_s += acc[b, 1]
    # pairs sharing a sub-bucket: gather each crowded sub-bucket's points and sort them
    offsets = np.zeros(k + 1, dtype=np.int64)
    for b in range(k):
        offsets[b + 1] = offsets[b] + (int(acc[b, 2]) if acc[b, 2] > 1 else 0)
    fill = offsets[:-1].copy()
    pv = np.empty(offsets[-1])
    wv = np.empty(offsets[-1])
    for i in range(n):
        b = sub[i]
        if acc[b, 2] > 1:
            pv[fill[b]] = p[i]
            wv[fill[b]] = w[i]
            fill[b] += 1
    for b in range(k):
        if acc[b, 2] > 1:
            exact += _sorted_pair_sum(pv[offsets[b] : offsets[b + 1]], wv[offsets[b] : offsets[b + 1]])
    return exact, 0.0


@njit(cache=True, nogil=True)
def _to_probe(counts, groups, buckets, cap):
    """Groups of ``groups`` worth probing (more points than twice the probe's, and a larger
    count to go to), and the points their probes read."""
    out = np.empty(groups.size, dtype=np.int64)
    k = 0
    work = 0
    for g in groups:
        if counts[g] > 2 * _PROBE * buckets[g] and _bucket_count(counts[g], cap) > buckets[g]:
            out[k] = g
            k += 1
            work += _PROBE * buckets[g]
    return out[:k], work


@njit(cache=True, nogil=True)
def _probe_serially(x, y, w, weighted, starts, counts, probed, c, s, radius, core, budget, buckets, cap):
    """The probes of :func:`_all_tasks` on one thread."""
    rows = 16
    for g in probed:
        rows = max(rows, buckets[g])
    acc = _scratch(rows)
    for g in probed:
        if _crowds(x, y, w, weighted, starts[g], c, s, radius[g], core[g], budget, buckets[g], acc):
            buckets[g] = _bucket_count(counts[g], cap)


@njit(parallel=True, cache=True, nogil=True)
def _all_tasks(x, y, w, weighted, starts, counts, groups, cos_t, sin_t, radius, core, budget, buckets, cap, bounds):
    """Every (group, direction) task, in runs ``bounds[j]:bounds[j + 1]`` of consecutive tasks
    (groups major): each run is one parallel iteration with one scratch accumulator.
    ``buckets`` is every group's bucket count (see :func:`bucket_counts`), raised here for
    groups whose points crowd (:func:`_crowds`) to :func:`_bucket_count` of ``cap``."""
    m = cos_t.size
    # groups large enough to pay for it are probed first, on their first direction: those whose
    # leading points crowd get a bucket per few points in every task (each group decided by
    # one iteration, from its own points: the same counts whatever the threads)
    probed, work = _to_probe(counts, groups, buckets, cap)
    if work > RUN_POINTS:
        for j in prange(probed.size):
            g = probed[j]
            acc = _scratch(buckets[g])
            if _crowds(x, y, w, weighted, starts[g], cos_t[0], sin_t[0], radius[g], core[g], budget, buckets[g], acc):
                buckets[g] = _bucket_count(counts[g], cap)
    else:  # less work than a run: a parallel region of its own would cost more than it saves
        _probe_serially(x, y, w, weighted, starts, counts, probed, cos_t[0], sin_t[0], radius, core, budget, buckets, cap)
    # np.empty, not np.zeros: numba would make a parallel loop of each fill, handed out one
    # element at a time under thread_limit (every task writes its entries below)
    exact = np.empty(groups.size * m)
    uncertain = np.empty(groups.size * m)
    chain = np.empty(groups.size * m)
    for j in prange(bounds.size - 1):
        first, last = bounds[j], bounds[j + 1]
        rows = 16
        for task in range(first, last):
            g = groups[task // m]
            rows = max(rows, buckets[g], _bucket_count(counts[g], cap))
        acc = _scratch(rows)
        for task in range(first, last):
            g = groups[task // m]
            k = task % m
            e, u, c = _one_task(
                x, y, w, weighted, starts[g], counts[g], cos_t[k], sin_t[k], radius[g], core[g], budget, buckets[g], cap, acc
            )
            exact[task] = e
            uncertain[task] = u
            chain[task] = c
    return exact, uncertain, chain


def bucket_cap(budget):
    """Most buckets per task for an uncertainty ``budget``: fewer buckets are faster (16 Ki rows
    stay in a core's L2 cache, 64 Ki do not) but leave more pairs sharing one.

    A task's uncertainty falls as the square of its buckets, so the cap grows as 1/√budget:
    ``CAP_SCALE / √budget`` rounded up to a power of two, between MIN_CAP and MAX_BUCKETS.
    At tolerance 0.01 (budget 3e-4) that is 16 Ki, and a million points of a skewed cluster
    (2 % of them ten times further out) leave about 1 % of the budget; from tolerance 1e-3
    on every group may have the full 64 Ki.
    """
    cap = MIN_CAP
    while cap < MAX_BUCKETS and cap * math.sqrt(budget) < CAP_SCALE:
        cap *= 2
    return cap


#: groups of fewer points have a dense core of buckets (``pairs._bucket_core``) and as many
#: buckets as their budget needs; larger ones get the cap
SMALL_GROUP = 2 * MAX_BUCKETS
#: with B buckets over a dense core, a task leaves an in-bucket uncertainty of about SHAPE / B²
#: of its exact part (measured 5.6 typical, 8.5 at most, over the 8,000 tasks of 1,000 Gaussian
#: groups with 2 % remote members); twice the worst, so that few tasks need resolving
SHAPE = 16.0


def _power_of_two(v):
    """Smallest power of two at least ``v`` (and at least 16), elementwise."""
    return np.left_shift(1, np.ceil(np.log2(np.maximum(v, 16))).astype(np.int64))


def bucket_counts(counts, budget):
    """Buckets per task of each group for an uncertainty ``budget``.

    A small group gets the fewest buckets that leave it within its budget (:data:`SHAPE`),
    never more than its points (rounded up to a power of two): every bucket costs a clear and a
    scan per task, which for a thousand points is as much as the points themselves. More would
    only narrow an uncertainty that already fits (a bucket per 4, 8 or 16 points at least was
    slower on the benchmark's 1,000 groups of 182-5,574 points). Large groups, bucketed evenly
    over their whole radius, get :func:`bucket_cap`.

    Examples
    --------
    >>> bucket_counts(np.array([10, 182, 5_574, 200_000]), 3e-4).tolist()  # tolerance 0.01
    [16, 256, 256, 16384]
    """
    counts = np.asarray(counts)
    cap = bucket_cap(budget)
    enough = 16
    while enough * enough * budget < SHAPE and enough < cap:
        enough *= 2
    return np.where(counts < SMALL_GROUP, np.minimum(enough, _power_of_two(counts)), cap)


def _runs(counts, m):
    """Bounds of runs of consecutive tasks of about RUN_POINTS point-directions each (a larger
    task is a run of its own): few scratch arrays, yet enough runs to keep every thread busy."""
    work = np.repeat(counts, m)
    begin = np.cumsum(work) - work
    run = begin // RUN_POINTS
    cut = np.flatnonzero(np.diff(run)) + 1
    return np.concatenate([[0], cut, [work.size]]).astype(np.int64)


def bucketed_group_sums(x, y, w, starts, counts, groups, cos_t, sin_t, radius, budget, core=None):
    """Summed over directions: exact part, uncertainty and longest addition chain per group.

    ``x``, ``y`` (and ``w``, or None) are group-sorted and centred; ``radius`` bounds every
    point's distance from its group's centre; ``budget`` is the uncertainty allowed per
    direction relative to the exact part before heavy buckets are resolved. ``core`` (per
    group, default ``radius``: equal buckets throughout) is the half-width of the densely
    bucketed middle.
    """
    weighted = w is not None
    wv = w if weighted else np.zeros(1)
    groups = np.asarray(groups, dtype=np.int64)
    core = radius if core is None else core
    bounds = _runs(counts[groups], cos_t.size)
    exact, uncertain, chain = _all_tasks(
        x, y, wv, weighted, starts, counts, groups, cos_t, sin_t, radius, core, budget, bucket_counts(counts, budget), bucket_cap(budget), bounds
    )
    shape = (groups.size, cos_t.size)
    return (
        exact.reshape(shape).sum(axis=1),
        uncertain.reshape(shape).sum(axis=1),
        chain.reshape(shape).max(axis=1),
    )
