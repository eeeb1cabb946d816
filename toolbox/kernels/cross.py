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

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._common import (
    BLOCK_ELEMENTS,
    UNIT_ROUNDOFF,
    Progress,
    Ticker,
    centre,
    centring_slack,
    check_groups,
    check_method,
    check_points,
    cost_exact,
    crofton_interval,
    directions_unit_vectors,
    exact_rounding,
)
from .pairs import grouped_pair_sums

__all__ = ["MAX_CROSS_GROUPS", "CrossPairSums", "cross_pair_sums"]

#: a G × G result beyond this many groups would not fit comfortably in memory
MAX_CROSS_GROUPS = 8000


@dataclass(frozen=True)
class CrossPairSums:
    """G × G matrices of :func:`cross_pair_sums`.

    Off the diagonal, ``total[A, B]`` is the cross total of groups A and B and ``pair_weight``
    is ``W_A·W_B``; on the diagonal they are group A's own pair total and pair weight, so
    ``mean`` is the group's mean pair distance there. Entries without pairs are NaN.
    """

    n_points: np.ndarray
    weight_sum: np.ndarray
    pair_weight: np.ndarray
    total: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    rel_bound: np.ndarray
    exact: np.ndarray
    directions: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.pair_weight > 0, self.total / self.pair_weight, np.nan)


def _block_size(n_groups: int) -> int:
    # measured here: cross-block work is 2·(n/β)·G² multiply-adds in BLAS (~0.07 ns each),
    # in-block work n·β/2 pair terms in numpy (~40 ns each); the sum is smallest near β = 0.08·G
    return int(np.clip(round(0.08 * n_groups), 1, 1024))


def _cost_cross_projection(n, g, m):
    beta = _block_size(g)
    return m * (n * 40e-9 + (n / beta) * g * g * 0.14e-9 + n * beta * 20e-9)


