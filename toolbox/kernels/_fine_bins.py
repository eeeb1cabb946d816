"""Compiled kernel: projected pair sums at tight tolerances from many narrow bins, without sorting.

Along one direction, pairs of points in different bins are ordered, so their sum is exact from
each bin's weight ``W_b`` and weighted position sum ``S_b`` alone; a pair inside one bin adds
between 0 and the bin's width times its pair weight. That uncertainty,
``U = Σ_b width_b · (pair weight in b)``, is all the bins leave, and it falls as the square of
the bin width: enough bins meet a tight budget with no bin resolved at all.

The bins are placed where the points are. Three quarters of them split a dense core equally, an
eighth each the two tails beyond it (out to the group's radius); the core is chosen, per
direction, from a strided sample of a few thousand projected values, as the span that leaves the
least uncertainty the sample predicts. The bin index is a
non-decreasing function of the float projection (each piece linear and clamped to its own bins),
so pairs in different bins are summed exactly; a bin's width bound covers the rounding of its
index.

Should a direction still miss the budget (clustered data the sample does not see), its
projections are sorted and summed exactly instead. One (group, direction) pair is one task;
tasks go to the threads one at a time, and each thread reuses its own bins (zeroed as they are
read), so no task allocates.
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
def _core(x, y, start, n, c, s, reach, bins, sample, counts):
    """Ends of one direction's dense core, from a strided sample of its projected values.

    The sample is counted in equal cells of its range; the core is the run of cells that
    minimises the uncertainty the counts predict: a cell of width L holding N points in bins
    of width h leaves about ``h²·N²/(2L)``. A core of few cells is looked at again in finer
    cells of its own range (a dense cluster beside far outliers), up to ``ZOOMS`` times.
    """
    stride = max(1, -(-n // sample.size))
    taken = 0
    a, b = np.inf, -np.inf
    for i in range(start, start + n, stride):
        p = x[i] * c + y[i] * s
        sample[taken] = p
        taken += 1
        a = min(a, p)
        b = max(b, p)
    low, high = 0.0, 0.0  # Σ N²/L of the cells already left in each tail
    for _ in range(ZOOMS):
        if not b > a:  # one value left: it is the core
            break
        i, j, low, high = _best_run(sample[:taken], a, b, reach, bins, counts, low, high)
        cells = counts.size - 1
        span = (b - a) / cells
        a, b = a + i * span, a + (j + 1) * span
        if j - i + 1 > cells // 4:
            break
    return max(a, -reach), min(b, reach)


@njit(cache=True, nogil=True)
def _best_run(sample, a, b, reach, bins, counts, low, high):
    """The run of cells ``i..j`` of ``[a, b]`` whose core leaves the least predicted
    uncertainty, and the Σ N²/L of each tail with the cells beyond the run added."""
    cells = counts.size - 1
    inv = cells / (b - a)
    span = (b - a) / cells
    counts[:] = 0.0
    for p in sample:
        if a <= p <= b:
            counts[1 + min(int((p - a) * inv), cells - 1)] += 1.0
    for k in range(1, cells + 1):  # prefix sums of N_k²/L
        counts[k] = counts[k - 1] + counts[k] * counts[k] / span
    q = bins // 8
    mid = bins - 2 * q
    best, bi, bj = np.inf, 0, cells - 1
    for i in range(cells):
        h = max(a + i * span + reach, 0.0) / q
        below = h * h * (low + counts[i])
        if below >= best:  # grows with i
            break
        for j in range(i, cells):
            core = (j + 1 - i) * span / mid
            h = max(reach - a - (j + 1) * span, 0.0) / q
            total = below + core * core * (counts[j + 1] - counts[i]) + h * h * (high + counts[cells] - counts[j + 1])
            if total < best:
                best, bi, bj = total, i, j
    return bi, bj, low + counts[bi], high + counts[cells] - counts[bj + 1]


@njit(cache=True, nogil=True, inline="always")
def _bin(p, reach, lo, hi, q, mid, s_low, s_core, s_high):
    """Bin of projected value p: q bins per tail beyond the core [lo, hi], mid between; each
    piece clamped to its own bins, so the index never decreases as p grows."""
    if p < lo:
        return min(max(int((p + reach) * s_low), 0), q - 1)
    if p > hi:
        return min(max(q + mid + int((p - hi) * s_high), q + mid), 2 * q + mid - 1)
    return min(max(q + int((p - lo) * s_core), q), q + mid - 1)


@njit(cache=True, nogil=True)
def _one_task(x, y, w, weighted, start, n, c, s, radius, budget, acc, seen, counts, sample):
    """(exact part, uncertainty, longest addition chain) of one group on one direction.

    ``acc`` (bins × 2: weight, weighted position) must be zero and is left zero, as is
    ``seen`` (points per bin, when weighted); ``counts`` and ``sample`` are scratch.
    """
    if n < 2 or radius <= 0.0:
        return 0.0, 0.0, 0.0
    reach = radius * (1.0 + 8.0 * _U)  # every |projection| is within it
    bins = acc.shape[0]
    lo, hi = _core(x, y, start, n, c, s, reach, bins, sample, counts)
    q = bins // 8
    mid = bins - 2 * q
    s_low = q / (lo + reach) if lo + reach > 0.0 else 0.0
    s_high = q / (reach - hi) if reach - hi > 0.0 else 0.0
    s_core = mid / (hi - lo) if hi > lo else 0.0
    for i in range(start, start + n):
        p = x[i] * c + y[i] * s
        j = _bin(p, reach, lo, hi, q, mid, s_low, s_core, s_high)
        if weighted:
            acc[j, 0] += w[i]
            acc[j, 1] += w[i] * p
            seen[j] += 1
        else:
            acc[j, 0] += 1.0
            acc[j, 1] += p
    # a value's bin may be off by the rounding of its index arithmetic, a few u·reach: a
    # bin's spread of values is bounded by its width plus this
    slack = 64.0 * _U * reach
    widths = (max(lo + reach, 0.0) / q + slack, max(hi - lo, 0.0) / mid + slack, max(reach - hi, 0.0) / q + slack)
    exact, uncertain, fullest = _sweep(acc, seen, weighted, q, mid, widths)
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
def _sweep(acc, seen, weighted, q, mid, widths):
    """Exact part, uncertainty and fullest bin's count of the bins (zeroed as read);
    ``widths`` bound the spread of a low tail's, the core's and a high tail's bin."""
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
            width = widths[0] if j < q else (widths[1] if j < q + mid else widths[2])
            uncertain += width * (0.5 * wb * wb if weighted else 0.5 * wb * (wb - 1.0))
        acc[j, 0] = 0.0
        acc[j, 1] = 0.0
        if weighted:
            seen[j] = 0
    # a sum of non-negative terms is rounded down by at most (bins + 2)·u of itself
    return exact, uncertain * (1.0 + (acc.shape[0] + 2.0) * 2.0 * _U), fullest


@njit(parallel=True, cache=True)
def _all_tasks(x, y, w, weighted, starts, counts, groups, cos_t, sin_t, radius, budget, acc, seen, cells, sample):
    m = cos_t.size
    exact = np.zeros(groups.size * m)
    uncertain = np.zeros(groups.size * m)
    chain = np.zeros(groups.size * m)
    for task in prange(groups.size * m):
        t = numba.get_thread_id()  # each thread reuses its own bins
        g = groups[task // m]
        k = task % m
        e, u, h = _one_task(
            x, y, w, weighted, starts[g], counts[g], cos_t[k], sin_t[k], radius[g], budget,
            acc[t], seen[t], cells[t], sample[t],
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
    cells = np.zeros((threads, CELLS + 1))
    sample = np.empty((threads, SAMPLE))
    exact, uncertain, chain = _all_tasks(
        x, y, wv, weighted, starts, counts, groups, cos_t, sin_t, radius, budget, acc, seen, cells, sample
    )
    shape = (groups.size, cos_t.size)
    return (
        exact.reshape(shape).sum(axis=1),
        uncertain.reshape(shape).sum(axis=1),
        chain.reshape(shape).max(axis=1),
    )
