"""Polygons and lines as points, region joins, nearest distances, provenance and maps.

Layer-level checks against outside references (each named beside its check):
- the fill model's interval (the estimator's sums of the samples, widened by the model's
  allowance in ``toolbox.estimate.pieces``) against the
  mean distance between two uniform points of a disk, a square, a 2 × 3 rectangle and a segment
  (shared/REFERENCES.md: MathWorld's "Disk/Square/Line Line Picking", Mathai, Moschopoulos &
  Pederzoli 1999), with scipy's pdist for the discrete sums;
- the region of each point against ``geopandas.sjoin``;
- nearest distances against ``scipy.spatial.cKDTree`` / brute force and pyproj's geodesics.
"""

from __future__ import annotations

import json
import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from scipy.spatial.distance import cdist, pdist

from toolbox.errors import GeometryError, InputError, OutputError, ParameterError
from toolbox.estimate import Points, pair_sums
from toolbox.kernels.nearest import nearest_geodesic, nearest_planar
from toolbox.layers import provenance, write_output
from toolbox.layers.regions import join_regions, onto_regions
from toolbox.layers.shapes import as_points, default_spacing

# mean distance between two independent uniform points (shared/REFERENCES.md)
DISK = 128 / (45 * math.pi)  # radius 1; MathWorld "Disk Line Picking" (Uspensky 1937; Solomon 1978)
SQUARE = (2 + math.sqrt(2) + 5 * math.log(1 + math.sqrt(2))) / 15  # MathWorld "Square Line Picking"


def rectangle_mean(a: float, b: float) -> float:
    """Mathai, Moschopoulos & Pederzoli (1999) formula for an a × b rectangle."""
    d = math.hypot(a, b)
    return (a**3 / b**2 + b**3 / a**2 + d * (3 - a**2 / b**2 - b**2 / a**2)) / 15 + (
        b**2 / a * math.acosh(d / b) + a**2 / b * math.acosh(d / a)
    ) / 6


def test_rectangle_formula_matches_the_published_value():
    # Mathai, Moschopoulos & Pederzoli (1999): 2 × 3 gives 1.3170674; a square gives SQUARE
    assert rectangle_mean(2, 3) == pytest.approx(1.3170674, abs=1e-7)
    assert rectangle_mean(1, 1) == pytest.approx(SQUARE, rel=1e-12)


def discrete_interval(pts):
    """The fill model's mean interval from the estimator, exact sums of the samples."""
    w = pts.share
    sums = pair_sums(Points.build(pts.x, pts.y, weights=w, shift=pts.shift), tolerance=0)
    # planar samples are their pieces' centroids, so the model's total is at least the samples'
    # (Jensen): the lower bound is their brute-force sum (scipy pdist) over the pair weight W²/2
    weights = np.outer(w, w)[np.triu_indices(w.size, k=1)]
    discrete = float(np.dot(weights, pdist(np.column_stack([pts.x, pts.y]))))
    assert sums.pair_weight[0] == pytest.approx(w.sum() ** 2 / 2)
    assert sums.lower[0] == pytest.approx(discrete, rel=1e-9)
    return sums.lower[0] / sums.pair_weight[0], sums.mean[0], sums.upper[0] / sums.pair_weight[0]


SHAPES = {
    "disk": (shapely.Point(0, 0).buffer(1.0, quad_segs=512), DISK),
    "square": (shapely.box(0, 0, 1, 1), SQUARE),
    "rectangle": (shapely.box(10, 20, 12, 23), 1.3170674),  # Mathai et al. (1999)
    "segment": (shapely.LineString([(0, 0), (3, 4)]), 5 / 3),  # L/3, MathWorld "Line Line Picking"
    "polyline": (shapely.LineString([(0, 0), (2, 0), (2, 0)]), 2 / 3),  # a repeated vertex is harmless
}


@pytest.mark.parametrize("name", list(SHAPES))
@pytest.mark.parametrize("spacing", [0.3, 0.15, 0.075])
def test_fill_interval_holds_the_published_mean(name, spacing):
    geometry, truth = SHAPES[name]
    pts = as_points(gpd.GeoDataFrame(geometry=[geometry]), [], name, rule="fill", spacing=spacing)
    assert pts.share.sum() == pytest.approx(1.0, rel=1e-12)
    low, mean, high = discrete_interval(pts)
    assert low <= truth <= high, (low, mean, high, truth)
    # the bound shrinks with the spacing, as the argument says (first order in D)
    assert high - low <= 3.2 * spacing


