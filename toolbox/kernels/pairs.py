"""Sums of pair distances within groups: exact, or projected onto equally spaced directions.

The projection rests on the Cauchy–Crofton formula: for a vector v in the plane,
``|v| = 1/2 ∫_0^π |<v, u(θ)>| dθ``. Along one direction the projected pair sum is exact after
one sort, or, with the compiled kernel, from bins of the projected values (pairs in different
bins exactly, pairs in one bin bounded by its width). These functions return
:class:`~toolbox.kernels.Raw` records; ``toolbox.estimate`` turns them into intervals.
"""

from __future__ import annotations

import dataclasses
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ._common import (
    BLOCK_ELEMENTS,
    SMALL_EXACT,
    UNIT_ROUNDOFF,
    Raw,
    compiled_module,
    directions_unit_vectors,
    exact_rounding,
    thread_limit,
)


def _compiled():
    """The binned kernel module; None without numba (rows are then sorted with numpy)."""
    return compiled_module("_bucketed")


def _fine_bins():
    """The kernel of narrow bins for tight budgets (needs numba, as :func:`_compiled`)."""
    return compiled_module("_fine_bins")


#: point-directions per call of the compiled kernel, so that progress can be reported
_TASK_POINTS = 1 << 24
#: below this many point-directions the compiled kernel runs on one thread
_SERIAL_POINTS = 1 << 20

__all__ = ["exact_pair_raw", "projected_pair_raw", "padded_distances"]


