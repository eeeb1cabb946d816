"""``point-remoteness`` and its kernel ``grouped_point_sums``, checked from outside the project.

The per-feature quantity is ``R_i = Σ_j w_j d_ij`` over the other features j of i's group, and
``remote_avg = R_i / Σ_{j≠i} w_j`` (issue 3). Every reference value below comes from
``scipy.spatial.distance.cdist`` / ``pdist`` (brute force over all pairs, the definition of the
quantity), from numerical integration with ``scipy.integrate.dblquad``, or from a closed form
named beside the check, never from pairspread itself.
"""

from __future__ import annotations

import functools
import hashlib
import math
import shutil
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from geopandas.testing import assert_geodataframe_equal
from scipy import integrate
from scipy.spatial.distance import cdist, pdist

import toolbox

NEW_FIELDS = ["remote_avg", "remote_lo", "remote_hi", "remote_idx", "group_n", "note"]  # issues 3, 10
HOME_FIELDS = ["zone", "tenure", "pop", "label"]  # the fields of conftest.make_homes
X0, Y0 = 500_000.0, 6_120_000.0  # UTM-sized offsets (EPSG:32705 near the fixture layers)

#: Sizes asked for by the brief: singletons, the smallest pairs, both sides of the kernels'
#: 64-point exact/padded threshold, and groups large enough for the projection under ``auto``.
SIZES = (1, 2, 3, 64, 65, 500, 3000)
TOLERANCES = (0.0, 0.01, 1e-4)
#: exact sums carry only floating-point rounding, of order n·u for a sum of n non-negative terms
#: (Higham, "Accuracy and Stability of Numerical Algorithms", §4.2, from memory); 1e-10 is far
#: above n·u for n ≤ 3000 and far below any tolerance a user can ask for
EXACT_CAP = 1e-10
#: float rounding of the brute-force reference itself (the brief's allowance)
REF_SLACK = 1e-12


def directions_for(tolerance: float) -> int:
    # smallest m with tan²(π/(4m)) ≤ ε, i.e. m = ceil(π / (4 arctan √ε)): the Cauchy-Crofton
    # discretisation bound of /work/shared/DESIGN.md ("m = 8 for 1 %")
    return math.ceil(math.pi / (4 * math.atan(math.sqrt(tolerance))))


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# --------------------------------------------------------------------------------------------
# kernel layouts and their brute-force reference


def make_layout(kind: str, seed: int = 31):
    """Points of several groups of the sizes in SIZES, rows shuffled, at UTM-sized offsets.

    ``random``: uniform in squares of very different extents. ``clustered``: a few tight
    clusters per group, scales from 1 m to 2 km, one remote outlier per group of more than three
    points and an exact duplicate pair as the group of two. ``weighted``: the clustered layout
    with weights that include zeros (a zero-weight point in the group of three) and a two-point
    group with no weight at all.
    """
    rng = np.random.default_rng(seed)
    xs, ys, gs = [], [], []
    for code, size in enumerate(SIZES):
        if kind == "random":
            extent = rng.choice([10.0, 500.0, 20_000.0])
            pts = rng.uniform(0, extent, (size, 2)) + rng.uniform(-4e4, 4e4, 2)
        else:
            scale = rng.choice([1.0, 50.0, 2000.0])
            centres = rng.uniform(-4e4, 4e4, 2) + rng.normal(0, 5 * scale, (int(rng.integers(1, 4)), 2))
            pts = centres[rng.integers(0, len(centres), size)] + rng.normal(0, scale, (size, 2))
            if size == 2:
                pts[1] = pts[0]  # coincident points: every distance of the group is 0
            if size > 3:
                pts[0] += 3e4  # the remote site beside a dense cluster (DESIGN.md)
        xs.append(X0 + pts[:, 0])
        ys.append(Y0 + pts[:, 1])
        gs.append(np.full(size, code))
    x, y, g = np.concatenate(xs), np.concatenate(ys), np.concatenate(gs)
    weights = None
    if kind == "weighted":
        weights = rng.choice([0.0, 1.0, 2.5, 7.0, 40.0], x.size)
        three = np.flatnonzero(g == SIZES.index(3))
        weights[three] = [0.0, 2.5, 5.0]
        weights[g == SIZES.index(2)] = 0.0
    order = rng.permutation(x.size)  # group members not contiguous, as in real layers
    return x[order], y[order], g[order], None if weights is None else weights[order]


