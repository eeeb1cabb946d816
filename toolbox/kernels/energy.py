"""Energy statistics of labelled points with permutation p-values, exact or by projection.

Samples are given as one set of points with a sample label per *unit* (a feature; a unit may
own several points, e.g. a MultiPoint). The energy distance of two samples (Székely & Rizzo
2004) and DISCO's between-sample dispersion for k samples (Rizzo & Székely 2010) are signed
combinations of the within-sample pair sums ``P_aa`` and the total pair sum ``P``:

    S = P / N − Σ_a P_aa / W_a          (DISCO's between component, V-statistics)

with ``W_a`` the weight of sample ``a`` and ``N`` the total weight. ``P`` does not depend on the
labels, so a permutation test only needs the ``P_aa`` of each relabelling.

By projection, along each of ``m`` directions the points are sorted once; a relabelling then
costs one O(n) pass per direction (the order does not depend on the labels). The statistic
computed is the direction-summed one (``Σ_θ S_θ``, a valid statistic in its own right), so the
permutation p-value is exact for it. The kernel returns raw sums; ``toolbox.estimate.contrast``
turns them into the energy distance and DISCO's components with guaranteed intervals. Exact
mode keeps the n × n distance matrix and forms each relabelling's ``P_aa`` as ``½ zᵀ D z`` in
blocks. Both modes draw the same relabellings for a
seed. See docs/method.md, "Are the samples laid out differently?".
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._common import BLOCK_ELEMENTS, UNIT_ROUNDOFF, centre, check_points, directions_unit_vectors

__all__ = ["EnergySums", "energy_sums", "check_permutations", "holm_adjust", "EXACT_MAX_POINTS", "MAX_PERMUTATIONS"]

#: exact mode keeps the n × n distance matrix (8 n² bytes: 200 MB at this size)
EXACT_MAX_POINTS = 5000
#: beyond a million relabellings the p-value's resolution (1e-6) says nothing more
MAX_PERMUTATIONS = 1_000_000
#: relabellings per call of the scan kernel (progress and memory step)
_BATCH = 128
#: relabellings drawn by one thread: 64 one-byte labels fill one cache line of a row
_RELABEL_BLOCK = 64


@dataclass(frozen=True)
class EnergySums:
    """Raw sums of :func:`energy_sums` (no interval arithmetic: the estimator layer does that).

    ``total`` and ``within`` (one per sample) are sums over unordered pairs ``Σ_{i<j} w_i w_j``
    of the summed projections over ``directions`` directions (or of exact distances when
    ``directions`` is 0); ``slack_total`` and ``slack_within`` bound the rounding of the kernel's
    own arithmetic, in the same units. ``pair_weight`` is ``Σ_{i<j} w_i w_j`` within each sample.
    ``p_value`` is the permutation p-value of the statistic computed from these sums.
    """

    total: float
    within: np.ndarray
    counts: np.ndarray
    weight_sum: np.ndarray
    total_weight: float
    pair_weight: np.ndarray
    slack_total: float
    slack_within: np.ndarray
    directions: int
    p_value: float
    permutations: int


# --------------------------------------------------------------------------------------------
# the per-relabelling scan along sorted directions


_GOLDEN = 0x9E3779B97F4A7C15


def _splitmix(state):  # pragma: no cover - compiled by numba
    """One step of splitmix64 (Steele, Lea & Flood 2014): the new state and a 64-bit output."""
    state = state + np.uint64(_GOLDEN)
    z = state
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return state, z ^ (z >> np.uint64(31))


def _relabel_python(counts, seeds, out):  # pragma: no cover - compiled by numba
    """Column b of ``out`` (units × relabellings): a uniformly random labelling with ``counts``.

    Sequential selection: unit u takes label a with probability (labels a still to give) /
    (units left), every labelling with these counts being equally likely, as with a shuffle.
    The draw is an exact integer in [0, units left) (the high half of the product of 32 random bits
    from splitmix64 and the bound, with Lemire's 2019 rejection step). Each relabelling has its own
    generator seeded with ``seeds[b]``, so it does not depend on threads or batches, and the
    units are walked in the outer loop so that ``out`` is written in order.
    """
    n_units, n_perm = out.shape
    k = counts.size
    blocks = (n_perm + _RELABEL_BLOCK - 1) // _RELABEL_BLOCK
    for block in prange(blocks):  # noqa: F821 - numba's prange; a block is one cache line of a row
        first = block * _RELABEL_BLOCK
        last = min(first + _RELABEL_BLOCK, n_perm)
        state = seeds[first:last].astype(np.uint64)
        left = np.empty((last - first, k), dtype=np.int64)
        for b in range(last - first):
            left[b, :] = counts
        for u in range(n_units):
            bound = np.uint64(n_units - u)
            threshold = (np.uint64(1 << 32) - bound) % bound  # 2^32 mod bound: rejection keeps it exact
            for b in range(last - first):
                while True:
                    state[b], z = _splitmix(state[b])
                    product = (z >> np.uint64(32)) * bound
                    if (product & np.uint64(0xFFFFFFFF)) >= threshold:
                        break
                r = np.int64(product >> np.uint64(32))
                a = 0
                while r >= left[b, a]:
                    r -= left[b, a]
                    a += 1
                left[b, a] -= 1
                out[u, first + b] = a


def _scan_python(labels, unit_sorted, p_sorted, w_sorted, weighted, out_f, out_w):  # pragma: no cover
    """Within-sample projected pair sums of many relabellings, per direction (compiled by numba).

    ``labels[u, b]`` is the sample of unit ``u`` in relabelling ``b``; along direction ``d`` the
    points are sorted, ``unit_sorted[d]`` naming their units. Along one sorted direction the
    pair sum of sample a is Σ_j w_j (p_j·W_before − P_before) over its points j, with W_before
    and P_before the weight and weighted position of the sample's points before j. The
    relabellings form the inner loop: one point's data serves all of them, and they do not
    depend on each other.
    """
    m, n = p_sorted.shape
    n_perm, k = out_f.shape[1], out_f.shape[2]
    for d in prange(m):  # noqa: F821 - numba's prange, bound when compiled
        f = np.zeros((n_perm, k))
        wb = np.zeros((n_perm, k))
        pb = np.zeros((n_perm, k))
        for j in range(n):
            row = labels[unit_sorted[d, j]]
            p = p_sorted[d, j]
            w = w_sorted[d, j] if weighted else 1.0
            wp = w * p
            for b in range(n_perm):
                a = row[b]
                f[b, a] += w * (p * wb[b, a] - pb[b, a])
                wb[b, a] += w
                pb[b, a] += wp
        out_f[d] = f
        out_w[d] = wb


def _scan2_python(labels, unit_sorted, p_sorted, w_sorted, weighted, out_f, out_w):  # pragma: no cover
    """:func:`_scan_python` for two samples, with four running sums per relabelling.

    With ``W``, ``Q`` the weight and weighted position of all points before j (the same for
    every relabelling) and ``w1``, ``q1`` those of sample 1, a point of sample 1 adds
    ``w_j·B`` with ``B = p_j·w1 − q1`` to its sample's sum and a point of sample 0 adds
    ``w_j·(A − B)`` with ``A = p_j·W − Q``. The sample (s = 0 or 1) selects by arithmetic, not
    by indexing or branching, so the loop over relabellings vectorises.
    """
    m, n = p_sorted.shape
    n_perm = out_f.shape[1]
    for d in prange(m):  # noqa: F821
        g1 = np.zeros(n_perm)  # sample 1's pair sum
        ga = np.zeros(n_perm)  # both samples' pair sums
        w1 = np.zeros(n_perm)
        q1 = np.zeros(n_perm)
        w_before = 0.0
        q_before = 0.0
        for j in range(n):
            row = labels[unit_sorted[d, j]]
            p = p_sorted[d, j]
            w = w_sorted[d, j] if weighted else 1.0
            wa = w * (p * w_before - q_before)
            wp = w * p
            for b in range(n_perm):
                s = np.float64(row[b])
                wb = w * (p * w1[b] - q1[b])
                g1[b] += s * wb
                ga[b] += (1.0 - s) * wa + (2.0 * s - 1.0) * wb
                w1[b] += s * w
                q1[b] += s * wp
            w_before += w
            q_before += wp
        for b in range(n_perm):
            out_f[d, b, 0] = ga[b] - g1[b]
            out_f[d, b, 1] = g1[b]
            out_w[d, b, 0] = w_before - w1[b]
            out_w[d, b, 1] = w1[b]


@functools.cache
def _compiled():
    """The relabelling and scan kernels compiled by numba on first use (cached on disk).

    None without numba (the numpy fallbacks then run; their relabellings differ).
    """
    try:
        import numba
    except ImportError:  # pragma: no cover - numba is a dependency; the numpy path is the fallback
        return None
    globals()["prange"] = numba.prange
    globals()["_splitmix"] = numba.njit(cache=True, nogil=True)(_splitmix)
    jit = numba.njit(parallel=True, cache=True, nogil=True)
    # contracting a·b + c into one rounding (FMA) only makes the sums more accurate
    vector = numba.njit(parallel=True, cache=True, nogil=True, fastmath={"contract"})
    return jit(_relabel_python), jit(_scan_python), vector(_scan2_python)


def _relabel(counts, seeds, n_units, dtype):
    """Random relabellings with the sample sizes ``counts``, as a (units × relabellings) array."""
    out = np.empty((n_units, seeds.size), dtype=dtype)
    kernels = _compiled()
    if kernels is None:  # pragma: no cover
        base = np.repeat(np.arange(counts.size), counts).astype(dtype)
        for b, seed in enumerate(seeds):
            out[:, b] = np.random.default_rng(int(seed)).permutation(base)
        return out
    kernels[0](counts.astype(np.int64), seeds, out)
    return out


def _scan_numpy(labels, unit_sorted, p_sorted, w_sorted, weighted, out_f, out_w):
    """The same sums with numpy (fallback without numba): O(k n) per relabelling and direction."""
    for d in range(p_sorted.shape[0]):
        lab = labels[unit_sorted[d]]
        w_all = w_sorted[d] if weighted else np.ones(p_sorted.shape[1])
        for b in range(labels.shape[1]):
            for a in range(out_f.shape[2]):
                mask = lab[:, b] == a
                p, w = p_sorted[d][mask], w_all[mask]
                before_w, before_p = np.cumsum(w) - w, np.cumsum(w * p) - w * p
                out_f[d, b, a] = float(np.sum(w * (p * before_w - before_p)))
                out_w[d, b, a] = w.sum()


class _Projected:
    """Sorted projections of the points along ``m`` directions; within sums per relabelling."""

    def __init__(self, x, y, units, w, weighted, k, m):
        self.k, self.m, self.weighted = k, m, weighted
        cos, sin = directions_unit_vectors(m)
        n = x.size
        self.p = np.empty((m, n))
        self.units = np.empty((m, n), dtype=np.int32)
        self.w = np.empty((m, n)) if weighted else self.p
        for d in range(m):
            p = x * cos[d] + y * sin[d]
            order = np.argsort(p, kind="stable")
            self.p[d] = p[order]
            self.units[d] = units[order]
            if weighted:
                self.w[d] = w[order]
        kernels = _compiled()
        self.scan = _scan_numpy if kernels is None else kernels[2] if k == 2 else kernels[1]

    def __call__(self, labels):
        out_f = np.zeros((self.m, labels.shape[1], self.k))
        out_w = np.zeros((self.m, labels.shape[1], self.k))
        self.scan(np.ascontiguousarray(labels), self.units, self.p, self.w, self.weighted, out_f, out_w)
        return out_f.sum(axis=0), out_w[0]


class _Exact:
    """The n × n distance matrix; a relabelling's within sums are ½ zᵀ D z per sample."""

    def __init__(self, x, y, units, w, k):
        from scipy.spatial.distance import cdist  # a start-up cost only exact sums pay

        pts = np.column_stack([x, y])
        self.d = cdist(pts, pts)
        self.units, self.w, self.k = units, w, k
        self.step = max(1, BLOCK_ELEMENTS // max(1, x.size * k))

    def __call__(self, labels):
        out_f = np.empty((labels.shape[1], self.k))
        out_w = np.empty((labels.shape[1], self.k))
        classes = np.arange(self.k)
        for a in range(0, labels.shape[1], self.step):
            point_labels = labels[self.units, a : a + self.step]  # (n, b)
            z = (point_labels[:, :, None] == classes) * self.w[:, None, None]  # (n, b, k)
            z = z.reshape(self.w.size, -1)
            within = 0.5 * np.einsum("ij,ij->j", z, self.d @ z)
            out_f[a : a + self.step] = within.reshape(-1, self.k)
            out_w[a : a + self.step] = z.sum(axis=0).reshape(-1, self.k)
        return out_f, out_w


def _statistic(f_total, f_within, w_within, weight_total):
    """``P/N − Σ_a P_aa/W_a`` per relabelling (rows); an empty sample contributes nothing."""
    with np.errstate(invalid="ignore", divide="ignore"):
        within = np.where(w_within > 0, f_within / w_within, 0.0).sum(axis=1)
    return f_total / weight_total - within


# --------------------------------------------------------------------------------------------
# the test


def _check_labels(labels, units, n_points, n_samples):
    labels = np.asarray(labels)
    if labels.ndim != 1 or (labels.size and not np.issubdtype(labels.dtype, np.integer)):
        raise ParameterError("labels must be one integer sample code per unit.")
    if n_samples is None:
        n_samples = int(labels.max()) + 1 if labels.size else 0
    if labels.size and (labels.min() < 0 or labels.max() >= n_samples):
        raise ParameterError(f"sample codes must lie in [0, {n_samples}).")
    if units is None:
        if labels.size != n_points:
            raise ParameterError(
                f"labels must have one value per point ({n_points}) when units is not given. "
                f"Got {labels.size}."
            )
        units = np.arange(n_points)
    units = np.asarray(units)
    if units.shape != (n_points,) or (units.size and not np.issubdtype(units.dtype, np.integer)):
        raise ParameterError("units must be one integer unit index per point.")
    if units.size and (units.min() < 0 or units.max() >= labels.size):
        raise ParameterError(f"unit indices must lie in [0, {labels.size}).")
    dtype = np.int8 if n_samples <= 127 else np.int32
    return labels.astype(dtype), units.astype(np.int32), int(n_samples)


def check_permutations(permutations) -> int:
    """Validate a number of relabellings: an integer in [1, MAX_PERMUTATIONS]."""
    if isinstance(permutations, bool) or int(permutations) != permutations or not (
        1 <= permutations <= MAX_PERMUTATIONS
    ):
        raise ParameterError(
            f"permutations must be an integer in [1, {MAX_PERMUTATIONS:,}]. Got {permutations!r} "
            "instead; 999 is the usual choice (the smallest p-value it can give is 1/1000)."
        )
    return int(permutations)


def energy_sums(
    x,
    y,
    labels,
    weights=None,
    *,
    units=None,
    n_samples: int | None = None,
    directions: int = 8,
    permutations: int = 999,
    seed=None,
    orders=None,
    progress: Callable[[int, int], None] | None = None,
) -> EnergySums:
    """Raw sums and permutation p-value of DISCO's between statistic, exact or by projection.

    Parameters
    ----------
    x, y : array_like
        Planar coordinates of all points of all samples.
    labels : array_like of int
        Sample code of every unit, in ``[0, n_samples)``; the units are what permutations
        shuffle.
    weights : array_like, optional
        Non-negative weight of every point (a frequency); ones if omitted.
    units : array_like of int, optional
        Unit (index into ``labels``) of every point; default: every point is its own unit.
    n_samples : int, optional
        Number of samples (default ``labels.max() + 1``).
    directions : int
        Projection directions ``m``; 0 for exact sums (at most ``EXACT_MAX_POINTS`` points).
    permutations : int
        Number of random relabellings, in [1, 1,000,000].
    seed : int or numpy.random.SeedSequence, optional
        Seed of the relabellings; the same seed gives the same relabellings in either mode.
    orders : array_like of int, optional
        Explicit relabellings instead of random ones: each row a permutation ``π`` of the units,
        read as a reordered distance matrix is: unit ``π[i]`` takes the label of unit ``i``
        (lets a test replay another program's permutations).
    progress : callable, optional
        Called as ``progress(done, total)`` in relabellings.

    Returns
    -------
    EnergySums

    Examples
    --------
    >>> r = energy_sums([0.0, 1.0, 10.0, 11.0], [0.0] * 4, [0, 0, 1, 1], directions=0, permutations=9, seed=1)
    >>> float(r.total), r.within.tolist()  # all pairs; each sample's pairs
    (42.0, [1.0, 1.0])
    """
    x, y, weights = check_points(x, y, weights)
    labels, units, k = _check_labels(labels, units, x.size, n_samples)
    if orders is None:
        permutations = check_permutations(permutations)
    else:
        orders = np.asarray(orders)
        if orders.ndim != 2 or orders.shape[1] != labels.size:
            raise ParameterError(f"orders must have one row of {labels.size} unit indices per relabelling.")
        permutations = orders.shape[0]
    n, m = x.size, int(directions)
    weighted = weights is not None
    w = weights if weighted else np.ones(n)
    point_labels = labels[units]
    counts = np.bincount(point_labels, minlength=k)
    weight_sum = np.bincount(point_labels, w, minlength=k)
    if k < 2 or (counts < 1).any() or not (weight_sum > 0).all():
        raise ParameterError(
            f"An energy test needs at least two samples, each with a point of positive weight. Got "
            f"points per sample {counts.tolist()} and weights {weight_sum.tolist()}."
        )
    if m == 0 and n > EXACT_MAX_POINTS:
        raise ParameterError(
            f"Exact sums keep the {n:,} × {n:,} distance matrix in memory and are limited to "
            f"{EXACT_MAX_POINTS:,} points per test; use the projection estimate for larger tests."
        )
    xc, yc = centre(x, y, np.zeros(n, dtype=np.int64), 1, w if weighted else None)
    within = _Exact(xc, yc, units, w, k) if m == 0 else _Projected(xc, yc, units, w, weighted, k, m)
    total_weight = float(w.sum())
    f_total = float(within(np.zeros((labels.size, 1), dtype=labels.dtype))[0][0, 0])
    f_obs, _ = within(labels[:, None])
    observed = _statistic(f_total, f_obs, weight_sum[None, :], total_weight)[0]
    # ties within rounding count as at least as extreme (a conservative p-value)
    threshold = observed - 64 * n * UNIT_ROUNDOFF * abs(f_total / total_weight)
    rng = np.random.default_rng(seed)
    unit_counts = np.bincount(labels, minlength=k)
    extreme = 0
    for start in range(0, permutations, _BATCH):
        size = min(_BATCH, permutations - start)
        if orders is None:
            seeds = rng.integers(0, 2**63, size=size, dtype=np.int64)
            relabelled = _relabel(unit_counts, seeds, labels.size, labels.dtype)
        else:  # as a permuted distance matrix: unit orders[b, i] takes the label of unit i
            relabelled = np.empty((labels.size, size), dtype=labels.dtype)
            relabelled[orders[start : start + size].T, np.arange(size)[None, :]] = labels[:, None]
        f_perm, w_perm = within(relabelled)
        extreme += int(np.count_nonzero(_statistic(f_total, f_perm, w_perm, total_weight) >= threshold))
        if progress is not None:
            progress(start + size, permutations)
    f_within = f_obs[0]
    radius_sum = np.bincount(point_labels, w * np.hypot(xc, yc), minlength=k)
    # rounding allowance of each summed pair sum: the projections and the running sums of the
    # scan (or the matrix products) err by at most (2n + 8)·u·W_a·Σ_a w_i r_i per direction
    slack_within = max(m, 1) * (2 * counts + 8) * UNIT_ROUNDOFF * weight_sum * radius_sum
    slack_total = max(m, 1) * (2 * n + 8) * UNIT_ROUNDOFF * total_weight * radius_sum.sum()
    if m == 0:  # exact distances: only rounding (each d_ij is within a few u of the true one)
        slack_within = slack_within + (2 * counts + 8) * UNIT_ROUNDOFF * f_within
        slack_total += (2 * n + 8) * UNIT_ROUNDOFF * f_total
    return EnergySums(
        total=f_total,
        within=f_within,
        counts=counts,
        weight_sum=weight_sum,
        total_weight=total_weight,
        pair_weight=(weight_sum**2 - np.bincount(point_labels, w * w, minlength=k)) / 2,
        slack_total=float(slack_total),
        slack_within=slack_within,
        directions=m,
        p_value=(extreme + 1) / (permutations + 1),
        permutations=permutations,
    )


def holm_adjust(p_values) -> np.ndarray:
    """Holm's step-down adjustment of p-values for multiple tests (NaN entries are left out).

    The i-th smallest of the k p-values becomes ``max_{j ≤ i} min(1, (k − j + 1)·p_(j))``
    (Holm 1979); it controls the family-wise error rate without assumptions about how the
    tests depend on each other.

    Examples
    --------
    >>> holm_adjust([0.01, 0.04, 0.03, float("nan")]).round(2).tolist()
    [0.03, 0.06, 0.06, nan]
    """
    p = np.asarray(p_values, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    valid = np.flatnonzero(~np.isnan(p))
    order = valid[np.argsort(p[valid], kind="stable")]
    k = order.size
    scaled = np.minimum(1.0, (k - np.arange(k)) * p[order])
    out[order] = np.maximum.accumulate(scaled)
    return out
