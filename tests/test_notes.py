"""One group that cannot be computed does not sink the run (issue 10, part 3).

The layer: in EPSG:4326, a world-wide group of 20,001 points (one more than exact geodesic sums
take, and too wide for any local projection) beside two small invented towns. At the default
tolerance the world group gets a note and empty distances, the towns are computed, one warning
names the world group, and ``--strict`` writes nothing and exits with status 3.

Reference: brute-force sums of ``pyproj.Geod(ellps="WGS84").inv`` over every pair (Karney 2013,
as implemented in PROJ), never pairspread itself.
"""

from __future__ import annotations

import io
import json
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely

import toolbox
from toolbox import estimate
from toolbox.cli import main
from toolbox.errors import PartialResultError, PartialResultWarning

GEOD = pyproj.Geod(ellps="WGS84")
#: invented towns: name -> (centre longitude, centre latitude, spread in degrees, points)
TOWNS = {"Alderholt": (12.5, 41.9, 0.02, 40), "Brackwater": (-70.6, -33.4, 0.03, 30)}


def geod_cross(lon_a, lat_a, lon_b, lat_b) -> np.ndarray:
    """Every distance between two point sets (metres), by pyproj.Geod."""
    i, j = (v.ravel() for v in np.meshgrid(np.arange(lon_a.size), np.arange(lon_b.size), indexing="ij"))
    _, _, d = GEOD.inv(lon_a[i], lat_a[i], lon_b[j], lat_b[j])
    return d.reshape(lon_a.size, lon_b.size)


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    rng = np.random.default_rng(10)
    n = estimate.EXACT_FALLBACK_POINTS + 1
    assert n == 20_001
    lon = [rng.uniform(-180, 180, n)]
    lat = [np.degrees(np.arcsin(rng.uniform(-0.9, 0.9, n)))]
    places = ["world"] * n
    towns = {}
    for name, (x, y, spread, k) in TOWNS.items():
        towns[name] = (x + rng.normal(0, spread, k), y + rng.normal(0, spread, k))
        lon.append(towns[name][0]), lat.append(towns[name][1])
        places += [name] * k
    frame = gpd.GeoDataFrame(
        {"place": places}, geometry=shapely.points(np.concatenate(lon), np.concatenate(lat)), crs="EPSG:4326"
    )
    path = tmp_path_factory.mktemp("world") / "world.gpkg"
    pyogrio.write_dataframe(frame, path)
    return path, towns


def warning_lines(err: str) -> list[str]:
    return [line for line in err.splitlines() if line.startswith("pairspread: warning:")]


def test_world_group_gets_a_note_and_the_towns_are_computed(world, tmp_path, capsys):
    path, towns = world
    out = tmp_path / "spread.csv"
    assert main(["group-spread", str(path), "--group-by", "place", "--output", str(out)]) == 0
    err = capsys.readouterr().err
    table = pd.read_csv(out).set_index("place")
    for name, (lon, lat) in towns.items():
        truth = np.triu(geod_cross(lon, lat, lon, lat), 1).sum()
        row = table.loc[name]
        assert row["total_lo"] <= truth <= row["total_hi"], name
        assert row["total_dist"] == pytest.approx(truth, rel=0.01)
        assert pd.isna(row["note"])
    world_row = table.loc["world"]
    assert np.isnan(world_row["total_dist"]) and np.isnan(world_row["mean_dist"])
    assert "too many for exact geodesic sums" in world_row["note"] and "--group-by" in world_row["note"]
    # exactly one warning, naming the world group and no town
    (line,) = warning_lines(err)
    assert "'world'" in line and "Alderholt" not in line and "--strict" in line
    # the provenance record lists it too
    record = json.loads((tmp_path / "spread.csv.json").read_text())
    assert list(record["notes"]) == ["world"]


