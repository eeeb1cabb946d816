"""point-remoteness read and written batch by batch (``--batch-rows``, or a layer above the
size threshold).

References: every feature's mean distance to the rest of its group by brute force, with
scipy's ``cdist`` (planar) or ``pyproj.Geod.inv`` (geodesic; Karney 2013, accurate to
round-off); the written files are read back with pyogrio / geopandas.
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from scipy.spatial.distance import cdist

import toolbox
from toolbox import grouping
from toolbox.errors import GeometryError, ParameterError, PartialResultError

GEOD = pyproj.Geod(ellps="WGS84")


def _exact_means(frame: gpd.GeoDataFrame, weight: str | None, geodesic: bool) -> np.ndarray:
    """Σ_j w_j d_ij / Σ_j w_j over the other points of i's group, by brute force."""
    xy = shapely.get_coordinates(np.asarray(frame.geometry.values))
    w = np.ones(len(frame)) if weight is None else frame[weight].to_numpy(dtype=float)
    codes = grouping.group_features(frame, ["zone"]).codes
    out = np.full(len(frame), np.nan)
    for g in np.unique(codes):
        members = np.flatnonzero(codes == g)
        if geodesic:
            i, j = (v.ravel() for v in np.meshgrid(members, members, indexing="ij"))
            d = np.reshape(GEOD.inv(xy[i, 0], xy[i, 1], xy[j, 0], xy[j, 1])[2], (members.size,) * 2)
        else:
            d = cdist(xy[members], xy[members])
        other = w[members].sum() - w[members]
        with np.errstate(invalid="ignore", divide="ignore"):
            out[members] = np.where(other > 0, d @ w[members] / other, np.nan)
    return out


def _layer(homes, layout: str) -> gpd.GeoDataFrame:
    if layout == "homes":
        return homes.dropna(subset=["zone"]).reset_index(drop=True)
    rng = np.random.default_rng(5)  # a dense village, a hamlet 3 km off, one farm: heavy bins
    x = np.concatenate([rng.normal(0, 2, 400), 3000 + rng.normal(0, 50, 200), [40_000.0]])
    y = np.concatenate([rng.normal(0, 2, 400), rng.normal(0, 50, 200), [5_000.0]])
    return gpd.GeoDataFrame(
        {"zone": np.where(np.arange(x.size) % 3 == 0, "north", "south"), "pop": rng.integers(1, 6, x.size) * 1.0},
        geometry=shapely.points(500_000 + x, 6_120_000 + y),
        crs="EPSG:32705",
    )


