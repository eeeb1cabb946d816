"""Geodesic distances (issue 4) checked against pyproj.Geod, the reference library.

``pyproj.Geod(ellps="WGS84").inv`` implements C. F. F. Karney, "Algorithms for geodesics",
Journal of Geodesy 87 (2013) 43-55, accurate to round-off (15 nm) for every pair of points; it
is named as the reference in /work/shared/REFERENCES.md. Every reference sum here is computed
in this file, over all pairs with numpy, never with pairspread's own kernels. Random groups are
discs of points around arbitrary centres (no real places' data); reference sums cost ~1 µs per
pair, so groups stay at a few thousand points at most.
"""

from __future__ import annotations

import io
import math
import re

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from scipy.spatial.distance import pdist

import toolbox
from toolbox import estimate
from toolbox.cli import main
from toolbox.errors import InputError, ParameterError

#: the reference: Karney (2013) as implemented in PROJ and wrapped by pyproj
GEOD = pyproj.Geod(ellps="WGS84")
WGS84 = {"a": 6378137.0, "f": 1 / 298.257223563}  # WGS 84 defining constants (NIMA TR8350.2; common practice)

#: name -> (centre longitude, centre latitude, diameter in km)
EXTENTS = {
    "regional": (14.2, 47.6, 50),
    "national": (-101.0, 39.0, 1000),
    "continental": (21.0, 4.0, 3000),
    "antimeridian": (180.0, -17.0, 1000),  # straddles ±180°
    "pole": (35.0, 88.0, 1000),  # reaches over the North Pole
}
TOLERANCES = (0.01, 1e-3)



def geodesic_pair_sums(*args, **kw):
    return estimate.grouped_pair_sums(*args, distance="geodesic", **kw)


def geodesic_point_sums(*args, **kw):
    return estimate.grouped_point_sums(*args, distance="geodesic", **kw)


def geodesic_cross_sums(*args, **kw):
    return estimate.cross_pair_sums(*args, distance="geodesic", **kw)


def exact_pair_sums(*args, **kw):
    return geodesic_pair_sums(*args, method="exact", **kw)


def disc(rng, lon0, lat0, diameter_km, n):
    """n random points in the geodesic disc of the given diameter (uniform by area, roughly)."""
    azimuth = rng.uniform(0, 360, n)
    distance = diameter_km * 500 * np.sqrt(rng.uniform(0, 1, n))
    lon, lat, _ = GEOD.fwd(np.full(n, lon0), np.full(n, lat0), azimuth, distance)
    return (np.asarray(lon) + 180) % 360 - 180, np.asarray(lat)


def reference_pairs(lon, lat):
    """Geodesic distance of every pair i < j (numpy's upper-triangle order), by pyproj.Geod.inv."""
    i, j = np.triu_indices(lon.size, 1)
    return i, j, np.asarray(GEOD.inv(lon[i], lat[i], lon[j], lat[j])[2])


def reference_total(lon, lat, w=None):
    """Σ_{i<j} w_i w_j s_ij over all pairs with pyproj.Geod.inv."""
    i, j, s = reference_pairs(lon, lat)
    return float(np.sum(s if w is None else w[i] * w[j] * s))


def reference_rows(lon, lat, w=None):
    """Σ_j w_j s_ij for every point, over all pairs with pyproj.Geod.inv."""
    n = lon.size
    i, j = np.triu_indices(n, 1)
    s = GEOD.inv(lon[i], lat[i], lon[j], lat[j])[2]
    w = np.ones(n) if w is None else w
    return np.bincount(i, w[j] * s, n) + np.bincount(j, w[i] * s, n)


def assert_bounded(total, lower, upper, rel_bound, truth, tolerance):
    """Truth in [lower, upper]; estimate within rel_bound of it; rel_bound within tolerance."""
    total, lower, upper, rel_bound = map(np.asarray, (total, lower, upper, rel_bound))
    truth = np.asarray(truth)
    # the reference itself carries summation rounding of order 1e-13 relative
    assert np.all(lower <= truth * (1 + 1e-12)), (lower, truth)
    assert np.all(truth <= upper * (1 + 1e-12)), (upper, truth)
    assert np.all(np.abs(total / truth - 1) <= rel_bound * (1 + 1e-9) + 1e-12)
    assert np.all(rel_bound <= tolerance)