@functools.cache
def layout_reference(kind: str):
    """Brute-force per-point sums with ``scipy.spatial.distance.cdist`` (the definition).

    Returns the layout and, per point, ``Σ_j w_j d_ij`` over its group, ``Σ_{j≠i} w_j``, and per
    group the pair total ``Σ_{i<j} w_i w_j d_ij`` from ``pdist``.
    """
    x, y, g, weights = make_layout(kind)
    w = np.ones(x.size) if weights is None else weights
    total = np.empty(x.size)
    other = np.empty(x.size)
    pair_total = np.empty(len(SIZES))
    for code in range(len(SIZES)):
        members = np.flatnonzero(g == code)
        pts = np.c_[x[members], y[members]]
        total[members] = cdist(pts, pts) @ w[members]
        other[members] = w[members].sum() - w[members]
        iu = np.triu_indices(members.size, k=1)  # pdist's condensed order
        pair_total[code] = float(np.dot(np.outer(w[members], w[members])[iu], pdist(pts)))
    return (x, y, g, weights), total, other, pair_total


KERNEL_CASES = [
    (kind, method, tolerance)
    for kind in ("random", "clustered", "weighted")
    for method in ("auto", "exact", "projection")
    for tolerance in TOLERANCES
    if not (method == "projection" and tolerance == 0)
]


@pytest.mark.parametrize(("kind", "method", "tolerance"), KERNEL_CASES)
def test_point_sums_against_cdist(kind, method, tolerance):
    (x, y, g, weights), ref, other, _ = layout_reference(kind)
    got = toolbox.grouped_point_sums(x, y, g, weights=weights, tolerance=tolerance, method=method)
    defined = other > 0  # a point with no other weighted point of its group has no mean
    assert not defined.all() and defined.any()
    for array in (got.total, got.lower, got.upper, got.rel_bound, got.mean):
        assert np.isnan(array[~defined]).all()
        assert np.isfinite(array[defined]).all()
    np.testing.assert_allclose(got.other_weight, other, rtol=1e-12, atol=0)

    r, est = ref[defined], got.total[defined]
    lo, hi, rb = got.lower[defined], got.upper[defined], got.rel_bound[defined]
    # cdist reference inside the guaranteed interval (with the reference's own rounding)
    assert (lo <= r * (1 + REF_SLACK)).all() and (r <= hi * (1 + REF_SLACK)).all()
    # |est − exact| ≤ rel_bound·exact ≤ tolerance·exact
    assert (np.abs(est - r) <= (rb + REF_SLACK) * r).all()
    exact_points = got.exact[defined]
    cap = np.where(exact_points, EXACT_CAP, tolerance)
    assert (rb <= cap).all()
    truth_mean = r / other[defined]
    assert (np.abs(got.mean[defined] - truth_mean) <= (cap + REF_SLACK) * truth_mean).all()

    # which method each point got, and the documented direction count
    if tolerance == 0 or method == "exact":
        assert exact_points.all() and (got.directions[defined] == 0).all()
    else:
        if method == "projection":
            assert not exact_points.any()
        else:  # auto: the 3000-point group is far cheaper by projection
            assert not exact_points[g[defined] == SIZES.index(3000)].any()
        assert (got.directions[defined] == np.where(exact_points, 0, directions_for(tolerance))).all()


def test_projection_method_needs_a_tolerance():
    # documented in the manifest: tolerance 0 "means exact sums"; projection cannot honour it
    with pytest.raises(toolbox.ParameterError, match="exact"):
        toolbox.grouped_point_sums([0, 1], [0, 0], [0, 0], tolerance=0, method="projection")