def test_square_centre_mean_distance():
    # mean distance from the centre of a unit square to its points, (√2 + ln(1+√2))/6: half the
    # mean distance from a corner (common practice, from the square-line-picking integrals);
    # checked here by a midpoint rule on a fine grid
    from toolbox.layers.shapes import _SQUARE_CENTRE_MEAN

    g = (np.arange(2000) + 0.5) / 2000 - 0.5
    x, y = np.meshgrid(g, g)
    assert np.hypot(x, y).mean() == pytest.approx(_SQUARE_CENTRE_MEAN, rel=1e-6)


def test_fill_weights_follow_area_and_cells_align_across_features():
    left, right = shapely.box(0, 0, 2, 1), shapely.box(2, 0, 3, 1)
    frame = gpd.GeoDataFrame({"pop": [10.0, 30.0]}, geometry=[left, right])
    pts = as_points(frame, ["pop"], "two boxes", rule="fill", spacing=0.5)
    assert np.bincount(pts.feature, pts.share).tolist() == pytest.approx([1.0, 1.0])
    assert (pts.x % 0.5 == 0.25).all()  # one grid for the layer: shared edges cut no cell twice
    assert pts.attributes["pop"].tolist() == [10.0, 30.0]


def test_centroid_and_inside():
    ring = shapely.Point(0, 0).buffer(2).difference(shapely.Point(0, 0).buffer(1))
    frame = gpd.GeoDataFrame(geometry=[ring, shapely.box(5, 5, 7, 7)])
    with pytest.warns(UserWarning, match="1 centroid"):
        centre = as_points(frame, [], "rings", rule="centroid")
    assert centre.x.tolist() == pytest.approx([0.0, 6.0], abs=1e-9)
    inside = as_points(frame, [], "rings", rule="inside")
    assert shapely.intersects(shapely.points(inside.x, inside.y), frame.geometry.values).all()
    assert (inside.shift == 0).all() and inside.spacing is None


def test_fill_refuses_mixed_and_degenerate_layers():
    mixed = gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1, 1), shapely.LineString([(0, 0), (1, 1)])])
    with pytest.raises(GeometryError, match="mixes line and polygon"):
        as_points(mixed, [], "mixed", rule="fill")
    empty = gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1, 1), None])
    with pytest.raises(GeometryError, match="no geometry"):
        as_points(empty, [], "holes", rule="inside")
    with pytest.raises(ParameterError, match="fill.spacing"):
        as_points(gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1, 1)]), [], "x", rule="fill", spacing=-1)
    with pytest.raises(ParameterError, match="larger .fill.spacing"):
        as_points(gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1e5, 1e5)]), [], "x", rule="fill", spacing=1e-2)


def test_default_spacing_follows_tolerance_and_budget():
    square = np.array([shapely.box(0, 0, 300, 300)])
    assert default_spacing(square, 0.01) == pytest.approx(1.0)
    assert default_spacing(square, 0.001) == pytest.approx(300 / math.sqrt(400_000))  # the budget


# ---------------------------------------------------------------------------------------------
# regions


def districts():
    """Invented partition of a 3 × 2 block into three regions, plus one far away."""
    return gpd.GeoDataFrame(
        {"name": ["west", "middle", "east", "islet"], "code": [3, 1, 2, 9]},
        geometry=[
            shapely.box(0, 0, 1, 2),
            shapely.box(1, 0, 2, 2),
            shapely.box(2, 0, 3, 2),
            shapely.box(10, 10, 11, 11),
        ],
        crs="EPSG:32705",
    )


def test_regions_match_geopandas_sjoin(recwarn):
    rng = np.random.default_rng(7)
    x, y = rng.uniform(-0.5, 3.5, 500), rng.uniform(-0.5, 2.5, 500)
    regions = districts()
    join = join_regions(x, y, regions.crs, "points", regions, region_id="name")
    # reference: geopandas.sjoin with 'within' (points strictly inside one region)
    pts = gpd.GeoDataFrame(geometry=shapely.points(x, y), crs=regions.crs)
    ref = gpd.sjoin(pts, regions, predicate="within")["name"]
    assert join.values.iloc[ref.index].tolist() == ref.tolist()
    outside = np.setdiff1d(np.arange(500), ref.index)
    assert join.values.iloc[outside].isna().all()
    assert join.outside == outside.size and join.keep.all()
    assert any("lie in no region" in str(w.message) for w in recwarn)


def test_boundary_points_go_to_the_first_region_in_the_layer():
    regions = districts()
    x, y = np.array([1.0, 2.0, 1.0]), np.array([1.0, 0.5, 2.0])  # on shared edges and a corner
    join = join_regions(x, y, regions.crs, "points", regions, region_id="name")
    assert join.values.tolist() == ["west", "middle", "west"]
    reordered = regions.iloc[[2, 1, 0, 3]]
    join = join_regions(x, y, regions.crs, "points", reordered, region_id="name")
    assert join.values.tolist() == ["middle", "east", "middle"]