# --------------------------------------------------------------------------------------------
# known geodesic distances (worked examples)


def test_meridian_quadrant():
    # WGS 84 meridian quadrant (equator to pole) 10 001 965.729 m: a well-known value, quoted
    # from memory and equal to pyproj.Geod's 10 001 965.729 31 m.
    r = exact_pair_sums([0.0, 0.0], [0.0, 90.0], [0, 0], **WGS84)
    assert r.total[0] == pytest.approx(10_001_965.729, abs=1e-3)
    assert r.upper[0] - r.lower[0] < 1e-6  # an exact sum carries only a round-off allowance


def test_equator_quadrant():
    # A quarter of the equator is a geodesic (shorter than (1 − f)·180°, the onset of the
    # equatorial cut locus, Karney 2013): its length is a·π/2 = 10 018 754.171 m.
    r = exact_pair_sums([0.0, 90.0], [0.0, 0.0], [0, 0], **WGS84)
    assert r.total[0] == pytest.approx(WGS84["a"] * math.pi / 2, rel=1e-12)


def test_karney_direct_example():
    # Karney (2013), worked direct problem on WGS 84: from φ1 = 40°, α1 = 30°, s12 = 10 000 km
    # the end point is φ2 = 41.79331020506°, λ12 = 137.84490004377° (values quoted from
    # memory of the paper; pyproj.Geod.fwd reproduces them to 1e-11°, about 1 µm).
    r = exact_pair_sums([0.0, 137.84490004377], [40.0, 41.79331020506], [0, 0])
    assert r.total[0] == pytest.approx(10_000_000.0, abs=1e-5)


@pytest.mark.parametrize("method", ["auto", "projection"])
def test_karney_inverse_example_nearly_antipodal(method):
    # Karney (2013), worked inverse problem on WGS 84: φ1 = −30°, φ2 = 29.9°, λ12 = 179.8° gives
    # s12 = 19 989 832.827 610 m (quoted from memory of the paper; pyproj.Geod agrees to 1 µm).
    # The two points are nearly antipodal: no local projection covers them, so even the
    # projection method falls back to exact sums for so small a group, and says so.
    r = geodesic_pair_sums([0.0, 179.8], [-30.0, 29.9], [0, 0], method=method)
    assert r.total[0] == pytest.approx(19_989_832.827_610, abs=1e-5)
    assert r.exact[0] and r.directions[0] == 0


# --------------------------------------------------------------------------------------------
# random groups against pyproj.Geod


@pytest.fixture(scope="module")
def groups():
    """One layer holding a group of each extent, with its Geod reference totals.

    Sizes: 1200 points each (0.7 million pairs per reference), weights 0–9 (zeros included);
    ``truth`` holds the unweighted and the weighted reference total of every group.
    """
    rng = np.random.default_rng(20260602)
    lon, lat, code = [], [], []
    for g, (lon0, lat0, extent) in enumerate(EXTENTS.values()):
        x, y = disc(rng, lon0, lat0, extent, 1200)
        lon.append(x)
        lat.append(y)
        code.append(np.full(x.size, g))
    lon, lat, code = np.concatenate(lon), np.concatenate(lat), np.concatenate(code)
    order = rng.permutation(lon.size)  # groups interleaved, as in a real layer
    lon, lat, code = lon[order], lat[order], code[order]
    weights = rng.integers(0, 10, lon.size).astype(float)
    truth = np.zeros((2, len(EXTENTS)))
    for g in range(len(EXTENTS)):
        members = code == g
        i, j, s = reference_pairs(lon[members], lat[members])
        w = weights[members]
        truth[:, g] = s.sum(), np.sum(w[i] * w[j] * s)
    return lon, lat, code, weights, truth


