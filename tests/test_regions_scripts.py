"""Polygons and lines as input, grouping by region polygons and results on the regions, end to end.

The scripts are run as a user runs them (Python API and command line); every check compares
against something outside the project, named beside it:

- mean distance between two independent uniform points (shared/REFERENCES.md): a disk,
  128R/(45π) (MathWorld "Disk Line Picking"; Uspensky 1937, Solomon 1978); the unit square,
  (2 + √2 + 5 ln(1+√2))/15 (MathWorld "Square Line Picking", OEIS A091505); a 2 × 3 rectangle,
  1.3170674 (Mathai, Moschopoulos & Pederzoli 1999); a segment of length L, L/3 (MathWorld
  "Line Line Picking"); two disjoint stretches of one line, the distance of their midpoints
  (every pair is ordered the same way, so the mean of the difference is the difference of the
  means: linearity of expectation, common practice);
- region membership against ``geopandas.sjoin(points, regions, predicate="within")`` and the
  sums against ``scipy.spatial.distance.pdist``/``cdist`` brute force;
- a point on a feature against shapely's ``intersects``.
"""

from __future__ import annotations

import math
import re
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from scipy.spatial.distance import cdist, pdist

import toolbox
from toolbox.cli import main

CRS = "EPSG:32705"
X0, Y0 = 500_000.0, 6_120_000.0

DISK = 128 / (45 * math.pi)  # radius 1: MathWorld "Disk Line Picking"
SQUARE = (2 + math.sqrt(2) + 5 * math.log(1 + math.sqrt(2))) / 15  # MathWorld "Square Line Picking"
RECTANGLE = 1.3170674  # 2 × 3: Mathai, Moschopoulos & Pederzoli (1999), 7 digits as published

SHAPES = {
    # the disk's polygon has 2048 vertices: its mean differs from the disk's by about 1e-6 R
    "disk": (shapely.Point(X0, Y0).buffer(1.0, quad_segs=512), DISK, 1e-5),
    "square": (shapely.box(X0, Y0, X0 + 1, Y0 + 1), SQUARE, 0.0),
    "rectangle": (shapely.box(X0, Y0, X0 + 2, Y0 + 3), RECTANGLE, 1e-7),
    "segment": (shapely.LineString([(X0, Y0), (X0 + 3, Y0 + 4)]), 5 / 3, 0.0),  # L/3, L = 5
}


def one_feature(geometry, crs=CRS) -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame({"name": ["it"]}, geometry=[geometry], crs=crs)


def interval(row) -> tuple[float, float]:
    """The guaranteed interval of the mean, from the table's totals and pair weight."""
    return row["total_lo"] / row["pair_weight"], row["total_hi"] / row["pair_weight"]


@pytest.mark.parametrize("name", list(SHAPES))
@pytest.mark.parametrize("spacing", [0.4, 0.2, 0.1])
@pytest.mark.parametrize("tolerance", [0.0, 0.01])
def test_fill_reproduces_the_published_mean(name, spacing, tolerance):
    geometry, truth, published = SHAPES[name]
    table = toolbox.group_spread(one_feature(geometry), as_points="fill", fill_spacing=spacing, tolerance=tolerance)
    row = table.iloc[0]
    low, high = interval(row)
    assert low - published <= truth <= high + published, (low, row["mean_dist"], high, truth)
    assert low <= row["mean_dist"] <= high
    assert row["weight_sum"] == pytest.approx(1.0)  # one feature of weight 1, spread
    assert row["pair_weight"] == pytest.approx(0.5)  # the model's W²/2: every pair of its weight
    assert f"grid spacing {spacing:g} metre" in row["as_points"]
    # the allowance is first order in the spacing: about 0.77 D per pair for whole cells
    assert high - low <= 1.6 * spacing + 2 * tolerance * truth


