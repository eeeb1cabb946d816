"""``cross-spread`` and its kernel ``cross_pair_sums``, checked from outside the project.

For groups A ≠ B the cross total is ``Σ_{a∈A, b∈B} w_a w_b d_ab`` and the mean divides it by
``W_A·W_B``; a group with itself gives its own pair total and mean pair distance (issue 3).
Every reference value comes from ``scipy.spatial.distance.cdist`` / ``pdist`` (brute force, the
definition), from numerical integration with ``scipy.integrate.dblquad``, from MathWorld's
published square value, or from coordinates transformed with ``pyproj`` by the test itself.
"""

from __future__ import annotations

import functools
import hashlib
import io
import math
import shutil
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from geopandas.testing import assert_geodataframe_equal
from scipy import integrate
from scipy.spatial.distance import cdist, pdist

import toolbox

#: the long table's columns, exactly, in this order (issue 3)
LONG_COLUMNS = ["from_group", "to_group", "n_from", "n_to", "total_dist", "total_lo", "total_hi", "mean_dist",
                "rel_bound", "method", "directions", "units", "note"]  # note: issue 10
X0, Y0 = 500_000.0, 6_120_000.0
SIZES = (1, 2, 3, 64, 65, 500, 3000)
TOLERANCES = (0.0, 0.01, 1e-4)
#: exact sums carry only floating-point rounding, of order n·u for n non-negative terms (Higham,
#: "Accuracy and Stability of Numerical Algorithms", §4.2, from memory); 1e-10 is far above that
EXACT_CAP = 1e-10
REF_SLACK = 1e-12  # float rounding of the brute-force reference itself


def directions_for(tolerance: float) -> int:
    # m = ceil(π / (4 arctan √ε)), the Cauchy-Crofton bound of /work/shared/DESIGN.md
    return math.ceil(math.pi / (4 * math.atan(math.sqrt(tolerance))))


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# --------------------------------------------------------------------------------------------
# kernel layouts and the brute-force reference


def make_layout(kind: str, seed: int = 47):
    """Groups of the sizes in SIZES (or, for ``many``, 150 groups of 1-80 points), shuffled.

    ``random``: uniform squares of very different extents. ``clustered``: tight clusters (1 m to
    2 km), a remote outlier per group and coincident points. ``weighted``: clustered, weights with
    zeros and one two-point group without weight. ``many``: enough groups that the cross kernel
    sums pairs inside blocks of several points (the block size grows with the group count),
    with duplicated points across groups and zero weights.
    """
    rng = np.random.default_rng(seed)
    sizes = SIZES if kind != "many" else tuple(int(s) for s in rng.integers(1, 81, 150))
    xs, ys, gs = [], [], []
    for code, size in enumerate(sizes):
        if kind == "random":
            pts = rng.uniform(0, rng.choice([10.0, 500.0, 20_000.0]), (size, 2)) + rng.uniform(-4e4, 4e4, 2)
        else:
            scale = rng.choice([1.0, 50.0, 2000.0])
            centres = rng.uniform(-4e4, 4e4, 2) + rng.normal(0, 5 * scale, (int(rng.integers(1, 4)), 2))
            pts = centres[rng.integers(0, len(centres), size)] + rng.normal(0, scale, (size, 2))
            if size == 2:
                pts[1] = pts[0]
            if size > 3:
                pts[0] += 3e4
        xs.append(X0 + pts[:, 0])
        ys.append(Y0 + pts[:, 1])
        gs.append(np.full(size, code))
    x, y, g = np.concatenate(xs), np.concatenate(ys), np.concatenate(gs)
    weights = None
    if kind == "many":
        x[:40], y[:40] = x[40:80], y[40:80]  # the same locations in different groups
        weights = rng.choice([0.0, 1.0, 3.0], x.size)
    if kind == "weighted":
        weights = rng.choice([0.0, 1.0, 2.5, 7.0, 40.0], x.size)
        weights[g == SIZES.index(2)] = 0.0
    order = rng.permutation(x.size)
    return x[order], y[order], g[order], len(sizes), None if weights is None else weights[order]


