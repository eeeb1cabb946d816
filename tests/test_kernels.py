"""The array kernels against scipy's pair distances, on ordinary and adversarial layouts.

The reference for every total is ``scipy.spatial.distance.pdist`` (exact Euclidean distances of
all pairs, scipy's own brute force), summed with ``math.fsum``; weighted totals multiply each
pair by ``w_i w_j`` with the pairs taken in ``numpy.triu_indices`` order, the order pdist uses.
The checks are the promises of the kernels' docstrings:

* exact sums (tolerance 0 or method "exact") equal the reference to rounding;
* every total lies in its guaranteed interval, ``lower ≤ reference ≤ upper``;
* ``|total − reference| ≤ rel_bound · reference`` and ``rel_bound ≤ tolerance``.

The invariances (order of the features, translation, scaling, rotation) are properties of the
Euclidean distance itself (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.distance import pdist

from toolbox import (
    ParameterError,
    directions_for_tolerance,
    exact_pair_sum,
    grouped_pair_sums,
    pair_distance_sum,
    projection_directions,
    projection_error,
    projection_factors,
)

TOLERANCES = (0.5, 0.1, 0.01, 1e-3, 1e-5)
METHODS = ("auto", "exact", "projection")
#: the exact kernels promise rounding-level agreement; the issue asks for 1e-9 against pdist
EXACT_RTOL = 1e-9


def accurate_sum(terms) -> float:
    # math.fsum is correctly rounded; numpy's pairwise summation is within about
    # log2(len)·u ≈ 3e-15 relative for these non-negative terms, far inside the kernels' exact
    # interval (len(group)+8)·u at the sizes where it is used, and much faster
    return math.fsum(terms) if terms.size <= 200_000 else float(np.sum(terms))


def pdist_total(x, y, weights=None) -> float:
    """Σ_{i<j} w_i w_j |p_i − p_j| from scipy's pdist."""
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    if x.size < 2:
        return 0.0
    d = pdist(np.column_stack([x, y]))
    if weights is None:
        return accurate_sum(d)
    weights = np.asarray(weights, dtype=np.float64)
    i, j = np.triu_indices(x.size, 1)
    return accurate_sum(weights[i] * weights[j] * d)


def pair_weight_total(n: int, weights=None) -> float:
    """Σ_{i<j} w_i w_j over the same triu_indices pairs."""
    if weights is None:
        return n * (n - 1) / 2
    i, j = np.triu_indices(n, 1)
    return math.fsum(np.asarray(weights)[i] * np.asarray(weights)[j])


def check_against_reference(total, lower, upper, rel_bound, reference, tolerance, exact):
    """The promises of the kernels for one total, given the pdist reference."""
    assert lower <= reference <= upper, (lower, reference, upper)
    assert abs(total - reference) <= rel_bound * reference, (total, reference, rel_bound)
    if exact:
        assert total == pytest.approx(reference, rel=EXACT_RTOL, abs=0)
        # the exact interval is a rounding allowance, far below every tolerance used here
        assert rel_bound < 1e-11
    else:
        assert rel_bound <= tolerance, (rel_bound, tolerance)


def check_method(r, method: str, tolerance: float):
    """The method and direction count reported for a PairSum are those that were asked for."""
    if method == "exact" or tolerance == 0:
        assert (r.method, r.directions) == ("exact", 0)
    elif method == "projection":
        assert (r.method, r.directions) == ("projection", projection_directions(tolerance))
    else:
        assert (r.method, r.directions) in (
            ("exact", 0),
            ("projection", projection_directions(tolerance)),
        )


# ----------------------------------------------------------------------------------------------
# data sets


def uniform_points(n=1500, seed=11):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 1000, n), rng.uniform(0, 1000, n), None


def clustered_points(n=2500, seed=12):
    # five clusters of very different sizes and spreads, some overlapping
    rng = np.random.default_rng(seed)
    centres = rng.uniform(-5e4, 5e4, (5, 2))
    spreads = np.array([0.5, 3.0, 40.0, 800.0, 2.0])
    labels = rng.choice(5, n, p=[0.4, 0.3, 0.15, 0.1, 0.05])
    pts = centres[labels] + rng.normal(size=(n, 2)) * spreads[labels, None]
    return pts[:, 0], pts[:, 1], None


