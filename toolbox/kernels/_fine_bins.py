"""Compiled kernel: projected pair sums at tight tolerances from many narrow bins, without sorting.

Along one direction, pairs of points in different bins are ordered, so their sum is exact from
each bin's weight ``W_b`` and weighted position sum ``S_b`` alone; a pair inside one bin adds
between 0 and the bin's width times its pair weight. That uncertainty,
``U = Σ_b width_b · (pair weight in b)``, is all the bins leave, and it falls as the square of
the bin width: enough bins meet a tight budget with no bin resolved at all.

The bins are placed where the points are. Three quarters of them split a dense core equally, an
eighth each the two tails beyond it (out to the group's radius), either equally or in doubling
pieces that start as narrow as the core's bins (a cluster's edge then stays in narrow bins beside
far outliers). The core and the tails' form are chosen per direction from a strided sample of a
few thousand of the group's points, as those that leave the least uncertainty the sample
predicts. The bin index is a non-decreasing function of the float projection (each piece
clamped to its own bins), so pairs in different bins are summed exactly; a bin's width bound
covers the rounding of its index.

Should a direction still miss the budget (clustered data the sample does not see), its
projections are sorted and summed exactly instead. One (group, direction) pair is one task;
tasks go to the threads one at a time, and each thread reuses its own bins (zeroed as they are
read) and its group's sample, so no task allocates.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba import njit, prange

from ._bucketed import _sorted_pair_sum

__all__ = ["fine_bin_sums", "bins_for_budget"]

#: equal cells over the sampled range of a direction, to find its dense core
CELLS = 128
#: projected values sampled per task to find the core
SAMPLE = 8192
#: times a narrow core is looked at again in finer cells
ZOOMS = 3
#: most pieces of a tail, each twice as wide as the one before, with the same number of bins
PIECES = 32
#: most bins per task (a thread's bins, 16 bytes each, take 1 MiB)
MAX_BINS = 1 << 16
#: fewest bins per task
MIN_BINS = 1 << 10
#: equal bins over a Gaussian's core (±2.9 σ, three quarters of the bins) leave about 15/B²
#: of the exact part uncertain; bins are chosen so that this is a quarter of the budget
_GAUSSIAN = 15.0
_MARGIN = 4.0
_U = np.finfo(np.float64).eps / 2


def bins_for_budget(budget: float) -> int:
    """Bins per task (a power of two) for an uncertainty of about ``budget/4`` on Gaussian data;
    0 when even ``MAX_BINS`` would leave Gaussian data over the budget (sort instead).

    A bin of width h holding c points leaves at most ``h·c²/2``; over a Gaussian of deviation σ
    whose core ±2.9 σ gets ``3B/4`` equal bins (``h = 7.7 σ/B``), that sums to ``h²/(4σ²) ≈
    15/B²`` of the exact part (``c = n·f·h``, ``∫f² = 1/(2σ√π)``, mean pair distance
    ``2σ/√π``). Uniform data leave less (``3/B²``); the quarter leaves room for clustering.
    At least ``MIN_BINS``.

    Examples
    --------
    >>> bins_for_budget(1.16e-8), bins_for_budget(1e-3), bins_for_budget(1e-9)
    (65536, 1024, 0)
    """
    if not budget > 0:
        return 0
    wanted = math.sqrt(_MARGIN * _GAUSSIAN / budget)
    if wanted > 2 * MAX_BINS:
        return 0
    bins = 1 << max(0, math.ceil(math.log2(wanted)))
    return int(min(max(bins, MIN_BINS), MAX_BINS))


@njit(cache=True, nogil=True)
def _gather(x, y, start, n, sample):
    """Every ``stride``-th point of a group into rows 0 and 1 of ``sample`` (points in a
    space-filling-curve order give a spatially even sample); returns how many."""
    stride = max(1, -(-n // sample.shape[1]))
    taken = 0
    for i in range(start, start + n, stride):
        sample[0, taken] = x[i]
        sample[1, taken] = y[i]
        taken += 1
    return taken


@njit(cache=True, nogil=True)
def _core(sample, taken, c, s, reach, bins, counts):
    """One direction's dense core and its tails' pieces, from a sample of the group's points.

    The sampled points (rows 0 and 1 of ``sample``, see :func:`_gather`) are projected (into
    row 2) and counted in equal cells of their range; the core is the run of cells that
    minimises the uncertainty the counts predict (:func:`_best_run`). A core of few cells is
    looked at again in finer cells of its own range (a dense cluster beside far outliers), up
    to ``ZOOMS`` times. Returns the core's ends and the pieces of the low and the high tail.
    """
    values = sample[2, :taken]
    a, b = np.inf, -np.inf
    for i in range(taken):
        p = sample[0, i] * c + sample[1, i] * s
        values[i] = p
        a = min(a, p)
        b = max(b, p)
    # Σ N(N−1)/L, times x and times x², of the cells already left in each tail (x: centres)
    tails = np.zeros(6)
    if not b > a:  # one value: equal bins over the whole range
        a, b = -reach, reach
    for _ in range(ZOOMS):
        if not b > a:  # one value left: it is the core
            break
        i, j = _best_run(values, a, b, reach, bins, counts, tails)
        cells = counts.shape[1] - 1
        span = (b - a) / cells
        a, b = a + i * span, a + (j + 1) * span
        if j - i + 1 > cells // 4:
            break
    lo, hi = max(a, -reach), min(b, reach)
    core = (hi - lo) / (bins - 2 * (bins // 8))
    return lo, hi, _pieces(tails[0], tails[1], tails[2], lo + reach, lo, core, bins // 8, -1.0), _pieces(
        tails[3], tails[4], tails[5], reach - hi, hi, core, bins // 8, 1.0
    )


@njit(cache=True, nogil=True, inline="always")
def _tail_cost(s0, s1, s2, length, edge, core, q, side, pieces):
    """Predicted uncertainty of a tail of ``length`` beyond ``edge`` (side −1: below it) in
    ``pieces`` doubling pieces (1: equal bins), from its cells' Σ N(N−1)/L and its moments.

    Piece t's bins are ``D·2^t/per`` wide, between ``(d + D)/(2 per)`` and ``(d + D)/per`` at a
    distance d from the edge: ``0.72 (d + D)/per`` is taken.
    """
    if pieces == 1:
        h = max(length, 0.0) / q
        return h * h * s0
    per = q // pieces
    scale = max(core * per, length / (2.0**pieces - 1.0))
    centre = edge - side * scale  # d + D = side·(x − centre)
    moment = s2 - 2.0 * centre * s1 + centre * centre * s0
    return (0.72 / per) ** 2 * max(moment, 0.0)


@njit(cache=True, nogil=True)
def _pieces(s0, s1, s2, length, edge, core, q, side):
    """Pieces (1, 2, 4, ... PIECES) of a tail that leave the least predicted uncertainty.

    The sums are of ``N(N−1)/L`` (pairs, not points: a sampled outlier alone costs nothing).
    """
    best, chosen = np.inf, PIECES
    pieces = PIECES
    while pieces >= 1:  # ties go to more pieces: narrow bins next to the core cost little
        cost = _tail_cost(s0, s1, s2, length, edge, core, q, side, pieces)
        if cost < best:
            best, chosen = cost, pieces
        pieces //= 2
    return chosen


@njit(cache=True, nogil=True)
def _best_run(sample, a, b, reach, bins, sums, tails):
    """The run of cells ``i..j`` of ``[a, b]`` whose core leaves the least predicted
    uncertainty; the cells beyond it are added to ``tails``.

    A cell of width L holding N points in bins of width h leaves about ``h²·N(N−1)/(2L)``: core
    bins have ``h = (core width)/mid``, tail bins see :func:`_tail_cost` (equal bins or
    ``PIECES`` doubling pieces, whichever is less, as :func:`_tail_cost`); prefix sums of
    ``N(N−1)/L`` and its first and second moments give every run at once. The run holds the
    cell with the most pairs.
    """
    cells = sums.shape[1] - 1
    inv = cells / (b - a)
    span = (b - a) / cells
    sums[:, :] = 0.0
    for p in sample:
        if a <= p <= b:
            sums[0, 1 + min(int((p - a) * inv), cells - 1)] += 1.0
    for k in range(1, cells + 1):  # prefix sums
        weight = sums[0, k] * (sums[0, k] - 1.0) / span  # N(N−1): a lone sampled point has no pairs
        centre = a + (k - 0.5) * span
        sums[0, k] = sums[0, k - 1] + weight
        sums[1, k] = sums[1, k - 1] + weight * centre
        sums[2, k] = sums[2, k - 1] + weight * centre * centre
    q = bins // 8
    mid = bins - 2 * q
    per = q // PIECES
    factor = (0.72 / per) ** 2  # of the doubling pieces' moment (see _tail_cost)
    reaching = 1.0 / (2.0**PIECES - 1.0)
    # the core holds the cell with the most pairs
    densest = 0
    for k in range(1, cells):
        if sums[0, k + 1] - sums[0, k] > sums[0, densest + 1] - sums[0, densest]:
            densest = k
    best, bi, bj = np.inf, 0, cells - 1
    for i in range(densest + 1):
        lo = a + i * span
        s0, s1, s2 = tails[0] + sums[0, i], tails[1] + sums[1, i], tails[2] + sums[2, i]
        equal = (lo + reach) / q
        equal = equal * equal * s0
        for j in range(densest, cells):
            hi = a + (j + 1) * span
            h = (hi - lo) / mid
            t0 = tails[3] + sums[0, cells] - sums[0, j + 1]
            t1 = tails[4] + sums[1, cells] - sums[1, j + 1]
            t2 = tails[5] + sums[2, cells] - sums[2, j + 1]
            centre = lo + max(h * per, (lo + reach) * reaching)
            below = min(equal, factor * max(s2 - 2.0 * centre * s1 + centre * centre * s0, 0.0))
            above = (reach - hi) / q
            centre = hi - max(h * per, (reach - hi) * reaching)
            above = min(above * above * t0, factor * max(t2 - 2.0 * centre * t1 + centre * centre * t0, 0.0))
            total = h * h * (sums[0, j + 1] - sums[0, i]) + below + above
            if total < best:
                best, bi, bj = total, i, j
    for r in range(3):
        tails[r] += sums[r, bi]
        tails[3 + r] += sums[r, cells] - sums[r, bj + 1]
    return bi, bj


@njit(cache=True, nogil=True, inline="always")
def _log2(power):
    """k of a power of two 2^k."""
    k = 0
    while (1 << k) < power:
        k += 1
    return k


@njit(cache=True, nogil=True, inline="always")
def _tail(d, inv_scale, shift, last, value, bits):
    """Offset of a tail bin from the core's edge, for a value at distance d ≥ 0 beyond it.

    Piece t holds the distances ``[D(2^t − 1), D(2^(t+1) − 1))`` in ``per = 2^k`` equal bins
    (of width ``D·2^t/per``), ``D = 1/inv_scale``: bins widen as they leave the core, so a
    cluster's edge gets narrow bins and remote points wide ones. For ``v = d/D + 1 ≥ 1`` the
    offset ``t·per + ⌊(v/2^t − 1)·per⌋`` is the float's exponent and first k mantissa bits,
    read from its bits (``value`` and ``bits`` share one float's memory); positive floats
    order as their bits do, so it never decreases as d grows. ``shift = 52 − k``.
    """
    value[0] = d * inv_scale + 1.0
    return min((bits[0] >> shift) - (1023 << (52 - shift)), last)


@njit(cache=True, nogil=True, inline="always")
def _bin(p, lo, hi, q, mid, s_core, tails, value, bits):
    """Bin of projected value p: q bins per tail beyond the core [lo, hi], mid between; each
    piece clamped to its own bins, so the index never decreases as p grows. ``tails``: each
    tail's 1/D and shift (see :func:`_tail`)."""
    if p < lo:
        return q - 1 - _tail(lo - p, tails[0], tails[1], q - 1, value, bits)
    if p > hi:
        return q + mid + _tail(p - hi, tails[2], tails[3], q - 1, value, bits)
    return min(max(q + int((p - lo) * s_core), q), q + mid - 1)


@njit(cache=True, nogil=True)
def _one_task(x, y, w, weighted, start, n, c, s, radius, budget, acc, seen, counts, sample, taken):
    """(exact part, uncertainty, longest addition chain) of one group on one direction.

    ``acc`` (bins × 2: weight, weighted position) must be zero and is left zero, as is
    ``seen`` (points per bin, when weighted); ``counts`` is scratch, ``sample`` holds ``taken``
    of the group's points (:func:`_gather`).
    """
    if n < 2 or radius <= 0.0:
        return 0.0, 0.0, 0.0
    reach = radius * (1.0 + 8.0 * _U)  # every |projection| is within it
    bins = acc.shape[0]
    lo, hi, pieces_low, pieces_high = _core(sample, taken, c, s, reach, bins, counts)
    q = bins // 8
    mid = bins - 2 * q
    s_core = mid / (hi - lo) if hi > lo else 0.0
    # a tail's first piece has bins as wide as the core's, unless its pieces could not reach
    # R_g; one piece is equal bins over the whole tail
    core = (hi - lo) / mid
    per_low, per_high = q // pieces_low, q // pieces_high
    scale_low = max(core * per_low, (lo + reach) / (2.0**pieces_low - 1.0))
    scale_high = max(core * per_high, (reach - hi) / (2.0**pieces_high - 1.0))
    inv_low = 1.0 / scale_low if scale_low > 0.0 else 0.0
    inv_high = 1.0 / scale_high if scale_high > 0.0 else 0.0
    shifts = (52 - _log2(per_low), 52 - _log2(per_high))
    tails = (inv_low, shifts[0], inv_high, shifts[1])
    value = counts[0, :1]  # scratch now: one float, read as its bits in _tail
    bits = value.view(np.int64)
    if weighted:  # two loops: a branch inside the hottest one costs 7 %
        for i in range(start, start + n):
            p = x[i] * c + y[i] * s
            j = _bin(p, lo, hi, q, mid, s_core, tails, value, bits)
            acc[j, 0] += w[i]
            acc[j, 1] += w[i] * p
            seen[j] += 1
    else:
        for i in range(start, start + n):
            p = x[i] * c + y[i] * s
            j = _bin(p, lo, hi, q, mid, s_core, tails, value, bits)
            acc[j, 0] += 1.0
            acc[j, 1] += p
    # a value's bin may be off by the rounding of its index arithmetic, a few u·reach: a
    # bin's spread of values is bounded by its width plus this
    slack = 64.0 * _U * reach
    shape = (core, scale_low / per_low, scale_high / per_high, slack)
    exact, uncertain, fullest = _sweep(acc, seen, weighted, q, mid, per_low, per_high, shape)
    chain = 2.0 * bins + 8.0 + fullest
    if uncertain <= budget * exact:
        return exact, uncertain, chain
    # the bins miss the budget here: sort this direction's projections (exact)
    pv = np.empty(n)
    wv = np.ones(n)
    for i in range(n):
        pv[i] = x[start + i] * c + y[start + i] * s
        if weighted:
            wv[i] = w[start + i]
    return _sorted_pair_sum(pv, wv), 0.0, 2.0 * n + 8.0


@njit(cache=True, nogil=True)
def _sweep(acc, seen, weighted, q, mid, per_low, per_high, shape):
    """Exact part, uncertainty and fullest bin's count of the bins (zeroed as read).

    ``shape``: a core bin's width, the first bin width of the low and of the high tail (piece
    t's are 2^t times that) and the rounding slack added to every width.
    """
    core, low, high, slack = shape
    exact = 0.0
    uncertain = 0.0
    acc_w = 0.0
    acc_s = 0.0
    fullest = 0.0
    for j in range(acc.shape[0]):
        wb, sb = acc[j, 0], acc[j, 1]
        if wb == 0.0:
            if weighted:
                seen[j] = 0
            continue
        exact += sb * acc_w - wb * acc_s
        acc_w += wb
        acc_s += sb
        count = float(seen[j]) if weighted else wb
        fullest = max(fullest, count)
        if count > 1.0:  # pair weight: c(c−1)/2 exactly, or at most W²/2 when weighted
            if j < q:
                width = low * (1 << ((q - 1 - j) // per_low))
            elif j < q + mid:
                width = core
            else:
                width = high * (1 << ((j - q - mid) // per_high))
            uncertain += (width + slack) * (0.5 * wb * wb if weighted else 0.5 * wb * (wb - 1.0))
        acc[j, 0] = 0.0
        acc[j, 1] = 0.0
        if weighted:
            seen[j] = 0
    # a sum of non-negative terms is rounded down by at most (bins + 2)·u of itself
    return exact, uncertain * (1.0 + (acc.shape[0] + 2.0) * 2.0 * _U), fullest


@njit(parallel=True, cache=True)
def _all_tasks(x, y, w, weighted, starts, counts, groups, cos_t, sin_t, radius, budget, scratch):
    acc, seen, cells, sample, held = scratch
    m = cos_t.size
    # np.empty, not np.zeros: in a parallel function numba makes a parallel loop of each fill,
    # handed out one element at a time under thread_limit (every task writes its entries)
    exact = np.empty(groups.size * m)
    uncertain = np.empty(groups.size * m)
    chain = np.empty(groups.size * m)
    for task in prange(groups.size * m):
        t = numba.get_thread_id()  # each thread reuses its own bins and its group's sample
        g = groups[task // m]
        k = task % m
        if held[t, 0] != g:
            held[t, 0] = g
            held[t, 1] = _gather(x, y, starts[g], counts[g], sample[t])
        e, u, h = _one_task(
            x, y, w, weighted, starts[g], counts[g], cos_t[k], sin_t[k], radius[g], budget,
            acc[t], seen[t], cells[t], sample[t], held[t, 1],
        )
        exact[task] = e
        uncertain[task] = u
        chain[task] = h
    return exact, uncertain, chain


def fine_bin_sums(x, y, w, starts, counts, groups, cos_t, sin_t, radius, budget):
    """Summed over directions: exact part, uncertainty and longest addition chain per group.

    ``x``, ``y`` (and ``w``, or None) are group-sorted and centred; ``radius`` bounds every
    point's distance from its group's centre; ``budget`` is the uncertainty allowed per
    direction relative to the exact part (a direction over it is sorted instead). Call inside
    :func:`toolbox.kernels._common.thread_limit`.
    """
    weighted = w is not None
    wv = w if weighted else np.zeros(1)
    groups = np.asarray(groups, dtype=np.int64)
    threads = numba.config.NUMBA_NUM_THREADS
    bins = bins_for_budget(budget) or MAX_BINS
    acc = np.zeros((threads, bins, 2))
    seen = np.zeros((threads, bins if weighted else 1), dtype=np.int32)
    cells = np.zeros((threads, 3, CELLS + 1))
    sample = np.empty((threads, 3, SAMPLE))  # sampled x, y and their projections
    held = np.full((threads, 2), -1, dtype=np.int64)  # group sampled, points taken
    scratch = (acc, seen, cells, sample, held)
    exact, uncertain, chain = _all_tasks(x, y, wv, weighted, starts, counts, groups, cos_t, sin_t, radius, budget, scratch)
    shape = (groups.size, cos_t.size)
    return (
        exact.reshape(shape).sum(axis=1),
        uncertain.reshape(shape).sum(axis=1),
        chain.reshape(shape).max(axis=1),
    )