def test_group_layout_straddles_what_it_should(groups):
    lon, lat, code, _, _ = groups
    anti = code == list(EXTENTS).index("antimeridian")
    assert lon[anti].min() < -179 and lon[anti].max() > 179
    assert lat[code == list(EXTENTS).index("pole")].max() > 89.5


@pytest.mark.parametrize("tolerance", TOLERANCES)
@pytest.mark.parametrize("method", ["auto", "projection"])
def test_estimates_bounded_against_geod(groups, tolerance, method):
    lon, lat, code, _, truth = groups
    r = geodesic_pair_sums(lon, lat, code, tolerance=tolerance, method=method)
    assert_bounded(r.total, r.lower, r.upper, r.rel_bound, truth[0], tolerance)
    names = list(EXTENTS)
    local = ~r.exact
    # regional and national groups always use a local projection at these tolerances; the
    # continental one at 1e-3 cannot (its AEQD distorts by ~0.5 %) and is summed exactly
    assert local[names.index("regional")] and local[names.index("national")]
    assert r.exact[names.index("continental")] == (tolerance == 1e-3)


def test_weighted_estimates_bounded_against_geod(groups):
    lon, lat, code, weights, truth = groups
    r = geodesic_pair_sums(lon, lat, code, weights=weights, tolerance=0.01)
    assert_bounded(r.total, r.lower, r.upper, r.rel_bound, truth[1], 0.01)
    ww = np.array([np.sum(weights[code == g]) ** 2 - np.sum(weights[code == g] ** 2) for g in range(5)]) / 2
    np.testing.assert_allclose(r.pair_weight, ww, rtol=1e-12)


def test_exact_matches_geod(groups):
    lon, lat, code, weights, _ = groups
    keep = np.zeros(lon.size, dtype=bool)
    for g in range(len(EXTENTS)):
        keep[np.flatnonzero(code == g)[:300]] = True
    lon, lat, code, weights = lon[keep], lat[keep], code[keep], weights[keep]
    r = geodesic_pair_sums(lon, lat, code, weights=weights, tolerance=0)
    for g in range(len(EXTENTS)):
        members = code == g
        truth = reference_total(lon[members], lat[members], weights[members])
        assert r.total[g] == pytest.approx(truth, rel=1e-9)
        assert r.lower[g] * (1 - 1e-12) <= truth <= r.upper[g] * (1 + 1e-12)
        assert r.exact[g] and r.rel_bound[g] < 1e-9
    # --method exact at a non-zero tolerance is the same computation
    again = geodesic_pair_sums(lon, lat, code, weights=weights, method="exact")
    np.testing.assert_array_equal(again.total, r.total)


def test_local_frame_distortion_matches_spherical_formula():
    # On a sphere the AEQD scales are h = 1 along radii and k = c / sin c across them at angular
    # distance c from the centre (Snyder, "Map Projections: A Working Manual", USGS PP 1395,
    # 1987, §25; section number from memory). The sampled bounds must contain [1, C / sin C]
    # for the farthest point at C.
    radius = 6_371_000.0
    sphere = pyproj.Geod(a=radius, f=0.0)
    for c_deg in (0.2, 5.0, 30.0, 70.0):
        lon, lat, _ = sphere.fwd(
            [10.0] * 3, [50.0] * 3, [0.0, 120.0, 240.0], [c_deg * math.pi / 180 * radius] * 3
        )
        frame = estimate.local_frame(np.r_[lon, 10.0], np.r_[lat, 50.0], a=radius, f=0.0)
        c = math.radians(frame.radius_deg)
        assert frame.usable and frame.k_min <= 1.0
        assert c / math.sin(c) <= frame.k_max <= 1 + 1.05 * (c / math.sin(c) - 1) + 1e-7