@pytest.mark.parametrize("tolerance", [0.0, 0.01])
@pytest.mark.parametrize("kind", ["random", "weighted"])
def test_remoteness_totals_sum_to_twice_the_pair_total(kind, tolerance):
    # Σ_i w_i R_i counts every unordered pair twice: Σ_i w_i Σ_j w_j d_ij = 2 Σ_{i<j} w_i w_j d_ij
    (x, y, g, weights), _, _, pair_total = layout_reference(kind)
    w = np.ones(x.size) if weights is None else weights
    method = "exact" if tolerance == 0 else "projection"
    points = toolbox.grouped_point_sums(x, y, g, weights=weights, tolerance=tolerance, method=method)
    pairs = toolbox.grouped_pair_sums(x, y, g, weights=weights, tolerance=tolerance, method=method)
    live = np.isfinite(pairs.total)
    weighted_sum = np.bincount(g, np.nan_to_num(w * points.total), len(SIZES))
    if tolerance == 0:
        # against pdist (brute force) and against grouped_pair_sums in exact mode
        np.testing.assert_allclose(weighted_sum[live], 2 * pair_total[live], rtol=1e-12)
        np.testing.assert_allclose(weighted_sum[live], 2 * pairs.total[live], rtol=1e-12)
    else:
        # both sides are estimates of the same 2·D (pdist): each within its tolerance of it, so
        # within the sum of the two rel_bounds of each other (the kernels may estimate differently)
        truth = 2 * pair_total[live]
        assert (np.abs(weighted_sum[live] - truth) <= tolerance * truth).all()
        assert (np.abs(2 * pairs.total[live] - truth) <= tolerance * truth).all()
        spread = np.bincount(g, np.nan_to_num(w * points.rel_bound * points.total), len(SIZES))[live]
        # (rel_bound·R̂ may fall short of rel_bound·R by a factor 1 − tolerance, hence the margin)
        allowed = (spread + 2 * pairs.rel_bound[live] * truth) * (1 + 2 * tolerance)
        assert (np.abs(weighted_sum[live] - 2 * pairs.total[live]) <= allowed).all()


# --------------------------------------------------------------------------------------------
# a published value: mean distance from the centre of a square to a uniform point in it


def _square_grid(k: int, side: float) -> np.ndarray:
    u = (np.arange(k) + 0.5) / k * side  # midpoints of a k × k grid of cells
    gx, gy = np.meshgrid(u, u)
    return np.c_[gx.ravel(), gy.ravel()]


def test_centre_of_square_matches_grid_and_closed_form(tmp_path):
    # E|P − c| for P uniform in the unit square and c its centre is (√2 + asinh 1)/6
    # = 0.3825978582 (quarter squares of MathWorld, "Square Point Picking"; from memory),
    # confirmed here independently by numerical integration with scipy.integrate.dblquad.
    continuous, _ = integrate.dblquad(lambda v, u: math.hypot(u - 0.5, v - 0.5), 0, 1, 0, 1, epsabs=1e-12)
    assert continuous == pytest.approx((math.sqrt(2) + math.asinh(1)) / 6, rel=1e-9)

    side, k = 1000.0, 40
    grid = _square_grid(k, side) + [X0, Y0]
    centre = np.array([[X0 + side / 2, Y0 + side / 2]])
    remote = np.array([[X0 + 40 * side, Y0 - 30 * side]])  # a far site in its own group
    pts = np.vstack([centre, grid, remote])
    frame = gpd.GeoDataFrame(
        {"block": ["square"] * (1 + k * k) + ["far"]},
        geometry=shapely.points(pts[:, 0], pts[:, 1]),
        crs="EPSG:32705",
    )
    # the grid reference: cdist from the centre to the k² grid points, computed on the same grid
    grid_mean = float(cdist(centre, grid).mean())
    # ... which converges to the continuous value (midpoint rule, second order); at k = 40 the
    # difference measured here is 2.3e-4 relative
    coarse = float(cdist([[0.5, 0.5]], _square_grid(20, 1.0)).mean())
    assert abs(grid_mean / side - continuous) < abs(coarse - continuous) / 2
    assert grid_mean / side == pytest.approx(continuous, rel=5e-4)

    for tolerance in TOLERANCES:
        result = toolbox.run("point-remoteness", data=frame, group_by="block", tolerance=tolerance,
                             output=str(tmp_path / f"c{tolerance}.parquet"))
        row = result.iloc[0]
        assert abs(row["remote_avg"] - grid_mean) <= max(tolerance, REF_SLACK) * grid_mean
        assert row["remote_lo"] <= grid_mean * (1 + REF_SLACK) and grid_mean <= row["remote_hi"] * (1 + REF_SLACK)
        assert row["group_n"] == 1 + k * k
        # the centre sits nearer the rest than a typical feature: 0.3826 / 0.5214 = 0.73 (the
        # ratio of the two MathWorld values), well below 1 even with a 1 % error on each
        assert row["remote_idx"] == pytest.approx(0.3825978582 / 0.5214054332, rel=2.1 * tolerance + 2e-3)
        far = result.iloc[-1]  # alone in its group: nulls, group_n 1
        assert far[NEW_FIELDS[:4]].isna().all() and far["group_n"] == 1