def cross_pair_sums(
    x,
    y,
    groups,
    n_groups: int | None = None,
    weights=None,
    *,
    tolerance: float = 0.01,
    method: str = "auto",
    progress: Progress | None = None,
) -> CrossPairSums:
    """Total distance between the points of every pair of groups, with guaranteed bounds.

    Parameters
    ----------
    x, y : array_like
        Planar coordinates of the points.
    groups : array_like of int
        Group code of every point, in ``[0, n_groups)``.
    n_groups : int, optional
        Number of groups (default ``groups.max() + 1``).
    weights : array_like, optional
        Non-negative weights; the cross total is ``Σ_{a∈A, b∈B} w_a w_b d_ab``.
    tolerance : float
        Guaranteed relative error of every entry, in [0, 0.5]; 0 means exact.
    method : {"auto", "exact", "projection"}
        ``auto`` takes exact sums when they are cheaper for the whole layer.
    progress : callable, optional
        Called as ``progress(done, total)`` in work units.

    Returns
    -------
    CrossPairSums
        G × G matrices; the diagonal holds each group's own pair total.

    Examples
    --------
    >>> r = cross_pair_sums([0, 1, 4, 4], [0, 0, 0, 3], [0, 0, 1, 1], tolerance=0)
    >>> r.total[[0, 1, 0], [1, 0, 0]].round(6).tolist()  # 4 + 5 + 3 + √18 both ways; group 0's pair
    [16.242641, 16.242641, 1.0]
    """
    x, y, weights = check_points(x, y, weights)
    groups, n_groups = check_groups(groups, x.size, n_groups)
    m = check_method(method, tolerance)
    if n_groups > MAX_CROSS_GROUPS:
        raise ParameterError(
            f"{n_groups} groups would make a {n_groups} × {n_groups} result; at most "
            f"{MAX_CROSS_GROUPS} groups are supported. Group by fewer or coarser fields."
        )
    within = grouped_pair_sums(x, y, groups, n_groups, weights, tolerance=tolerance, method=method)
    w = np.ones(x.size) if weights is None else weights
    n = x.size
    use_exact = m == 0 or (method == "auto" and cost_exact(n) <= _cost_cross_projection(n, n_groups, m))
    cx, cy = centre(x, y, np.zeros(n, dtype=np.int64), 1, w)
    radii = np.hypot(cx, cy)
    tick = Ticker(progress, n if use_exact else m * n)
    if use_exact:
        total = _exact_cross(cx, cy, groups, n_groups, w, tick)
        # every entry sums non-negative terms in three stages (matrix product, rows, blocks)
        rounding = exact_rounding(3 * n)
        # centring: entry (A, B) may be off by u·√2·Σ w_a w_b (r_a + r_b)
        wr = np.bincount(groups, w * radii, n_groups)
        ws = np.bincount(groups, w, n_groups)
        shift = centring_slack(1.0, 1.0) * (np.outer(wr, ws) + np.outer(ws, wr)) / 2
        lower, upper = np.maximum(total * (1 - rounding) - shift, 0.0), total * (1 + rounding) + shift
        with np.errstate(divide="ignore", invalid="ignore"):
            rel_bound = np.where(total > 0, rounding + shift / total, np.where(shift > 0, np.inf, 0.0))
        directions = 0
    else:
        summed = np.zeros((n_groups, n_groups))
        beta = _block_size(n_groups)
        for c, s in zip(*directions_unit_vectors(m), strict=True):
            part = _projected_cross(cx * c + cy * s, groups, n_groups, w, beta)
            summed += part + part.T
            tick(n)
        weight_sum = np.bincount(groups, w, n_groups)
        blocks = -(-n // beta)
        radius = float(radii.max()) if n else 0.0
        # Rounding: each ordered half is bounded by 2·R·W_A·W_B and accumulates over at most
        # T + β + 16 terms, so the computed entry is within that many units of roundoff of it.
        slack = m * (blocks + beta + 16) * UNIT_ROUNDOFF * 4 * radius * np.outer(weight_sum, weight_sum)
        total, lower, upper, rel_bound = crofton_interval(summed, slack, m)
        directions = m
        redone = _exact_where_rounding_dominates(
            cx, cy, groups, n_groups, w, tolerance, total, lower, upper, rel_bound
        )

    weight_sum = within.weight_sum
    pair_weight = np.outer(weight_sum, weight_sum)
    exact = np.full(total.shape, use_exact)
    dirs = np.full(total.shape, directions, dtype=np.int64)
    if not use_exact:
        exact[redone] = True
        dirs[redone] = 0
    diag = np.arange(n_groups)
    pair_weight[diag, diag] = within.pair_weight
    for matrix, values in (
        (total, within.total),
        (lower, within.lower),
        (upper, within.upper),
        (rel_bound, within.rel_bound),
        (exact, within.exact),
        (dirs, within.directions),
    ):
        matrix[diag, diag] = values
    missing = ~(pair_weight > 0)
    for matrix in (total, lower, upper, rel_bound):
        matrix[missing] = np.nan
    return CrossPairSums(
        n_points=within.n_points,
        weight_sum=weight_sum,
        pair_weight=pair_weight,
        total=total,
        lower=lower,
        upper=upper,
        rel_bound=rel_bound,
        exact=exact,
        directions=dirs,
    )


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


def _exact_where_rounding_dominates(x, y, groups, n_groups, w, tolerance, total, lower, upper, rel_bound):
    """Recompute exactly the entries whose rounding allowance pushed them over the tolerance.

    The allowance is written in the radius of the whole layer, so two tight clusters far from
    the rest can get a bound above the tolerance although their estimate is fine; an exact
    sum over just those two groups settles it (in place, when it costs under 1e8 pairs).
    Returns the mask of entries recomputed.
    """
    counts = np.bincount(groups, minlength=n_groups)
    redone = np.zeros(total.shape, dtype=bool)
    over = np.argwhere(np.triu(rel_bound > tolerance, 1))
    for a, b in over:
        if counts[a] * counts[b] > 1e8:
            continue
        ia, ib = np.flatnonzero(groups == a), np.flatnonzero(groups == b)
        sub = np.concatenate([ia, ib])
        codes = np.concatenate([np.zeros(ia.size, np.int64), np.ones(ib.size, np.int64)])
        cx, cy = centre(x[sub], y[sub], np.zeros(sub.size, np.int64), 1, w[sub])
        entry = _exact_cross(cx, cy, codes, 2, w[sub], lambda units: None)[0, 1]
        radii = np.hypot(cx, cy)
        rounding = exact_rounding(3 * sub.size)
        wr = np.bincount(codes, w[sub] * radii, 2)
        ws = np.bincount(codes, w[sub], 2)
        shift = centring_slack(1.0, 1.0) * (wr[0] * ws[1] + ws[0] * wr[1]) / 2
        lo, hi = max(entry * (1 - rounding) - shift, 0.0), entry * (1 + rounding) + shift
        bound = rounding + shift / entry if entry > 0 else 0.0
        for matrix, value in ((total, entry), (lower, lo), (upper, hi), (rel_bound, bound)):
            matrix[a, b] = matrix[b, a] = value
        redone[a, b] = redone[b, a] = True
    return redone


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