def weighted_points(n=2000, seed=13):
    rng = np.random.default_rng(seed)
    x, y, _ = clustered_points(n, seed)
    return x, y, rng.lognormal(0.0, 1.5, n)


DATASETS = {"uniform": uniform_points, "clustered": clustered_points, "weighted": weighted_points}
_references: dict = {}


def dataset(name):
    if name not in _references:
        x, y, w = DATASETS[name]()
        _references[name] = (x, y, w, pdist_total(x, y, w))
    return _references[name]


# ----------------------------------------------------------------------------------------------
# exact sums against pdist


@pytest.mark.parametrize("name", list(DATASETS))
def test_exact_sums_match_pdist(name):
    x, y, w, reference = dataset(name)  # reference: scipy pdist
    assert exact_pair_sum(x, y, w) == pytest.approx(reference, rel=EXACT_RTOL, abs=0)
    for method in ("auto", "exact"):
        r = pair_distance_sum(x, y, w, tolerance=0, method=method)
        check_method(r, method, 0)
        check_against_reference(r.total, r.lower, r.upper, r.rel_bound, reference, 0.0, exact=True)
        assert r.pair_weight == pytest.approx(pair_weight_total(x.size, w), rel=1e-12)
        assert r.mean == pytest.approx(reference / pair_weight_total(x.size, w), rel=EXACT_RTOL)
    # method "exact" with a non-zero tolerance is exact all the same
    r = pair_distance_sum(x, y, w, tolerance=0.1, method="exact")
    check_against_reference(r.total, r.lower, r.upper, r.rel_bound, reference, 0.1, exact=True)


@pytest.mark.parametrize("tolerance", [0.1, 0.01, 1e-3, 1e-5])
@pytest.mark.parametrize("name", list(DATASETS))
def test_projection_on_ordinary_data(name, tolerance):
    x, y, w, reference = dataset(name)  # reference: scipy pdist
    for method in ("auto", "projection"):
        r = pair_distance_sum(x, y, w, tolerance=tolerance, method=method)
        check_method(r, method, tolerance)
        check_against_reference(
            r.total, r.lower, r.upper, r.rel_bound, reference, tolerance, r.method == "exact"
        )


# ----------------------------------------------------------------------------------------------
# many groups at once


GROUP_SIZES = (1, 2, 3, 50, 64, 65, 200, 3000, 1, 2, 3, 7, 50, 64, 65, 130)


def grouped_layout(weighted: bool, seed=21):
    """Groups of mixed sizes with unused codes between and after them, points shuffled."""
    rng = np.random.default_rng(seed)
    codes = np.arange(len(GROUP_SIZES)) * 2 + 1  # codes 0, 2, 4, ... stay empty
    n_groups = int(codes.max()) + 4  # and a few more empty ones at the end
    xs, ys, gs = [], [], []
    for code, size in zip(codes, GROUP_SIZES, strict=True):
        centre = rng.uniform(-1e4, 1e4, 2)
        scale = rng.choice([0.1, 10.0, 500.0])
        xs.append(centre[0] + scale * rng.normal(size=size))
        ys.append(centre[1] + scale * rng.normal(size=size))
        gs.append(np.full(size, code))
    x, y, g = np.concatenate(xs), np.concatenate(ys), np.concatenate(gs)
    order = rng.permutation(x.size)
    x, y, g = x[order], y[order], g[order]
    w = rng.uniform(0.0, 5.0, x.size) if weighted else None
    return x, y, g, n_groups, w


_group_references: dict = {}


def grouped_case(weighted: bool):
    if weighted not in _group_references:
        x, y, g, n_groups, w = grouped_layout(weighted)
        refs = []
        for code in range(n_groups):
            sel = g == code
            ws = None if w is None else w[sel]
            refs.append((int(sel.sum()), pdist_total(x[sel], y[sel], ws), pair_weight_total(sel.sum(), ws)))
        _group_references[weighted] = (x, y, g, n_groups, w, refs)
    return _group_references[weighted]