def test_planar_tolerance_combines_exactly():
    # Folding a planar estimate of relative error e into [k_min, k_max] must give exactly the
    # requested tolerance at the planar tolerance chosen for it (algebra in docs/method.md).
    for tolerance, k_min, k_max in ((0.01, 1.0, 1.004), (1e-3, 0.9999, 1.0002), (0.3, 1.0, 1.2)):
        e = estimate.planar_tolerance(tolerance, k_min, k_max)
        lo_p, hi_p = 1 / (1 + e), 1 / (1 - e)  # the planar interval around an estimate of 1
        _, lo, hi, bound = estimate.fold_distortion(1.0, lo_p, hi_p, k_min, k_max)
        assert float(bound) == pytest.approx(tolerance, rel=1e-9)


def test_point_sums_against_geod():
    rng = np.random.default_rng(7)
    parts = [disc(rng, *EXTENTS[name], 500) for name in ("national", "antimeridian", "pole")]
    lon = np.concatenate([p[0] for p in parts])
    lat = np.concatenate([p[1] for p in parts])
    code = np.repeat(np.arange(3), 500)
    weights = rng.integers(1, 5, lon.size).astype(float)
    truth = np.concatenate([reference_rows(p[0], p[1], weights[code == g]) for g, p in enumerate(parts)])
    for tolerance in TOLERANCES:
        r = geodesic_point_sums(lon, lat, code, weights=weights, tolerance=tolerance)
        assert not r.exact.any()
        assert_bounded(r.total, r.lower, r.upper, r.rel_bound, truth, tolerance)
    r = geodesic_point_sums(lon, lat, code, weights=weights, tolerance=0)
    np.testing.assert_allclose(r.total, truth, rtol=1e-9)
    assert r.exact.all()


def test_cross_sums_against_geod():
    rng = np.random.default_rng(11)
    centres = [(-98.0, 36.0), (-104.0, 42.0), (-95.0, 44.0)]
    parts = [disc(rng, lon0, lat0, 600, 300) for lon0, lat0 in centres]
    lon = np.concatenate([p[0] for p in parts])
    lat = np.concatenate([p[1] for p in parts])
    code = np.repeat(np.arange(3), 300)
    truth = np.empty((3, 3))
    for a in range(3):
        for b in range(3):
            if a == b:
                truth[a, a] = reference_total(*parts[a])
            else:
                la, pa = parts[a]
                lb, pb = parts[b]
                i, j = np.meshgrid(np.arange(300), np.arange(300), indexing="ij")
                truth[a, b] = GEOD.inv(la[i.ravel()], pa[i.ravel()], lb[j.ravel()], pb[j.ravel()])[2].sum()
    for tolerance in (0.01,):
        r = geodesic_cross_sums(lon, lat, code, tolerance=tolerance, method="projection")
        assert not r.exact.any()
        assert_bounded(r.total, r.lower, r.upper, r.rel_bound, truth, tolerance)
    r = geodesic_cross_sums(lon, lat, code, tolerance=0)
    np.testing.assert_allclose(r.total, truth, rtol=1e-9)


def test_wide_small_groups_fall_back_to_exact():
    # points over the whole globe: beyond a hemisphere, so exact sums (small group) and Geod
    rng = np.random.default_rng(3)
    lon = rng.uniform(-180, 180, 120)
    lat = np.degrees(np.arcsin(rng.uniform(-1, 1, 120)))
    frame = estimate.local_frame(lon, lat)
    assert not frame.usable
    r = geodesic_pair_sums(lon, lat, np.zeros(120, dtype=int), method="projection")
    assert r.exact[0] and r.total[0] == pytest.approx(reference_total(lon, lat), rel=1e-9)
    c = geodesic_cross_sums(lon, lat, np.arange(120) % 2, method="projection")
    assert c.exact.all()