# --------------------------------------------------------------------------------------------
# reference for the fixture layer (conftest.make_homes): cdist per group


def _group_keys(frame: pd.DataFrame, group_by) -> list[tuple]:
    if not group_by:
        return [()] * len(frame)
    values = frame[list(group_by)].astype(object).to_numpy()
    return [tuple(None if pd.isna(v) else v for v in row) for row in values]


def remoteness_reference(frame: gpd.GeoDataFrame, group_by=(), weight=None) -> pd.DataFrame:
    """Per feature: the weighted mean distance to the rest of its group and remote_idx, by cdist.

    ``remote_idx = remote_avg / (D_g / P_g)`` with ``D_g = Σ_{i<j} w_i w_j d_ij`` and
    ``P_g = Σ_{i<j} w_i w_j`` (issue 3: "remote_avg divided by the group's weighted mean pair
    distance").
    """
    xy = shapely.get_coordinates(np.asarray(frame.geometry.values))
    assert len(xy) == len(frame)
    w = np.ones(len(frame)) if weight is None else frame[weight].to_numpy(dtype=float)
    keys = _group_keys(frame, group_by)
    avg = np.full(len(frame), np.nan)
    index = np.full(len(frame), np.nan)
    count = np.zeros(len(frame), dtype=np.int64)
    for key in dict.fromkeys(keys):
        members = np.array([k == key for k in keys])
        d = cdist(xy[members], xy[members])
        wm = w[members]
        other = wm.sum() - wm
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_i = np.where(other > 0, (d @ wm) / other, np.nan)
        pair_weight = (wm.sum() ** 2 - (wm * wm).sum()) / 2
        group_mean = (wm @ d @ wm) / 2 / pair_weight if pair_weight > 0 else np.nan
        avg[members] = mean_i
        index[members] = mean_i / group_mean
        count[members] = members.sum()
    return pd.DataFrame({"avg": avg, "idx": index, "n": count, "w": w})


@pytest.fixture(scope="module")
def homes_reference(homes):
    return {
        (tuple(group_by), weight): remoteness_reference(homes, group_by, weight)
        for group_by, weight in ((["zone"], "pop"), (["zone"], None), (["zone", "tenure"], None))
    }


def _plain(values) -> list:
    """Text values with every kind of null as None (formats read back nulls differently)."""
    return [None if (v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v))) else v for v in values]


def check_copy(out: gpd.GeoDataFrame, homes: gpd.GeoDataFrame, ref: pd.DataFrame, tolerance: float,
               *, coordinate_atol: float = 0.0):
    """The copy keeps every field and geometry and adds the new fields with correct values."""
    fields = [c for c in out.columns if c != out.geometry.name]
    assert fields == HOME_FIELDS + NEW_FIELDS
    assert all(len(name) <= 10 for name in fields)  # dBASE limit, common practice
    assert len(out) == len(homes)
    assert out.crs is not None and out.crs.to_epsg() == 32705
    for field in HOME_FIELDS:
        assert _plain(out[field]) == _plain(homes[field]), field
    got_xy = shapely.get_coordinates(np.asarray(out.geometry.values))
    want_xy = shapely.get_coordinates(np.asarray(homes.geometry.values))
    np.testing.assert_allclose(got_xy, want_xy, rtol=0, atol=coordinate_atol)
    assert (shapely.get_type_id(np.asarray(out.geometry.values)) == 0).all()  # still points

    np.testing.assert_array_equal(out["group_n"].to_numpy(), ref["n"].to_numpy())
    defined = np.isfinite(ref["avg"].to_numpy())
    assert (~defined).sum() >= 1  # the 'lone' home at least
    for name in NEW_FIELDS[:4]:
        assert out[name][~defined].isna().all(), name
    avg, truth = out["remote_avg"].to_numpy(float)[defined], ref["avg"].to_numpy()[defined]
    lo, hi = out["remote_lo"].to_numpy(float)[defined], out["remote_hi"].to_numpy(float)[defined]
    cap = max(tolerance, REF_SLACK)
    assert (lo <= truth * (1 + REF_SLACK)).all() and (truth <= hi * (1 + REF_SLACK)).all()
    assert (np.abs(avg - truth) <= cap * truth + 1e-9).all()
    # remote_idx = remote_avg / group mean: both estimated, so its error is within
    # (1 + t)/(1 − t) − 1 ≤ 2.1 t for t ≤ 0.01
    idx, truth_idx = out["remote_idx"].to_numpy(float)[defined], ref["idx"].to_numpy()[defined]
    assert (np.abs(idx - truth_idx) <= 2.1 * cap * truth_idx).all()