@pytest.mark.parametrize(
    "method, tolerance",
    [(m, t) for m in METHODS for t in (0.0, 0.01, 1e-3) if (m, t) != ("projection", 0.0)],
)
@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_grouped_against_per_group_pdist(weighted, method, tolerance):
    x, y, g, n_groups, w, refs = grouped_case(weighted)
    r = grouped_pair_sums(x, y, g, n_groups, w, tolerance=tolerance, method=method)
    assert r.total.shape == (n_groups,)
    m = 0 if tolerance == 0 else projection_directions(tolerance)
    for code, (size, reference, pair_weight) in enumerate(refs):
        assert r.n_points[code] == size
        assert r.weight_sum[code] == pytest.approx(size if w is None else math.fsum(w[g == code]))
        assert r.pair_weight[code] == pytest.approx(pair_weight, rel=1e-12, abs=1e-300)
        if size < 2:
            # empty groups and single points: no pairs, NaN totals
            for values in (r.total, r.lower, r.upper, r.rel_bound, r.mean):
                assert math.isnan(values[code])
            assert (r.exact[code], r.directions[code]) == (False, 0)
            continue
        exact = bool(r.exact[code])
        if method == "exact" or tolerance == 0:
            assert exact
        elif method == "projection":
            assert not exact
        assert r.directions[code] == (0 if exact else m)
        check_against_reference(
            r.total[code], r.lower[code], r.upper[code], r.rel_bound[code], reference, tolerance, exact
        )
        assert r.mean[code] == pytest.approx(r.total[code] / pair_weight, rel=1e-12)


@pytest.mark.parametrize("method, tolerance", [("exact", 0.0), ("projection", 0.01), ("auto", 1e-3)])
def test_many_small_groups(method, tolerance):
    # 1200 groups of 30 to 70 points: more groups of one size class than fit one padded block,
    # so the kernels work through several chunks
    rng = np.random.default_rng(31)
    sizes = rng.integers(30, 71, 1200)
    g = np.repeat(np.arange(sizes.size), sizes)
    x = rng.normal(size=g.size) * 50 + g * 7.0
    y = rng.normal(size=g.size) * 50
    w = rng.uniform(0.5, 2.0, g.size)
    r = grouped_pair_sums(x, y, g, weights=w, tolerance=tolerance, method=method)
    starts = np.concatenate([[0], np.cumsum(sizes)])
    for code in range(sizes.size):
        sl = slice(starts[code], starts[code + 1])
        reference = pdist_total(x[sl], y[sl], w[sl])  # scipy pdist
        check_against_reference(
            r.total[code],
            r.lower[code],
            r.upper[code],
            r.rel_bound[code],
            reference,
            tolerance,
            bool(r.exact[code]),
        )


def crowding_groups(seed=32):
    # three groups of 3,000 points, more than the bucketed kernel's probe reads (4 per bucket of
    # 256): one Gaussian (a few hundred buckets suffice), one 90 % inside 1 m amid 10 km of
    # scatter (its first points already crowd), and one whose first 1,200 points are spread
    # over 1 km and the other 1,800 within 1 cm (the probe passes, the whole group crowds)
    rng = np.random.default_rng(seed)
    n = 3000
    blob = rng.random(n) < 0.9
    parts = [
        (rng.normal(0, 300, n), rng.normal(0, 300, n)),
        (np.where(blob, rng.normal(0, 1, n), rng.uniform(-5e3, 5e3, n)), np.where(blob, rng.normal(0, 1, n), rng.uniform(-5e3, 5e3, n))),
        (np.r_[rng.uniform(0, 1e3, 1200), rng.uniform(0, 0.01, 1800)], np.r_[rng.uniform(0, 1e3, 1200), rng.uniform(0, 0.01, 1800)]),
    ]
    x = np.concatenate([p[0] for p in parts]) + 500_000.0
    y = np.concatenate([p[1] for p in parts]) + 6_120_000.0
    return x, y, np.repeat(np.arange(3), n), rng.gamma(2.0, 1.5, 3 * n)


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_crowded_groups_get_more_buckets(weighted):
    x, y, g, w = crowding_groups()
    w = w if weighted else None
    r = grouped_pair_sums(x, y, g, 3, w, tolerance=0.01, method="projection", threads=2)
    for code in range(3):
        mine = g == code
        reference = pdist_total(x[mine], y[mine], None if w is None else w[mine])  # scipy pdist
        check_against_reference(r.total[code], r.lower[code], r.upper[code], r.rel_bound[code], reference, 0.01, False)
    # each group's bucket counts are decided from its own points alone: the same on one thread
    again = grouped_pair_sums(x, y, g, 3, w, tolerance=0.01, method="projection", threads=1)
    for column in ("total", "lower", "upper"):
        np.testing.assert_array_equal(getattr(again, column), getattr(r, column))