def test_strict_exits_3_and_writes_nothing(world, tmp_path, capsys):
    path, _ = world
    for script in ("group-spread", "point-remoteness", "cross-spread"):
        out = tmp_path / f"{script}.gpkg"
        code = main([script, str(path), "--group-by", "place", "--output", str(out), "--strict"])
        err = capsys.readouterr().err
        assert code == 3, err
        assert not out.exists() and not list(tmp_path.iterdir())
        (line,) = err.strip().splitlines()
        assert line.startswith("pairspread: error:") and "'world'" in line and "nothing was written" in line


def test_point_remoteness_notes_the_world_features_only(world):
    path, towns = world
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = toolbox.point_remoteness(path, group_by="place")
    partial = [w for w in caught if issubclass(w.category, PartialResultWarning)]
    assert len(partial) == 1 and "'world'" in str(partial[0].message)
    assert "strict=True" in str(partial[0].message)  # Python's words, not the command line's
    far = out[out["place"] == "world"]
    assert far["remote_avg"].isna().all() and far["note"].str.contains("too many").all()
    assert far["note"].str.contains("method='exact'").all()  # the fix in Python's words
    lon, lat = towns["Alderholt"]
    d = geod_cross(lon, lat, lon, lat)
    truth = d.sum(axis=1) / (lon.size - 1)
    town = out[out["place"] == "Alderholt"]
    assert town["note"].isna().all()
    assert (town["remote_lo"].to_numpy() <= truth).all() and (truth <= town["remote_hi"].to_numpy()).all()


def test_cross_spread_rows_with_the_world_group_get_the_note(world):
    path, towns = world
    with pytest.warns(PartialResultWarning, match="'world'"):
        table = toolbox.cross_spread(path, group_by="place")
    bad = (table["from_group"] == "world") | (table["to_group"] == "world")
    assert table.loc[bad, "note"].str.contains("too many for exact geodesic sums").all()
    assert table.loc[bad, "total_dist"].isna().all()
    assert table.loc[~bad, "note"].isna().all() and len(table.loc[~bad]) == 4
    (a_lon, a_lat), (b_lon, b_lat) = towns["Alderholt"], towns["Brackwater"]
    truth = geod_cross(a_lon, a_lat, b_lon, b_lat).sum()
    row = table[(table["from_group"] == "Alderholt") & (table["to_group"] == "Brackwater")].iloc[0]
    assert row["total_lo"] <= truth <= row["total_hi"]
    # the matrix has no note column: the notes stay in attrs (and the written provenance)
    with pytest.warns(PartialResultWarning, match="provenance record"):
        wide = toolbox.cross_spread(path, group_by="place", wide=True)
    assert list(wide.attrs["notes"]) == ["world"] and "note" not in wide.columns


def test_python_strict_raises(world):
    path, _ = world
    with pytest.raises(PartialResultError, match=r"'world'.*nothing was written \(strict=True\)"):
        toolbox.group_spread(path, group_by="place", strict=True)


def test_chain_strict_stops_before_the_step_writes(world, tmp_path, capsys):
    path, _ = world
    chain = tmp_path / "steps.toml"
    chain.write_text(
        "pairspread_chain = 1\n"
        "[steps.spread]\n"
        'script = "group-spread"\n'
        f'params = {{ data = "{path}", group_by = "place", output = "spread.csv" }}\n'
    )
    assert main(["chain", str(chain), "--strict"]) == 3
    err = capsys.readouterr().err
    assert "step 'spread'" in err and "'world'" in err
    assert not (tmp_path / "spread.csv").exists()
    assert main(["chain", str(chain)]) == 0
    assert len(warning_lines(capsys.readouterr().err)) == 1
    record = json.loads((tmp_path / "spread.csv.json").read_text())
    assert record["chain"] == {"file": str(chain), "step": "spread"}
    assert pd.read_csv(io.StringIO((tmp_path / "spread.csv").read_text()))["note"].notna().sum() == 1


