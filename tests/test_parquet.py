"""GeoParquet read through pyarrow: files, partitioned folders and globs, WKB and GeoArrow.

The reference reader is ``geopandas.read_parquet`` (geopandas' own implementation of the
GeoParquet specification); group sums are checked against brute force with
``scipy.spatial.distance.pdist`` (``reference_table`` in conftest.py).
"""

from __future__ import annotations

import io
import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import shapely

from toolbox import layers
from toolbox.errors import GeometryError, InputError, ParameterError
from toolbox.layers import parquet


def _partitioned(homes: gpd.GeoDataFrame, folder) -> None:
    """One file per zone in Hive-style ``zone=<value>`` folders (NULL zones left out)."""
    for zone, part in homes.groupby("zone"):
        (folder / f"zone={zone}").mkdir(parents=True)
        part.drop(columns="zone").to_parquet(folder / f"zone={zone}" / "part-0.parquet")


def _same_layer(ours: gpd.GeoDataFrame, theirs: gpd.GeoDataFrame) -> None:
    assert list(ours.columns) == list(theirs.columns)
    assert ours.geometry.name == theirs.geometry.name
    assert ours.crs == theirs.crs
    assert ours.index.equals(theirs.index)
    assert ours.geometry.geom_equals_exact(theirs.geometry, tolerance=0).all()
    for column in ours.columns.drop(ours.geometry.name):
        assert [str(v) for v in ours[column]] == [str(v) for v in theirs[column]], column


@pytest.mark.parametrize("encoding", ["WKB", "geoarrow"])
def test_file_matches_geopandas(tmp_path, homes, encoding):
    path = tmp_path / "homes.parquet"
    homes.to_parquet(path, geometry_encoding=encoding)
    frame, label = layers.read_layer(path)
    _same_layer(frame, gpd.read_parquet(path))
    assert label == f"GeoParquet {str(path)!r}"
    points = layers.read_points(path, fields=["zone", "pop"])
    expected = shapely.get_coordinates(gpd.read_parquet(path).geometry.values)
    np.testing.assert_array_equal(np.column_stack([points.x, points.y]), expected)
    assert points.crs == homes.crs
    assert points.attributes["pop"].tolist() == homes["pop"].tolist()


@pytest.mark.parametrize("spelling", ["folder", "folder/", "glob"])
def test_partitioned_folder_matches_geopandas(tmp_path, homes, spelling):
    folder = tmp_path / "homes"
    _partitioned(homes, folder)
    name = {"folder": str(folder), "folder/": f"{folder}/", "glob": f"{folder}/*/*.parquet"}[spelling]
    frame, _ = layers.read_layer(name)
    _same_layer(frame, gpd.read_parquet(folder))
    points = layers.read_points(name, fields=["zone"])
    assert sorted(set(points.attributes["zone"])) == sorted(homes["zone"].dropna().unique())


def test_group_spread_on_a_folder_matches_pdist(run_main, tmp_path, homes, reference, by_key):
    folder = tmp_path / "homes"
    _partitioned(homes, folder)
    code, out, err = run_main(
        "group-spread", folder, "--group-by", "zone", "--weight", "pop", "--tolerance", "0", "--output", "-"
    )
    assert code == 0, err
    table = pd.read_csv(io.StringIO(out))
    expected = reference(homes[homes["zone"].notna()], ["zone"], "pop")
    rows = by_key(table, ["zone"])
    assert set(rows) == set(expected)
    for key, ref in expected.items():
        assert rows[key]["n_points"] == ref["n_points"]
        np.testing.assert_allclose(rows[key]["total_dist"], ref["total_dist"], rtol=1e-9)


