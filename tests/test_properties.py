"""Properties of the three script kernels, fuzzed with hypothesis (issue 6).

For random layouts, weights and group labels, adversarial ones included (collinear at the
worst angles between the projection directions, remote outliers, duplicates, huge offsets),
each of ``toolbox.grouped_pair_sums`` (group-spread), ``toolbox.grouped_point_sums``
(point-remoteness) and ``toolbox.cross_pair_sums`` (cross-spread) must give

* the exact result inside ``[lower, upper]``;
* an estimate within its own relative bound of the exact result, and that bound within the
  tolerance asked for: ``|est − exact| ≤ rel_bound·exact ≤ tolerance·exact``;
* the same results whatever the order of the features;
* totals scaled by c when every coordinate is scaled by c.

"Exact" is brute force outside the project: every pair's distance with ``numpy.hypot`` of the
coordinate differences, summed with ``math.fsum`` (an exactly rounded sum). Each term is then
within 8 units of roundoff of the true one (difference, hypot, two weight products), so the
checks allow ``REF`` = 8u relative for the reference itself, and nothing more.

Profiles: ``ci`` (the default, used by ``make test``) runs a few hundred examples in all,
derandomized so that a fresh clone sees the same ones; ``HYPOTHESIS_PROFILE=long`` (``make
fuzz``) runs many more, randomly. Neither keeps an example database, and hypothesis's own
folder is moved to a temporary folder, so nothing is written in the repository.
"""

from __future__ import annotations

import atexit
import math
import os
import shutil
import tempfile

import numpy as np
from hypothesis import HealthCheck, event, example, given, settings
from hypothesis import strategies as st
from hypothesis.configuration import set_hypothesis_home_dir

import toolbox
from toolbox.estimate import directions_for_tolerance