# --------------------------------------------------------------------------------------------
# the command line (a subprocess once, in-process otherwise), to every output kind


def read_back(path: Path, layer: str | None = None) -> gpd.GeoDataFrame:
    if path.suffix == ".parquet":
        return gpd.read_parquet(path)  # GeoParquet
    return pyogrio.read_dataframe(path, layer=layer)


OUTPUT_CASES = [
    # (suffix, entry point, weighted, tolerance)
    (".shp", "script", True, 0.0),
    (".geojson", "main", False, 0.01),  # in-process (see conftest): no start-up to prove again
    (".parquet", "module", True, 0.01),  # `python -m toolbox` once
]


@pytest.mark.parametrize(("suffix", "entry", "weighted", "tolerance"), OUTPUT_CASES,
                         ids=[c[0][1:] for c in OUTPUT_CASES])
def test_cli_output_kinds(cli, tmp_path, homes_gpkg, homes, homes_reference, suffix, entry, weighted, tolerance):
    digest = sha256(homes_gpkg.path)
    out = tmp_path / f"remote{suffix}"
    weight = ["--weight", "pop"] if weighted else []
    proc = cli("point-remoteness", *homes_gpkg.args, "--group-by", "zone", *weight, "--tolerance", tolerance,
               "--output", out, entry=entry)
    assert proc.returncode == 0, proc.stderr
    assert f"wrote {len(homes)} row(s)" in proc.stderr
    assert sha256(homes_gpkg.path) == digest  # the input is never modified
    ref = homes_reference[(("zone",), "pop" if weighted else None)]
    # GeoJSON stores coordinates as decimal text (15 significant digits by default in GDAL's
    # driver, common practice): 1e-6 m is far below that at UTM magnitudes of 6e6 m
    check_copy(read_back(out), homes, ref, tolerance, coordinate_atol=1e-6 if suffix == ".geojson" else 0.0)


def test_cli_into_existing_geopackage(cli, tmp_path, homes_gpkg, homes, homes_reference):
    target = tmp_path / "project.gpkg"
    shutil.copyfile(homes_gpkg.path, target)
    before = {name: pyogrio.read_dataframe(target, layer=name) for name in ("homes", "sites", "zones")}
    digest = sha256(homes_gpkg.path)
    proc = cli("point-remoteness", *homes_gpkg.args, "--group-by", "zone,tenure", "--output", target,
               "--output-layer", "remote", entry="main")
    assert proc.returncode == 0, proc.stderr
    assert sha256(homes_gpkg.path) == digest
    listed = {str(name): kind for name, kind in pyogrio.list_layers(target)}
    assert listed == {"homes": "Point", "sites": "Point", "zones": "Polygon", "remote": "Point"}
    for name, frame in before.items():  # the other layers are kept as they were
        assert_geodataframe_equal(pyogrio.read_dataframe(target, layer=name), frame)
    check_copy(read_back(target, "remote"), homes, homes_reference[(("zone", "tenure"), None)], 0.01)

    # the default layer name comes from the manifest; an existing layer needs --overwrite
    again = cli("point-remoteness", *homes_gpkg.args, "--group-by", "zone", "--output", target,
                "--output-layer", "remote", entry="main")
    assert again.returncode != 0 and "--overwrite" in again.stderr
    assert again.stderr.count("\n") == 1