@pytest.mark.parametrize("copies", [1, 40], ids=["few probes, one thread", "many probes, in parallel"])
def test_crowded_groups_are_probed(copies):
    # the probe raises the bucket count of the group whose first points crowd, and only that one
    # (the group that crowds later is bucketed again within each task); 40 copies of the three
    # groups give the probes more work than a run (RUN_POINTS), so they run in parallel
    bucketed = pytest.importorskip("toolbox.kernels._bucketed")
    from toolbox.kernels import GroupLayout
    from toolbox.kernels._common import directions_unit_vectors
    from toolbox.kernels.pairs import _bucket_core

    x, y, g, _ = crowding_groups()
    shift = np.repeat(np.arange(copies) * 1e5, x.size)
    x, y, g = np.tile(x, copies) + shift, np.tile(y, copies), np.tile(g, copies) + np.repeat(3 * np.arange(copies), g.size)
    n_groups = 3 * copies
    lay = GroupLayout.build(x, y, g, n_groups, None)
    radius = lay.radius_max()
    budget = 3e-4
    buckets = bucketed.bucket_counts(lay.counts, budget)
    before = buckets.copy()
    cos_t, sin_t = directions_unit_vectors(8)
    groups = np.arange(n_groups)
    core = _bucket_core(lay, radius)
    bucketed._all_tasks(
        lay.x, lay.y, np.zeros(1), False, lay.starts, lay.counts, groups, cos_t, sin_t, radius,
        core, budget, buckets, bucketed.bucket_cap(budget), bucketed._runs(lay.counts, 8),
    )
    assert before.tolist() == [256, 256, 256] * copies
    assert buckets.tolist() == [256, 1024, 256] * copies


def test_groups_without_pairs():
    # empty codes, single points, a group whose weights are all zero and one with a single
    # non-zero weight have no pair weight: NaN totals, as the GroupPairSums docstring says
    x = [0.0, 1.0, 5.0, 6.0, 7.0, 9.0, 10.0, 3.0, 4.0]
    y = [0.0, 0.0, 1.0, 2.0, 3.0, 9.0, 10.0, 3.0, 3.0]
    g = [1, 1, 2, 2, 2, 3, 3, 5, 6]
    w = [1.0, 2.0, 0.0, 0.0, 0.0, 0.0, 4.0, 1.0, 1.0]
    for method in METHODS:
        r = grouped_pair_sums(x, y, g, 9, w, tolerance=0.01, method=method)
        assert r.n_points.tolist() == [0, 2, 3, 2, 0, 1, 1, 0, 0]
        assert r.pair_weight.tolist() == [0.0, 2.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]
        assert r.total[1] == pytest.approx(2.0, rel=0.01)  # w = 1·2 over distance 1
        dead = [0, 2, 3, 4, 5, 6, 7, 8]
        assert np.isnan(r.total[dead]).all() and np.isnan(r.mean[dead]).all()
        assert not r.exact[dead].any() and not r.directions[dead].any()
    # one set of points: pair_distance_sum reports a zero total and a NaN mean
    r = pair_distance_sum([5.0, 6.0, 7.0], [1.0, 2.0, 3.0], [0.0, 0.0, 0.0])
    assert (r.total, r.pair_weight) == (0.0, 0.0) and math.isnan(r.mean)
    r = pair_distance_sum([1.0], [2.0])
    assert (r.total, r.pair_weight) == (0.0, 0.0) and math.isnan(r.mean)
    r = grouped_pair_sums([], [], np.array([], dtype=np.int64), 3)
    assert r.n_points.tolist() == [0, 0, 0] and np.isnan(r.total).all()


# ----------------------------------------------------------------------------------------------
# adversarial layouts, every tolerance and method


