"""Bad input (issue 6): every case gets a clear one-line message or a documented result.

A refused case exits non-zero with exactly one line on stderr starting ``pairspread: error:``,
no traceback, and nothing written anywhere in the test's folder. A case that is accepted has its
result checked against scipy's brute-force distances (``scipy.spatial.distance.pdist`` and
``cdist``), never against pairspread itself. docs/reliability.md lists every case with the name
of its test here.

The layers are an invented scenario (homes of the fictional Isle of Quenwick) built per test.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import re
import subprocess
import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from pyogrio.raw import write as raw_write
from scipy.spatial.distance import cdist, pdist

import toolbox
from toolbox.cli import main

CRS = "EPSG:32705"  # WGS 84 / UTM zone 5S
X0, Y0 = 500_000.0, 6_120_000.0
SCRIPTS = ("group-spread", "point-remoteness", "cross-spread")


# --------------------------------------------------------------------------------------------
# helpers


def snapshot(folder: Path) -> dict[str, str]:
    """sha256 of every file below ``folder`` (hidden files too)."""
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(Path(folder).rglob("*"))
        if p.is_file()
    }


def homes(n: int = 60, seed: int = 4) -> gpd.GeoDataFrame:
    """Invented homes in three districts, with a resident count."""
    rng = np.random.default_rng(seed)
    return gpd.GeoDataFrame(
        {
            "district": rng.choice(["Brinewell", "Mossford", "Thornap"], n),
            "residents": rng.integers(1, 7, n).astype(np.int64),
        },
        geometry=shapely.points(X0 + rng.uniform(0, 2000, n), Y0 + rng.uniform(0, 1500, n)),
        crs=CRS,
    )


def write(frame: gpd.GeoDataFrame, path: Path, **kwargs) -> Path:
    pyogrio.write_dataframe(frame, path, **kwargs)
    return path


def output_args(script: str, folder: Path) -> list[str]:
    """An output for each script (point-remoteness always needs one)."""
    return ["--output", str(folder / "far.gpkg")] if script == "point-remoteness" else []


def pair_total(xy: np.ndarray, w: np.ndarray | None = None) -> float:
    """Σ_{i<j} w_i w_j d_ij by brute force with scipy's pdist (the definition of the total)."""
    d = pdist(xy)
    if w is None:
        return math.fsum(d)
    i, j = np.triu_indices(len(xy), k=1)  # pdist's condensed order: the upper triangle by rows
    return math.fsum(w[i] * w[j] * d)


@pytest.fixture
def fails(tmp_path, capfd):
    """Run the CLI in-process; check the one-line error and that no file below tmp_path changed."""

    def run(*args, match=()):
        before = snapshot(tmp_path)
        capfd.readouterr()
        code = main([str(a) for a in args])
        out, err = capfd.readouterr()
        assert code != 0, out
        assert "Traceback" not in err + out
        lines = err.splitlines()
        assert len(lines) == 1, err
        line = lines[0]
        assert line.startswith("pairspread: error: "), line
        assert "unexpected" not in line, line  # the catch-all for bugs
        for pattern in match:
            assert re.search(pattern, line), (pattern, line)
        assert snapshot(tmp_path) == before, "a refused run changed, added or removed files"
        return line

    return run


@pytest.fixture
def runs(capfd):
    """Run the CLI in-process; returns (stdout, stderr lines) of a successful run."""

    def run(*args):
        capfd.readouterr()
        code = main([str(a) for a in args])
        out, err = capfd.readouterr()
        assert code == 0, err
        assert "Traceback" not in err
        return out, err.splitlines()

    return run


def csv_table(text: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text))


# --------------------------------------------------------------------------------------------
# layers without usable points


