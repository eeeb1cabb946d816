"""Sums of distances between every pair of groups, with guaranteed intervals.

For groups A ≠ B the cross total is ``C_AB = Σ_{a∈A, b∈B} w_a w_b d_ab``. Along one direction,
with all points sorted by their projected value, every ordered pair (earlier j, later i) adds
``w_i w_j (p_i − p_j)`` to entry ``[g_i, g_j]``. The sorted sequence is cut into blocks of β
points: pairs in different blocks are summed for all group pairs at once by two matrix products
of per-block group sums (``S_tᵀ·W_<t − W_tᵀ·S_<t``), pairs inside a block directly. With T
blocks the cost per direction is O(n log n + T·G² + n·β); β is chosen to balance the last two.
Each pair's term is non-negative, so the projection interval holds for every entry.
"""

from __future__ import annotations

import numpy as np

from . import costs
from ._common import (
    BLOCK_ELEMENTS,
    UNIT_ROUNDOFF,
    Raw,
    compiled_module,
    directions_unit_vectors,
    exact_rounding,
    thread_limit,
)

__all__ = ["MAX_CROSS_GROUPS", "exact_cross_raw", "projected_cross_raw"]

#: a G × G result beyond this many groups would not fit comfortably in memory
MAX_CROSS_GROUPS = 8000


def exact_cross_raw(x, y, groups, n_groups, w, tick) -> Raw:
    """Exact G × G cross sums of centred points (the diagonal: twice each group's pair sum)."""
    total = _exact_cross(x, y, groups, n_groups, w, tick)
    radii = np.hypot(x, y)
    # every entry sums non-negative terms in three stages (matrix product, rows, blocks)
    rounding = exact_rounding(3 * x.size)
    # centring: entry (A, B) may be off by u·√2·Σ w_a w_b (r_a + r_b)
    wr = np.bincount(groups, w * radii, n_groups)
    ws = np.bincount(groups, w, n_groups)
    return Raw(total, 0, relative=rounding, radius_mass=np.outer(wr, ws) + np.outer(ws, wr))


def projected_cross_raw(x, y, groups, n_groups, w, m, tick, threads=None) -> Raw:
    """Summed projections of the G × G cross sums of centred points on ``m`` directions."""
    n = x.size
    cos_t, sin_t = directions_unit_vectors(m)
    sweep = compiled_module("_cross_sweep")
    if sweep is not None:
        summed, chain = _swept(sweep, x, y, groups, n_groups, w, cos_t, sin_t, tick, threads)
    else:
        summed = np.zeros((n_groups, n_groups))
        beta = costs.cross_block(n_groups)
        for c, s in zip(cos_t, sin_t, strict=True):
            part = _projected_cross(x * c + y * s, groups, n_groups, w, beta)
            summed += part + part.T
            tick(n)
        chain = -(-n // beta) + beta
    weight_sum = np.bincount(groups, w, n_groups)
    radius = float(np.hypot(x, y).max()) if n else 0.0
    # Rounding: each ordered half is bounded by 2·R·W_A·W_B and accumulates over at most
    # `chain` + 16 terms per direction (blocks and block size; or a group's points against
    # running sums over another group's), so the computed entry is within that many units of
    # roundoff of it, per direction.
    slack = m * (chain + 16) * UNIT_ROUNDOFF * 4 * radius * np.outer(weight_sum, weight_sum)
    return Raw(summed, m, absolute=slack)


#: most bytes of per-thread G × G matrices the swept kernel may hold
_SWEEP_BYTES = 1 << 29


def _swept(sweep, x, y, groups, n_groups, w, cos_t, sin_t, tick, threads):
    """Cross sums by the compiled sweep, a few directions per call so progress can be told."""
    import numba

    n, m = x.size, cos_t.size
    workers = max(
        1, min(threads or numba.get_num_threads(), m, _SWEEP_BYTES // (8 * n_groups * n_groups + 1))
    )
    args = [
        np.ascontiguousarray(v, dtype=t) for v, t in ((x, float), (y, float), (groups, np.int64), (w, float))
    ]
    step = workers * max(1, (1 << 22) // max(n, 1))
    with thread_limit(workers):
        acc = np.zeros((numba.get_num_threads(), n_groups, n_groups))
        for k in range(0, m, step):
            sweep.swept_cross_halves(*args, cos_t[k : k + step], sin_t[k : k + step], acc)
            tick(n * cos_t[k : k + step].size)
    half = acc.sum(axis=0)
    counts = np.bincount(groups, minlength=n_groups)
    # a group's points against running sums of another's, plus the summing over directions
    return half + half.T, 2 * int(counts.max(initial=0)) + m


def _projected_cross(p, groups, n_groups, w, beta) -> np.ndarray:
    """Ordered half ``C'[A, B] = Σ_{b before a} w_a w_b (p_a − p_b)`` for one direction."""
    order = np.argsort(p)
    n = p.size
    blocks = -(-n // beta)
    pad = blocks * beta - n
    ps = np.concatenate([p[order], np.full(pad, p[order[-1]] if n else 0.0)])
    gs = np.concatenate([groups[order], np.zeros(pad, dtype=np.int64)])
    ws = np.concatenate([w[order], np.zeros(pad)])
    block_of = np.repeat(np.arange(blocks), beta)
    cell = block_of * n_groups + gs
    wb = np.bincount(cell, ws, blocks * n_groups).reshape(blocks, n_groups)
    sb = np.bincount(cell, ws * ps, blocks * n_groups).reshape(blocks, n_groups)
    w_before = np.cumsum(wb, axis=0) - wb
    s_before = np.cumsum(sb, axis=0) - sb
    half = sb.T @ w_before - wb.T @ s_before  # pairs in different blocks
    if beta > 1:  # pairs inside one block, later index i against earlier j
        ps, gs, ws = ps.reshape(blocks, beta), gs.reshape(blocks, beta), ws.reshape(blocks, beta)
        later, earlier = np.tril_indices(beta, -1)
        step = max(1, BLOCK_ELEMENTS // later.size)
        flat = np.zeros(n_groups * n_groups)
        for a in range(0, blocks, step):
            bp, bg, bw = ps[a : a + step], gs[a : a + step], ws[a : a + step]
            terms = bw[:, later] * bw[:, earlier] * (bp[:, later] - bp[:, earlier])
            cells = bg[:, later] * n_groups + bg[:, earlier]
            flat += np.bincount(cells.ravel(), terms.ravel(), n_groups * n_groups)
        half += flat.reshape(n_groups, n_groups)
    return half


def _exact_cross(x, y, groups, n_groups, w, tick) -> np.ndarray:
    """Exact ``Σ_{a∈A, b∈B} w_a w_b d_ab`` for all group pairs, in blocks of rows."""
    import scipy.sparse
    from scipy.spatial.distance import cdist  # imported here: a start-up cost only exact sums pay

    n = x.size
    pts = np.column_stack([x, y])
    onehot = scipy.sparse.csr_matrix((w, (np.arange(n), groups)), shape=(n, n_groups))
    total = np.zeros((n_groups, n_groups))
    block = max(1, min(n, BLOCK_ELEMENTS // max(n, 1)))
    for a in range(0, n, block):
        b = min(n, a + block)
        per_row = (onehot.T @ cdist(pts[a:b], pts).T).T  # (rows, G): Σ_b w_b d_ab by group of b
        total += (onehot[a:b].T @ per_row).reshape(n_groups, n_groups)
        tick(b - a)
    return np.asarray(total)