def test_wide_large_group_is_refused():
    # refused with a note and NaN sums, never raised: one bad group must not sink the others
    rng = np.random.default_rng(5)
    n = estimate.EXACT_FALLBACK_POINTS + 1
    lon, lat = rng.uniform(-180, 180, n), rng.uniform(-60, 60, n)
    near_lon, near_lat = disc(rng, 10.0, 50.0, 20, 50)
    codes = np.r_[np.zeros(n, dtype=int), np.ones(50, dtype=int)]
    r = geodesic_pair_sums(np.r_[lon, near_lon], np.r_[lat, near_lat], codes)
    assert re.search(r"from its centre.*too many for exact geodesic sums", r.note[0])
    assert np.isnan(r.total[0]) and r.method[0] is None
    assert r.note[1] == "" and r.total[1] == pytest.approx(reference_total(near_lon, near_lat), rel=0.01)
    p = geodesic_point_sums(lon, lat, np.zeros(n, dtype=int))
    assert "too many for exact geodesic sums" in p.note[0] and np.isnan(p.total).all()
    # two compact towns on opposite sides of the Earth: each fine in its own frame, together too
    # wide for one and too many points for exact sums, so only the pair between them is refused
    half = estimate.EXACT_FALLBACK_POINTS // 2 + 1
    (alon, alat), (blon, blat) = disc(rng, 10.0, 50.0, 20, half), disc(rng, -170.0, -50.0, 20, half)
    c = geodesic_cross_sums(np.r_[alon, blon], np.r_[alat, blat], np.repeat([0, 1], half))
    assert "combined set of points" in c.note[0, 1] and np.isnan(c.total[0, 1])
    assert c.note[0, 0] == c.note[1, 1] == "" and np.isfinite([c.total[0, 0], c.total[1, 1]]).all()
    with pytest.raises(InputError, match="too many for exact geodesic sums"):
        estimate.raise_for_notes(r)


def test_large_group_too_distorted_for_the_tolerance_is_refused():
    # a continental group at a tolerance its local projection alone cannot meet
    rng = np.random.default_rng(9)
    n = estimate.EXACT_FALLBACK_POINTS + 1
    lon, lat = disc(rng, 21.0, 4.0, 5000, n)
    r = geodesic_pair_sums(lon, lat, np.zeros(n, dtype=int), tolerance=1e-4)
    assert re.search(r"distorts distances.*tolerance of at least", r.note[0]) and np.isnan(r.total[0])


# --------------------------------------------------------------------------------------------
# the scripts and the command line