def line_layout(tolerance, halfway: bool, n=300, seed=41):
    """Points on one line, at the worst angles for the directions the tolerance needs.

    With m directions kπ/m, a line halfway between two of them (angle π/(2m)) and a line along
    one of them are the two extremes of the projected sum (see test_references.py).
    """
    m = projection_directions(tolerance)
    angle = math.pi / (2 * m) if halfway else (m // 3) * math.pi / m
    t = np.random.default_rng(seed).uniform(0, 2000, n)
    return 350_000.0 + t * math.cos(angle), 6_100_000.0 + t * math.sin(angle), None


def remote_point_layout(first: bool, seed=42):
    # 5000 points within 1 m, one at 100 km; first or last in the input
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, 1, 5000), rng.uniform(0, 1, 5000)
    if first:
        return np.concatenate([[100_000.0], x]), np.concatenate([[0.0], y]), None
    return np.concatenate([x, [100_000.0]]), np.concatenate([y, [0.0]]), None


def offset_layout(seed=43):
    # UTM-sized coordinates (5,000,000 m) with a 1 m spread
    rng = np.random.default_rng(seed)
    return 5e6 + rng.uniform(0, 1, 2000), 5e6 + rng.uniform(0, 1, 2000), None


def duplicates_layout(seed=44):
    # 400 points on six distinct places, half of them on one
    rng = np.random.default_rng(seed)
    places = rng.uniform(0, 100, (6, 2))
    pick = rng.choice(6, 400, p=[0.5, 0.1, 0.1, 0.1, 0.1, 0.1])
    return places[pick, 0], places[pick, 1], None


def some_zero_weights_layout(seed=45):
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, 500, 1500), rng.uniform(0, 500, 1500)
    w = rng.uniform(0, 3, 1500) * (rng.random(1500) > 0.3)
    return x, y, w


def dominant_weight_layout(remote: bool, seed=46):
    # one point weighs a million times the others; inside the crowd, or 100 km away
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, 10, 2000), rng.uniform(0, 10, 2000)
    if remote:
        x[7] = 100_000.0
    w = np.ones(2000)
    w[7] = 1e6
    return x, y, w


def zero_weights_far_away_layout(seed=47):
    # 500 weighted points within 1 cm (a site measured many times), and 500 points of zero weight
    # 100 km away that count for nothing
    rng = np.random.default_rng(seed)
    x = np.concatenate([rng.uniform(0, 0.01, 500), 100_000.0 + rng.uniform(0, 1, 500)])
    y = np.concatenate([rng.uniform(0, 0.01, 500), rng.uniform(0, 1, 500)])
    w = np.concatenate([rng.integers(1, 6, 500).astype(np.float64), np.zeros(500)])
    return x, y, w


def two_stacks_layout(seed=48):
    # 400 sites 1 km apart at most, each two points on one spot and two on another 1 cm away:
    # a bucket holding a site has half its weight at each end of its spread, the case where its
    # pairs reach the bound the bucketed kernel reports for them (width × W²/4)
    rng = np.random.default_rng(seed)
    sites = rng.uniform(0, 1000, (400, 2))
    step = rng.normal(size=(400, 2))
    step *= 0.01 / np.hypot(step[:, :1], step[:, 1:])
    spots = np.stack([sites, sites, sites + step, sites + step], axis=1).reshape(-1, 2)
    return spots[:, 0], spots[:, 1], None


LAYOUTS = {
    "two stacks per site": lambda tol: two_stacks_layout(),
    "line halfway": lambda tol: line_layout(tol, halfway=True),
    "line along a direction": lambda tol: line_layout(tol, halfway=False),
    "remote point first": lambda tol: remote_point_layout(first=True),
    "remote point last": lambda tol: remote_point_layout(first=False),
    "offset 5e6, 1 m spread": lambda tol: offset_layout(),
    "duplicates": lambda tol: duplicates_layout(),
    "some zero weights": lambda tol: some_zero_weights_layout(),
    "dominant weight": lambda tol: dominant_weight_layout(remote=False),
    "dominant remote weight": lambda tol: dominant_weight_layout(remote=True),
    "zero weights far away": lambda tol: zero_weights_far_away_layout(),
}
_layout_references: dict = {}