@pytest.mark.parametrize("layout", ["homes", "clustered"])
@pytest.mark.parametrize("distance", ["planar", "geodesic"])
@pytest.mark.parametrize("weighted", [False, True])
def test_streamed_remoteness_intervals_contain_the_exact_means(homes, layout, distance, weighted):
    frame = _layer(homes, layout)
    if distance == "geodesic":
        frame = frame.to_crs("EPSG:4326")
    weight = "pop" if weighted else None
    truth = _exact_means(frame, weight, distance == "geodesic")
    whole = toolbox.point_remoteness(frame, group_by="zone", weight=weight, distance=distance)
    live = ~np.isnan(truth)
    for pieces in (1, 2, 7, 50):
        rows = -(-len(frame) // pieces)
        out = toolbox.point_remoteness(frame, group_by="zone", weight=weight, distance=distance, batch_rows=rows)
        assert isinstance(out, gpd.GeoDataFrame) and len(out) == len(frame)
        lo, hi = out["remote_lo"].to_numpy(), out["remote_hi"].to_numpy()
        assert np.all(lo[live] <= truth[live]) and np.all(truth[live] <= hi[live]), pieces
        np.testing.assert_array_equal(np.isnan(out["remote_avg"].to_numpy()), ~live)
        # every other field is the input's, in its order; group sizes as read whole
        pd.testing.assert_frame_equal(out[frame.columns.tolist()], frame, check_like=False)
        assert out["group_n"].tolist() == whole["group_n"].tolist()
        assert np.all((whole["remote_lo"] <= out["remote_hi"]) | ~live)
        assert np.all((out["remote_lo"] <= whole["remote_hi"]) | ~live)


@pytest.mark.parametrize("suffix", [".gpkg", ".parquet", ".shp", ".geojson"])
def test_streamed_output_is_written_batch_by_batch_and_matches(tmp_path, homes, suffix):
    source = tmp_path / "homes.parquet"
    homes.to_parquet(source)
    target = tmp_path / f"remote{suffix}"
    common = dict(group_by="zone", weight="pop", tolerance=0.01, method="projection")
    expected = toolbox.point_remoteness(source, batch_rows=40, **common)  # put together in memory
    toolbox.point_remoteness(source, batch_rows=40, output=str(target), **common)
    back = gpd.read_parquet(target) if suffix == ".parquet" else pyogrio.read_dataframe(target)
    assert len(back) == len(homes)
    for name in ("remote_avg", "remote_lo", "remote_hi", "remote_idx", "group_n", "pop"):
        np.testing.assert_allclose(back[name], expected[name], rtol=1e-9, err_msg=name)
    assert back["zone"].fillna("").tolist() == expected["zone"].fillna("").tolist()
    xy = shapely.get_coordinates(np.asarray(back.geometry.values))
    np.testing.assert_allclose(xy, shapely.get_coordinates(np.asarray(homes.geometry.values)))
    if suffix == ".parquet":  # GeoParquet: CRS kept, provenance recorded
        import pyarrow.parquet as pq

        assert back.crs.to_epsg() == 32705
        assert b"pairspread" in pq.read_schema(target).metadata


def test_a_bad_batch_leaves_nothing_written(tmp_path, homes):
    frame = homes.dropna(subset=["zone"]).reset_index(drop=True).copy()
    geometry = frame.geometry.values.copy()
    geometry[-1] = shapely.multipoints([[0, 0], [1, 1]])  # in the last batch: met while writing
    frame = frame.set_geometry(geometry)
    source = tmp_path / "homes.parquet"
    frame.to_parquet(source)
    target = tmp_path / "remote.gpkg"
    with pytest.raises(GeometryError, match="MultiPoint"):
        toolbox.point_remoteness(source, group_by="zone", batch_rows=50, output=str(target))
    assert not target.exists() and [p.name for p in tmp_path.iterdir()] == ["homes.parquet"]


def test_a_cluster_is_refused_for_per_feature_output(tmp_path, homes):
    with pytest.raises(ParameterError, match="one row per feature.*--batch-rows"):
        toolbox.point_remoteness(homes, group_by="zone", dask_scheduler="tcp://127.0.0.1:9")


def test_a_streamed_group_that_cannot_be_computed_gets_a_note_and_the_rest_are_written(tmp_path, monkeypatch):
    # a group spread over more than half the longitudes has no local frame; made "too large"
    # for the exact fallback here by lowering the limit, it gets a note (NaN sums), the other
    # group its values, and the output is written batch by batch all the same
    import toolbox.estimate.sums as sums

    monkeypatch.setattr(sums, "EXACT_FALLBACK_POINTS", 50)
    rng = np.random.default_rng(4)
    lon = np.r_[rng.uniform(-180, 180, 100), 10 + rng.uniform(0, 0.1, 100)]
    lat = np.r_[rng.uniform(-60, 60, 100), 50 + rng.uniform(0, 0.1, 100)]
    frame = gpd.GeoDataFrame(
        {"zone": np.repeat(["world", "town"], 100)}, geometry=shapely.points(lon, lat), crs="EPSG:4326"
    )
    source, target = tmp_path / "sites.parquet", tmp_path / "remote.gpkg"
    frame.to_parquet(source)
    with pytest.warns(UserWarning, match="world"):
        toolbox.point_remoteness(source, group_by="zone", batch_rows=30, output=str(target))
    back = pyogrio.read_dataframe(target)
    world, town = back["zone"] == "world", back["zone"] == "town"
    assert back.loc[world, "note"].str.contains("too many for exact geodesic sums").all()
    assert back.loc[world, "remote_avg"].isna().all()
    assert back.loc[town, "note"].isna().all() and back.loc[town, "remote_avg"].notna().all()
    truth = _exact_means(frame, None, True)
    lo, hi = back.loc[town, "remote_lo"].to_numpy(), back.loc[town, "remote_hi"].to_numpy()
    assert np.all(lo <= truth[town.to_numpy()]) and np.all(truth[town.to_numpy()] <= hi)
    # strict: the notes are known before the first batch is written, so nothing is
    strict = tmp_path / "strict.gpkg"
    with pytest.raises(PartialResultError, match="world"):
        toolbox.point_remoteness(source, group_by="zone", batch_rows=30, output=str(strict), strict=True)
    assert not strict.exists()