def test_streamed_group_spread_notes_the_world_group_too(world, tmp_path, capsys):
    # --batch-rows: the sums come from the mergeable state, the notes the same way
    path, towns = world
    out = tmp_path / "spread.csv"
    args = ["group-spread", str(path), "--group-by", "place", "--batch-rows", "5000", "--output", str(out)]
    assert main(args) == 0
    (line,) = warning_lines(capsys.readouterr().err)
    assert "'world'" in line and "Alderholt" not in line
    table = pd.read_csv(out).set_index("place")
    assert "too many for exact geodesic sums" in table.loc["world", "note"]
    lon, lat = towns["Brackwater"]
    truth = np.triu(geod_cross(lon, lat, lon, lat), 1).sum()
    assert table.loc["Brackwater", "total_lo"] <= truth <= table.loc["Brackwater", "total_hi"]
    assert main([*args[:-1], str(tmp_path / "strict.csv"), "--strict"]) == 3
    assert not (tmp_path / "strict.csv").exists()


def test_spread_contrast_takes_the_same_way(tmp_path):
    # a group with one sample value cannot be tested: a note, one warning, or with strict an error
    rng = np.random.default_rng(4)
    x, y = rng.uniform(0, 1000, 60), rng.uniform(0, 1000, 60)
    frame = gpd.GeoDataFrame(
        {"ward": ["north"] * 40 + ["east"] * 20, "tenure": ["owned", "rented"] * 20 + ["owned"] * 20},
        geometry=shapely.points(x, y),
        crs="EPSG:32705",
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        table = toolbox.spread_contrast(frame, compare="tenure", group_by="ward", permutations=19, seed=1)
    partial = [w for w in caught if issubclass(w.category, PartialResultWarning)]
    assert len(partial) == 1 and "'east'" in str(partial[0].message) and "'north'" not in str(partial[0].message)
    rows = table.set_index("ward")
    assert "nothing to compare" in rows.loc["east", "note"] and pd.isna(rows.loc["north", "note"])
    assert 0 < rows.loc["north", "p_value"] <= 1
    out = tmp_path / "contrast.csv"
    with pytest.raises(PartialResultError, match="'east'"):
        toolbox.spread_contrast(
            frame, compare="tenure", group_by="ward", permutations=19, seed=1, strict=True, output=str(out)
        )
    assert not out.exists()


def test_a_shapefile_says_that_it_cuts_the_notes(world, tmp_path, capsys):
    # dBASE text fields hold 254 bytes (common practice); the notes are longer, and GDAL cuts quietly
    path, _ = world
    out = tmp_path / "far.shp"
    assert main(["point-remoteness", str(path), "--group-by", "place", "--output", str(out), "--quiet"]) == 0
    lines = warning_lines(capsys.readouterr().err)
    assert len(lines) == 2 and any("'world'" in line for line in lines)
    assert any("254 bytes" in line and "'note'" in line and "GeoPackage" in line for line in lines)
    far = pyogrio.read_dataframe(out)
    assert far.loc[far["place"] == "world", "note"].str.startswith("Geodesic sums").all()


def test_streamed_cross_spread_sinks_only_the_world_rows(world):
    # --batch-rows: the towns are compared on common bins of their own, as in memory
    path, towns = world
    with pytest.warns(PartialResultWarning, match="'world'"):
        table = toolbox.cross_spread(path, group_by="place", batch_rows=5000)
    bad = (table["from_group"] == "world") | (table["to_group"] == "world")
    assert table.loc[bad, "note"].str.contains("too many for exact geodesic sums").all()
    assert table.loc[bad, "total_dist"].isna().all()
    assert table.loc[~bad, "note"].isna().all() and len(table.loc[~bad]) == 4
    (a_lon, a_lat), (b_lon, b_lat) = towns["Alderholt"], towns["Brackwater"]
    truth = geod_cross(a_lon, a_lat, b_lon, b_lat).sum()  # brute force, pyproj.Geod
    row = table[(table["from_group"] == "Alderholt") & (table["to_group"] == "Brackwater")].iloc[0]
    assert row["total_lo"] <= truth <= row["total_hi"] and row["rel_bound"] <= 0.01