settings.register_profile(
    "ci",
    max_examples=80,
    deadline=None,
    database=None,
    derandomize=True,
    print_blob=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
settings.register_profile(
    "long",
    max_examples=3000,
    deadline=None,
    database=None,
    print_blob=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
PROFILE = settings.get_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

U = np.finfo(np.float64).eps / 2  # unit roundoff
REF = 8 * U  # relative rounding of the brute-force reference (see the module docstring)
TOLERANCES = [0.0, 1e-6, 1e-3, 0.01, 0.05, 0.2, 0.5]
OFFSETS = [0.0, 5e5, 6.1e6, 1e9]  # none; UTM easting; UTM northing; far beyond any map


# Hypothesis caches constants it finds in the project's modules as soon as pytest has collected
# the tests, before any fixture runs; so its folder is moved out of the repository right here,
# into a temporary folder removed at exit.
_HOME = tempfile.mkdtemp(prefix="pairspread-hypothesis-")
set_hypothesis_home_dir(_HOME)
atexit.register(shutil.rmtree, _HOME, ignore_errors=True)


# --------------------------------------------------------------------------------------------
# layouts


@st.composite
def cases(draw, max_points: int = 40):
    """A layout of points with group codes, weights, a tolerance and a method."""
    tolerance = draw(st.sampled_from(TOLERANCES))
    method = draw(st.sampled_from(["auto", "exact", "projection"]))
    if tolerance == 0:
        method = draw(st.sampled_from(["auto", "exact"]))
    m = directions_for_tolerance(tolerance) if tolerance > 0 else 8
    # mostly small groups (exact sums, padded layouts); now and then large ones (row blocks, buckets)
    n = draw(st.integers(0, max_points) | st.integers(65, 5 * max_points))
    kind = draw(st.sampled_from(["uniform", "collinear", "outlier", "duplicates", "two lines"]))
    scale = draw(st.sampled_from([1e-3, 1.0, 750.0, 1e5]))
    offset = (draw(st.sampled_from(OFFSETS)), draw(st.sampled_from(OFFSETS)))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    # the worst angles for m directions: along one of them (the estimate's largest ratio to the
    # truth) or halfway between two (its smallest)
    angle = draw(st.integers(0, 4 * m - 1)) * math.pi / (2 * m)
    if kind == "uniform":
        xy = rng.uniform(-scale, scale, (n, 2))
    elif kind == "collinear":
        t = rng.uniform(-scale, scale, n)
        xy = np.c_[t * math.cos(angle), t * math.sin(angle)]
    elif kind == "outlier":  # a tight cluster and one remote site
        far = draw(st.sampled_from([1e2, 1e4, 1e6]))
        xy = rng.normal(0, scale / far, (n, 2))
        if n:
            xy[rng.integers(n)] = (scale * math.cos(angle), scale * math.sin(angle))
    elif kind == "duplicates":  # a few places, many points on each
        places = rng.uniform(-scale, scale, (draw(st.integers(1, 3)), 2))
        xy = places[rng.integers(0, len(places), n)]
    else:  # two parallel lines at the worst angle, far apart
        t = rng.uniform(-scale, scale, n)
        side = rng.integers(0, 2, n) * 10 * scale
        xy = np.c_[t * math.cos(angle) - side * math.sin(angle), t * math.sin(angle) + side * math.cos(angle)]
    x, y = xy[:, 0] + offset[0], xy[:, 1] + offset[1]
    event(f"layout: {kind}, {'large' if n > max_points else 'small'}")
    n_groups = draw(st.integers(1, 4))  # the last ones may have no points at all
    labels = draw(st.sampled_from(["random", "blocks", "one"]))
    if labels == "random":
        codes = rng.integers(0, n_groups, n)
    elif labels == "blocks":
        codes = np.sort(rng.integers(0, n_groups, n))
    else:
        codes = np.zeros(n, dtype=np.int64)
    weighting = draw(st.sampled_from(["none", "counts", "with zeros", "spread", "one heavy"]))
    if weighting == "none":
        w = None
    elif weighting == "counts":
        w = rng.integers(1, 6, n).astype(float)
    elif weighting == "with zeros":
        w = rng.integers(0, 3, n).astype(float)
    elif weighting == "spread":  # over six decades
        w = np.exp(rng.uniform(-7, 7, n))
    else:
        w = np.ones(n)
        if n:
            w[rng.integers(n)] = 1e6
    return {
        "x": x,
        "y": y,
        "codes": codes.astype(np.int64),
        "n_groups": n_groups,
        "w": w,
        "tolerance": tolerance,
        "method": method,
    }


def identical_points_far_away():
    """Every point at one place far from the origin: once gave per-point sums of ±2e-26, below
    their lower bound of 0 (see test_bad_input.py::test_estimates_of_identical_points_are_never_negative)."""
    return {
        "x": np.full(25, 500_000.1),
        "y": np.full(25, 6_120_000.3),
        "codes": np.zeros(25, dtype=np.int64),
        "n_groups": 1,
        "w": None,
        "tolerance": 0.01,
        "method": "projection",
    }


# --------------------------------------------------------------------------------------------
# the brute-force reference


def _weights(case) -> np.ndarray:
    return np.ones(case["x"].size) if case["w"] is None else case["w"]


def _distances(case, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    x, y = case["x"], case["y"]
    return np.hypot(x[a][:, None] - x[b][None, :], y[a][:, None] - y[b][None, :])


def exact_pairs(case) -> tuple[np.ndarray, np.ndarray]:
    """Per group: Σ_{i<j} w_i w_j d_ij and the pair weight Σ_{i<j} w_i w_j."""
    w = _weights(case)
    totals, pair_weight = np.zeros(case["n_groups"]), np.zeros(case["n_groups"])
    for g in range(case["n_groups"]):
        members = np.flatnonzero(case["codes"] == g)
        d = _distances(case, members, members)
        ww = w[members][:, None] * w[members][None, :]
        upper = np.triu(np.ones_like(d, dtype=bool), k=1)
        totals[g] = math.fsum((ww * d)[upper])
        pair_weight[g] = math.fsum(ww[upper])
    return totals, pair_weight


def exact_points(case) -> np.ndarray:
    """Per point: Σ_j w_j d_ij over the other points of its group."""
    w = _weights(case)
    out = np.zeros(case["x"].size)
    for g in range(case["n_groups"]):
        members = np.flatnonzero(case["codes"] == g)
        d = _distances(case, members, members) * w[members][None, :]
        out[members] = [math.fsum(row) for row in d]
    return out


def exact_cross(case) -> np.ndarray:
    """G × G: Σ_{a∈A, b∈B} w_a w_b d_ab off the diagonal, each group's own pair total on it."""
    w = _weights(case)
    G = case["n_groups"]
    out = np.zeros((G, G))
    own, _ = exact_pairs(case)
    for a in range(G):
        for b in range(G):
            ia, ib = np.flatnonzero(case["codes"] == a), np.flatnonzero(case["codes"] == b)
            terms = w[ia][:, None] * w[ib][None, :] * _distances(case, ia, ib)
            out[a, b] = own[a] if a == b else math.fsum(terms.ravel())
    return out


# --------------------------------------------------------------------------------------------
# the checks


def run(kernel: str, case, x=None, y=None, order=None):
    x = case["x"] if x is None else x
    y = case["y"] if y is None else y
    codes, w = case["codes"], case["w"]
    if order is not None:
        x, y, codes, w = x[order], y[order], codes[order], None if w is None else w[order]
    function = {
        "pairs": toolbox.grouped_pair_sums,
        "points": toolbox.grouped_point_sums,
        "cross": toolbox.cross_pair_sums,
    }[kernel]
    return function(x, y, codes, case["n_groups"], w, tolerance=case["tolerance"], method=case["method"])


def check_against_exact(total, lower, upper, rel_bound, exact, tolerance) -> None:
    """The interval holds the exact value; the estimate is within rel_bound ≤ tolerance of it."""
    has = ~np.isnan(total)
    total, lower, upper, rel_bound, exact = total[has], lower[has], upper[has], rel_bound[has], exact[has]
    assert (lower <= exact * (1 + REF)).all(), ("lower bound above the exact value", lower, exact)
    assert (exact * (1 - REF) <= upper).all(), ("upper bound below the exact value", upper, exact)
    # |est − exact| ≤ rel_bound·exact; with exact = 0 this asks for an estimate of exactly 0
    # (whatever the bound: it is infinite when rounding leaves an allowance above a zero total)
    error = np.abs(total - exact)
    allowed = np.where(exact > 0, (rel_bound + REF) * exact, 0.0)
    assert (error <= allowed).all(), ("estimate outside its bound", total, exact, rel_bound)
    limit = tolerance if tolerance > 0 else 1e-9  # exact sums: rounding only
    positive = exact > 0
    assert (rel_bound[positive] <= limit).all(), ("bound above the tolerance", rel_bound, tolerance)


@PROFILE
@given(cases())
def test_group_pair_sums_hold_the_exact_totals(case):
    r = run("pairs", case)
    exact, pair_weight = exact_pairs(case)
    counts = np.bincount(case["codes"], minlength=case["n_groups"])
    # groups without a pair (fewer than 2 points, or zero pair weight) have no total
    np.testing.assert_array_equal(np.isnan(r.total), (counts < 2) | ~(pair_weight > 0))
    # (the pair weight's own rounding is the subject of test_means_hold_within_the_bound)
    np.testing.assert_allclose(r.pair_weight, pair_weight, rtol=1e-9)
    check_against_exact(r.total, r.lower, r.upper, r.rel_bound, exact, case["tolerance"])


@PROFILE
@given(cases())
@example(identical_points_far_away())
def test_point_sums_hold_the_exact_sums(case):
    r = run("points", case)
    exact = exact_points(case)
    w = _weights(case)
    other = np.bincount(case["codes"], w, case["n_groups"])[case["codes"]] - w
    # a point without another weighted point in its group has no sum
    np.testing.assert_array_equal(np.isnan(r.total), ~(other > 0))
    check_against_exact(r.total, r.lower, r.upper, r.rel_bound, exact, case["tolerance"])


@PROFILE
@given(cases(max_points=32))
def test_cross_pair_sums_hold_the_exact_totals(case):
    r = run("cross", case)
    exact = exact_cross(case)
    shape = exact.shape
    check_against_exact(
        r.total.ravel(),
        r.lower.ravel(),
        r.upper.ravel(),
        r.rel_bound.ravel(),
        exact.ravel(),
        case["tolerance"],
    )
    np.testing.assert_allclose(r.total, r.total.T, rtol=1e-12, equal_nan=True)  # symmetric
    assert r.total.shape == shape


def weights_ten_decades_apart():
    """Two points 5 apart, weighing 1e-10 and 1: W − w for the heavy one cancels all but 8 digits."""
    return {
        "x": np.array([0.0, 3.0]),
        "y": np.array([0.0, 4.0]),
        "codes": np.zeros(2, dtype=np.int64),
        "n_groups": 1,
        "w": np.array([1e-10, 1.0]),
        "tolerance": 0.0,
        "method": "exact",
    }


@PROFILE
@given(cases())
@example(weights_ten_decades_apart())
def test_means_hold_within_the_bound(case):
    # mean_dist = total / pair weight is guaranteed to the same relative bound as the total
    # (docs/scripts.md: rel_bound is the relative error "of total_dist (and so of mean_dist)")
    exact, pair_weight = exact_pairs(case)
    with np.errstate(invalid="ignore", divide="ignore"):
        exact_mean = np.where(pair_weight > 0, exact / pair_weight, np.nan)
    r = run("pairs", case)
    np.testing.assert_array_equal(np.isnan(r.mean), np.isnan(exact_mean))
    has = ~np.isnan(exact_mean)
    error = np.abs(r.mean[has] - exact_mean[has])
    assert (error <= (r.rel_bound[has] + 2 * REF) * exact_mean[has]).all(), (r.mean, exact_mean, r.rel_bound)
    w = _weights(case)
    other = np.array(
        [math.fsum(w[(case["codes"] == case["codes"][i]) & (np.arange(w.size) != i)]) for i in range(w.size)]
    )
    p = run("points", case)
    np.testing.assert_allclose(p.other_weight, other, rtol=4 * w.size * U)
    with np.errstate(invalid="ignore", divide="ignore"):
        exact_point_mean = np.where(other > 0, exact_points(case) / other, np.nan)
    np.testing.assert_array_equal(np.isnan(p.mean), np.isnan(exact_point_mean))


def _compare(a, b, atol) -> None:
    np.testing.assert_allclose(a, b, rtol=1e-9, atol=atol, equal_nan=True)


def _scale_of(case) -> float:
    """W² · (extent of the layout): the size of a total, for absolute allowances.

    The extent includes n·u·|coordinate|, how far rounding may put a group's centre from its
    points, which sets the rounding allowances of groups of identical points.
    """
    x, y, w = case["x"], case["y"], _weights(case)
    if x.size == 0:
        return 0.0
    far = max(np.abs(x).max(), np.abs(y).max())
    extent = max(np.ptp(x), np.ptp(y)) + 4 * x.size * U * far
    return max(float(w.sum()), 1.0) ** 2 * extent


def _rounding_of_scaled(case, c) -> float:
    """How much rounding c·x and c·y may move a total: every distance by up to 2√2·u·c·|x|."""
    x, y, w = case["x"], case["y"], _weights(case)
    if x.size == 0:
        return 0.0
    return 3 * U * c * max(np.abs(x).max(), np.abs(y).max()) * max(float(w.sum()), 1.0) ** 2


@PROFILE
@given(cases(max_points=32), st.randoms(use_true_random=False))
def test_results_do_not_depend_on_feature_order(case, random):
    order = np.array(random.sample(range(case["x"].size), case["x"].size), dtype=np.int64)
    atol = 1e-11 * _scale_of(case)  # rounding of sums taken in another order
    for kernel in ("pairs", "points", "cross"):
        a, b = run(kernel, case), run(kernel, case, order=order)
        if kernel == "points":  # per point: compare each point with itself
            for name in ("total", "lower", "upper", "other_weight"):
                _compare(getattr(b, name), getattr(a, name)[order], atol)
        else:
            for name in ("total", "lower", "upper", "pair_weight"):
                _compare(getattr(b, name), getattr(a, name), atol)


@PROFILE
@given(cases(max_points=32), st.sampled_from([0.25, 2.0, 1024.0, 3.7, 1e-3, 4e4]))
def test_scaling_coordinates_scales_the_totals(case, c):
    power_of_two = math.log2(c).is_integer()
    for kernel in ("pairs", "points", "cross"):
        a = run(kernel, case)
        b = run(kernel, case, x=case["x"] * c, y=case["y"] * c)
        has = ~np.isnan(a.total)
        np.testing.assert_array_equal(np.isnan(b.total), ~has)
        exact_sums = np.asarray(a.exact, dtype=bool)
        # scaling by a power of two is exact in floating point; by another factor it rounds the
        # scaled coordinates too, which moves the exact totals themselves a little
        atol = 1e-11 * _scale_of(case) * c + (0 if power_of_two else _rounding_of_scaled(case, c))
        if power_of_two or case["tolerance"] == 0 or case["method"] == "exact":
            for name in ("total", "lower", "upper"):
                _compare(getattr(b, name), c * getattr(a, name), atol)
        else:
            # the estimate may round differently (e.g. another point on a bucket's edge), but both
            # are within their bounds of the exact totals, which scale exactly
            ta, tb = a.total[has], b.total[has]
            size = np.maximum(np.abs(c * ta), np.abs(tb))
            with np.errstate(invalid="ignore"):  # an infinite bound of a zero total
                both = np.where(size > 0, (a.rel_bound[has] + b.rel_bound[has] + 2 * REF) * size, 0.0)
            assert (np.abs(tb - c * ta) <= both + atol).all(), (tb, c * ta)
            _compare(b.total[has & exact_sums], c * a.total[has & exact_sums], atol)
