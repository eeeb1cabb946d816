"""``--map`` on every script and ``--group-shape`` on group-spread and cross-spread, end to end.

Maps are checked by reading the PNG back (matplotlib.image): its size, that it is not one flat
colour, and that the colour bar is there: both ends of the pack's palette appear in a tall,
narrow run of pixels (the bar's gradient). Group shapes are checked against outside references:
the hull against shapely's ``convex_hull`` of the group's points (computed here through
geopandas' ``dissolve``), the planar centre against ``numpy.average`` with the weights, and the
geodesic centre across the antimeridian against the midpoint of the geodesic between two points
from ``pyproj.Geod`` (Karney's algorithm).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely

import toolbox
from toolbox.errors import OutputError, ParameterError
from toolbox.maps import _PALETTE


def _png(path):
    import matplotlib.image

    return matplotlib.image.imread(str(path))[..., :3]


def _rgb(colour: str) -> np.ndarray:
    return np.array([int(colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])


def _has_colour_bar(image) -> bool:
    """Some column holds a tall run of the palette's gradient that reaches both of its ends."""
    from toolbox.maps import _colormap

    shades = _colormap()(np.linspace(0, 1, 64))[:, :3]
    ends = [_rgb(_PALETTE[0]), _rgb(_PALETTE[-1])]
    both = [(np.abs(image - end).max(axis=2) < 0.03).any(axis=0) for end in ends]
    for column in np.flatnonzero(both[0] & both[1]):  # columns holding both ends of the palette
        pixels = image[:, column]
        on_palette = np.abs(pixels[:, None, :] - shades[None]).max(axis=2).min(axis=1) < 0.02
        if on_palette.sum() < 150:
            continue
        if all((np.abs(pixels[on_palette] - end).max(axis=1) < 0.03).any() for end in ends):
            return True
    return False


def _assert_picture(path, *, colour_bar: bool = True) -> None:
    image = _png(path)
    assert image.shape[0] >= 300 and image.shape[1] >= 500, image.shape
    assert image.reshape(-1, 3).std(axis=0).max() > 0.05  # not blank
    if colour_bar:
        assert _has_colour_bar(image)


# --------------------------------------------------------------------------------------------
# one map per script


SCRIPTS = {
    "group-spread": (["--group-by", "zone", "--weight", "pop"], True),
    "group-spread-centre": (["--group-by", "zone", "--group-shape", "centre"], True),
    "point-remoteness": (["--group-by", "zone", "--output", "{tmp}/remote.gpkg"], True),
    "cross-spread": (["--group-by", "zone"], True),
    "cross-spread-nearest-matrix": (["--group-by", "zone", "--nearest"], True),
    "cross-spread-nearest-bars": (["--group-by", "tenure", "--to", "{gpkg}", "--to-layer", "sites", "--nearest"], False),
    "spread-contrast": (["--compare", "tenure", "--permutations", "19", "--seed", "3"], True),
    "keep-rows": (["--where", "zone = 'harbour'", "--output", "{tmp}/kept.gpkg"], False),
}


@pytest.mark.parametrize("case", list(SCRIPTS))
def test_every_script_draws_a_map(run_main, tmp_path, homes_gpkg, case):
    args, colour_bar = SCRIPTS[case]
    script = case.split("-nearest")[0].removesuffix("-centre")
    args = [a.format(tmp=tmp_path, gpkg=homes_gpkg.path) for a in args]
    picture = tmp_path / "map.png"
    code, out, err = run_main(script, *homes_gpkg.args, *args, "--map", picture)
    assert code == 0, err
    assert f"drew the map in {picture}" in err
    _assert_picture(picture, colour_bar=colour_bar)


def test_map_of_group_spread_leaves_the_table_a_table(tmp_path, homes_gpkg):
    # the hulls are drawn, but the result (and a CSV output) stay the plain table asked for
    result = toolbox.group_spread(
        homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", output=str(tmp_path / "t.csv"),
        map=str(tmp_path / "m.png"),
    )  # fmt: skip
    assert not isinstance(result, gpd.GeoDataFrame)
    assert "geometry" not in pd.read_csv(tmp_path / "t.csv").columns
    _assert_picture(tmp_path / "m.png")


# --------------------------------------------------------------------------------------------
# bad input: one clear line each, and nothing computed or written