def _exact_one(x, y, w) -> float:
    """Exact weighted pair sum of one centred group (blocks of rows against the rest)."""
    from scipy.spatial.distance import cdist  # imported here: a start-up cost only exact sums pay

    n = x.size
    if n < 2:
        return 0.0
    pts = np.column_stack([x, y])
    w = np.ones(n) if w is None else w
    block = max(1, min(n, BLOCK_ELEMENTS // n))
    total = 0.0
    for a in range(0, n, block):
        b = min(n, a + block)
        d = cdist(pts[a:b], pts[a:])
        # pairs inside the block appear twice in d[:, :b-a]; pairs with later rows once
        total += 0.5 * float(w[a:b] @ d[:, : b - a] @ w[a:b])
        if b < n:
            total += float(w[a:b] @ d[:, b - a :] @ w[b:])
    return total


def padded_distances(px, py) -> np.ndarray:
    """Distance matrices (groups, s, s) of padded rows of points."""
    dx = px[:, :, None] - px[:, None, :]
    dy = py[:, :, None] - py[:, None, :]
    return np.sqrt(dx * dx + dy * dy)


def _exact_padded(px, py, w) -> np.ndarray:
    """Exact pair sums of many small groups laid out as padded rows (padding has weight 0)."""
    return 0.5 * np.einsum("gi,gij,gj->g", w, padded_distances(px, py), w)


def exact_pair_raw(lay, groups, tick) -> Raw:
    """Exact pair sums of ``groups`` of a centred layout (one entry per group of ``groups``).

    Many small groups at once in padded blocks, larger ones in blocks of rows.
    """
    counts = lay.counts
    total = np.zeros(lay.n_groups)
    small = groups[counts[groups] <= SMALL_EXACT]
    for chunk, index, valid in lay.chunks(small, lambda s: s * s):
        total[chunk] = _exact_padded(lay.x[index], lay.y[index], lay.padded_weights(index, valid))
        tick(counts[chunk].sum())
    for g in groups[counts[groups] > SMALL_EXACT]:
        sl = slice(lay.starts[g], lay.starts[g] + counts[g])
        total[g] = _exact_one(lay.x[sl], lay.y[sl], None if lay.w is None else lay.w[sl])
        tick(counts[g])
    # padded batches add all s² terms in one chain; row blocks chain about 3n additions
    sizes = counts[groups]
    rounding = exact_rounding(np.where(sizes <= SMALL_EXACT, sizes * sizes, 3 * sizes))
    # centring: Σ_{i<j} w_i w_j (r_i + r_j) ≤ W·A; twice that, as a margin
    mass = 2 * lay.weight_sum[groups] * lay.radius_sum()[groups]
    return Raw(total[groups], 0, relative=rounding, radius_mass=mass)


def projected_pair_raw(lay, groups, m, budget, tick, threads) -> Raw:
    """Summed projections of the pair sums of ``groups`` (centred layout) on ``m`` directions.

    ``budget`` is the in-bin uncertainty the binned kernel may leave per direction, relative
    to its exact part; heavier bins are resolved.
    """
    cos_t, sin_t = directions_unit_vectors(m)
    radius_sum = lay.radius_sum()[groups]
    weight_sum = lay.weight_sum[groups]
    exact_part, uncertain = np.zeros(lay.n_groups), np.zeros(lay.n_groups)
    chain = 2.0 * lay.counts  # cumulative sums over a row of n_g (the sorting route)
    compiled = _compiled() is not None
    # Tight budgets: enough narrow bins that none needs resolving, for groups large enough
    # (_FINE_WEIGHTED, _FINE_UNWEIGHTED); smaller ones are sorted (unweighted, below 1e-7) or
    # bucketed and resolved.
    tight = budget < 1e-7
    bins = _fine_bins().bins_for_budget(budget) if compiled and budget < _FINE_BUDGET else 0
    least = bins * (_FINE_WEIGHTED if tight and lay.w is not None else _FINE_UNWEIGHTED)
    fine = groups[lay.counts[groups] >= least] if bins else groups[:0]
    rest = groups[~np.isin(groups, fine)]
    binned = rest if compiled and not (tight and lay.w is None) else rest[:0]
    if fine.size or binned.size:
        source = _spatially_ordered(lay) if m >= _LOCALITY_DIRECTIONS else lay
    if fine.size:
        exact_part[fine], uncertain[fine], chain[fine] = _fine_sums(source, fine, cos_t, sin_t, budget, tick, threads)
    if binned.size:
        e, u, c = _bucketed_sums(source, binned, cos_t, sin_t, budget, tick, threads)
        exact_part[binned], uncertain[binned], chain[binned] = e[binned], u[binned], c[binned]
    elif rest.size:
        workers = max(1, min(threads or _default_threads(), m))
        with ThreadPoolExecutor(workers) as pool:  # numpy's sort lets go of the GIL
            for chunk, index, valid in lay.chunks(rest, lambda s: s):
                cw = None if lay.w is None else lay.padded_weights(index, valid)
                cx, cy, n = lay.x[index], lay.y[index], lay.counts[chunk]
                jobs = [
                    pool.submit(_projected_rows, cx, cy, cw, valid, n, cos_t[k::workers], sin_t[k::workers])
                    for k in range(workers)
                ]
                exact_part[chunk] = np.sum([job.result() for job in jobs], axis=0)
                tick(m * lay.counts[chunk].sum())
    # Rounding: every sum of one direction is bounded by W_g·Σ w_i r_i (|p_i| ≤ r_i, each
    # coefficient at most w_i·W_g) and built from chains of at most `chain` additions, so it is
    # within (2·chain + 6)·u·W_g·Σ w_i r_i of the exact projected sum of the exact
    # coordinates (centring included).
    slack = m * (2 * chain[groups] + 6) * UNIT_ROUNDOFF * weight_sum * radius_sum
    return Raw(exact_part[groups], m, absolute=slack, uncertain=uncertain[groups])


#: narrow bins below this budget (tolerances up to about 1.5e-5): at 1e-5, 1,000,000 points take
#: 0.14-0.17x the time of the buckets, which resolve many of theirs
_FINE_BUDGET = 2e-7
#: narrow bins from this many points per bin on. Two: below, numpy's sort of padded rows (and,
#: at 1e-5, the buckets) are faster: each task's core search and sweep, and its 1 MiB of bins
#: out of cache, cost as much as ~50,000 points (measured break-even about 100,000 points at
#: 2¹⁶ bins, 30,000-100,000 at 2¹⁵). Weighted groups below 1e-7, whose other route buckets and
#: resolves, from an eighth.
_FINE_WEIGHTED = 1 / 8
_FINE_UNWEIGHTED = 2

#: from this many directions on, points are first put in a space-filling-curve order
_LOCALITY_DIRECTIONS = 64


def _spread_bits(v):
    """Spread the 16 low bits of v over the even bits of a 32-bit word."""
    v = v.astype(np.uint64) & 0xFFFF
    v = (v | (v << 8)) & 0x00FF00FF
    v = (v | (v << 4)) & 0x0F0F0F0F
    v = (v | (v << 2)) & 0x33333333
    return (v | (v << 1)) & 0x55555555


def _spatially_ordered(lay):
    """The layout with each group's points in Morton (Z-curve) order.

    Points near each other land in nearby buckets on every direction, so the bucket rows the
    kernel touches stay in cache; with hundreds of directions that repays the one extra sort.
    """
    radius = lay.radius_max()
    per_group = np.divide(32767.0, radius, out=np.zeros_like(radius), where=radius > 0)
    scale = per_group[0] if lay.n_groups == 1 else per_group[lay.codes]
    qx = np.clip((lay.x * scale + 32768.0), 0, 65535)
    qy = np.clip((lay.y * scale + 32768.0), 0, 65535)
    key = _spread_bits(qx) | (_spread_bits(qy) << 1)
    key |= lay.codes.astype(np.uint64) << 32
    order = np.argsort(key)
    return dataclasses.replace(
        lay, x=lay.x[order], y=lay.y[order], w=None if lay.w is None else lay.w[order], _order=None
    )


def _default_threads() -> int:
    """Threads when none are asked for: numba's current setting (the runner's --threads)."""
    compiled = _compiled()
    if compiled is not None:
        import numba

        return numba.get_num_threads()
    return os.cpu_count() or 1


def _bucketed_sums(lay, groups, cos_t, sin_t, budget, tick, threads):
    """Exact part and uncertainty of the projected sums of ``groups``, with the compiled kernel."""
    m = cos_t.size
    radius = lay.radius_max()
    core = _bucket_core(lay, radius)
    exact_part, uncertain = np.zeros(lay.n_groups), np.zeros(lay.n_groups)
    chain = np.zeros(lay.n_groups)
    work = lay.counts[groups] * m
    batches = np.cumsum(work) // _TASK_POINTS
    if work.sum() < _SERIAL_POINTS:  # starting the thread pool would cost more than it saves
        threads = 1
    with thread_limit(threads):
        for batch in np.split(groups, np.flatnonzero(np.diff(batches)) + 1):
            e, u, c = _compiled().bucketed_group_sums(
                lay.x,
                lay.y,
                lay.w,
                lay.starts,
                lay.counts,
                batch,
                cos_t,
                sin_t,
                radius,
                budget,
                core,
            )
            exact_part[batch], uncertain[batch], chain[batch] = e, u, c
            tick(m * lay.counts[batch].sum())
    return exact_part, uncertain, chain


def _fine_sums(lay, groups, cos_t, sin_t, budget, tick, threads):
    """Exact part, uncertainty and addition chain of the projected sums of ``groups`` (large
    groups at a tight budget), from narrow bins, in batches of groups for progress."""
    m = cos_t.size
    out = np.zeros((3, groups.size))
    batches = np.cumsum(lay.counts[groups] * m) // _TASK_POINTS
    radius = lay.radius_max()
    with thread_limit(threads):
        for batch in np.split(np.arange(groups.size), np.flatnonzero(np.diff(batches)) + 1):
            g = groups[batch]
            out[:, batch] = _fine_bins().fine_bin_sums(
                lay.x, lay.y, lay.w, lay.starts, lay.counts, g, cos_t, sin_t, radius, budget
            )
            tick(m * lay.counts[g].sum())
    return out


#: a group's core of dense buckets spans ± this many mean distances from its centre
_CORE_SPAN = 2.0


def _bucket_core(lay, radius):
    """Half-width of each group's densely bucketed core (its radius: equal buckets throughout).

    Groups small enough to get under one bucket per point have a core of ±2 mean (weighted)
    distances from their centre: remote members then no longer stretch the buckets of the dense
    middle, and most (group, direction) tasks fit their budget without a second pass. The mean
    distance, unlike the RMS one, is hardly moved by a few remote members. Larger groups keep
    equal buckets (their buckets are narrow already).
    """
    small = (lay.counts < _compiled().SMALL_GROUP) & (lay.weight_sum > 0)
    if not small.any():
        return radius
    mean = np.divide(lay.radius_sum(), lay.weight_sum, out=radius.copy(), where=small)
    return np.where(small, np.minimum(_CORE_SPAN * mean, radius), radius)


def _projected_rows(cx, cy, cw, valid, n, cos_t, sin_t) -> np.ndarray:
    """Σ over directions of the exact projected pair sums, one padded row per group.

    Rows are sorted independently, so every cumulative sum stays inside its group.
    """
    s = cx.shape[1]
    rank = np.arange(s, dtype=np.float64)[None, :]
    tail = ~(rank < n[:, None])  # after sorting, padding sits at the end of each row
    out = np.zeros(cx.shape[0])
    if cw is None:
        coef = np.where(tail, 0.0, 2 * rank - n[:, None] + 1)
    else:
        wsum = cw.sum(axis=1)[:, None]
    padded = not valid.all()  # one group (the tight-tolerance case) has no padding to mask
    # the projection goes into the same two buffers every direction: with hundreds of
    # directions, fresh arrays would cost as much as the sorts
    p, part = np.empty_like(cx), np.empty_like(cx)
    for c, s_ in zip(cos_t, sin_t, strict=True):
        np.multiply(cx, c, out=p)
        p += np.multiply(cy, s_, out=part)
        if padded:
            p[~valid] = np.inf
        if cw is None:
            p.sort(axis=1)
            if padded:
                p[tail] = 0.0
            out += np.einsum("gi,gi->g", coef, p)
        else:
            order = np.argsort(p, axis=1)
            p = np.take_along_axis(p, order, axis=1)
            p[tail] = 0.0
            w = np.take_along_axis(cw, order, axis=1)
            before = np.cumsum(w, axis=1) - w
            out += np.einsum("gi,gi->g", w * (2 * before + w - wsum), p)
    return out


def has_compiled() -> bool:
    """Whether the compiled binned kernel is available (numba installed)."""
    return _compiled() is not None