@functools.cache
def cross_reference(kind: str):
    """Brute force: ``C[A, B] = Σ_{a∈A, b∈B} w_a w_b d_ab`` by ``cdist`` in row blocks.

    The diagonal holds each group's own pair total ``Σ_{a<a'}``, i.e. half of ``C[A, A]``
    (``d_aa = 0``); ``pair_weight`` is ``W_A·W_B`` off the diagonal, ``Σ_{a<a'} w_a w_a'`` on it.
    """
    x, y, g, n_groups, weights = make_layout(kind)
    w = np.ones(x.size) if weights is None else weights
    pts = np.c_[x, y]
    onehot = np.zeros((x.size, n_groups))
    onehot[np.arange(x.size), g] = w
    total = np.zeros((n_groups, n_groups))
    for a in range(0, x.size, 500):
        total += onehot[a : a + 500].T @ (cdist(pts[a : a + 500], pts) @ onehot)
    weight_sum = onehot.sum(axis=0)
    pair_weight = np.outer(weight_sum, weight_sum)
    diag = np.arange(n_groups)
    total[diag, diag] /= 2
    pair_weight[diag, diag] = (weight_sum**2 - np.bincount(g, w * w, n_groups)) / 2
    return (x, y, g, n_groups, weights), total, pair_weight


KERNEL_CASES = [
    (kind, method, tolerance)
    for kind in ("random", "clustered", "weighted")
    for method in ("auto", "exact", "projection")
    for tolerance in TOLERANCES
    if not (method == "projection" and tolerance == 0)
] + [("many", "projection", 0.01), ("many", "projection", 1e-4), ("many", "auto", 0.0)]


def check_cross(got, ref, pair_weight, tolerance):
    live = pair_weight > 0
    assert live.any() and not live.all()
    for matrix in (got.total, got.lower, got.upper, got.rel_bound, got.mean):
        assert np.isnan(matrix[~live]).all()
        assert np.isfinite(matrix[live]).all()
    np.testing.assert_allclose(got.pair_weight, pair_weight, rtol=1e-12, atol=0)
    r, est, rb = ref[live], got.total[live], got.rel_bound[live]
    # cdist reference inside [lower, upper]; |est − exact| ≤ rel_bound·exact ≤ tolerance·exact
    assert (got.lower[live] <= r * (1 + REF_SLACK)).all() and (r <= got.upper[live] * (1 + REF_SLACK)).all()
    assert (np.abs(est - r) <= (rb + REF_SLACK) * r).all()
    cap = np.where(got.exact[live], EXACT_CAP, tolerance)
    assert (rb <= cap).all()
    truth_mean = r / pair_weight[live]
    assert (np.abs(got.mean[live] - truth_mean) <= (cap + REF_SLACK) * truth_mean).all()
    dirs = got.directions[live]
    assert (dirs == np.where(got.exact[live], 0, directions_for(tolerance) if tolerance else 0)).all()
    # cross(A, B) == cross(B, A): the matrix is symmetric
    np.testing.assert_allclose(got.total, got.total.T, rtol=1e-12, atol=0)
    np.testing.assert_allclose(got.lower, got.lower.T, rtol=1e-12, atol=0)


@pytest.mark.parametrize(("kind", "method", "tolerance"), KERNEL_CASES)
def test_cross_sums_against_cdist(kind, method, tolerance):
    (x, y, g, n_groups, weights), ref, pair_weight = cross_reference(kind)
    got = toolbox.cross_pair_sums(x, y, g, n_groups, weights, tolerance=tolerance, method=method)
    check_cross(got, ref, pair_weight, tolerance)
    off = ~np.eye(n_groups, dtype=bool) & (pair_weight > 0)
    if tolerance == 0 or method == "exact":
        assert got.exact[pair_weight > 0].all()
    elif method == "projection":
        assert not got.exact[off].any()
    # the points per group
    np.testing.assert_array_equal(got.n_points, np.bincount(g, minlength=n_groups))