def test_points_outside_dropped_with_a_count():
    regions = districts()
    with pytest.warns(UserWarning, match="2 of 3 point.*left out"):
        join = join_regions(
            np.array([0.5, 50, 60]), np.array([0.5, 50, 60]), regions.crs, "p", regions,
            region_id="code", outside="drop",
        )
    assert join.keep.tolist() == [True, False, False]
    assert join.values.iloc[0] == 3


def test_regions_in_another_crs_are_reprojected_with_a_warning():
    regions = districts()
    x, y = np.array([500_000.0, 500_000.4]), np.array([6_120_000.0, 6_120_000.5])
    shifted = regions.set_geometry(regions.translate(500_000 - 0.5, 6_120_000 - 1)).to_crs("EPSG:4326")
    with pytest.warns(UserWarning, match="reprojected"):
        join = join_regions(x, y, regions.crs, "p", shifted, region_id="name")
    assert join.values.tolist() == ["west", "west"]


def test_region_errors_name_the_fix(tmp_path):
    regions = districts()
    with pytest.raises(InputError, match="has no field 'nam'; did you mean 'name'"):
        join_regions(np.zeros(1), np.zeros(1), regions.crs, "p", regions, region_id="nam")
    lines = gpd.GeoDataFrame({"name": ["a"]}, geometry=[shapely.LineString([(0, 0), (1, 1)])], crs=regions.crs)
    with pytest.raises(InputError, match="needs a polygon layer"):
        join_regions(np.zeros(1), np.zeros(1), regions.crs, "p", lines, region_id="name")
    with pytest.raises(InputError, match="Only one of"):
        join_regions(np.zeros(1), np.zeros(1), None, "p", regions, region_id="name")
    with pytest.raises(ParameterError, match="outside.regions"):
        join_regions(np.zeros(1), np.zeros(1), regions.crs, "p", regions, region_id="name", outside="keep")


def test_results_onto_regions_keep_every_region():
    regions = districts()
    join = join_regions(np.array([0.5, 1.5]), np.array([1.0, 1.0]), regions.crs, "p", regions, region_id="code")
    table = pd.DataFrame({"code": pd.array([3, 1], dtype="Int64"), "mean_dist": [1.5, 2.5]})
    out = onto_regions(table, join)
    assert list(out["name"]) == list(regions["name"]) and out.crs == regions.crs
    assert out["mean_dist"].tolist()[:2] == [1.5, 2.5] and out["mean_dist"].iloc[2:].isna().all()
    assert out.geometry.equals(regions.geometry)


# ---------------------------------------------------------------------------------------------
# nearest


def test_nearest_planar_matches_brute_force():
    rng = np.random.default_rng(3)
    q, t = rng.normal(size=(300, 2)) * 100, rng.normal(size=(80, 2)) * 100
    d = nearest_planar(q[:, 0], q[:, 1], t[:, 0], t[:, 1])
    np.testing.assert_allclose(d, cdist(q, t).min(axis=1), rtol=1e-12)  # brute force with scipy cdist
    same = nearest_planar(t[:, 0], t[:, 1], t[:, 0], t[:, 1], same=True)
    full = cdist(t, t)
    np.fill_diagonal(full, np.inf)
    np.testing.assert_allclose(same, full.min(axis=1), rtol=1e-12)


