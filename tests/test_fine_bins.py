"""The narrow-bin kernel of tight tolerances against scipy's distances and numpy's sorts.

References: totals from ``scipy.spatial.distance.cdist`` (exact Euclidean distances, scipy's
own brute force), in blocks of rows, each block summed by numpy and the blocks by
``math.fsum``; per-direction projected pair sums from ``numpy.sort`` and the sorted-values
formula ``Σ_i (2i − n + 1)·p_(i)`` (weighted: ``Σ_i w_i p_i (2·W_<i + w_i − W)``), common
practice for sums of absolute differences. The kernel's promises: along every direction the
true projected sum lies in ``[exact part, exact part + uncertainty]``; a direction whose bins
miss the budget is sorted instead (uncertainty 0); the totals' intervals hold and meet the
tolerance.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from toolbox import pair_distance_sum
from toolbox.estimate.interval import bin_budget, projection_directions
from toolbox.kernels import GroupLayout, pairs

_fine_bins = pytest.importorskip("toolbox.kernels._fine_bins", reason="the narrow-bin kernel needs numba")

TOLERANCE = 1e-6
BUDGET = bin_budget(TOLERANCE, projection_directions(TOLERANCE))
#: a few thousand points: as many as a weighted group needs for narrow bins at this budget
N = int(_fine_bins.bins_for_budget(BUDGET) * pairs._FINE_WEIGHTED) + 800


def cdist_total(x, y, w=None) -> float:
    """Σ_{i<j} w_i w_j |p_i − p_j| from scipy's cdist, half the full matrix's sum, in blocks."""
    pts = np.column_stack([x, y])
    w = np.ones(x.size) if w is None else w
    blocks = [w[a : a + 1000] @ cdist(pts[a : a + 1000], pts) @ w for a in range(0, x.size, 1000)]
    return 0.5 * math.fsum(blocks)


def sorted_projection(p, w=None) -> float:
    """Exact Σ_{i<j} w_i w_j |p_i − p_j| of values along one direction, by numpy.sort."""
    order = np.argsort(p, kind="stable")
    p = p[order]
    if w is None:
        return math.fsum((2 * np.arange(p.size) - p.size + 1) * p)
    w = w[order]
    before = np.concatenate([[0.0], np.cumsum(w)[:-1]])
    return math.fsum(w * p * (2 * before + w - w.sum()))


def skewed(n, seed):
    """A Gaussian cluster (σ = 1 km) in UTM-like metres, 2 % of it ten times wider; weights."""
    rng = np.random.default_rng(seed)
    scale = 1000.0 * np.where(rng.random(n) < 0.02, 10.0, 1.0)
    x = 520_000.0 + rng.normal(size=n) * scale
    y = 6_130_000.0 + rng.normal(size=n) * scale
    return x, y, rng.gamma(2.0, 1.5, n)


def cluster_with_outliers(n, seed):
    """A cluster of σ = 1 cm and four points 50 km away from it."""
    rng = np.random.default_rng(seed)
    x = 520_000.0 + rng.normal(size=n) * 0.01
    y = 6_130_000.0 + rng.normal(size=n) * 0.01
    x[:4] += 50_000.0 * np.array([1.0, -1.0, 0.3, 0.0])
    y[:4] += 50_000.0 * np.array([0.0, 0.2, 1.0, -1.0])
    return x, y, rng.gamma(2.0, 1.5, n)


def tiny_clusters(n, seed):
    """Ninety clusters of σ = 1 µm spread over 10 km: most pairs share a narrow bin."""
    rng = np.random.default_rng(seed)
    centres = rng.uniform(0.0, 10_000.0, (90, 2))
    pts = centres[rng.integers(0, 90, n)] + rng.normal(size=(n, 2)) * 1e-6
    return pts[:, 0], pts[:, 1], rng.gamma(2.0, 1.5, n)


@pytest.fixture
def kernel_calls(monkeypatch):
    """The (exact part, uncertainty) of every call of the narrow-bin kernel, which unweighted
    groups of N points get too (normally they are sorted below 2 points per bin)."""
    monkeypatch.setattr(pairs, "_FINE_UNWEIGHTED", pairs._FINE_WEIGHTED)
    calls = []
    real = _fine_bins.fine_bin_sums

    def spy(*args):
        out = real(*args)
        calls.append(out)
        return out

    monkeypatch.setattr(_fine_bins, "fine_bin_sums", spy)
    return calls


def check_total(r, reference, tolerance=TOLERANCE):
    assert r.lower <= reference <= r.upper, (r.lower, reference, r.upper)
    assert abs(r.total - reference) <= r.rel_bound * reference
    assert r.rel_bound <= tolerance


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("tolerance", [TOLERANCE, 1e-5])
def test_tight_tolerance_against_scipy(tolerance, weighted, kernel_calls):
    x, y, w = skewed(N, seed=71)
    w = w if weighted else None
    r = pair_distance_sum(x, y, w, tolerance=tolerance, method="projection")
    check_total(r, cdist_total(x, y, w), tolerance)  # scipy cdist
    # the narrow bins did the work and met the budget without sorting any direction
    assert len(kernel_calls) == 1
    exact, uncertain, _ = kernel_calls[0]
    budget = bin_budget(tolerance, projection_directions(tolerance))
    assert 0 < uncertain[0] <= budget * exact[0]


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("layout", [cluster_with_outliers, tiny_clusters])
def test_interval_holds_where_bins_are_crowded(layout, weighted, kernel_calls):
    # a dense cluster beside far outliers, and many tiny clusters: layouts whose bins would
    # need resolving; the interval still holds and meets the tolerance
    x, y, w = layout(N, seed=72)
    w = w if weighted else None
    r = pair_distance_sum(x, y, w, tolerance=TOLERANCE, method="projection")
    check_total(r, cdist_total(x, y, w))  # scipy cdist
    assert len(kernel_calls) == 1


def test_small_unweighted_groups_are_sorted(monkeypatch):
    # below two points per bin numpy's sort is faster: no call of the kernel
    called = []
    monkeypatch.setattr(_fine_bins, "fine_bin_sums", lambda *args: called.append(args))
    x, y, _ = skewed(N, seed=77)
    r = pair_distance_sum(x, y, tolerance=TOLERANCE, method="projection")
    assert not called and r.rel_bound <= TOLERANCE


def one_direction(x, y, w, angle, budget):
    """The kernel's (exact part, uncertainty) of one group along one direction, and numpy's sum."""
    lay = GroupLayout.build(x, y, np.zeros(x.size, dtype=np.int64), 1, w)
    c, s = np.array([math.cos(angle)]), np.array([math.sin(angle)])
    exact, uncertain, _ = _fine_bins.fine_bin_sums(
        lay.x, lay.y, lay.w, lay.starts, lay.counts, np.array([0]), c, s, lay.radius_max(), budget
    )
    return exact[0], uncertain[0], sorted_projection(lay.x * c[0] + lay.y * s[0], lay.w)


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("angle", [0.0, 0.3, math.pi / 2, 2.9])
def test_each_direction_lies_in_its_bins_interval(angle, weighted):
    x, y, w = skewed(20_000, seed=73)
    w = w if weighted else None
    exact, uncertain, reference = one_direction(x, y, w, angle, budget=1.0)  # never sorted
    slack = 1e-12 * reference  # rounding of both sums, far below the bins' uncertainty
    assert uncertain > 1e3 * slack
    assert exact - slack <= reference <= exact + uncertain + slack


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_a_dense_cluster_beside_far_outliers_needs_no_sort(weighted):
    # the tail bins widen away from the core, so the cluster's edge stays in narrow ones and
    # the budget is met by the bins alone
    x, y, w = cluster_with_outliers(N, seed=76)
    w = w if weighted else None
    for angle in (0.0, 0.7, 2.0):
        exact, uncertain, reference = one_direction(x, y, w, angle, BUDGET)
        assert 0 < uncertain <= BUDGET * exact
        slack = 1e-12 * reference
        assert exact - slack <= reference <= exact + uncertain + slack


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_a_direction_that_misses_the_budget_is_sorted(weighted):
    x, y, w = tiny_clusters(N, seed=74)
    w = w if weighted else None
    exact, uncertain, reference = one_direction(x, y, w, 0.7, BUDGET)
    assert uncertain == 0
    assert exact == pytest.approx(reference, rel=1e-12)


def test_gaussian_data_leave_a_quarter_of_the_budget():
    # bins_for_budget: Gaussian data leave about 15/B² ≤ budget/4 of the exact part uncertain
    rng = np.random.default_rng(75)
    x, y = rng.normal(size=(2, 50_000)) * 300.0
    for angle in (0.1, 1.0, 2.0):
        exact, uncertain, _ = one_direction(x, y, None, angle, BUDGET)
        assert 0 < uncertain <= BUDGET / 4 * exact