@functools.cache
def summed_projections(kind: str, m: int):
    """Σ over m directions u of Σ_{a∈A, b∈B} w_a w_b |<p_a − p_b, u>|, by brute force."""
    (x, y, g, n_groups, weights), _, _ = cross_reference(kind)
    w = np.ones(x.size) if weights is None else weights
    x, y = x - x.mean(), y - y.mean()
    onehot = np.zeros((x.size, n_groups))
    onehot[np.arange(x.size), g] = w
    out = np.zeros((n_groups, n_groups))
    for k in range(m):
        p = x * math.cos(k * math.pi / m) + y * math.sin(k * math.pi / m)
        for a in range(0, x.size, 1000):
            out += onehot[a : a + 1000].T @ np.abs(p[a : a + 1000, None] - p[None, :]) @ onehot
    return (x, y, g, n_groups, w), out


@pytest.mark.parametrize("kind", ["clustered", "many"])
@pytest.mark.parametrize("route", ["compiled sweep", "numpy blocks"])
def test_summed_projections_match_their_definition(kind, route, monkeypatch):
    # Along direction u the projected cross sum is Σ_{a∈A, b∈B} w_a w_b |<p_a − p_b, u>| by
    # definition (the Cauchy–Crofton sum of DESIGN.md). Both kernel routes (the compiled sweep
    # over open groups, and numpy's block sums used without numba) must give it to rounding,
    # on 1 and 2 threads.
    from toolbox.kernels import cross
    from toolbox.kernels._common import Ticker

    if route == "numpy blocks":
        monkeypatch.setattr(cross, "compiled_module", lambda name: None)
    m = 5
    (x, y, g, n_groups, w), expected = summed_projections(kind, m)
    scale = np.abs(expected).max()
    for threads in (1, 2):
        got = cross.projected_cross_raw(x, y, g, n_groups, w, m, Ticker(None, 0), threads)
        assert got.directions == m
        np.testing.assert_allclose(got.value, expected, rtol=1e-9, atol=1e-12 * scale)


def test_groups_without_points_get_empty_rows():
    # n_groups beyond the codes present: those groups have no points and no distances
    (x, y, g, n_groups, weights), ref, pair_weight = cross_reference("random")
    got = toolbox.cross_pair_sums(x, y, g, n_groups + 2, weights, tolerance=0.01)
    assert got.total.shape == (n_groups + 2, n_groups + 2)
    assert (got.n_points[n_groups:] == 0).all()
    assert np.isnan(got.total[n_groups:]).all() and np.isnan(got.total[:, n_groups:]).all()
    inner = np.s_[:n_groups, :n_groups]
    live = pair_weight > 0
    assert (np.abs(got.total[inner][live] - ref[live]) <= (got.rel_bound[inner][live] + REF_SLACK) * ref[live]).all()


def test_close_groups_far_from_the_centre_keep_the_tolerance():
    rng = np.random.default_rng(3)
    n = 1000
    near_a = rng.normal(0, 0.01, (n, 2))  # two 1 cm clusters 10 cm apart ...
    near_b = rng.normal(0, 0.01, (n, 2)) + [0.1, 0.0]
    far = rng.normal(0, 10, (n, 2)) + [2e5, 0.0]  # ... and a third group 200 km away
    pts = np.vstack([near_a, near_b, far]) + [X0, Y0]
    g = np.repeat([0, 1, 2], n)
    got = toolbox.cross_pair_sums(pts[:, 0], pts[:, 1], g, tolerance=1e-4, method="projection")
    truth = cdist(pts[:n], pts[n : 2 * n]).sum()  # brute force
    assert got.lower[0, 1] <= truth <= got.upper[0, 1]
    assert got.rel_bound[0, 1] <= 1e-4


# --------------------------------------------------------------------------------------------
# published and independent values: uniform squares


def _grid(k: int) -> np.ndarray:
    u = (np.arange(k) + 0.5) / k  # cell midpoints of a k × k grid of the unit square
    gx, gy = np.meshgrid(u, u)
    return np.c_[gx.ravel(), gy.ravel()]


def continuous_square_to_square(offset: float) -> float:
    """E|X − Y| for X uniform in [0,1]², Y uniform in [offset, offset+1]×[0,1], by dblquad.

    The difference of two independent U(0,1) values has the triangular density 1 − |t| on
    [−1, 1] (common practice), so E|X − Y| = ∫∫ √((offset+s)² + t²)(1 − |s|)(1 − |t|) ds dt.
    Each quadrant is integrated separately so the kinks of the density sit on the borders.
    """
    total = 0.0
    for s0, s1 in ((-1, 0), (0, 1)):
        for t0, t1 in ((-1, 0), (0, 1)):
            value, _ = integrate.dblquad(
                lambda t, s: math.hypot(offset + s, t) * (1 - abs(s)) * (1 - abs(t)), s0, s1, t0, t1,
                epsabs=1e-13, epsrel=1e-12,
            )
            total += value
    return total