# --------------------------------------------------------------------------------------------
# error cases and edge cases, through the command line in-process (same code, no start-up)



def _one_line_error(code: int, err: str) -> str:
    assert code != 0
    assert err.startswith("pairspread: error: ") and err.count("\n") == 1, err
    return err


def test_missing_output_is_refused(run_main, homes_gpkg):
    code, _, err = run_main("point-remoteness", *homes_gpkg.args, "--group-by", "zone")
    assert "--output" in _one_line_error(code, err)


@pytest.mark.parametrize(("option", "wrong", "suggested"), [("--group-by", "zon", "zone"), ("--weight", "popp", "pop")])
def test_unknown_field_suggests_close_match(run_main, tmp_path, homes_gpkg, option, wrong, suggested):
    out = tmp_path / "x.gpkg"
    code, _, err = run_main("point-remoteness", *homes_gpkg.args, option, wrong, "--output", out)
    err = _one_line_error(code, err)
    assert f"'{wrong}'" in err and f"did you mean '{suggested}'" in err
    assert not out.exists()


def test_input_with_a_new_field_name_is_refused(run_main, tmp_path, homes, write_layer):
    frame = homes.copy()
    frame["remote_avg"] = 1.0  # would be overwritten by the new field
    path = write_layer(frame, ".gpkg", name="taken")
    digest = sha256(path)
    out = tmp_path / "x.geojson"
    code, _, err = run_main("point-remoteness", path, "--group-by", "zone", "--output", out)
    assert "remote_avg" in _one_line_error(code, err)
    assert not out.exists() and sha256(path) == digest


def test_multipoint_with_several_points_is_refused(run_main, tmp_path, write_layer):
    geoms = [shapely.multipoints([[X0, Y0], [X0 + 10, Y0]]), shapely.Point(X0 + 50, Y0), shapely.Point(X0, Y0 + 70)]
    path = write_layer(gpd.GeoDataFrame({"zone": ["a", "a", "a"]}, geometry=geoms, crs="EPSG:32705"), ".gpkg",
                       name="multi")
    out = tmp_path / "x.gpkg"
    code, _, err = run_main("point-remoteness", path, "--group-by", "zone", "--output", out)
    err = _one_line_error(code, err)
    assert "1 MultiPoint" in err and "split" in err
    assert not out.exists()


def test_single_point_multipoints_are_accepted(tmp_path):
    pts = np.array([[0.0, 0.0], [3.0, 0.0], [0.0, 4.0]]) + [X0, Y0]
    as_points = gpd.GeoDataFrame({"zone": ["a"] * 3}, geometry=shapely.points(pts), crs="EPSG:32705")
    as_multi = as_points.set_geometry([shapely.multipoints([p]) for p in pts], crs="EPSG:32705")
    got = toolbox.run("point-remoteness", data=as_multi, group_by="zone", tolerance=0,
                      output=str(tmp_path / "m.parquet"))
    # a 3-4-5 triangle: each vertex's mean distance to the other two (REFERENCES.md: total 12)
    np.testing.assert_allclose(got["remote_avg"], [3.5, 4.0, 4.5], rtol=1e-12)
    same = toolbox.run("point-remoteness", data=as_points, group_by="zone", tolerance=0,
                       output=str(tmp_path / "p.parquet"))
    np.testing.assert_array_equal(got["remote_avg"], same["remote_avg"])
    # remote_idx: mean pair distance 12/3 = 4
    np.testing.assert_allclose(got["remote_idx"], [3.5 / 4, 1.0, 4.5 / 4], rtol=1e-12)


def test_where_matching_nothing_writes_an_empty_layer(run_main, tmp_path, homes_gpkg):
    # behaviour chosen by the code (the same as group-spread's empty table): exit 0 and an empty
    # layer that still has every field, rather than an error
    out = tmp_path / "empty.gpkg"
    code, _, err = run_main("point-remoteness", *homes_gpkg.args, "--group-by", "zone",
                            "--where", "pop > 1000", "--output", out)
    assert code == 0, err
    assert "wrote 0 row(s)" in err
    frame = pyogrio.read_dataframe(out)
    assert len(frame) == 0
    assert [c for c in frame.columns if c != frame.geometry.name] == HOME_FIELDS + NEW_FIELDS