def test_empty_layer_gives_empty_results(tmp_path, runs):
    # documented result: no points, no pairs: null distances (one row without --group-by,
    # no rows with it), an empty output layer, and no error
    empty = gpd.GeoDataFrame(
        {"district": pd.Series([], dtype=object), "residents": pd.Series([], dtype=np.int64)},
        geometry=gpd.GeoSeries([], crs=CRS),
    )
    path = write(empty, tmp_path / "empty.gpkg", layer="homes", geometry_type="Point")
    out, err = runs("group-spread", path, "--output", "-")
    assert err == []  # no warnings either
    table = csv_table(out)
    assert len(table) == 1 and table["n_points"].tolist() == [0]
    assert table[["total_dist", "total_lo", "total_hi", "mean_dist"]].isna().all(axis=None)
    out, _ = runs("group-spread", path, "--group-by", "district", "--weight", "residents", "--output", "-")
    assert len(csv_table(out)) == 0 and "district" in out.splitlines()[0]
    runs("point-remoteness", path, "--output", tmp_path / "far.gpkg", "--quiet")
    far = pyogrio.read_dataframe(tmp_path / "far.gpkg")
    assert len(far) == 0 and {"remote_avg", "remote_lo", "remote_hi"} <= set(far.columns)
    out, err = runs("cross-spread", path, "--group-by", "district", "--output", "-")
    assert len(csv_table(out)) == 0 and err == []
    out, err = runs("cross-spread", path, "--to", path, "--output", "-")
    assert csv_table(out)["n_from"].tolist() == [0] and err == []


@pytest.mark.parametrize("script", SCRIPTS)
@pytest.mark.parametrize("kind", ["null", "empty"])
def test_layer_with_only_null_or_empty_geometries(tmp_path, fails, script, kind):
    frame = homes(5)
    if kind == "null":
        path = write(frame.set_geometry([None] * 5, crs=CRS), tmp_path / "nothing.geojson")
    else:
        path = write(frame.set_geometry([shapely.Point()] * 5, crs=CRS), tmp_path / "nothing.gpkg")
    args = [script, path, *(["--group-by", "district"] if script == "cross-spread" else [])]
    fails(*args, *output_args(script, tmp_path), match=["5 of 5 features", "no geometry"])


@pytest.mark.parametrize("script", SCRIPTS)
def test_mixed_geometry_types(tmp_path, fails, script):
    frame = homes(12)
    geoms = list(frame.geometry)
    geoms[1] = shapely.LineString([(X0, Y0), (X0 + 50, Y0 + 20)])
    geoms[4] = shapely.LineString([(X0 + 5, Y0), (X0 + 90, Y0 + 20)])
    geoms[7] = shapely.box(X0, Y0, X0 + 10, Y0 + 10)
    path = write(frame.set_geometry(geoms), tmp_path / "mixed.geojson")
    args = [script, path, *(["--group-by", "district"] if script == "cross-spread" else [])]
    fails(
        *args,
        *output_args(script, tmp_path),
        match=[r"3 feature\(s\) that are not points", "2 LineString", "1 Polygon"],
    )


def _multipoints(seed: int = 5) -> gpd.GeoDataFrame:
    rng = np.random.default_rng(seed)
    geoms = [
        shapely.multipoints(np.c_[X0 + rng.uniform(0, 900, k), Y0 + rng.uniform(0, 600, k)])
        for k in (3, 1, 4)
    ]
    geoms += list(shapely.points(X0 + rng.uniform(0, 900, 3), Y0 + rng.uniform(0, 600, 3)))
    return gpd.GeoDataFrame({"residents": [2, 1, 3, 5, 1, 4]}, geometry=geoms, crs=CRS)


def test_multipoint_is_split_into_points_for_group_spread(tmp_path, runs):
    frame = _multipoints()
    path = write(frame, tmp_path / "multi.gpkg")
    out, _ = runs("group-spread", path, "--weight", "residents", "--tolerance", "0", "--output", "-")
    table = csv_table(out)
    # every point of a MultiPoint counts, carrying its feature's weight
    xy, feature = shapely.get_coordinates(frame.geometry.values, return_index=True)
    w = frame["residents"].to_numpy(float)[feature]
    assert table["n_points"].tolist() == [3 + 1 + 4 + 3]
    assert table["total_dist"][0] == pytest.approx(pair_total(xy, w), rel=1e-12)


def test_multipoint_with_several_points_is_refused_by_point_remoteness(tmp_path, fails):
    path = write(_multipoints(), tmp_path / "multi.gpkg")
    fails(
        "point-remoteness",
        path,
        "--output",
        tmp_path / "far.gpkg",
        match=[r"2 MultiPoint feature\(s\)", "several points", "split them"],
    )