@pytest.fixture(scope="module")
def squares():
    """Three unit squares scaled to 1 km in EPSG:32705: B shares an edge with A, C is 3 km away.

    A k = 40 grid of cell midpoints in each (1600 features per square).
    """
    side, k = 1000.0, 40
    unit = _grid(k)
    parts = {"A": unit, "B": unit + [1.0, 0.0], "C": unit + [3.0, 0.0]}
    pts = np.vstack(list(parts.values()))
    frame = gpd.GeoDataFrame(
        {"square": np.repeat(list(parts), k * k)},
        geometry=shapely.points(X0 + side * pts[:, 0], Y0 + side * pts[:, 1]),
        crs="EPSG:32705",
    )
    # the grid references, on exactly the same points: cdist (cross) and pdist (within A)
    grid = {
        ("A", "B"): float(cdist(parts["A"], parts["B"]).mean()),
        ("A", "C"): float(cdist(parts["A"], parts["C"]).mean()),
        ("A", "A"): float(pdist(parts["A"]).mean()),
    }
    return frame, side, grid


def test_grid_references_approach_the_continuous_values(squares):
    _, _, grid = squares
    for (_, to), offset in ((("A", "B"), 1.0), (("A", "C"), 3.0)):
        continuous = continuous_square_to_square(offset)
        coarse = float(cdist(_grid(20), _grid(20) + [offset, 0.0]).mean())
        fine = grid[("A", to)]
        # the midpoint rule converges at second order: halving the cell at least halves the error
        assert abs(fine - continuous) < abs(coarse - continuous) / 2
        assert fine == pytest.approx(continuous, rel=1e-4)  # measured: 5.3e-5 (A-B), 5.8e-6 (A-C)
    # two squares side by side, computed by dblquad (no closed form is cited here): 1.0881382...
    assert continuous_square_to_square(1.0) == pytest.approx(1.08813825, rel=1e-8)
    # within one unit square: (2 + √2 + 5 ln(1 + √2)) / 15 = 0.5214054332 (MathWorld, "Square
    # Line Picking"; OEIS A091505); the k = 40 grid's mean pair distance is 3e-4 above it
    published = (2 + math.sqrt(2) + 5 * math.log(1 + math.sqrt(2))) / 15
    assert published == pytest.approx(0.5214054332, rel=1e-9)
    assert grid[("A", "A")] == pytest.approx(published, rel=1e-3)


@pytest.mark.parametrize("tolerance", TOLERANCES)
def test_cross_mean_of_squares_matches_the_grid(squares, tolerance):
    frame, side, grid = squares
    table = toolbox.cross_spread(frame, group_by="square", tolerance=tolerance)
    rows = table.set_index(["from_group", "to_group"])
    cap = max(tolerance, REF_SLACK)
    for (a, b), reference in grid.items():
        for pair in ((a, b), (b, a)):
            row = rows.loc[pair]
            truth = side * reference
            assert abs(row["mean_dist"] - truth) <= cap * truth, pair
            assert row["units"] == "metre"
            assert row["n_from"] == row["n_to"] == 1600
    # cross(A, B) == cross(B, A) in the table
    for a, b in (("A", "B"), ("A", "C"), ("B", "C")):
        assert rows.loc[(a, b), "total_dist"] == pytest.approx(rows.loc[(b, a), "total_dist"], rel=1e-12)


# --------------------------------------------------------------------------------------------
# the fixture layers (conftest): reference by cdist


def _keys(frame: pd.DataFrame, group_by) -> list:
    if not group_by:
        return ["all"] * len(frame)
    return [None if pd.isna(v) else v for v in frame[group_by].astype(object)]