def test_where_on_parquet_keeps_the_same_rows_as_ogr(run_main, tmp_path, homes, homes_gpkg, same_table):
    path = tmp_path / "homes.parquet"
    homes.to_parquet(path)
    where = "tenure = 'rented' AND pop BETWEEN 2 AND 6 AND zone IS NOT NULL"
    args = ("--group-by", "zone", "--tolerance", "0", "--where", where, "--output", "-")
    code_p, out_p, err_p = run_main("group-spread", path, *args)
    code_g, out_g, err_g = run_main("group-spread", *homes_gpkg.args, *args)
    assert code_p == code_g == 0, err_p + err_g
    same_table(pd.read_csv(io.StringIO(out_p)), pd.read_csv(io.StringIO(out_g)), rtol=1e-12)


def test_batches_cover_the_layer_with_only_the_needed_columns(tmp_path, homes):
    path = tmp_path / "homes.parquet"
    homes.to_parquet(path, row_group_size=50)
    layer = parquet.open_parquet(path)
    batches = list(layer.batches(["zone"], where="pop > 0", batch_rows=40))
    assert max(b.num_rows for b in batches) <= 40
    assert all(b.schema.names == ["zone", "geometry"] for b in batches)
    xs = np.concatenate([parquet.points_of_table(b, layer, ["zone"]).x for b in batches])
    np.testing.assert_array_equal(xs, homes.geometry.x[homes["pop"] > 0].to_numpy())


def test_geoarrow_multipoints_count_each_point(tmp_path):
    frame = gpd.GeoDataFrame(
        {"g": ["a", "b"]},
        geometry=[shapely.MultiPoint([(0, 0), (3, 0)]), shapely.MultiPoint([(0, 0), (0, 4), (1, 1)])],
        crs="EPSG:32705",
    )
    path = tmp_path / "multi.parquet"
    frame.to_parquet(path, geometry_encoding="geoarrow")
    assert parquet.open_parquet(path).geometry.encoding == "multipoint"
    points = layers.read_points(path, fields=["g"])
    assert points.feature.tolist() == [0, 0, 1, 1, 1]
    assert points.y.tolist() == [0, 0, 0, 4, 1]


def test_crs_from_the_metadata(tmp_path, homes):
    """GeoParquet 1.1 specification: a missing ``crs`` key means OGC:CRS84, ``null`` means unknown."""
    table = pa.table({"id": [1, 2], "geometry": shapely.to_wkb(shapely.points([0, 1], [0, 1]))})
    for crs, expected in (("absent", "OGC:CRS84"), (None, None)):
        column = {"encoding": "WKB", "geometry_types": ["Point"]}
        if crs != "absent":
            column["crs"] = crs
        geo = {"version": "1.1.0", "primary_column": "geometry", "columns": {"geometry": column}}
        path = tmp_path / f"crs_{crs}.parquet"
        pq.write_table(table.replace_schema_metadata({"geo": json.dumps(geo)}), path)
        points = layers.read_points(path)
        assert (points.crs is None) if expected is None else points.crs.to_string() == expected


def test_partitions_that_disagree_give_one_message(tmp_path, homes):
    folder = tmp_path / "years"
    folder.mkdir()
    homes.iloc[:10].to_parquet(folder / "a.parquet")
    homes.iloc[10:20].to_crs("EPSG:4326").to_parquet(folder / "b.parquet")
    with pytest.raises(InputError, match=r"do not agree: .*b\.parquet' has CRS EPSG:4326 against EPSG:32705"):
        layers.read_points(folder)
    (folder / "b.parquet").unlink()
    retyped = homes.iloc[10:20].astype({"pop": float})
    retyped.to_parquet(folder / "b.parquet")
    with pytest.raises(InputError, match=r"field 'pop' as double against int64"):
        layers.read_layer(folder)


def test_bad_inputs_are_named(tmp_path, homes):
    plain = tmp_path / "plain.parquet"
    pq.write_table(pa.table({"x": [1.0]}), plain)
    with pytest.raises(InputError, match="no geometry column"):
        layers.read_points(plain)
    zones = tmp_path / "zones.parquet"
    gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1, 1)], crs="EPSG:32705").to_parquet(zones)
    with pytest.raises(GeometryError, match="not points .*1 Polygon"):
        layers.read_points(zones)
    with pytest.raises(InputError, match="matches no .parquet file"):
        layers.read_points(tmp_path / "nothing" / "*.parquet")
    with pytest.raises(InputError, match="holds one layer"):
        layers.read_points(zones, layer="districts")
    with pytest.raises(ParameterError, match="names field 'popp'.*did you mean 'pop'"):
        homes.to_parquet(tmp_path / "homes.parquet")
        layers.read_points(tmp_path / "homes.parquet", where="popp > 1")