BAD_MAPS = {
    "missing folder": (["--map", "{tmp}/nowhere/map.png"], "folder of --map .* does not exist"),
    "existing map": (["--map", "{tmp}/old.png"], "already exists; pass --overwrite"),
    "not png": (["--map", "{tmp}/map.jpg"], r"--map must name a \.png file"),
    "csv with shapes": (["--group-shape", "hull", "--output", "{tmp}/t.csv"], r"\.gpkg, \.shp, \.geojson, \.parquet"),
    "streamed shapes": (["--group-shape", "hull", "--batch-rows", "50"], "--group-shape needs the whole layer"),
}


@pytest.mark.parametrize("case", list(BAD_MAPS))
def test_bad_map_and_shape_options_are_one_clear_line(run_main, tmp_path, homes_gpkg, case):
    args, message = BAD_MAPS[case]
    (tmp_path / "old.png").write_bytes(b"mine")
    code, out, err = run_main(
        "group-spread", *homes_gpkg.args, "--group-by", "zone", *[a.format(tmp=tmp_path) for a in args]
    )
    lines = err.strip().splitlines()
    assert code != 0 and len(lines) == 1 and lines[0].startswith("pairspread: error:"), err
    assert __import__("re").search(message, lines[0]), lines[0]
    assert (tmp_path / "old.png").read_bytes() == b"mine"
    assert not (tmp_path / "t.csv").exists()


def test_wide_cross_table_and_a_map_are_refused_before_computing(run_main, tmp_path, homes_gpkg):
    code, _, err = run_main(
        "cross-spread", *homes_gpkg.args, "--group-by", "zone", "--wide", "--map", tmp_path / "m.png",
        "--output", tmp_path / "w.csv",
    )  # fmt: skip
    assert code != 0 and "drop --wide" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "w.csv").exists()


def test_python_callers_get_keyword_words(tmp_path, homes_gpkg):
    (tmp_path / "old.png").write_bytes(b"mine")
    with pytest.raises(OutputError, match=r"overwrite=True"):
        toolbox.group_spread(homes_gpkg.path, **homes_gpkg.kwargs, map=str(tmp_path / "old.png"))
    with pytest.raises(ParameterError, match=r"'map' must name a \.png file"):
        toolbox.cross_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", map="m.svg")


# --------------------------------------------------------------------------------------------
# group shapes against outside references


def test_hull_is_shapely_convex_hull_of_each_group(homes_gpkg, homes):
    result = toolbox.group_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", group_shape="hull")
    assert isinstance(result, gpd.GeoDataFrame) and result.crs == homes.crs
    # reference: geopandas dissolve (a union of each group's points) then shapely's convex_hull
    expected = homes.dissolve(by="zone", dropna=False).convex_hull
    for zone, geometry in zip(result["zone"], result.geometry, strict=True):
        key = np.nan if zone is None or (isinstance(zone, float) and np.isnan(zone)) else zone
        reference = expected[expected.index.isna()].iloc[0] if key is np.nan else expected[key]
        assert shapely.equals_exact(shapely.normalize(geometry), shapely.normalize(reference), 1e-6), zone
    kinds = dict(zip(result["zone"], result.geom_type, strict=True))
    assert kinds["lone"] == "Point" and kinds["harbour"] == "Polygon"


def test_centre_is_the_weighted_mean(homes_gpkg, homes):
    result = toolbox.group_spread(
        homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", weight="pop", group_shape="centre"
    )
    for zone in ("harbour", "upland", "ridge"):
        part = homes[homes["zone"] == zone]
        # reference: numpy's weighted average of the coordinates
        x = np.average(part.geometry.x, weights=part["pop"])
        y = np.average(part.geometry.y, weights=part["pop"])
        got = result.geometry[result["zone"] == zone].iloc[0]
        assert abs(got.x - x) < 1e-6 and abs(got.y - y) < 1e-6