def table_reference(first, group_by, weight=None, second=None, to_group_by=None, to_weight=None, second_xy=None):
    """``{(from, to): (n_from, n_to, total, mean)}`` by cdist, one layer or two.

    ``second_xy``: the second layer's coordinates in the first layer's CRS (transformed by the
    test with pyproj), when the two CRSs differ.
    """
    xa = shapely.get_coordinates(np.asarray(first.geometry.values))
    wa = np.ones(len(first)) if weight is None else first[weight].to_numpy(float)
    ka = _keys(first, group_by)
    if second is None:
        xb, wb, kb = xa, wa, ka
    else:
        xb = shapely.get_coordinates(np.asarray(second.geometry.values)) if second_xy is None else second_xy
        wb = np.ones(len(second)) if to_weight is None else second[to_weight].to_numpy(float)
        kb = _keys(second, to_group_by)
    ka, kb = pd.Series(ka, dtype=object), pd.Series(kb, dtype=object)
    out = {}
    for a in dict.fromkeys(ka):
        ma = (ka.map(lambda v, a=a: v == a)).to_numpy()
        for b in dict.fromkeys(kb):
            mb = (kb.map(lambda v, b=b: v == b)).to_numpy()
            d = cdist(xa[ma], xb[mb])
            if second is None and a == b:
                total = float(wa[ma] @ d @ wa[ma]) / 2
                pair_weight = (wa[ma].sum() ** 2 - (wa[ma] ** 2).sum()) / 2
            else:
                total = float(wa[ma] @ d @ wb[mb])
                pair_weight = wa[ma].sum() * wb[mb].sum()
            mean = total / pair_weight if pair_weight > 0 else np.nan
            out[(a, b)] = (int(ma.sum()), int(mb.sum()), total if pair_weight > 0 else np.nan, mean)
    return out


def _clean(v):
    return None if (v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v))) else v


def check_table(table: pd.DataFrame, reference: dict, tolerance: float, units: str = "metre"):
    assert list(table.columns) == LONG_COLUMNS
    got = {}
    for _, row in table.iterrows():
        key = (_clean(row["from_group"]), _clean(row["to_group"]))
        assert key not in got, key
        got[key] = row
    assert set(got) == set(reference)
    cap = max(tolerance, REF_SLACK)
    for key, (n_from, n_to, total, mean) in reference.items():
        row = got[key]
        assert (row["n_from"], row["n_to"]) == (n_from, n_to), key
        assert row["units"] == units, key
        if np.isnan(total):
            for column in ("total_dist", "total_lo", "total_hi", "mean_dist", "rel_bound", "method"):
                assert _clean(row[column]) is None, (key, column)
            continue
        assert row["total_lo"] <= total * (1 + REF_SLACK) and total <= row["total_hi"] * (1 + REF_SLACK), key
        assert abs(row["total_dist"] - total) <= (row["rel_bound"] + REF_SLACK) * total, key
        assert row["rel_bound"] <= (cap if row["method"] == "projection" else EXACT_CAP), key
        assert abs(row["mean_dist"] - mean) <= cap * mean, key
        assert row["method"] in ("exact", "projection"), key
        assert row["directions"] == (directions_for(tolerance) if row["method"] == "projection" else 0), key
        if tolerance == 0:
            assert row["method"] == "exact", key


def read_table(path_or_text, suffix: str, layer: str | None = None) -> pd.DataFrame:
    if suffix == "-":
        return pd.read_csv(io.StringIO(path_or_text))
    if suffix == ".csv":
        return pd.read_csv(path_or_text)
    if suffix == ".parquet":
        return pd.read_parquet(path_or_text)
    return pyogrio.read_dataframe(path_or_text, layer=layer)


@pytest.fixture(scope="module")
def homes_refs(homes):
    return {
        ("zone", "pop"): table_reference(homes, "zone", "pop"),
        ("zone", None): table_reference(homes, "zone"),
    }


# --------------------------------------------------------------------------------------------
# the command line (a subprocess once, in-process otherwise): every table output kind


TABLE_CASES = [
    # (output suffix, entry point, weighted, tolerance)
    ("-", "script", True, 0.0),
    (".csv", "module", False, 0.01),  # `python -m toolbox` once
    (".parquet", "main", True, 1e-4),  # in-process (see conftest): no start-up to prove again
]