def test_nearest_geodesic_matches_pyproj_brute_force():
    from pyproj import Geod

    rng = np.random.default_rng(5)
    qlon, qlat = rng.uniform(170, 190, 120), rng.uniform(-80, 80, 120)  # across the antimeridian
    tlon, tlat = rng.uniform(170, 190, 60), rng.uniform(-80, 80, 60)
    d = nearest_geodesic(qlon, qlat, tlon, tlat, a=6378137.0, f=1 / 298.257223563)
    geod = Geod(ellps="WGS84")  # Karney (2013), as shared/REFERENCES.md names it
    brute = np.array([min(geod.inv([a] * 60, [b] * 60, tlon, tlat)[2]) for a, b in zip(qlon, qlat, strict=True)])
    np.testing.assert_allclose(d, brute, rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# provenance


@pytest.mark.parametrize("suffix", [".gpkg", ".parquet", ".csv", ".geojson", ".shp"])
def test_every_output_records_how_it_was_made(tmp_path, suffix):
    record = provenance("group-spread", {"data": "in.gpkg", "layer": "homes", "tolerance": 0.01, "weight": "pop"})
    frame = gpd.GeoDataFrame({"mean_dist": [1.0]}, geometry=[shapely.Point(0, 0)], crs="EPSG:32705")
    table = frame if suffix in (".geojson", ".shp") else pd.DataFrame(frame.drop(columns="geometry"))
    path = tmp_path / f"out{suffix}"
    write_output(table, str(path), what="layer" if suffix in (".geojson", ".shp") else "table",
                 layer_name="result", record=record)
    if suffix == ".gpkg":
        import sqlite3

        with sqlite3.connect(path) as db:
            description = db.execute("select description from gpkg_contents where table_name='result'").fetchone()[0]
            rows = [r[0] for r in db.execute("select metadata from gpkg_metadata")]
        assert "group-spread" in description and "in.gpkg" in description
        assert any("pairspread" in r and "tolerance" in r for r in rows)
    elif suffix == ".parquet":
        import pyarrow.parquet as pq

        stored = json.loads(pq.read_schema(path).metadata[b"pairspread"])
        assert stored["script"] == "group-spread" and stored["weight"] == "pop"
    elif suffix == ".geojson":
        assert json.loads(json.loads(path.read_text())["description"])["layer"] == "homes"
    else:
        stored = json.loads((tmp_path / f"out{suffix}.json").read_text())
        assert stored["parameters"]["tolerance"] == 0.01 and stored["input_crs"] is None
    assert record["made_by"].startswith("pairspread")


def test_sidecar_is_not_overwritten_without_overwrite(tmp_path):
    (tmp_path / "out.csv.json").write_text("mine")
    record = provenance("group-spread", {"data": "in.gpkg"})
    with pytest.raises(OutputError, match="no_sidecar=True"):
        write_output(pd.DataFrame({"a": [1]}), str(tmp_path / "out.csv"), record=record)
    write_output(pd.DataFrame({"a": [1]}), str(tmp_path / "out.csv"), record=record, sidecar=False)
    assert (tmp_path / "out.csv.json").read_text() == "mine"


def test_no_layer_is_touched_by_provenance(tmp_path):
    path = tmp_path / "keep.gpkg"
    pyogrio.write_dataframe(districts(), path, layer="regions")
    record = provenance("group-spread", {"data": str(path), "layer": "regions"})
    assert record["input_crs"].endswith("32705")
    write_output(pd.DataFrame({"a": [1]}), str(path), layer_name="result", record=record)
    assert set(pyogrio.list_layers(path)[:, 0]) == {"regions", "result"}


# ---------------------------------------------------------------------------------------------
# maps: read back the PNG (size, not blank, the colour bar's colours present)


def _png(path):
    import matplotlib.image

    return matplotlib.image.imread(path)


def test_area_map_has_colour_bar_and_is_not_blank(tmp_path):
    from toolbox.maps import _PALETTE, draw_map

    regions = districts()
    regions["mean_dist"] = [1.0, 2.0, np.nan, 3.0]
    regions["units"] = "metre"
    path = draw_map("group-spread", regions, str(tmp_path / "map.png"), shapes="regions")
    image = _png(path)
    assert image.shape[0] > 400 and image.shape[1] > 500
    rgb = image[..., :3].reshape(-1, 3)
    assert rgb.std() > 0.05  # not one flat colour
    # both ends of the palette appear (the colour bar spans them), within PNG rounding
    for colour in (_PALETTE[0], _PALETTE[-1]):
        target = np.array([int(colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])
        assert (np.abs(rgb - target).max(axis=1) < 0.02).any(), colour


def test_map_refuses_other_suffixes_and_existing_files(tmp_path):
    from toolbox.maps import check_map

    with pytest.raises(ParameterError, match=r"\.png"):
        check_map(str(tmp_path / "map.pdf"))
    (tmp_path / "map.png").write_bytes(b"mine")
    with pytest.raises(OutputError, match="overwrite=True"):
        check_map(str(tmp_path / "map.png"))


def test_map_without_matplotlib_names_the_install_command(monkeypatch):
    import builtins

    from toolbox import maps

    real = builtins.__import__

    def refuse(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError("No module named 'matplotlib'")
        return real(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", refuse)
    with pytest.raises(ParameterError, match=r"pip install 'pairspread\[maps\]'"):
        maps.check_map("x.png")


def test_provenance_of_layers_in_memory():
    frame = gpd.GeoDataFrame({"a": [1]}, geometry=[shapely.Point(0, 0)], crs="EPSG:32705")
    record = provenance("cross-spread", {"data": frame, "to": frame, "group_by": [], "wide": False})
    assert record["input"] == "a GeoDataFrame of 1 features" and record["input_crs"].endswith("32705")
    assert record["parameters"] == {"to": "a GeoDataFrame of 1 features"}