def layout_case(name, tolerance):
    key = (name, projection_directions(tolerance) if name.startswith("line") else None)
    if key not in _layout_references:
        x, y, w = LAYOUTS[name](tolerance)
        _layout_references[key] = (x, y, w, pdist_total(x, y, w))  # scipy pdist
    return _layout_references[key]


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("tolerance", TOLERANCES)
@pytest.mark.parametrize("name", list(LAYOUTS))
def test_adversarial_layouts(name, tolerance, method):
    x, y, w, reference = layout_case(name, tolerance)
    r = pair_distance_sum(x, y, w, tolerance=tolerance, method=method)
    check_method(r, method, tolerance)
    check_against_reference(r.total, r.lower, r.upper, r.rel_bound, reference, tolerance, r.method == "exact")
    if name.startswith("line") and r.method == "projection":
        # every pair has the same worst angle, so the error is the bound tan²(π/(4m)) itself:
        # over for a line halfway between directions when m is even, under when it is odd
        m = r.directions
        over = name == "line halfway"
        sign = 1 if over == (m % 2 == 0) else -1
        # the bucketed sums may add up to half their in-bucket uncertainty, which the kernel
        # keeps within the margin the directions leave under the tolerance
        margin = max(tolerance - projection_error(m), 1e-6 * projection_error(m))
        assert abs(r.total / reference - 1 - sign * projection_error(m)) <= margin


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("tolerance", TOLERANCES)
def test_interval_holds_at_the_worst_angles(tolerance, weighted):
    # On a line at an extreme angle the true total sits exactly on one end of the interval
    # (D = F·sin x or D = F·tan x), so only the kernels' rounding allowance keeps it inside;
    # many lines of random sizes make it likely that rounding falls on the wrong side somewhere
    m = projection_directions(tolerance)
    rng = np.random.default_rng(61)
    for angle in (math.pi / (2 * m), 0.0, (m // 2) * math.pi / m):
        c, s = math.cos(angle), math.sin(angle)
        for _ in range(20):
            n = int(rng.integers(2, 300))
            t = rng.uniform(0, 2000, n)
            w = rng.integers(1, 20, n).astype(np.float64) if weighted else None
            reference = pdist_total(t * c, t * s, w)  # scipy pdist
            r = pair_distance_sum(t * c, t * s, w, tolerance=tolerance, method="projection")
            check_against_reference(r.total, r.lower, r.upper, r.rel_bound, reference, tolerance, False)


def test_some_zero_weights_equal_dropping_those_points():
    # zero-weight points contribute nothing: the total is scipy's over the other points alone
    x, y, w = some_zero_weights_layout()
    keep = w > 0
    reference = pdist_total(x[keep], y[keep], w[keep])
    r = pair_distance_sum(x, y, w, tolerance=0)
    assert r.total == pytest.approx(reference, rel=EXACT_RTOL)
    assert r.pair_weight == pytest.approx(pair_weight_total(int(keep.sum()), w[keep]), rel=1e-12)


def test_identical_points_have_zero_total():
    # all points on one place: every distance is 0, and so are the total and its interval
    x, y = np.full(300, 512_345.25), np.full(300, 6_100_000.5)
    for method, tolerance in (("exact", 0.0), ("projection", 0.01), ("projection", 1e-5)):
        r = pair_distance_sum(x, y, tolerance=tolerance, method=method)
        assert (r.total, r.lower, r.upper) == (0.0, 0.0, 0.0)
        assert r.pair_weight == 300 * 299 / 2 and r.mean == 0.0


# ----------------------------------------------------------------------------------------------
# invariances (properties of the Euclidean distance; common practice)


def invariance_case(seed=51):
    rng = np.random.default_rng(seed)
    sizes = [2, 3, 40, 64, 65, 400, 1500]
    g = np.repeat(np.arange(len(sizes)), sizes)
    x = rng.normal(size=g.size) * 300 + g * 1000
    y = rng.normal(size=g.size) * 300
    w = rng.uniform(0.1, 4.0, g.size)
    return x, y, g, w


INVARIANCE_RUNS = [("exact", 0.0), ("projection", 0.5), ("projection", 0.01), ("auto", 1e-3)]


def grouped(x, y, g, w, method, tolerance):
    return grouped_pair_sums(x, y, g, weights=w, tolerance=tolerance, method=method)


@pytest.mark.parametrize("method, tolerance", INVARIANCE_RUNS)
def test_feature_order_does_not_matter(method, tolerance):
    x, y, g, w = invariance_case()
    base = grouped(x, y, g, w, method, tolerance)
    p = np.random.default_rng(52).permutation(x.size)
    shuffled = grouped(x[p], y[p], g[p], w[p], method, tolerance)
    for field in ("total", "lower", "upper", "pair_weight"):
        np.testing.assert_allclose(getattr(shuffled, field), getattr(base, field), rtol=1e-12)
    np.testing.assert_array_equal(shuffled.exact, base.exact)


@pytest.mark.parametrize("method, tolerance", INVARIANCE_RUNS)
def test_translation_does_not_matter(method, tolerance):
    x, y, g, w = invariance_case()
    base = grouped(x, y, g, w, method, tolerance)
    moved = grouped(x + 523_456.5, y - 6_123_456.25, g, w, method, tolerance)
    # the shifted coordinates are rounded to about 1e-9 m, hence 1e-10 rather than 1e-15
    np.testing.assert_allclose(moved.total, base.total, rtol=1e-10)


@pytest.mark.parametrize("factor", [1e-3, 3.7, 2.0**10, 1e4])
@pytest.mark.parametrize("method, tolerance", INVARIANCE_RUNS)
def test_scaling_scales_the_totals(method, tolerance, factor):
    x, y, g, w = invariance_case()
    base = grouped(x, y, g, w, method, tolerance)
    scaled = grouped(x * factor, y * factor, g, w, method, tolerance)
    for field in ("total", "lower", "upper"):
        np.testing.assert_allclose(getattr(scaled, field), factor * getattr(base, field), rtol=1e-12)
    np.testing.assert_allclose(scaled.pair_weight, base.pair_weight, rtol=0)


@pytest.mark.parametrize("tolerance", [0.5, 0.1, 0.01])
def test_rotation_by_the_direction_step(tolerance):
    # exact sums do not change under any rotation; the projection estimate does, but not under a
    # rotation by a whole number of direction steps π/m, which only relabels the directions
    x, y, g, w = invariance_case()
    m = projection_directions(tolerance)
    for angle, method in ((0.4321, "exact"), (math.pi / m, "projection"), (3 * math.pi / m, "projection")):
        c, s = math.cos(angle), math.sin(angle)
        base = grouped(x, y, g, w, method, tolerance)
        turned = grouped(c * x - s * y, s * x + c * y, g, w, method, tolerance)
        np.testing.assert_allclose(turned.total, base.total, rtol=1e-10)
    # and a rotation by half a step does change it (so the check above can fail)
    c, s = math.cos(math.pi / (2 * m)), math.sin(math.pi / (2 * m))
    line = np.linspace(0, 100, 50)
    r0 = pair_distance_sum(line, 0 * line, tolerance=tolerance, method="projection")
    r1 = pair_distance_sum(c * line, s * line, tolerance=tolerance, method="projection")
    assert abs(r1.total / r0.total - 1) > projection_error(m)


# ----------------------------------------------------------------------------------------------
# input validation


def test_bad_coordinates():
    for bad in (math.nan, math.inf, -math.inf):
        with pytest.raises(
            ParameterError, match=r"1 point\(s\) have NaN or infinite coordinates \(first at index 2\)"
        ):
            pair_distance_sum([0.0, 1.0, bad], [0.0, 1.0, 2.0])
        with pytest.raises(ParameterError, match="NaN or infinite coordinates"):
            grouped_pair_sums([0.0, 1.0, 2.0], [bad, 1.0, 2.0], [0, 0, 0])
        with pytest.raises(ParameterError, match="NaN or infinite coordinates"):
            exact_pair_sum([0.0, 1.0, 2.0], [0.0, bad, 2.0])
    with pytest.raises(ParameterError, match="same length"):
        pair_distance_sum([0.0, 1.0, 2.0], [0.0, 1.0])


@pytest.mark.parametrize("bad", [-1.0, -1e-300, math.nan, math.inf])
def test_bad_weights(bad):
    with pytest.raises(
        ParameterError, match=r"1 weight\(s\) are negative, NaN or infinite \(first at index 1\)"
    ):
        pair_distance_sum([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [1.0, bad, 1.0])
    with pytest.raises(ParameterError, match="finite and non-negative"):
        grouped_pair_sums([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [0, 1, 1], weights=[bad, 1.0, 1.0])
    with pytest.raises(ParameterError, match="finite and non-negative"):
        exact_pair_sum([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [1.0, 1.0, bad])


def test_weights_of_the_wrong_shape():
    with pytest.raises(ParameterError, match="one value per point"):
        pair_distance_sum([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [1.0, 1.0])


@pytest.mark.parametrize("bad", [-0.01, 0.51, 1.0, math.nan, math.inf])
def test_tolerance_out_of_range(bad):
    with pytest.raises(ParameterError, match=r"tolerance must be in \[0, 0\.5\]\. Got"):
        pair_distance_sum([0.0, 1.0], [0.0, 1.0], tolerance=bad)
    with pytest.raises(ParameterError, match=r"tolerance must be in \[0, 0\.5\]"):
        grouped_pair_sums([0.0, 1.0], [0.0, 1.0], [0, 0], tolerance=bad, method="exact")
    with pytest.raises(ParameterError, match=r"tolerance must be in \(0, 0\.5\]"):
        directions_for_tolerance(bad)


def test_directions_need_a_positive_tolerance():
    with pytest.raises(
        ParameterError, match=r"tolerance must be in \(0, 0\.5\].*use 0 with the exact method"
    ):
        directions_for_tolerance(0.0)
    with pytest.raises(ParameterError, match="directions must be at least 1"):
        projection_error(0)


@pytest.mark.parametrize("bad", ["fast", "EXACT", "", None])
def test_bad_method(bad):
    with pytest.raises(ParameterError, match=r"method must be one of auto, exact, projection\. Got"):
        pair_distance_sum([0.0, 1.0], [0.0, 1.0], method=bad)
    with pytest.raises(ParameterError, match="method must be one of"):
        grouped_pair_sums([0.0, 1.0], [0.0, 1.0], [0, 0], method=bad)


def test_projection_needs_a_tolerance():
    with pytest.raises(ParameterError, match="projection method needs a tolerance above 0"):
        pair_distance_sum([0.0, 1.0], [0.0, 1.0], tolerance=0, method="projection")
    with pytest.raises(ParameterError, match="use method 'exact'"):
        grouped_pair_sums([0.0, 1.0], [0.0, 1.0], [0, 0], tolerance=0.0, method="projection")


def test_bad_group_codes():
    with pytest.raises(ParameterError, match=r"group codes must lie in \[0, 2\)"):
        grouped_pair_sums([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [0, 1, 2], n_groups=2)
    with pytest.raises(ParameterError, match=r"group codes must lie in \[0, 3\)"):
        grouped_pair_sums([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [0, -1, 2])
    with pytest.raises(ParameterError, match="one integer code per point"):
        grouped_pair_sums([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [0.0, 1.0, 1.0])
    with pytest.raises(ParameterError, match="one integer code per point"):
        grouped_pair_sums([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], [0, 1])


def test_projection_factors_are_consistent():
    # lower ≤ estimate ≤ upper factor, so the estimate always lies inside its own interval
    for m in (2, 3, 8, 786):
        lower, upper, estimate = projection_factors(m)
        assert lower < estimate < upper


@pytest.mark.parametrize("tolerance", [0.5, 0.1, 0.01, 1e-3, 1e-4, 1e-5, 1e-6])
def test_group_totals_use_the_fewest_directions_with_a_margin(tolerance):
    # the group-total kernel takes the fewest directions of the Crofton bound tan²(π/4m) ≤ ε,
    # unless they leave under 1 % of ε for the in-bucket uncertainty; then those for 0.99 ε
    fewest = directions_for_tolerance(tolerance)
    m = projection_directions(tolerance)
    if tolerance - projection_error(fewest) >= 0.01 * tolerance:
        assert m == fewest
    else:
        assert m == directions_for_tolerance(0.99 * tolerance) > fewest
    assert projection_error(m) <= 0.99 * tolerance or m == fewest