@pytest.mark.parametrize(("suffix", "entry", "weighted", "tolerance"), TABLE_CASES,
                         ids=["stdout", "csv", "parquet"])
def test_cli_long_table(cli, tmp_path, homes_gpkg, homes_refs, suffix, entry, weighted, tolerance):
    digest = sha256(homes_gpkg.path)
    target = "-" if suffix == "-" else tmp_path / f"cross{suffix}"
    weight = ["--weight", "pop"] if weighted else []
    proc = cli("cross-spread", *homes_gpkg.args, "--group-by", "zone", *weight, "--tolerance", tolerance,
               "--output", target, entry=entry)
    assert proc.returncode == 0, proc.stderr
    assert sha256(homes_gpkg.path) == digest
    table = read_table(proc.stdout if suffix == "-" else target, suffix)
    assert len(table) == 5 * 5  # four zones and the NULL zone, every ordered pair
    check_table(table, homes_refs[("zone", "pop" if weighted else None)], tolerance)


def test_cli_gpkg_table_into_existing_geopackage(cli, tmp_path, homes_gpkg, homes_refs):
    target = tmp_path / "project.gpkg"
    shutil.copyfile(homes_gpkg.path, target)
    before = {name: pyogrio.read_dataframe(target, layer=name) for name in ("homes", "sites", "zones")}
    proc = cli("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--output", target, entry="main")
    assert proc.returncode == 0, proc.stderr
    listed = {str(name): kind for name, kind in pyogrio.list_layers(target)}
    # the manifest's default table name, written as a non-spatial table beside the other layers
    assert listed == {"homes": "Point", "sites": "Point", "zones": "Polygon", "cross_spread": None}
    for name, frame in before.items():
        assert_geodataframe_equal(pyogrio.read_dataframe(target, layer=name), frame)
    check_table(read_table(target, ".gpkg", "cross_spread"), homes_refs[("zone", None)], 0.01)


def _wide_matches_long(wide: pd.DataFrame, long: pd.DataFrame):
    froms = list(dict.fromkeys(_clean(v) for v in long["from_group"]))
    tos = list(dict.fromkeys(_clean(v) for v in long["to_group"]))
    assert list(wide.columns) == ["from_group", *["(null)" if t is None else str(t) for t in tos]]
    # one row per from-group, in the long table's order
    assert [_clean(v) for v in wide["from_group"]] == froms
    for _, row in long.iterrows():
        a, b = _clean(row["from_group"]), _clean(row["to_group"])
        rows = wide["from_group"].isna() if a is None else wide["from_group"] == a
        value = wide.loc[rows, "(null)" if b is None else str(b)].item()
        if np.isnan(row["mean_dist"]):
            assert np.isnan(value)
        else:
            assert value == pytest.approx(row["mean_dist"], rel=1e-12)


def test_cli_wide_matrix(cli, run_main, homes_gpkg, homes):
    args = ["cross-spread", *homes_gpkg.args, "--group-by", "zone", "--weight", "pop", "--where",
            "zone IS NOT NULL"]
    proc = cli(*args, "--wide", "--output", "-", entry="main")
    assert proc.returncode == 0, proc.stderr
    wide = pd.read_csv(io.StringIO(proc.stdout))
    code, out, err = run_main(*args, "--output", "-")
    assert code == 0, err
    long = pd.read_csv(io.StringIO(out))
    zones = sorted(homes["zone"].dropna().unique())
    assert len(wide) == len(zones) and len(long) == len(zones) ** 2
    _wide_matches_long(wide, long)
    # the 'lone' zone has no pairs with itself: an empty cell on the diagonal
    assert np.isnan(wide.loc[wide["from_group"] == "lone", "lone"].item())


@pytest.mark.parametrize("suffix", [".gpkg", ".parquet", ".csv"])
def test_wide_matrix_table_kinds(run_main, tmp_path, homes_gpkg, suffix):
    args = ["cross-spread", *homes_gpkg.args, "--group-by", "tenure", "--where", "zone = 'harbour'"]
    code, out, err = run_main(*args, "--output", "-")
    assert code == 0, err
    long = pd.read_csv(io.StringIO(out))
    target = tmp_path / f"wide{suffix}"
    code, _, err = run_main(*args, "--wide", "--output", target)
    assert code == 0, err
    _wide_matches_long(read_table(target, suffix, "cross_spread"), long)


