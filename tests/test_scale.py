"""Layers read in parts and batches, group keys merged across them, passes on a Dask cluster.

References: the batches must reproduce what ``geopandas`` reads (``geopandas.read_file`` and
``geopandas.read_parquet``); group codes must be those :func:`toolbox.grouping.group_features`
gives on the whole layer (pandas' ``groupby``). The cluster tests start a
``distributed.LocalCluster`` of two worker processes and close it; nothing is timed.
"""

from __future__ import annotations

import os

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely

from toolbox import batchkeys, cluster, grouping
from toolbox.errors import GeometryError, InputError, ParameterError
from toolbox.geodesy import DistanceSetup
from toolbox.layers.stream import layer_parts
from toolbox.streaming import prepare

PLANAR = DistanceSetup("planar", "metre")


def _coordinates(frame: gpd.GeoDataFrame) -> np.ndarray:
    return shapely.get_coordinates(np.asarray(frame.geometry.values))


def _write_parts(frame: gpd.GeoDataFrame, folder, pieces: int) -> None:
    folder.mkdir()
    for i, part in enumerate(np.array_split(np.arange(len(frame)), pieces)):
        frame.iloc[part].to_parquet(folder / f"part-{i}.parquet")


@pytest.mark.parametrize("batch_rows", [1, 7, 50, 10_000])
def test_ogr_batches_cover_the_layer_in_order(homes_file, homes, batch_rows):
    parts = layer_parts(homes_file.path, **homes_file.kwargs)
    batches = list(parts.batches(["zone", "pop"], batch_rows=batch_rows))
    assert all(len(b.attributes) <= batch_rows for b in batches)
    expected = gpd.read_file(homes_file.path, **homes_file.kwargs)  # the reference reader
    xy = np.concatenate([np.column_stack([b.x, b.y]) for b in batches])
    np.testing.assert_array_equal(xy, _coordinates(expected))
    pop = np.concatenate([b.attributes["pop"].to_numpy() for b in batches])
    np.testing.assert_array_equal(pop, expected["pop"].to_numpy())
    assert parts.rows == len(homes) and parts.crs.to_epsg() == 32705


def test_parquet_folder_has_one_part_per_file(tmp_path, homes):
    _write_parts(homes, tmp_path / "homes", 3)
    parts = layer_parts(tmp_path / "homes")
    assert len(parts.parts) == 3 and parts.on_workers and parts.rows == len(homes)
    batches = list(parts.batches(["zone"], batch_rows=40))
    xy = np.concatenate([np.column_stack([b.x, b.y]) for b in batches])
    np.testing.assert_array_equal(xy, _coordinates(gpd.read_parquet(tmp_path / "homes")))
    assert "part-2.parquet" in batches[-1].label  # messages name the file


def test_key_tables_merge_to_the_whole_layers_groups(homes):
    rng = np.random.default_rng(7)
    whole = grouping.group_features(homes, ["zone", "tenure"])
    cuts = np.sort(rng.choice(np.arange(1, len(homes)), 9, replace=False))
    pieces = np.split(rng.permutation(len(homes)), cuts)
    tables = [
        batchkeys.key_table(homes.iloc[p], ["zone", "tenure"], {"n": np.ones(p.size)}, {"n": "sum"})
        for p in pieces
    ]
    merged = batchkeys.merge_key_tables(tables[::-1])
    pd.testing.assert_frame_equal(merged.keys.astype(object), whole.keys.astype(object), check_column_type=False)
    np.testing.assert_array_equal(merged.codes(homes), whole.codes)
    np.testing.assert_array_equal(merged.values["n"], np.bincount(whole.codes))


@pytest.mark.parametrize("spill", [True, False])
def test_prepared_batches_replay_the_layer(homes_gpkg, homes, spill):
    parts = layer_parts(homes_gpkg.path, **homes_gpkg.kwargs)
    whole = grouping.group_features(homes, ["zone"])
    with prepare(parts, group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=33, spill=spill) as ready:
        assert (ready.spill is not None) == spill
        folder = ready.spill.folder if spill else None
        replay = list(ready.batches())
        values = ready.keys.values
    x, y, w, codes = (np.concatenate([b[i] for b in replay]) for i in range(4))
    xy = _coordinates(homes)
    np.testing.assert_array_equal(np.column_stack([x, y]), xy)
    np.testing.assert_array_equal(w, homes["pop"].to_numpy(dtype=float))
    np.testing.assert_array_equal(codes, whole.codes)
    np.testing.assert_array_equal(values["n_points"], np.bincount(whole.codes))
    np.testing.assert_allclose(values["xmax"], pd.Series(xy[:, 0]).groupby(whole.codes).max())
    np.testing.assert_allclose(values["wy"], np.bincount(whole.codes, xy[:, 1] * w))
    if spill:  # closed with the block: the spill is gone
        assert ready.spill is None and not os.path.exists(folder)


def test_bad_weights_and_geometries_stop_pass_one(tmp_path, homes):
    bad = homes.copy()
    bad.loc[bad.index[150], "pop"] = -1
    with pytest.raises(InputError, match="negative weight in 'pop'"):
        prepare(layer_parts(bad), group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=50)
    folder = tmp_path / "holes"
    _write_parts(homes, folder, 3)
    holed = homes.iloc[:10].copy()
    holed.loc[holed.index[3], "geometry"] = None
    holed.to_parquet(folder / "part-1.parquet")
    with pytest.raises(GeometryError, match=r"file '.*part-1\.parquet'.* have no geometry"):
        prepare(layer_parts(folder), group_by=["zone"], weight=None, setup=PLANAR, batch_rows=50)


def test_layers_only_this_process_reads_are_refused_on_a_cluster(homes):
    with pytest.raises(ParameterError, match="only be read by this process"):
        cluster.reduce_parts(layer_parts(homes), [], 10, len, sum, client=object())
    with pytest.raises(ParameterError, match="fiona engine"):
        layer_parts("anything.gpkg", engine="fiona")


def test_a_scheduler_that_does_not_answer_is_one_clear_error(monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT", 1)
    with pytest.raises(InputError, match=r"No Dask scheduler answered at 'tcp://127\.0\.0\.1:9'"):
        with cluster.connected("tcp://127.0.0.1:9"):
            pass


# --------------------------------------------------------------------------------------------
# a LocalCluster of two worker processes, shared by the tests that need one


@pytest.fixture(scope="module")
def local_cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None, memory_limit="1GiB"
    ) as running:
        with distributed.Client(running, set_as_default=False) as client:
            yield client


def test_pass_one_on_a_cluster_matches_this_process(local_cluster, tmp_path, homes):
    _write_parts(homes, tmp_path / "homes", 5)
    parts = layer_parts(tmp_path / "homes")
    here = prepare(parts, group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=16, spill=False)
    there = prepare(parts, group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=16, client=local_cluster)
    pd.testing.assert_frame_equal(there.keys.keys, here.keys.keys)
    pd.testing.assert_frame_equal(there.keys.values, here.keys.values)
    dask_geopandas = pytest.importorskip("dask_geopandas")
    frame = dask_geopandas.from_geopandas(homes, npartitions=4)
    framed = prepare(
        layer_parts(frame), group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=16, client=local_cluster
    )
    pd.testing.assert_frame_equal(framed.keys.values, here.keys.values)