@pytest.mark.filterwarnings("ignore:Shapefile field names")
@pytest.mark.filterwarnings("ignore:A Shapefile holds one kind")
@pytest.mark.parametrize("suffix", [".gpkg", ".shp", ".geojson", ".parquet"])
def test_group_shapes_are_written_as_a_layer(tmp_path, homes_gpkg, suffix):
    out = tmp_path / f"hulls{suffix}"
    result = toolbox.group_spread(
        homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", group_shape="hull", output=str(out)
    )
    back = gpd.read_parquet(out) if suffix == ".parquet" else pyogrio.read_dataframe(out)
    assert len(back) == len(result) and back.crs == result.crs
    assert back.geometry.area.sum() == pytest.approx(result.geometry.area.sum(), rel=1e-9)
    # a Shapefile holds polygons only here: the one-point group's hull is written without one
    points = (result.geom_type == "Point").to_numpy()
    assert points.any()
    assert back.geometry[points].isna().all() if suffix == ".shp" else (back.geom_type[points] == "Point").all()


def test_geodesic_centre_and_hull_across_the_antimeridian():
    lon = np.array([179.5, -179.5, 179.8, -179.8])
    lat = np.array([-16.0, -16.0, -16.4, -16.4])
    frame = gpd.GeoDataFrame({"w": [1.0, 1.0, 0.0, 0.0]}, geometry=shapely.points(lon, lat), crs="EPSG:4326")
    result = toolbox.group_spread(frame, weight="w", group_shape="centre", tolerance=0)
    centre = result.geometry.iloc[0]
    # reference: the midpoint of the geodesic between the two weighted points (pyproj.Geod);
    # a mean of longitudes would put the centre near 0°, on the other side of the Earth
    geod = pyproj.Geod(ellps="WGS84")
    azimuth, _, length = geod.inv(179.5, -16.0, -179.5, -16.0)
    mid_lon, mid_lat, _ = geod.fwd(179.5, -16.0, azimuth, length / 2)
    assert geod.inv(centre.x, centre.y, mid_lon, mid_lat)[2] < 50.0  # metres, over a 107 km pair
    hull = toolbox.group_spread(frame, group_shape="hull", tolerance=0).geometry.iloc[0]
    assert hull.area < 1.0  # square degrees: a small polygon, not one around the Earth
    assert hull.bounds[0] == pytest.approx(179.5) and hull.bounds[2] == pytest.approx(180.5)


def test_cross_spread_rows_carry_their_from_group_shape(homes_gpkg, homes):
    result = toolbox.cross_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", group_shape="hull")
    harbour = shapely.MultiPoint(homes[homes["zone"] == "harbour"].geometry.tolist()).convex_hull
    rows = result[result["from_group"] == "harbour"]
    assert len(rows) == 5 and all(shapely.equals_exact(g, harbour, 1e-6) or g.equals(harbour) for g in rows.geometry)
    wide = toolbox.cross_spread(
        homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", group_shape="centre", wide=True
    )
    assert isinstance(wide, gpd.GeoDataFrame) and (wide.geom_type == "Point").all()


def test_a_chain_checks_every_map_before_the_first_step_runs(run_main, tmp_path, homes_gpkg):
    chain = tmp_path / "chain.toml"
    chain.write_text(
        "pairspread_chain = 1\n"
        "[steps.first]\n"
        'script = "group-spread"\n'
        f'params = {{ data = "{homes_gpkg.path.name}", layer = "homes", group_by = "zone", output = "first.csv" }}\n'
        "[steps.second]\n"
        'script = "cross-spread"\n'
        f'params = {{ data = "{homes_gpkg.path.name}", layer = "homes", group_by = "zone", map = "nowhere/m.png" }}\n'
    )
    code, _, err = run_main("chain", chain)
    lines = err.strip().splitlines()
    assert code != 0 and len(lines) == 1 and "step 'second'" in lines[0] and "does not exist" in lines[0], err
    assert not (tmp_path / "first.csv").exists()


def test_cross_spread_on_the_regions_draws_its_matrix(tmp_path, homes):
    # every home in one of two invented square regions; the rows are written onto the regions
    x0, y0 = homes.total_bounds[:2]
    x1, y1 = homes.total_bounds[2:]
    mid = (x0 + x1) / 2
    regions = gpd.GeoDataFrame(
        {"area": ["west", "east"]},
        geometry=[shapely.box(x0 - 1, y0 - 1, mid, y1 + 1), shapely.box(mid, y0 - 1, x1 + 1, y1 + 1)],
        crs=homes.crs,
    )
    result = toolbox.cross_spread(
        homes, regions=regions, region_id="area", output_on="regions", map=str(tmp_path / "m.png")
    )
    assert "from_group" not in result.columns and "area" in result.columns
    _assert_picture(tmp_path / "m.png")