def test_wide_gpkg_keeps_the_null_group_column(run_main, tmp_path, homes_gpkg):
    target = tmp_path / "wide.gpkg"
    code, _, err = run_main("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--wide", "--output", target)
    assert code == 0, err
    wide = pyogrio.read_dataframe(target, layer="cross_spread")
    assert len(wide) == 5 and wide.shape[1] == 1 + 5


# --------------------------------------------------------------------------------------------
# two layers, with a CRS mismatch


@pytest.fixture
def sites_other_crs(tmp_path, homes_gpkg):
    """The five sites of the fixture GeoPackage reprojected to EPSG:32704 (UTM zone 4S)."""
    sites = pyogrio.read_dataframe(homes_gpkg.path, layer="sites")
    assert sites.crs.to_epsg() == 32705
    moved = sites.to_crs("EPSG:32704")
    moved["kind"] = ["hall", "clinic", "clinic", "hall", "clinic"]
    path = tmp_path / "sites_4s.gpkg"
    pyogrio.write_dataframe(moved, path, layer="sites")
    pyogrio.write_dataframe(moved.iloc[:2], path, layer="other")  # so --to-layer is needed
    return path, moved


def _in_first_crs(frame: gpd.GeoDataFrame) -> np.ndarray:
    # the reference transform, done here with pyproj: EPSG:32704 -> EPSG:32705
    xy = shapely.get_coordinates(np.asarray(frame.geometry.values))
    transformer = pyproj.Transformer.from_crs("EPSG:32704", "EPSG:32705", always_xy=True)
    x, y = transformer.transform(xy[:, 0], xy[:, 1])
    return np.c_[x, y]


def test_cli_two_layers_with_crs_mismatch(cli, homes_gpkg, homes, sites_other_crs):
    path, moved = sites_other_crs
    proc = cli("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--weight", "pop", "--to", path,
               "--to-layer", "sites", "--to-group-by", "kind", "--to-weight", "capacity", "--tolerance", "0",
               "--output", "-", entry="main")
    assert proc.returncode == 0, proc.stderr
    warnings = [line for line in proc.stderr.splitlines() if line.startswith("pairspread: warning:")]
    assert len(warnings) == 1 and "reprojected" in warnings[0]
    assert "UTM zone 4S" in warnings[0] and "UTM zone 5S" in warnings[0]  # pyproj CRS names
    table = pd.read_csv(io.StringIO(proc.stdout))
    reference = table_reference(homes, "zone", "pop", moved, "kind", "capacity", second_xy=_in_first_crs(moved))
    check_table(table, reference, 0.0)
    assert len(table) == 5 * 2
    # the points really moved: without reprojection the distances would be ~600 km larger
    assert table["mean_dist"].max() < 20_000


def test_two_layers_without_to_group_by(run_main, homes_gpkg, homes, sites_other_crs):
    path, moved = sites_other_crs
    code, out, err = run_main("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--to", path,
                              "--to-layer", "sites", "--output", "-")
    assert code == 0, err
    assert "reprojected" in err
    table = pd.read_csv(io.StringIO(out))
    assert set(table["to_group"]) == {"all"} and (table["n_to"] == 5).all()
    reference = table_reference(homes, "zone", None, moved, None, None, second_xy=_in_first_crs(moved))
    check_table(table, reference, 0.01)


