"""``cross-spread --nearest`` end to end, against outside references.

Planar: every point's nearest distance from ``scipy.spatial.cKDTree.query`` and from a brute
force over all pairs (``scipy.spatial.distance.cdist``), then the weighted mean with
``numpy.average``. Geodesic (a layer in degrees): a brute force over all pairs with
``pyproj.Geod(ellps="WGS84").inv`` (Karney, "Algorithms for geodesics", J. Geodesy 2013).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pyproj
import pytest
import shapely
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

import toolbox
from toolbox.errors import ParameterError


def _xy(frame):
    return np.column_stack([frame.geometry.x, frame.geometry.y])


def test_nearest_within_one_layer_matches_kdtree_and_brute_force(homes_gpkg, homes):
    result = toolbox.cross_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", weight="pop", nearest=True)
    assert {"nearest_avg", "nearest_max"} <= set(result.columns) and "total_dist" not in result.columns
    groups = ["harbour", "upland", "ridge"]
    for a in groups:
        source = homes[homes["zone"] == a]
        for b in groups:
            target = homes[homes["zone"] == b]
            if a == b:  # the nearest OTHER point: the second neighbour of the tree
                d_tree = cKDTree(_xy(target)).query(_xy(source), k=2)[0][:, 1]
                full = cdist(_xy(source), _xy(target))
                np.fill_diagonal(full, np.inf)
            else:
                d_tree = cKDTree(_xy(target)).query(_xy(source))[0]
                full = cdist(_xy(source), _xy(target))
            d_brute = full.min(axis=1)
            np.testing.assert_allclose(d_tree, d_brute, rtol=1e-12)
            row = result[(result["from_group"] == a) & (result["to_group"] == b)].iloc[0]
            assert row["nearest_avg"] == pytest.approx(np.average(d_brute, weights=source["pop"]), rel=1e-12)
            assert row["nearest_max"] == pytest.approx(d_brute.max(), rel=1e-12)
    # the one-point group has no other point to be nearest to itself
    lone = result[(result["from_group"] == "lone") & (result["to_group"] == "lone")].iloc[0]
    assert np.isnan(lone["nearest_avg"]) and np.isnan(lone["nearest_max"])


def test_nearest_to_another_layer_cli(run_main, tmp_path, homes_gpkg, homes):
    from toolbox.layers import read_layer

    sites = read_layer(homes_gpkg.path, layer="sites")[0]
    out = tmp_path / "access.csv"
    code, _, err = run_main(
        "cross-spread", *homes_gpkg.args, "--group-by", "tenure", "--to", homes_gpkg.path, "--to-layer", "sites",
        "--nearest", "--output", out,
    )  # fmt: skip
    assert code == 0, err
    import pandas as pd

    table = pd.read_csv(out)
    assert list(table["to_group"]) == ["all", "all"]
    for tenure in ("owned", "rented"):
        source = homes[homes["tenure"] == tenure]
        d = cdist(_xy(source), _xy(sites)).min(axis=1)  # brute force
        row = table[table["from_group"] == tenure].iloc[0]
        assert row["nearest_avg"] == pytest.approx(d.mean(), rel=1e-12)
        assert row["nearest_max"] == pytest.approx(d.max(), rel=1e-12)
        assert row["n_to"] == len(sites) and row["units"] == "metre"


def test_nearest_geodesic_matches_pyproj_brute_force():
    rng = np.random.default_rng(7)
    # an invented archipelago across the antimeridian, and a handful of clinics
    lon = (178.5 + rng.uniform(0, 3, 60) + 180) % 360 - 180
    lat = rng.uniform(-18, -15, 60)
    homes = gpd.GeoDataFrame(
        {"isle": np.where(lat < -16.5, "south", "north"), "w": rng.integers(1, 5, 60).astype(float)},
        geometry=shapely.points(lon, lat),
        crs="EPSG:4326",
    )
    clinics = gpd.GeoDataFrame(geometry=shapely.points([179.2, -179.6, 180.0], [-16.0, -17.2, -15.2]), crs="EPSG:4326")
    result = toolbox.cross_spread(homes, group_by="isle", weight="w", to=clinics, nearest=True)
    geod = pyproj.Geod(ellps="WGS84")
    for isle in ("north", "south"):
        part = homes[homes["isle"] == isle]
        qx, qy = np.repeat(part.geometry.x, 3), np.repeat(part.geometry.y, 3)
        tx, ty = np.tile(clinics.geometry.x, len(part)), np.tile(clinics.geometry.y, len(part))
        d = np.asarray(geod.inv(qx, qy, tx, ty)[2]).reshape(-1, 3).min(axis=1)  # brute force
        row = result[result["from_group"] == isle].iloc[0]
        assert row["nearest_avg"] == pytest.approx(np.average(d, weights=part["w"]), rel=1e-9)
        assert row["nearest_max"] == pytest.approx(d.max(), rel=1e-9)
        assert row["units"] == "metre"


def test_nearest_wide_matrix(homes_gpkg):
    wide = toolbox.cross_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", nearest=True, wide=True)
    long = toolbox.cross_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", nearest=True)
    value = long[(long["from_group"] == "harbour") & (long["to_group"] == "ridge")]["nearest_avg"].iloc[0]
    assert wide[wide["from_group"] == "harbour"]["ridge"].iloc[0] == value


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--to-weight", "capacity"], "--nearest measures exact distances .*drop --to-weight"),
        (["--method", "projection"], "drop --method projection"),
    ],
)
def test_nearest_refuses_what_it_cannot_take(run_main, homes_gpkg, extra, message):
    code, _, err = run_main(
        "cross-spread", *homes_gpkg.args, "--group-by", "zone", "--to", homes_gpkg.path, "--to-layer", "sites",
        "--nearest", *extra,
    )  # fmt: skip
    lines = err.strip().splitlines()
    assert code != 0 and len(lines) == 1, err
    assert __import__("re").search(message, lines[0]), lines[0]


def test_nearest_refusal_speaks_python(homes_gpkg):
    with pytest.raises(ParameterError, match=r"'nearest' .* drop method='projection'"):
        toolbox.cross_spread(homes_gpkg.path, **homes_gpkg.kwargs, group_by="zone", nearest=True, method="projection")


def test_nearest_and_shapes_need_the_layers_in_memory(run_main, homes_gpkg):
    for extra in (["--nearest"], ["--group-shape", "hull"]):
        code, _, err = run_main("cross-spread", *homes_gpkg.args, "--group-by", "zone", "--batch-rows", "100", *extra)
        lines = err.strip().splitlines()
        assert code != 0 and len(lines) == 1 and "needs the layers in memory" in lines[0], err
        assert f"drop {extra[0]}" in lines[0]