def test_point_remoteness_output_reads_back(run_main, tmp_path, homes_gpkg):
    """The pack reads its own GeoParquet output (the bundled GDAL cannot)."""
    out = tmp_path / "remote.parquet"
    code, _, err = run_main(
        "point-remoteness", *homes_gpkg.args, "--group-by", "zone", "--output", out, "--quiet"
    )
    assert code == 0, err
    code, printed, err = run_main("group-spread", out, "--where", "remote_idx > 1.5", "--group-by", "zone")
    assert code == 0, err
    expected = gpd.read_parquet(out).query("remote_idx > 1.5")
    assert str(len(expected[expected["zone"] == "harbour"])) in printed


def test_geodataframe_where_filters_in_memory(homes):
    before = homes.copy()
    kept, _ = layers.read_layer(homes, where="zone = 'ridge' OR pop >= 8")
    expected = homes[(homes["zone"] == "ridge") | (homes["pop"] >= 8)]
    assert kept.index.tolist() == expected.index.tolist()
    assert homes.equals(before)  # the caller's frame is not modified


def test_attributes_of_a_batch_are_what_pyarrow_converts():
    from toolbox.layers.read import _arrow_attributes

    table = pa.table(
        {
            "zone": pa.array([3, 1, 2], pa.int32()),
            "pop": pa.array([1.5, 0.0, 2.0]),
            "count": pa.array([1, None, 2], pa.int64()),
            "name": pa.array(["a", None, "c"]),
        }
    )
    for fields in (["zone", "pop"], ["zone", "count"], ["name", "pop"], []):
        ours = _arrow_attributes(table, fields)
        # pyarrow's own conversion is the reference
        pd.testing.assert_frame_equal(ours, table.select(fields).to_pandas(), check_index_type=False)
        assert len(ours) == table.num_rows


@pytest.mark.parametrize("files", [1, 2])
def test_text_keys_streamed_as_dictionaries_group_and_sort_as_the_texts(tmp_path, homes, files):
    import toolbox
    from toolbox.layers.stream import layer_parts

    folder = tmp_path / "homes"
    folder.mkdir()
    # the texts first appear out of order: in one dictionary (one file, one batch), or in
    # different orders in many (two files of small row groups, batches of 17)
    order = np.random.default_rng(5).permutation(len(homes))
    rows = 10_000 if files == 1 else 17
    for i, part in enumerate(np.array_split(order, files)):
        homes.iloc[part].to_parquet(folder / f"{i}.parquet", row_group_size=rows if files == 1 else 23)
    first = next(layer_parts(folder).batches(["zone"], batch_rows=rows))
    assert isinstance(first.attributes["zone"].dtype, pd.CategoricalDtype)  # read as a dictionary
    streamed = toolbox.group_spread(folder, group_by="zone", weight="pop", batch_rows=rows)
    # geopandas' reader and pandas' groupby are the reference: groups sorted, nulls last
    expected = gpd.read_parquet(folder).groupby("zone", dropna=False, sort=True).size()
    assert streamed["zone"].tolist()[:-1] == expected.index.tolist()[:-1] and pd.isna(streamed["zone"].iloc[-1])
    assert streamed["n_points"].tolist() == expected.tolist()
    assert streamed["zone"].dtype == gpd.read_parquet(folder)["zone"].dtype
    whole = toolbox.group_spread(folder, group_by="zone", weight="pop")  # read whole, in memory
    inside = (streamed["total_lo"] <= whole["total_dist"]) & (whole["total_dist"] <= streamed["total_hi"])
    assert inside[whole["total_dist"] > 0].all()