def test_single_point_multipoints_are_fine_for_point_remoteness(tmp_path, runs):
    frame = _multipoints()
    frame = frame[shapely.get_num_geometries(frame.geometry.values) == 1].reset_index(drop=True)
    path = write(frame, tmp_path / "single.gpkg")
    runs("point-remoteness", path, "--tolerance", "0", "--output", tmp_path / "far.gpkg", "--quiet")
    far = pyogrio.read_dataframe(tmp_path / "far.gpkg")
    xy = shapely.get_coordinates(frame.geometry.values)
    d = cdist(xy, xy)  # scipy: each feature's distances to the others
    np.testing.assert_allclose(far["remote_avg"], d.sum(axis=1) / (len(xy) - 1), rtol=1e-12)


# --------------------------------------------------------------------------------------------
# Z and M coordinates


def _z_layer(tmp_path: Path) -> tuple[Path, np.ndarray]:
    frame = homes(40)
    xy = shapely.get_coordinates(frame.geometry.values)
    z = np.random.default_rng(1).uniform(0, 800, len(xy))  # heights up to 800 m: would matter in 3-D
    path = write(frame.set_geometry(shapely.points(xy[:, 0], xy[:, 1], z), crs=CRS), tmp_path / "hills.gpkg")
    assert pyogrio.read_info(path)["geometry_type"] == "Point Z"  # precondition
    return path, xy


def test_z_coordinates_are_ignored(tmp_path, runs):
    path, xy = _z_layer(tmp_path)
    out, _ = runs("group-spread", path, "--tolerance", "0", "--output", "-")
    # planar distances: scipy's pdist on x and y only
    assert csv_table(out)["total_dist"][0] == pytest.approx(pair_total(xy), rel=1e-12)


def test_z_coordinates_are_ignored_with_a_note(tmp_path, runs):
    path, _ = _z_layer(tmp_path)
    _, err = runs("group-spread", path, "--tolerance", "0", "--output", "-")
    assert any(line.startswith("pairspread: warning: ") and re.search(r"\bZ\b", line) for line in err), err


def test_m_coordinates_are_ignored_with_the_readers_note(tmp_path, runs):
    # documented result: GDAL reads measured (M) points, pyogrio drops M with its own warning,
    # shown as a warning line; distances use x and y
    frame = homes(30)
    xy = shapely.get_coordinates(frame.geometry.values)
    m = np.arange(30.0)
    wkt = [f"POINT M ({float(x)!r} {float(y)!r} {float(v)!r})" for (x, y), v in zip(xy, m, strict=True)]
    wkb = shapely.to_wkb(shapely.from_wkt(wkt), flavor="iso")
    path = tmp_path / "measured.gpkg"
    raw_write(
        path,
        geometry=np.asarray(wkb, dtype=object),
        field_data=[frame["residents"].to_numpy()],
        fields=["residents"],
        driver="GPKG",
        geometry_type="PointM",
        crs=CRS,
    )
    out, err = runs("group-spread", path, "--tolerance", "0", "--output", "-")
    assert csv_table(out)["total_dist"][0] == pytest.approx(pair_total(xy), rel=1e-12)
    assert err and all(line.startswith("pairspread: warning: ") and "(M)" in line for line in err), err


# --------------------------------------------------------------------------------------------
# coordinates and weights


@pytest.mark.parametrize("script", SCRIPTS)
def test_nan_or_infinite_coordinates(tmp_path, fails, script):
    frame = homes(20)
    xy = shapely.get_coordinates(frame.geometry.values)
    xy[3, 0], xy[8, 1], xy[11, 0] = np.nan, np.inf, -np.inf
    path = write(frame.set_geometry(shapely.points(xy), crs=CRS), tmp_path / "broken.gpkg")
    args = [script, path, *(["--group-by", "district"] if script == "cross-spread" else [])]
    fails(
        # the GeoPackage's FIDs (from 1), which a user looks features up by; not 0-based rows
        *args, *output_args(script, tmp_path), match=[r"3 feature\(s\)", "NaN or infinite", "FIDs 4, 9, 12"]
    )