def lonlat_layer(seed=2026, n=300):
    """An invented point layer in EPSG:4326 with two groups, one of them a far-flung one."""
    rng = np.random.default_rng(seed)
    lon_a, lat_a = disc(rng, -152.9, -35.0, 40, n)
    lon_b, lat_b = disc(rng, -150.0, -33.0, 400, n // 3)
    return gpd.GeoDataFrame(
        {"zone": ["inner"] * n + ["outer"] * (n // 3), "pop": rng.integers(0, 9, n + n // 3)},
        geometry=shapely.points(np.r_[lon_a, lon_b], np.r_[lat_a, lat_b]),
        crs="EPSG:4326",
    )


@pytest.fixture
def lonlat_gpkg(tmp_path):
    frame = lonlat_layer()
    path = tmp_path / "lonlat.gpkg"
    pyogrio.write_dataframe(frame, path, layer="homes", driver="GPKG")
    return frame, path


def run_csv(capsys, *args):
    code = main([*map(str, args), "--output", "-"])
    out, err = capsys.readouterr()
    assert code == 0, err
    return pd.read_csv(io.StringIO(out)), err


def test_cli_defaults_to_geodesic(cli, lonlat_gpkg, tmp_path):
    frame, path = lonlat_gpkg
    proc = cli(
        "group-spread", path, "--group-by", "zone", "--weight", "pop", "--output", "-", cwd=tmp_path, entry="main"
    )
    assert proc.returncode == 0, proc.stderr
    table = pd.read_csv(io.StringIO(proc.stdout)).set_index("zone")
    assert set(table["units"]) == {"metre"}
    for zone, rows in frame.groupby("zone"):
        truth = reference_total(
            rows.geometry.x.to_numpy(), rows.geometry.y.to_numpy(), rows["pop"].to_numpy(float)
        )
        row = table.loc[zone]
        assert_bounded(row["total_dist"], row["total_lo"], row["total_hi"], row["rel_bound"], truth, 0.01)


def test_cli_exact_geodesic(capsys, lonlat_gpkg):
    frame, path = lonlat_gpkg
    table, _ = run_csv(capsys, "group-spread", path, "--method", "exact", "--distance", "geodesic")
    truth = reference_total(frame.geometry.x.to_numpy(), frame.geometry.y.to_numpy())
    assert table["total_dist"][0] == pytest.approx(truth, rel=1e-9)
    assert table["method"][0] == "exact" and table["units"][0] == "metre"


def test_cli_planar_on_degrees_is_an_error(capsys, lonlat_gpkg):
    _, path = lonlat_gpkg
    assert main(["group-spread", str(path), "--distance", "planar"]) != 0
    err = capsys.readouterr().err
    assert "geographic CRS" in err and "degrees" in err and "--crs" in err and "--distance geodesic" in err


def test_cli_crs_reprojects_and_reports_units(capsys, lonlat_gpkg):
    frame, path = lonlat_gpkg
    table, _ = run_csv(capsys, "group-spread", path, "--crs", "EPSG:32705", "--tolerance", "0")
    # reference: the same reprojection with pyproj, then scipy's pdist
    x, y = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32705", always_xy=True).transform(
        frame.geometry.x.to_numpy(), frame.geometry.y.to_numpy()
    )
    assert table["total_dist"][0] == pytest.approx(pdist(np.column_stack([x, y])).sum(), rel=1e-9)
    assert table["units"][0] == "metre" and table["method"][0] == "exact"


@pytest.mark.parametrize(
    "args, match",
    [
        (["--crs", "EPSG:4326"], "must be a projected CRS"),
        (["--crs", "no such crs"], "must be a CRS pyproj accepts"),
        (["--crs", "EPSG:32705", "--distance", "geodesic"], "cannot be combined"),
    ],
)
def test_cli_crs_mistakes(capsys, lonlat_gpkg, args, match):
    _, path = lonlat_gpkg
    assert main(["group-spread", str(path), *args]) != 0
    assert match in capsys.readouterr().err


def test_cli_hemisphere_group(capsys, tmp_path):
    rng = np.random.default_rng(17)
    # small: exact geodesic sums, whatever the method asked for
    lon, lat = rng.uniform(-180, 180, 80), rng.uniform(-70, 70, 80)
    small = gpd.GeoDataFrame(geometry=shapely.points(lon, lat), crs="EPSG:4326")
    pyogrio.write_dataframe(small, tmp_path / "small.gpkg")
    table, _ = run_csv(capsys, "group-spread", tmp_path / "small.gpkg", "--method", "projection")
    assert table["method"][0] == "exact"
    assert table["total_dist"][0] == pytest.approx(reference_total(lon, lat), rel=1e-9)
    # large: a note and a warning (or with --strict exit 3), never a silent number
    n = estimate.EXACT_FALLBACK_POINTS + 1
    big = gpd.GeoDataFrame(
        geometry=shapely.points(rng.uniform(-180, 180, n), rng.uniform(-70, 70, n)), crs="EPSG:4326"
    )
    pyogrio.write_dataframe(big, tmp_path / "big.gpkg")
    assert main(["group-spread", str(tmp_path / "big.gpkg"), "--output", "-", "--strict"]) == 3
    err = capsys.readouterr().err
    assert "the whole layer reaches" in err and "too many for exact geodesic sums" in err


def test_projected_layer_unchanged(homes, reference, by_key, same_table):
    # no regression: a projected layer gives exactly what the planar kernel gives on its
    # coordinates, with or without --distance planar, and matches scipy's pdist
    default = toolbox.group_spread(homes, group_by="zone", tolerance=0)
    planar = toolbox.group_spread(homes, group_by="zone", tolerance=0, distance="planar")
    same_table(default, planar)
    got = by_key(default, ["zone"])
    for key, ref in reference(homes, ["zone"]).items():
        if not np.isnan(ref["total_dist"]):
            assert got[key]["total_dist"] == pytest.approx(ref["total_dist"], rel=1e-9)
    estimate = toolbox.group_spread(homes, group_by="zone", weight="pop")
    codes = toolbox.grouping.group_features(homes, ["zone"]).codes
    direct = toolbox.grouped_pair_sums(
        homes.geometry.x.to_numpy(), homes.geometry.y.to_numpy(), codes, None, homes["pop"].to_numpy(float)
    )
    np.testing.assert_array_equal(estimate["total_dist"].to_numpy(), direct.total)
    np.testing.assert_array_equal(estimate["total_lo"].to_numpy(), direct.lower)
    assert set(estimate["units"]) == {"metre"}


def test_projected_layer_geodesic_on_request(homes):
    # --distance geodesic on a UTM layer: its points' longitude and latitude on WGS 84
    lon, lat = pyproj.Transformer.from_crs("EPSG:32705", "EPSG:4326", always_xy=True).transform(
        homes.geometry.x.to_numpy(), homes.geometry.y.to_numpy()
    )
    table = toolbox.group_spread(homes, tolerance=0, distance="geodesic")
    assert table["total_dist"][0] == pytest.approx(
        reference_total(np.asarray(lon), np.asarray(lat)), rel=1e-9
    )


def test_point_remoteness_geodesic(lonlat_gpkg):
    frame, _ = lonlat_gpkg
    out = toolbox.point_remoteness(frame, group_by=["zone"], tolerance=1e-3)
    for _, rows in frame.groupby("zone"):
        lon, lat = rows.geometry.x.to_numpy(), rows.geometry.y.to_numpy()
        mean = reference_rows(lon, lat) / (lon.size - 1)
        got = out.loc[rows.index]
        assert np.all(got["remote_lo"] <= mean * (1 + 1e-12)) and np.all(
            mean <= got["remote_hi"] * (1 + 1e-12)
        )
        assert np.all(np.abs(got["remote_avg"] / mean - 1) <= 1e-3)


def test_cross_spread_geodesic_two_layers(lonlat_gpkg):
    frame, _ = lonlat_gpkg
    sites = gpd.GeoDataFrame(
        {"kind": ["a", "a", "b"]},
        geometry=shapely.points([-152.8, -151.0, -153.4], [-35.1, -34.2, -35.5]),
        crs="EPSG:4326",
    ).to_crs("EPSG:32705")
    with pytest.warns(UserWarning, match="longitude and latitude"):
        table = toolbox.cross_spread(frame, group_by="zone", to=sites, to_group_by="kind", tolerance=1e-3)
    assert set(table["units"]) == {"metre"}
    for _, row in table.iterrows():
        a = frame[frame["zone"] == row["from_group"]]
        b = sites[sites["kind"] == row["to_group"]].to_crs("EPSG:4326")
        ax, ay, bx, by = (
            a.geometry.x.to_numpy(),
            a.geometry.y.to_numpy(),
            b.geometry.x.to_numpy(),
            b.geometry.y.to_numpy(),
        )
        i, j = np.meshgrid(np.arange(ax.size), np.arange(bx.size), indexing="ij")
        truth = GEOD.inv(ax[i.ravel()], ay[i.ravel()], bx[j.ravel()], by[j.ravel()])[2].sum()
        assert_bounded(row["total_dist"], row["total_lo"], row["total_hi"], row["rel_bound"], truth, 1e-3)


def test_geodesic_needs_a_crs(homes):
    with pytest.raises(InputError, match="no CRS"):
        toolbox.group_spread(homes.set_crs(None, allow_override=True), distance="geodesic")


def test_latitudes_beyond_90_are_refused():
    frame = gpd.GeoDataFrame(geometry=shapely.points([0.0, 1.0], [10.0, 95.0]), crs="EPSG:4326")
    with pytest.raises(InputError, match="latitude beyond"):
        toolbox.group_spread(frame)


def test_kernel_checks():
    with pytest.raises(ParameterError, match="latitude"):
        exact_pair_sums([0.0, 0.0], [0.0, 91.0], [0, 0])
    with pytest.raises(ParameterError, match="flattening"):
        exact_pair_sums([0.0, 0.0], [0.0, 1.0], [0, 0], f=0.2)