def test_two_layer_mode_is_symmetric(homes, homes_gpkg, tmp_path):
    sites = pyogrio.read_dataframe(homes_gpkg.path, layer="sites")
    for tolerance in (0.0, 0.01):
        forward = toolbox.cross_spread(homes, group_by="zone", weight="pop", to=sites, to_group_by="site_name",
                                       to_weight="capacity", tolerance=tolerance)
        backward = toolbox.cross_spread(sites, group_by="site_name", weight="capacity", to=homes, to_group_by="zone",
                                        to_weight="pop", tolerance=tolerance)
        f = {(_clean(r.from_group), _clean(r.to_group)): r for r in forward.itertuples()}
        b = {(_clean(r.to_group), _clean(r.from_group)): r for r in backward.itertuples()}
        assert set(f) == set(b) and len(f) == 5 * 5
        for key, row in f.items():
            other = b[key]
            assert (row.n_from, row.n_to) == (other.n_to, other.n_from)
            assert row.mean_dist == pytest.approx(other.mean_dist, rel=1e-9), key
            assert row.total_dist == pytest.approx(other.total_dist, rel=1e-9), key
        # and against cdist on the same in-memory layers
        check_table(forward, table_reference(homes, "zone", "pop", sites, "site_name", "capacity"), tolerance)
    # the matrix of a two-layer run: 5 zones (rows) × 5 sites (columns), not transposed
    wide = toolbox.cross_spread(homes, group_by="zone", weight="pop", to=sites, to_group_by="site_name",
                                to_weight="capacity", tolerance=0.01, wide=True)
    _wide_matches_long(wide, forward)


# --------------------------------------------------------------------------------------------
# errors and empty results (in-process command line)



def _one_line_error(code: int, err: str) -> str:
    assert code != 0
    assert err.startswith("pairspread: error: ") and err.count("\n") == 1, err
    return err


def test_one_layer_needs_group_by(run_main, homes_gpkg):
    code, out, err = run_main("cross-spread", *homes_gpkg.args, "--output", "-")
    assert "--group-by" in _one_line_error(code, err) and out == ""


@pytest.mark.parametrize(("options", "wrong", "suggested"), [
    (["--group-by", "zon"], "zon", "zone"),
    (["--group-by", "zone", "--weight", "popp"], "popp", "pop"),
    (["--group-by", "zone", "--to", "SELF", "--to-layer", "sites", "--to-group-by", "site_nam"], "site_nam",
     "site_name"),
    (["--group-by", "zone", "--to", "SELF", "--to-layer", "sites", "--to-weight", "capacit"], "capacit", "capacity"),
])
def test_unknown_fields_suggest_close_match(run_main, homes_gpkg, options, wrong, suggested):
    options = [str(homes_gpkg.path) if o == "SELF" else o for o in options]
    code, out, err = run_main("cross-spread", *homes_gpkg.args, *options, "--output", "-")
    err = _one_line_error(code, err)
    assert f"'{wrong}'" in err and f"did you mean '{suggested}'" in err
    assert out == ""


def test_to_options_need_to(run_main, homes_gpkg):
    code, _, err = run_main("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--to-group-by", "kind")
    assert "--to" in _one_line_error(code, err)


def test_where_matching_nothing_gives_an_empty_table(run_main, homes_gpkg):
    # behaviour chosen by the code, the same as group-spread's: exit 0, the header and no rows
    code, out, err = run_main("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--where", "pop > 1000",
                              "--output", "-")
    assert code == 0, err
    assert out.splitlines() == [",".join(LONG_COLUMNS)]


# --------------------------------------------------------------------------------------------
# Python API


def test_api_returns_dataframes(homes, homes_gpkg, homes_refs, tmp_path):
    table = toolbox.cross_spread(homes, group_by="zone", weight="pop", tolerance=0)
    assert isinstance(table, pd.DataFrame) and not isinstance(table, gpd.GeoDataFrame)
    check_table(table, homes_refs[("zone", "pop")], 0.0)
    run = toolbox.run("cross-spread", data=homes_gpkg.path, layer="homes", group_by=["zone"],
                      output=str(tmp_path / "api.csv"))
    assert isinstance(run, pd.DataFrame)
    check_table(run, homes_refs[("zone", None)], 0.01)
    check_table(pd.read_csv(tmp_path / "api.csv"), homes_refs[("zone", None)], 0.01)
    wide = toolbox.run("cross-spread", data=homes, group_by="zone", weight="pop", tolerance=0, wide=True)
    assert isinstance(wide, pd.DataFrame) and len(wide) == 5 and wide.shape[1] == 1 + 5
    for (a, b), (_, _, _, mean) in homes_refs[("zone", "pop")].items():
        rows = wide["from_group"].isna() if a is None else wide["from_group"] == a
        cell = wide.loc[rows, "(null)" if b is None else b].item()
        assert (np.isnan(cell) and np.isnan(mean)) or cell == pytest.approx(mean, rel=1e-9), (a, b)