@pytest.mark.parametrize("script", SCRIPTS)
@pytest.mark.parametrize(
    ("value", "what"),
    [(-2.0, "negative"), (None, "null or NaN"), ("three", "not numbers")],
    ids=["negative", "null", "string"],
)
def test_bad_weights_in_a_file(tmp_path, fails, script, value, what):
    frame = homes(20)
    frame["residents"] = frame["residents"].astype(object if isinstance(value, str) else float)
    frame.loc[[2, 9], "residents"] = value
    path = write(frame, tmp_path / "weights.gpkg")
    args = [
        script,
        path,
        "--weight",
        "residents",
        *(["--group-by", "district"] if script == "cross-spread" else []),
    ]
    line = fails(*args, *output_args(script, tmp_path), match=["'residents'", what])
    if not isinstance(value, str):
        assert "FIDs 3, 10" in line  # the GeoPackage's FIDs, from 1
    # with a filter the FIDs are still the layer's own
    line = fails(*args, "--where", "fid > 5", *output_args(script, tmp_path), match=["'residents'", what])
    if not isinstance(value, str):
        assert "FID 10" in line and "FIDs" not in line


@pytest.mark.parametrize("script", ["group_spread", "cross_spread"])
def test_nan_weight_in_memory(script):
    # a float NaN (not a NULL) only reaches us in memory: a GeoPackage stores NaN as NULL
    frame = homes(20)
    frame["residents"] = frame["residents"].astype(float)
    frame.loc[6, "residents"] = np.nan
    frame.index = frame.index + 100  # a GeoDataFrame's features are named by its index labels
    with pytest.raises(toolbox.InputError, match=r"null or NaN weight in 'residents' \(index 106\)"):
        getattr(toolbox, script)(frame, weight="residents", group_by="district")


def test_numbers_stored_as_text_are_not_weights(tmp_path, fails):
    # documented result: a text field is refused even when its values look like numbers
    frame = homes(10)
    frame["residents"] = frame["residents"].astype(str)
    path = write(frame, tmp_path / "text_weights.gpkg")
    fails("group-spread", path, "--weight", "residents", match=["'residents'", "not numbers"])


def test_all_weights_zero_give_null_distances(tmp_path, runs):
    frame = homes(30)
    frame["residents"] = 0
    path = write(frame, tmp_path / "zero.gpkg")
    out, err = runs("group-spread", path, "--group-by", "district", "--weight", "residents", "--output", "-")
    table = csv_table(out)
    assert err == []  # no division warnings
    assert (table["pair_weight"] == 0).all() and (table["weight_sum"] == 0).all()
    assert table[["total_dist", "total_lo", "total_hi", "mean_dist", "rel_bound"]].isna().all(axis=None)
    assert table["n_points"].sum() == 30
    _, err = runs(
        "point-remoteness", path, "--weight", "residents", "--output", tmp_path / "far.gpkg", "--quiet"
    )
    assert err == []
    far = pyogrio.read_dataframe(tmp_path / "far.gpkg")
    assert far[["remote_avg", "remote_lo", "remote_hi", "remote_idx"]].isna().all(axis=None)
    out, err = runs("cross-spread", path, "--group-by", "district", "--weight", "residents", "--output", "-")
    assert err == [] and csv_table(out)[["total_dist", "mean_dist"]].isna().all(axis=None)


# --------------------------------------------------------------------------------------------
# groups, fields and layers


def test_null_group_values_form_their_own_group(tmp_path, runs):
    frame = homes(40)
    frame["district"] = frame["district"].astype(object)
    frame.loc[[1, 5, 6, 20], "district"] = None
    path = write(frame, tmp_path / "nulls.gpkg")
    out, _ = runs("group-spread", path, "--group-by", "district", "--tolerance", "0", "--output", "-")
    table = csv_table(out)
    null_row = table[table["district"].isna()]
    assert len(null_row) == 1 and null_row["n_points"].item() == 4
    xy = shapely.get_coordinates(frame.geometry.values)
    assert null_row["total_dist"].item() == pytest.approx(pair_total(xy[[1, 5, 6, 20]]), rel=1e-12)
    assert table["n_points"].sum() == 40