def test_default_spacing_meets_the_tolerance_and_is_stated():
    table = toolbox.group_spread(one_feature(SHAPES["square"][0]), as_points="fill", tolerance=0.01)
    row = table.iloc[0]
    low, high = interval(row)
    assert low <= SQUARE <= high
    assert row["rel_bound"] <= 0.01
    assert "the default for the layer and tolerance" in row["as_points"]


def test_default_spacing_follows_the_features_not_the_layer():
    # two unit squares 100 apart, one group each: the default spacing follows the squares, so
    # each group's interval holds the square's published mean within the tolerance
    frame = gpd.GeoDataFrame(
        {"name": ["near", "far"]},
        geometry=[shapely.box(X0, Y0, X0 + 1, Y0 + 1), shapely.box(X0 + 100, Y0, X0 + 101, Y0 + 1)],
        crs=CRS,
    )
    table = toolbox.group_spread(frame, as_points="fill", group_by="name", tolerance=0.01)
    for _, row in table.iterrows():
        low, high = interval(row)
        assert low <= SQUARE <= high and row["rel_bound"] <= 0.01


def test_fill_on_degrees_holds_the_disk_value():
    # a disk of radius 1 km drawn in an azimuthal equidistant projection centred on it, then
    # taken to longitude and latitude: at 1 km the projection's distortion is ~1e-8, far below
    # the bound, so the geodesic mean is 128R/(45π) (MathWorld "Disk Line Picking")
    aeqd = pyproj.CRS.from_proj4("+proj=aeqd +lat_0=-35 +lon_0=150 +datum=WGS84 +units=m")
    disk = gpd.GeoSeries([shapely.Point(0, 0).buffer(1000.0, quad_segs=256)], crs=aeqd).to_crs("EPSG:4326")
    table = toolbox.group_spread(
        gpd.GeoDataFrame(geometry=disk), as_points="fill", fill_spacing=0.001, tolerance=0.01
    )
    row = table.iloc[0]
    low, high = interval(row)
    assert row["units"] == "metre" and "degree" in row["as_points"]
    assert low <= 1000 * DISK <= high
    assert high - low < 0.5 * 1000 * DISK  # degrees scaled by the polar radius: loose but useful


def test_two_groups_of_lines_across():
    # stretches [0, 1] and [2, 3] of one line: every pair is ordered alike, so the mean distance
    # is the distance of the midpoints, 2 (linearity of expectation); each alone: L/3
    lines = gpd.GeoDataFrame(
        {"side": ["west", "east"]},
        geometry=[shapely.LineString([(X0, Y0), (X0 + 1, Y0)]), shapely.LineString([(X0 + 2, Y0), (X0 + 3, Y0)])],
        crs=CRS,
    )
    table = toolbox.cross_spread(lines, group_by="side", as_points="fill", fill_spacing=0.05, tolerance=0)
    for _, row in table.iterrows():
        truth = 1 / 3 if row["from_group"] == row["to_group"] else 2.0
        low, high = row["total_lo"] / (row["total_dist"] / row["mean_dist"]), row["total_hi"] / (
            row["total_dist"] / row["mean_dist"]
        )
        assert low <= truth <= high, (row["from_group"], row["to_group"], low, high)
    assert table["as_points"].str.startswith("fill").all()


def test_feature_remoteness_of_lines():
    # three stretches of one line, [0, 1], [2, 3], [10, 11], each of weight 1: the first one's
    # mean distance to the others is (2 + 10) / 2 = 6 (linearity of expectation, as above)
    starts = [0.0, 2.0, 10.0]
    lines = gpd.GeoDataFrame(
        {"g": ["a"] * 3}, geometry=[shapely.LineString([(X0 + s, Y0), (X0 + s + 1, Y0)]) for s in starts], crs=CRS
    )
    out = toolbox.point_remoteness(lines, group_by="g", as_points="fill", fill_spacing=0.1, tolerance=0.01)
    truth = [np.mean([abs(s - t) for t in starts if t != s]) for s in starts]
    assert (out["remote_lo"] <= np.array(truth)).all() and (np.array(truth) <= out["remote_hi"]).all()
    assert out["remote_avg"].to_numpy() == pytest.approx(truth, rel=0.02)
    assert out["group_n"].tolist() == [3, 3, 3]
    assert out.geometry.equals(lines.geometry)  # the copy keeps every feature as it was