def test_zero_weight_feature_beside_weighted_ones(tmp_path):
    # weights (0, 1, 5) on a 3-4-5 triangle: remote_avg_i = Σ_j w_j d_ij / Σ_{j≠i} w_j (issue 3)
    pts = np.array([[0.0, 0.0], [3.0, 0.0], [0.0, 4.0]]) + [X0, Y0]
    frame = gpd.GeoDataFrame({"w": [0.0, 1.0, 5.0]}, geometry=shapely.points(pts), crs="EPSG:32705")
    got = toolbox.run("point-remoteness", data=frame, weight="w", tolerance=0, output=str(tmp_path / "z.parquet"))
    expected = [(1 * 3 + 5 * 4) / 6, (0 * 3 + 5 * 5) / 5, (0 * 4 + 1 * 5) / 1]
    np.testing.assert_allclose(got["remote_avg"], expected, rtol=1e-12)
    # group mean: Σ_{i<j} w_i w_j d_ij / Σ_{i<j} w_i w_j = (1·5·5) / (1·5) = 5
    np.testing.assert_allclose(got["remote_idx"], np.array(expected) / 5, rtol=1e-12)
    assert (got["group_n"] == 3).all()


def test_zero_weight_features_beside_one_weighted_feature():
    # weights (0, 0, 5): the weighted point has Σ_{j≠i} w_j = 0, so no mean; the zero-weight
    # points' sums are 5 × their distance to it (3-4-5 triangle: 5·4 and 5·5)
    got = toolbox.grouped_point_sums([0, 3, 0], [0, 0, 4], [0, 0, 0], weights=[0, 0, 5], tolerance=0)
    assert np.isnan(got.total[2])
    np.testing.assert_allclose(got.total[:2], [20.0, 25.0], rtol=1e-12)


# --------------------------------------------------------------------------------------------
# Python API


def test_api_returns_geodataframe_and_remote_idx_identity(tmp_path, homes, homes_reference):
    before = homes.copy()
    got = toolbox.point_remoteness(homes, group_by="zone", weight="pop", tolerance=0,
                                   output=tmp_path / "api.parquet")
    assert isinstance(got, gpd.GeoDataFrame)
    assert_geodataframe_equal(homes, before)  # the frame passed in is not modified
    assert list(got.columns) == [*homes.columns, *NEW_FIELDS]
    assert got.crs == homes.crs and got.geometry.name == homes.geometry.name
    assert_geodataframe_equal(gpd.read_parquet(tmp_path / "api.parquet"), got, check_dtype=False)
    check_copy(got, homes, homes_reference[(("zone",), "pop")], 0.0)

    # Σ w_i (W − w_i) remote_idx_i / Σ w_i (W − w_i) = 1 per group: remote_avg_i = R_i / (W − w_i)
    # and remote_idx_i = remote_avg_i · P / D, so the numerator is Σ w_i R_i · P / D = 2P, and
    # the denominator is Σ w_i (W − w_i) = 2P (P = Σ_{i<j} w_i w_j)
    w = got["pop"].to_numpy(float)
    keys = pd.Series(_group_keys(got, ["zone"]))
    for key in dict.fromkeys(keys):
        members = (keys == key).to_numpy()
        factor = w[members] * (w[members].sum() - w[members])
        if not (factor > 0).any():
            continue
        idx = got["remote_idx"].to_numpy(float)[members]
        assert np.nansum(factor * idx) / factor[np.isfinite(idx)].sum() == pytest.approx(1.0, rel=1e-12), key

    # and through toolbox.run, with a projection estimate this time
    run = toolbox.run("point-remoteness", data=homes, group_by=["zone"], weight="pop",
                      output=str(tmp_path / "run.gpkg"))
    assert isinstance(run, gpd.GeoDataFrame)
    check_copy(run, homes, homes_reference[(("zone",), "pop")], 0.01)


def test_api_without_output_returns_geodataframe(homes):
    got = toolbox.point_remoteness(homes, group_by="zone")
    assert isinstance(got, gpd.GeoDataFrame)