@pytest.mark.parametrize("script", SCRIPTS)
def test_missing_group_field_suggests_close_matches(tmp_path, fails, script):
    path = write(homes(10), tmp_path / "homes.gpkg")
    fails(
        script,
        path,
        "--group-by",
        "distrct",
        *output_args(script, tmp_path),
        match=["no field 'distrct'", "did you mean 'district'"],
    )


@pytest.mark.parametrize("script", SCRIPTS)
def test_missing_layer_lists_the_layers(tmp_path, fails, script):
    path = write(homes(10), tmp_path / "island.gpkg", layer="homes")
    write(homes(5, seed=2), path, layer="wells")
    fails(
        script,
        path,
        "--layer",
        "rivers",
        "--group-by",
        "district",
        *output_args(script, tmp_path),
        match=["no layer 'rivers'", "'homes'", "'wells'"],
    )


def test_shapefile_output_with_colliding_field_names(tmp_path, fails, runs):
    frame = homes(20)
    frame["population_2020"] = 1.0
    frame["population_2021"] = 2.0
    path = write(frame, tmp_path / "census.gpkg")
    out = tmp_path / "out"
    out.mkdir()
    fails(
        "point-remoteness",
        path,
        "--output",
        out / "far.shp",
        match=["'population_2020'", "'population_2021'", "'population_'|10-character", "GeoPackage"],
    )
    assert list(out.iterdir()) == []
    # the same layer is fine where names may be long
    runs("point-remoteness", path, "--output", out / "far.gpkg", "--quiet")


def test_shapefile_output_with_a_field_cut_onto_a_new_one(tmp_path, fails):
    frame = homes(20)
    frame["remote_avg_2019"] = 1.0  # cut to 10 characters it is the new field remote_avg
    path = write(frame, tmp_path / "old_study.gpkg")
    fails(
        "point-remoteness", path, "--output", tmp_path / "far.shp", match=["'remote_avg_2019'", "remote_avg"]
    )


def test_shapefile_output_with_a_long_unicode_field_name(tmp_path, capfd):
    # dBASE field names are 10 bytes (common practice): 'quartier_é' has 10 characters but 11
    # bytes in UTF-8. Documented result: the name is shortened at a character boundary, with a
    # note, and the Shapefile reads back with its values
    frame = homes(20).rename(columns={"district": "quartier_é"})
    path = write(frame, tmp_path / "quartiers.gpkg")
    out = tmp_path / "far.shp"
    code = main(["point-remoteness", str(path), "--group-by", "quartier_é", "--output", str(out), "--quiet"])
    err = capfd.readouterr().err.splitlines()
    assert code == 0, err
    assert len(err) == 1 and err[0].startswith("pairspread: warning: ") and "quartier_é" in err[0], err
    far = pyogrio.read_dataframe(out)
    shortened = [c for c in far.columns if "quartier_é".startswith(c) and c != "quartier_é"]
    assert len(shortened) == 1 and len(shortened[0].encode("utf-8")) <= 10, list(far.columns)
    assert far[shortened[0]].tolist() == frame["quartier_é"].tolist()
    # the mapping is reported in the provenance sidecar too (issue 10)
    record = json.loads(Path(f"{out}.json").read_text(encoding="utf-8"))
    assert record["shapefile_fields"] == {"quartier_é": shortened[0]}
    assert {"remote_avg", "remote_lo", "remote_hi", "remote_idx", "group_n"} <= set(far.columns)