def concave() -> shapely.Polygon:
    """A U shape whose centroid lies in its notch, outside the polygon."""
    return shapely.Polygon([(0, 0), (30, 0), (30, 30), (20, 30), (20, 10), (10, 10), (10, 30), (0, 30)])


def test_centroid_and_inside_on_a_concave_polygon():
    shape = shapely.affinity.translate(concave(), X0, Y0)
    frame = gpd.GeoDataFrame(
        {"pop": [5, 3]}, geometry=[shape, shapely.affinity.translate(shape, 100, 0)], crs=CRS
    )
    with pytest.warns(UserWarning, match="2 centroid"):
        centre = toolbox.group_spread(frame, as_points="centroid", weight="pop", tolerance=0)
    inside = toolbox.group_spread(frame, as_points="inside", weight="pop", tolerance=0)
    assert "may lie outside" in centre["as_points"][0] and inside["as_points"][0].startswith("inside")
    # the centroids are 100 apart (a translation); points on the surface too, by shapely's rule
    assert centre["mean_dist"][0] == pytest.approx(100.0)
    on = shapely.point_on_surface(frame.geometry.values)
    assert shapely.intersects(on, frame.geometry.values).all()
    assert inside["mean_dist"][0] == pytest.approx(shapely.distance(on[0], on[1]))


# --------------------------------------------------------------------------------------------
# regions


def make_points(seed=7, n=400) -> gpd.GeoDataFrame:
    rng = np.random.default_rng(seed)
    return gpd.GeoDataFrame(
        {
            "tenure": rng.choice(["owned", "rented"], n),
            "pop": rng.integers(0, 6, n).astype(float),
        },
        geometry=shapely.points(X0 + rng.uniform(-500, 3500, n), Y0 + rng.uniform(-500, 2500, n)),
        crs=CRS,
    )


def make_regions() -> gpd.GeoDataFrame:
    """Three districts; points west of x = 0 or north of y = 2000 lie in none; 'Empty' holds none."""
    boxes = [(0, 0, 1500, 2000), (1500, 0, 3000, 2000), (5000, 5000, 6000, 6000)]
    return gpd.GeoDataFrame(
        {"code": [11, 12, 13], "dname": ["West", "East", "Empty"]},
        geometry=[shapely.box(X0 + a, Y0 + b, X0 + c, Y0 + d) for a, b, c, d in boxes],
        crs=CRS,
    )


def by_sjoin(points, regions, field):
    """Each point's region by geopandas' spatial join (the reference), NaN outside."""
    hits = gpd.sjoin(points, regions, predicate="within", how="left")
    return hits[field]


def reference_total(xy, w):
    i, j = np.triu_indices(len(xy), k=1)
    return math.fsum(w[i] * w[j] * pdist(xy))  # pdist's order is the upper triangle by rows


def test_regions_group_as_geopandas_sjoin_says(tmp_path):
    points, regions = make_points(), make_regions()
    with pytest.warns(UserWarning, match="lie in no region"):
        table = toolbox.group_spread(
            points, regions=regions, region_id="dname", group_by="tenure", weight="pop", tolerance=0
        )
    region = by_sjoin(points, regions, "dname")
    xy, w = shapely.get_coordinates(points.geometry.values), points["pop"].to_numpy()
    expected = {}
    for (name, tenure), rows in points.groupby([region.fillna("(none)"), "tenure"]).groups.items():
        rows = np.asarray(rows)
        expected[(name, tenure)] = reference_total(xy[rows], w[rows])
    got = {
        ("(none)" if pd.isna(r.dname) else r.dname, r.tenure): r.total_dist for r in table.itertuples()
    }
    assert set(got) == set(expected)
    for key, value in expected.items():
        assert got[key] == pytest.approx(value, rel=1e-12), key
    assert list(table.columns[:2]) == ["dname", "tenure"]