def test_unicode_names_and_paths_with_spaces(tmp_path):
    # names in several scripts, and spaces, in the folder, the file, the layer and the fields
    folder = tmp_path / "Île de Quenwick" / "relevés 2024"
    folder.mkdir(parents=True)
    frame = homes(45).rename(columns={"district": "quartier_é", "residents": "habitants"})
    frame["quartier_é"] = frame["quartier_é"].map(
        {"Brinewell": "Nord-Est ö", "Mossford": "Süd", "Thornap": "東区"}
    )
    path = write(frame, folder / "maisons été.gpkg", layer="maisons été")
    runs = {
        "group-spread": [
            "--group-by",
            "quartier_é",
            "--weight",
            "habitants",
            "--tolerance",
            "0",
            "--output",
            folder / "résultat ü.gpkg",
            "--output-layer",
            "écart à l'intérieur",
        ],
        "point-remoteness": [
            "--group-by",
            "quartier_é",
            "--tolerance",
            "0",
            "--output",
            folder / "éloignement ñ.geojson",
        ],
        "cross-spread": [
            "--group-by",
            "quartier_é",
            "--tolerance",
            "0",
            "--output",
            folder / "croisé 東.csv",
        ],
    }
    procs = {
        script: subprocess.Popen(
            [sys.executable, "-m", "toolbox", script, str(path), "--layer", "maisons été", *map(str, more)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            encoding="utf-8",
        )
        for script, more in runs.items()
    }
    for script, proc in procs.items():
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, (script, err)
        assert err.startswith("pairspread: wrote") and len(err.splitlines()) == 1, err
    xy = shapely.get_coordinates(frame.geometry.values)
    w = frame["habitants"].to_numpy(float)
    table = pyogrio.read_dataframe(folder / "résultat ü.gpkg", layer="écart à l'intérieur")
    for _, row in table.iterrows():
        members = (frame["quartier_é"] == row["quartier_é"]).to_numpy()
        assert row["total_dist"] == pytest.approx(pair_total(xy[members], w[members]), rel=1e-12)
    assert sorted(table["quartier_é"]) == sorted(["Nord-Est ö", "Süd", "東区"])
    far = pyogrio.read_dataframe(folder / "éloignement ñ.geojson")
    assert far["quartier_é"].tolist() == frame["quartier_é"].tolist()
    cross = pd.read_csv(folder / "croisé 東.csv")
    assert set(cross["from_group"]) == {"Nord-Est ö", "Süd", "東区"}


# --------------------------------------------------------------------------------------------
# sizes and scales


def test_one_group_per_feature_on_a_million_points():
    # documented result: a group of one point has no pairs, so every distance is null
    n = 1_000_000
    rng = np.random.default_rng(0)
    x, y = X0 + rng.uniform(0, 1e4, n), Y0 + rng.uniform(0, 1e4, n)
    codes = rng.permutation(n)
    pairs = toolbox.grouped_pair_sums(x, y, codes, n, tolerance=0.01)
    assert np.isnan(pairs.total).all() and (pairs.n_points == 1).all() and (pairs.pair_weight == 0).all()
    points = toolbox.grouped_point_sums(x, y, codes, n, tolerance=0.01)
    assert np.isnan(points.total).all() and (points.other_weight == 0).all()
    frame = gpd.GeoDataFrame({"home_id": codes}, geometry=shapely.points(x, y), crs=CRS)
    table = toolbox.group_spread(frame, group_by="home_id")
    assert len(table) == n and table["total_dist"].isna().all() and (table["n_points"] == 1).all()


def test_cross_spread_of_groups_of_one_point():
    # every off-diagonal entry is one distance, exactly: scipy's cdist
    rng = np.random.default_rng(2)
    n = 300
    x, y = X0 + rng.uniform(0, 1e4, n), Y0 + rng.uniform(0, 1e4, n)
    r = toolbox.cross_pair_sums(x, y, np.arange(n), n, tolerance=0)
    d = cdist(np.c_[x, y], np.c_[x, y])
    off = ~np.eye(n, dtype=bool)
    np.testing.assert_allclose(r.total[off], d[off], rtol=1e-12)
    assert np.isnan(np.diag(r.total)).all()


def test_cross_spread_with_too_many_groups_is_a_clear_error(tmp_path, fails):
    n = 8001
    frame = gpd.GeoDataFrame(
        {"home_id": np.arange(n)}, geometry=shapely.points(np.arange(n) * 3.0, np.zeros(n)), crs=CRS
    )
    path = write(frame, tmp_path / "homes.gpkg")
    fails("cross-spread", path, "--group-by", "home_id", match=["8001 groups", "at most"])


def _tiny_spread_at_huge_offset(n=200, seed=9):
    """Points within 1 cm of each other, 1e9 m from the origin (float64 spacing there: 1.2e-7 m)."""
    rng = np.random.default_rng(seed)
    offset = 1e9
    x = offset + rng.uniform(0, 0.01, n)
    y = -offset + rng.uniform(0, 0.01, n)
    # x − offset is exact (Sterbenz: the two are within a factor 2), so the reference works on the
    # very same points, shifted without rounding, where scipy's pdist loses nothing to the offset
    local = np.c_[x - offset, y + offset]
    assert np.array_equal(local[:, 0] + offset, x)
    return x, y, local


@pytest.mark.parametrize(("tolerance", "method"), [(0, "exact"), (0.01, "projection"), (1e-6, "projection")])
def test_huge_offset_with_a_centimetre_spread_in_the_kernels(tolerance, method):
    x, y, local = _tiny_spread_at_huge_offset()
    n = len(x)
    exact = pair_total(local)
    r = toolbox.grouped_pair_sums(x, y, np.zeros(n, dtype=np.int64), 1, tolerance=tolerance, method=method)
    assert r.lower[0] <= exact <= r.upper[0]
    assert abs(r.total[0] - exact) <= max(tolerance, 1e-12) * exact
    d = cdist(local, local)
    rows = np.array([math.fsum(row) for row in d])
    p = toolbox.grouped_point_sums(x, y, np.zeros(n, dtype=np.int64), 1, tolerance=tolerance, method=method)
    assert ((p.lower <= rows) & (rows <= p.upper)).all()
    assert (np.abs(p.total - rows) <= max(tolerance, 1e-12) * rows).all()
    halves = np.repeat([0, 1], n // 2)
    between = math.fsum(d[np.ix_(halves == 0, halves == 1)].ravel())
    c = toolbox.cross_pair_sums(x, y, halves, 2, tolerance=tolerance, method=method)
    assert c.lower[0, 1] <= between <= c.upper[0, 1]
    assert abs(c.total[0, 1] - between) <= max(tolerance, 1e-12) * between


def test_huge_offset_with_a_centimetre_spread_from_a_file(tmp_path, runs):
    x, y, local = _tiny_spread_at_huge_offset(120)
    frame = gpd.GeoDataFrame({"part": np.repeat(["a", "b"], 60)}, geometry=shapely.points(x, y), crs=CRS)
    path = write(frame, tmp_path / "far_away.gpkg")  # a GeoPackage keeps every bit of a double
    assert np.array_equal(shapely.get_coordinates(pyogrio.read_dataframe(path).geometry.values)[:, 0], x)
    for tolerance in ("0", "0.01"):
        out, _ = runs("group-spread", path, "--group-by", "part", "--tolerance", tolerance, "--output", "-")
        for _, row in csv_table(out).iterrows():
            exact = pair_total(local[(frame["part"] == row["part"]).to_numpy()])
            assert row["total_lo"] <= exact <= row["total_hi"]
            assert abs(row["total_dist"] - exact) <= max(float(tolerance), 1e-12) * exact
            assert row["mean_dist"] < 0.015  # a centimetre spread, not the rounding of 1e9


def _identical(tmp_path: Path, where: str) -> tuple[Path, float, float]:
    x0, y0 = (0.0, 0.0) if where == "origin" else (X0 + 0.1, Y0 + 0.3)
    frame = gpd.GeoDataFrame(
        {"residents": np.arange(1, 26)}, geometry=shapely.points(np.full(25, x0), np.full(25, y0)), crs=CRS
    )
    return write(frame, tmp_path / "same.gpkg"), x0, y0


@pytest.mark.parametrize("method", ["exact", "projection"])
@pytest.mark.parametrize("where", ["origin", "utm"])
def test_all_points_identical(tmp_path, runs, where, method):
    # documented result: totals, bounds and means exactly 0, a relative bound of 0, no division
    # error (the points centre to exact zeros, wherever they lie)
    path, x0, y0 = _identical(tmp_path, where)
    for weight in ([], ["--weight", "residents"]):
        out, err = runs("group-spread", path, *weight, "--method", method, "--output", "-")
        table = csv_table(out)
        assert err == []  # no division warnings
        for column in ("total_dist", "total_lo", "total_hi", "mean_dist", "rel_bound"):
            assert table[column].tolist() == [0.0], column
    same = toolbox.cross_pair_sums(np.full(10, x0), np.full(10, y0), np.repeat([0, 1], 5), 2, method=method)
    assert (same.total == 0).all() and (same.upper == 0).all()


@pytest.mark.parametrize(
    ("where", "method"),
    [
        ("origin", "exact"),
        ("origin", "projection"),
        ("utm", "exact"),
        ("utm", "projection"),
    ],
)
def test_all_points_identical_point_remoteness(tmp_path, runs, where, method):
    # documented result: every mean distance 0; remote_idx is 0 / 0, so null
    path, _, _ = _identical(tmp_path, where)
    _, err = runs("point-remoteness", path, "--method", method, "--output", tmp_path / "far.gpkg", "--quiet")
    assert err == []
    far = pyogrio.read_dataframe(tmp_path / "far.gpkg")
    assert (far["remote_avg"] == 0).all() and (far["remote_lo"] == 0).all()
    assert far["remote_idx"].isna().all()


def test_estimates_of_identical_points_are_never_negative():
    x, y = np.full(25, X0 + 0.1), np.full(25, Y0 + 0.3)
    r = toolbox.grouped_point_sums(x, y, np.zeros(25, dtype=np.int64), 1, method="projection")
    assert (r.lower <= r.total).all() and (r.total <= r.upper).all()
    assert (r.total >= 0).all()


# --------------------------------------------------------------------------------------------
# parameters and outputs


@pytest.mark.parametrize("script", SCRIPTS)
@pytest.mark.parametrize("value", ["-0.1", "0.51", "1", "nan", "inf", "-inf", "one"])
def test_tolerance_outside_zero_to_half(tmp_path, fails, script, value):
    path = write(homes(10), tmp_path / "homes.gpkg")
    fails(
        script,
        path,
        "--group-by",
        "district",
        f"--tolerance={value}",
        *output_args(script, tmp_path),
        match=["--tolerance", re.escape("[0, 0.5]"), re.escape(repr(value))],
    )


def test_tolerance_zero_means_exact_and_half_is_allowed(tmp_path, runs):
    frame = homes(30)
    path = write(frame, tmp_path / "homes.gpkg")
    exact = pair_total(shapely.get_coordinates(frame.geometry.values))
    out, _ = runs("group-spread", path, "--tolerance", "0", "--output", "-")
    table = csv_table(out)
    assert table["method"].tolist() == ["exact"] and table["directions"].tolist() == [0]
    assert table["total_dist"][0] == pytest.approx(exact, rel=1e-12)
    out, _ = runs("group-spread", path, "--tolerance", "0.5", "--method", "projection", "--output", "-")
    table = csv_table(out)
    assert table["method"].tolist() == ["projection"] and table["rel_bound"][0] <= 0.5
    assert table["total_lo"][0] <= exact <= table["total_hi"][0]
    assert abs(table["total_dist"][0] - exact) <= 0.5 * exact


@pytest.mark.parametrize("script", SCRIPTS)
@pytest.mark.parametrize("suffix", [".gpkg", ".csv", ".shp"])
def test_output_in_a_missing_folder(tmp_path, fails, script, suffix):
    if suffix == ".csv" and script == "point-remoteness":
        suffix = ".geojson"  # a layer output
    if suffix == ".shp" and script != "point-remoteness":
        suffix = ".parquet"  # a table output
    path = write(homes(10), tmp_path / "homes.gpkg")
    fails(
        script,
        path,
        "--group-by",
        "district",
        "--output",
        tmp_path / "no such folder" / f"out{suffix}",
        match=["no such folder", "does not exist"],
    )


@pytest.mark.skipif(
    hasattr(os, "geteuid") and os.geteuid() == 0,
    reason="running as root: permissions do not stop root's writes, so a read-only folder cannot "
    "be made here (and no read-only mount is available)",
)
@pytest.mark.parametrize("script", SCRIPTS)
def test_output_in_a_read_only_folder(tmp_path, fails, script):
    path = write(homes(10), tmp_path / "homes.gpkg")
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        suffix = ".gpkg" if script == "point-remoteness" else ".csv"
        fails(
            script,
            path,
            "--group-by",
            "district",
            "--output",
            locked / f"out{suffix}",
            match=["locked", "not writable"],
        )
    finally:
        locked.chmod(0o755)