def test_points_outside_dropped_with_a_count():
    points, regions = make_points(), make_regions()
    outside = int(by_sjoin(points, regions, "code").isna().sum())
    with pytest.warns(UserWarning, match=f"{outside} of {len(points)} point"):
        table = toolbox.group_spread(points, regions=regions, region_id="code", outside_regions="drop", tolerance=0)
    assert table["code"].tolist() == [11, 12]
    assert table["n_points"].sum() == len(points) - outside


def test_regions_in_another_crs_are_reprojected_with_a_warning():
    points, regions = make_points(), make_regions()
    with pytest.warns(UserWarning, match="reprojected to the points' CRS"):
        moved = toolbox.group_spread(points, regions=regions.to_crs("EPSG:4326"), region_id="code", tolerance=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        same = toolbox.group_spread(points, regions=regions, region_id="code", tolerance=0)
    assert moved["n_points"].tolist() == same["n_points"].tolist()


def test_cross_spread_between_regions_against_cdist():
    points, regions = make_points(), make_regions()
    with pytest.warns(UserWarning):
        table = toolbox.cross_spread(points, regions=regions, region_id="dname", outside_regions="drop", tolerance=0)
    region = by_sjoin(points, regions, "dname")
    xy = shapely.get_coordinates(points.geometry.values)
    west, east = xy[(region == "West").to_numpy()], xy[(region == "East").to_numpy()]
    row = table[(table.from_group == "West") & (table.to_group == "East")].iloc[0]
    assert row["mean_dist"] == pytest.approx(cdist(west, east).mean(), rel=1e-12)


def test_point_remoteness_within_regions_against_pdist():
    points, regions = make_points(), make_regions()
    with pytest.warns(UserWarning):
        out = toolbox.point_remoteness(points, regions=regions, region_id="code", tolerance=0)
    region = by_sjoin(points, regions, "code")
    xy = shapely.get_coordinates(points.geometry.values)
    members = np.flatnonzero((region == 12).to_numpy())
    d = cdist(xy[members], xy[members])
    expected = d.sum(axis=1) / (members.size - 1)
    assert out["remote_avg"].to_numpy()[members] == pytest.approx(expected, rel=1e-12)
    assert (out["code"].to_numpy()[members] == 12).all()
    assert out["code"].isna().sum() == region.isna().sum()  # the outside group keeps an empty id


@pytest.mark.parametrize("suffix", [".gpkg", ".shp", ".geojson", ".parquet"])
def test_output_on_regions_keeps_every_region(tmp_path, capfd, suffix):
    points, regions = make_points(), make_regions()
    src, zones = tmp_path / "homes.gpkg", tmp_path / "zones.gpkg"
    pyogrio.write_dataframe(points, src, layer="homes")
    pyogrio.write_dataframe(regions, zones, layer="districts")
    out = tmp_path / f"onto{suffix}"
    code = main([
        "group-spread", str(src), "--weight", "pop", "--regions", str(zones), "--region-id", "code",
        "--output-on", "regions", "--output", str(out), "--tolerance", "0",
    ])  # fmt: skip
    err = capfd.readouterr().err
    assert code == 0, err
    written = gpd.read_parquet(out) if suffix == ".parquet" else gpd.read_file(out)
    assert len(written) == 3 and written.crs == regions.crs
    assert written.geometry.geom_equals(regions.geometry).all()  # every region, geometry as it was
    assert written["dname"].tolist() == ["West", "East", "Empty"]
    empty = written[written["code"] == 13].iloc[0]
    assert pd.isna(empty["total_dist"]) and pd.isna(empty["mean_dist"])  # no points: empty values
    if suffix == ".shp":
        assert all(len(c) <= 10 for c in written.columns)
        assert "pair_weigh" in written.columns and re.search(r"pair_weight → pair_weigh", err)
    else:
        assert "pair_weight" in written.columns
    assert written["n_points"].iloc[:2].sum() == (by_sjoin(points, regions, "code").notna()).sum()


def test_output_on_regions_returns_a_geodataframe():
    with pytest.warns(UserWarning):
        result = toolbox.group_spread(
            make_points(), regions=make_regions(), region_id="code", group_by="tenure", output_on="regions"
        )
    assert isinstance(result, gpd.GeoDataFrame)
    # a region appears once per tenure found in it; the empty region once, with empty values
    assert result["code"].tolist() == [11, 11, 12, 12, 13]
    assert result["tenure"].isna().tolist() == [False] * 4 + [True]


# --------------------------------------------------------------------------------------------
# bad input: one clear line each, naming the option


@pytest.fixture
def refused(capfd):
    def run(*args, match):
        capfd.readouterr()
        code = main([str(a) for a in args])
        out, err = capfd.readouterr()
        lines = err.splitlines()
        assert code != 0 and len(lines) == 1 and lines[0].startswith("pairspread: error: "), err
        assert "Traceback" not in err + out and re.search(match, lines[0]), lines[0]
        return lines[0]

    return run


@pytest.fixture
def layers_on_disk(tmp_path):
    src, zones = tmp_path / "homes.gpkg", tmp_path / "zones.gpkg"
    pyogrio.write_dataframe(make_points(), src, layer="homes")
    pyogrio.write_dataframe(make_regions(), zones, layer="districts")
    pyogrio.write_dataframe(
        gpd.GeoDataFrame({"code": [1]}, geometry=[shapely.LineString([(X0, Y0), (X0 + 9, Y0)])], crs=CRS),
        zones, layer="roads",
    )  # fmt: skip
    return src, zones


def test_bad_region_options_each_one_clear_message(layers_on_disk, refused, tmp_path):
    src, zones = layers_on_disk
    base = ["group-spread", src]
    refused(*base, "--regions", zones, "--regions-layer", "districts", match="--regions needs --region-id")
    refused(*base, "--regions", zones, "--regions-layer", "districts", "--region-id", "cod", match="cod")
    refused(*base, "--regions", zones, "--regions-layer", "roads", "--region-id", "code", match="polygon layer")
    refused(*base, "--output-on", "regions", "--output", tmp_path / "x.gpkg", match="needs --regions")
    refused(*base, "--region-id", "code", match="--region-id needs --regions")
    refused(*base, "--regions", zones, "--region-id", "code", "--batch-rows", 100, match="--batch-rows")
    refused(
        *base, "--regions", zones, "--regions-layer", "districts", "--region-id", "code", "--output-on", "regions",
        "--output", tmp_path / "onto.csv", match="layer with geometry.*cannot hold",
    )  # fmt: skip


@pytest.mark.parametrize("spacing", ["0", "-1"])
def test_fill_spacing_must_be_positive(layers_on_disk, refused, tmp_path, spacing):
    zones = layers_on_disk[1]
    refused(
        "group-spread", zones, "--layer", "districts", "--as-points", "fill", f"--fill-spacing={spacing}",
        match=r"--fill-spacing must be a positive number",
    )  # fmt: skip


def test_polygons_without_as_points_name_the_option(layers_on_disk, refused):
    line = refused("group-spread", layers_on_disk[1], "--layer", "districts", match="--as-points")
    assert all(rule in line for rule in ("centroid", "inside", "fill"))


def test_python_messages_name_keywords():
    with pytest.raises(toolbox.errors.ParameterError, match="'fill_spacing' applies to as_points='fill'"):
        toolbox.group_spread(one_feature(shapely.box(0, 0, 1, 1)), fill_spacing=0.1)


def test_spread_contrast_of_polygons_by_their_centroids_against_dcor():
    import dcor

    rng = np.random.default_rng(1)
    centres = shapely.points(X0 + rng.uniform(0, 1000, 60), Y0 + rng.uniform(0, 1000, 60))
    kind = rng.choice(["a", "b"], 60)
    plots = gpd.GeoDataFrame({"kind": kind}, geometry=shapely.buffer(centres, 5.0), crs=CRS)
    table = toolbox.spread_contrast(plots, compare="kind", as_points="centroid", tolerance=0, seed=3)
    xy = shapely.get_coordinates(shapely.centroid(plots.geometry.values))
    # dcor.energy_distance: 2E|X−Y| − E|X−X'| − E|Y−Y'| (V-statistic; Székely & Rizzo 2004)
    expected = dcor.energy_distance(xy[kind == "a"], xy[kind == "b"])
    assert table["energy"][0] == pytest.approx(expected, rel=1e-9)
    with pytest.raises(toolbox.errors.ParameterError, match="as_points='inside'"):
        toolbox.spread_contrast(plots, compare="kind", as_points="fill")


def test_region_ids_missing_duplicated_or_clashing():
    points, regions = make_points(), make_regions()
    blank = regions.assign(dname=["West", None, "Empty"])
    with pytest.raises(toolbox.errors.InputError, match="1 region.*have no 'dname' value"):
        toolbox.group_spread(points, regions=blank, region_id="dname")
    twice = regions.assign(dname=["Both", "Both", "Empty"])
    with pytest.warns(UserWarning, match="share the 'dname' value"):
        table = toolbox.group_spread(points, regions=twice, region_id="dname", outside_regions="drop", tolerance=0)
    assert table["dname"].tolist() == ["Both"]  # one group for the shared value
    with pytest.raises(toolbox.errors.InputError, match="already has a field 'tenure'"):
        toolbox.group_spread(points, regions=regions.assign(tenure=1), region_id="tenure", group_by="tenure")
    with pytest.warns(UserWarning), pytest.raises(toolbox.errors.InputError, match="already has field.*mean_dist"):
        toolbox.group_spread(
            points, regions=regions.assign(mean_dist=1.0), region_id="code", output_on="regions"
        )


def test_point_remoteness_refuses_a_spread_feature_in_two_regions():
    regions = make_regions()
    across = gpd.GeoDataFrame(  # a strip over the edge x = 1500 between West and East
        geometry=[shapely.box(X0 + 1400, Y0 + 100, X0 + 1600, Y0 + 200), shapely.box(X0 + 100, Y0 + 100, X0 + 200, Y0 + 200)],
        crs=CRS,
    )
    with pytest.raises(toolbox.errors.GeometryError, match="several regions.*as_points='inside'"):
        toolbox.point_remoteness(across, regions=regions, region_id="code", as_points="fill", fill_spacing=20.0)
    out = toolbox.point_remoteness(across, regions=regions, region_id="code", as_points="inside")
    assert out["code"].tolist() == [11, 11] or out["code"].tolist() == [12, 11]


def test_cross_spread_matrix_onto_regions_against_cdist(tmp_path, capfd):
    points, regions = make_points(), make_regions()
    src, zones, out = tmp_path / "homes.gpkg", tmp_path / "zones.gpkg", tmp_path / "matrix.gpkg"
    pyogrio.write_dataframe(points, src, layer="homes")
    pyogrio.write_dataframe(regions, zones, layer="districts")
    code = main([
        "cross-spread", str(src), "--regions", str(zones), "--region-id", "dname", "--outside-regions", "drop",
        "--output-on", "regions", "--wide", "--tolerance", "0", "--output", str(out),
    ])  # fmt: skip
    assert code == 0, capfd.readouterr().err
    written = gpd.read_file(out)
    assert written["dname"].tolist() == ["West", "East", "Empty"]  # every region, in layer order
    assert written.geometry.geom_equals(regions.geometry).all()
    region = by_sjoin(points, regions, "dname")
    xy = shapely.get_coordinates(points.geometry.values)
    west, east = xy[(region == "West").to_numpy()], xy[(region == "East").to_numpy()]
    assert written.loc[0, "East"] == pytest.approx(cdist(west, east).mean(), rel=1e-12)  # scipy cdist
    assert pd.isna(written.loc[2, "West"])  # a region without points: empty values
