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
import pyproj
import pytest
import shapely
from scipy.spatial.distance import cdist, pdist

from toolbox import batchkeys, cluster, estimate, grouping, streaming
from toolbox.errors import GeometryError, InputError, ParameterError
from toolbox.estimate import DistanceSetup, Points
from toolbox.estimate.state import Survey
from toolbox.layers.stream import layer_parts
from toolbox.streaming import pair_sums, prepare

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
    whole = grouping.group_features(homes, ["zone", "tenure"])  # pandas' groupby: the reference
    cuts = np.sort(rng.choice(np.arange(1, len(homes)), 9, replace=False))
    pieces = np.split(rng.permutation(len(homes)), cuts)
    tables = [batchkeys.key_table(homes.iloc[p], ["zone", "tenure"]) for p in pieces]
    merged = batchkeys.merge_key_tables(tables[::-1])
    pd.testing.assert_frame_equal(
        merged.keys.astype(object), whole.keys.astype(object), check_column_type=False
    )
    np.testing.assert_array_equal(merged.codes(homes), whole.codes)
    registry = batchkeys.KeyRegistry(("zone", "tenure"))
    running = [registry.add(t.keys)[t.codes(homes.iloc[p])] for t, p in zip(tables, pieces, strict=True)]
    table, order = registry.table()
    pd.testing.assert_frame_equal(
        table.keys.astype(object), whole.keys.astype(object), check_column_type=False
    )
    for codes, p in zip(running, pieces, strict=True):
        np.testing.assert_array_equal(order[codes], whole.codes[p])


@pytest.mark.parametrize(
    "values",
    [
        [3, 1, 3, 2, 1, 5, 4, 3] * 3,  # integers: looked up in a table by value
        [3, 1, 3, 2 + 10**9, 1, 5, -(10**9), 3] * 3,  # too wide a range for a table: hashed
        ["b", "a", None, "b", "c", None, "a", "d"] * 3,  # strings and nulls
        [1.5, np.nan, 2.0, 1.5, 0.5, np.nan, 2.0, 3.0] * 3,  # floats and nulls
    ],
)
def test_registry_codes_rows_as_the_whole_layers_groups(values):
    frame = pd.DataFrame({"zone": values})
    whole = grouping.group_features(frame, ["zone"])  # pandas' groupby: the reference
    registry = batchkeys.KeyRegistry(("zone",))
    pieces = np.split(np.random.default_rng(3).permutation(len(frame)), [1, 5, 11, 12])
    batches = [frame.iloc[p].reset_index(drop=True) for p in pieces]
    if isinstance(values[0], int):  # one batch of floats (an integer field read with nulls elsewhere)
        batches[2] = batches[2].astype(float)
    running = [registry.code(b) for b in batches]
    table, order = registry.table()
    pd.testing.assert_frame_equal(table.keys.astype(object), whole.keys.astype(object), check_dtype=False)
    for codes, p in zip(running, pieces, strict=True):
        np.testing.assert_array_equal(order[codes], whole.codes[p])
    # the finished table codes any batch alike, and refuses a key it lacks
    for batch, p in zip(batches, pieces, strict=True):
        np.testing.assert_array_equal(table.codes(batch), whole.codes[p])
    assert (table.codes(pd.DataFrame({"zone": [values[0], 10**12]})) == [whole.codes[0], -1]).all()


def test_registry_codes_several_fields_and_categories_as_groupby(homes):
    frame = homes[["zone", "tenure"]].copy()
    frame.loc[frame.index[::7], "tenure"] = None
    frame["year"] = np.arange(len(frame)) % 3 + 2020
    with_nulls = frame.astype({"year": float})
    with_nulls.loc[with_nulls.index[: len(frame) // 2 : 5], "year"] = np.nan  # later batches: none
    cases = [
        (("zone", "tenure"), frame, frame),
        (("zone",), frame, frame.astype({"zone": "category"})),
        (("tenure", "year", "zone"), with_nulls, with_nulls),
    ]
    for fields, frame, source in cases:
        whole = grouping.group_features(frame, list(fields))  # pandas' groupby: the reference
        registry = batchkeys.KeyRegistry(fields)
        pieces = np.array_split(np.arange(len(frame)), 7)
        # batches without a null year hold integers, as an integer field read with nulls elsewhere
        batches = [source.iloc[p] for p in pieces]
        batches = [b.astype({"year": int}) if "year" in b and b["year"].notna().all() else b for b in batches]
        running = [registry.code(b) for b in batches]
        table, order = registry.table()
        pd.testing.assert_frame_equal(
            table.keys.astype(object), whole.keys.astype(object), check_column_type=False
        )
        for codes, p in zip(running, pieces, strict=True):
            np.testing.assert_array_equal(order[codes], whole.codes[p])


def test_one_pass_chunks_hold_every_point_once_in_order(homes_gpkg, homes, monkeypatch):
    monkeypatch.setattr(streaming, "ONE_PASS_CHUNK", 40)  # batches of 33 split across chunks
    parts = layer_parts(homes_gpkg.path, **homes_gpkg.kwargs)
    registry = batchkeys.KeyRegistry(("zone",))
    chunks = streaming._coded_chunks(parts, ["zone", "pop"], "pop", PLANAR, 33, registry)
    got, buffers = [], []
    for x, y, w, codes, n_groups in chunks:
        assert codes.max() < n_groups
        buffers.append(x)
        got.append(np.column_stack([x, y, w, codes]))  # a copy: the chunk's arrays are reused
    assert [len(c) for c in got[:-1]] == [40] * (len(got) - 1) and len(got) > 3
    assert np.shares_memory(buffers[0], buffers[2]) and not np.shares_memory(buffers[0], buffers[1])
    got = np.concatenate(got)
    whole = grouping.group_features(homes, ["zone"])  # pandas' groupby: the reference
    table, order = registry.table()
    pd.testing.assert_frame_equal(table.keys.astype(object), whole.keys.astype(object), check_column_type=False)
    np.testing.assert_array_equal(order[got[:, 3].astype(np.int64)], whole.codes)
    np.testing.assert_array_equal(got[:, :2], _coordinates(gpd.read_file(homes_gpkg.path, **homes_gpkg.kwargs)))
    np.testing.assert_array_equal(got[:, 2], homes["pop"].to_numpy(dtype=float))


def test_one_pass_chunks_stop_their_reader_when_left_early(homes_gpkg):
    import threading

    parts = layer_parts(homes_gpkg.path, **homes_gpkg.kwargs)
    registry = batchkeys.KeyRegistry(("zone",))
    chunks = streaming._coded_chunks(parts, ["zone"], None, PLANAR, 5, registry)
    next(chunks)  # the reader has filled the second buffer and waits for the first
    chunks.close()
    assert not [t for t in threading.enumerate() if t.name == "pairspread-reader"]


@pytest.mark.parametrize("spill", [True, False])
def test_prepared_batches_replay_the_layer(homes_gpkg, homes, spill):
    parts = layer_parts(homes_gpkg.path, **homes_gpkg.kwargs)
    whole = grouping.group_features(homes, ["zone"])
    with prepare(parts, group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=33, spill=spill) as ready:
        assert (ready.spill is not None) == spill
        folder = ready.spill.folder if spill else None
        replay = list(ready.points())
        survey = ready.survey
    x, y, w, codes = (
        np.concatenate([getattr(p, k) for p in replay]) for k in ("x", "y", "weights", "groups")
    )
    xy = _coordinates(homes)
    pop = homes["pop"].to_numpy(dtype=float)
    # the same points with the same weights and groups (the spill keeps each batch in group order)
    replayed = np.column_stack([codes, x, y, w])
    expected = np.column_stack([whole.codes, xy, pop])
    np.testing.assert_array_equal(
        replayed[np.lexsort(replayed.T[::-1])], expected[np.lexsort(expected.T[::-1])]
    )
    w = pop
    # the survey of the whole layer at once (the estimator's own), against the merged one
    whole_survey = Survey.of(Points.build(xy[:, 0], xy[:, 1], whole.codes, whole.count, w))
    np.testing.assert_array_equal(survey.count, whole_survey.count)
    np.testing.assert_array_equal(survey.lo, whole_survey.lo)
    np.testing.assert_allclose(survey.pair_weight, whole_survey.pair_weight, rtol=1e-12)
    np.testing.assert_allclose(survey.sums, whole_survey.sums, rtol=1e-12)
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
    with pytest.raises(ParameterError, match="Only this process can read the GeoDataFrame"):
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


# --------------------------------------------------------------------------------------------
# streamed sums against exact totals


GEOD = pyproj.Geod(ellps="WGS84")  # Karney's algorithm, accurate to round-off: the reference


def _exact_totals(frame: gpd.GeoDataFrame, codes: np.ndarray, n_groups: int, weights, geodesic: bool):
    """Σ_{i<j} w_i w_j d_ij per group by brute force: scipy's pdist, or pyproj.Geod.inv."""
    xy = _coordinates(frame)
    w = np.ones(len(xy)) if weights is None else weights
    out = np.full(n_groups, np.nan)
    for g in range(n_groups):
        members = np.flatnonzero(codes == g)
        if members.size < 2:
            continue
        i, j = np.triu_indices(members.size, k=1)
        if geodesic:
            a, b = xy[members[i]], xy[members[j]]
            d = GEOD.inv(a[:, 0], a[:, 1], b[:, 0], b[:, 1])[2]
        else:
            d = pdist(xy[members])  # condensed order: the upper triangle row by row, as i, j
        out[g] = float(np.dot(w[members[i]] * w[members[j]], d))
    return out


def _clustered_layer() -> gpd.GeoDataFrame:
    """A dense village (σ = 2 m), a second one 3 km away, one farm 40 km off: heavy bins."""
    rng = np.random.default_rng(11)
    x = np.concatenate([rng.normal(0, 2, 600), 3000 + rng.normal(0, 50, 300), [40_000.0]])
    y = np.concatenate([rng.normal(0, 2, 600), rng.normal(0, 50, 300), [5_000.0]])
    zone = np.where(np.arange(x.size) % 3 == 0, "north", "south")
    frame = gpd.GeoDataFrame(
        {"zone": zone, "pop": rng.integers(1, 6, x.size).astype(float)},
        geometry=shapely.points(500_000 + x, 6_120_000 + y),
        crs="EPSG:32705",
    )
    return frame.iloc[rng.permutation(len(frame))].reset_index(drop=True)


def _in_pieces(frame, pieces):
    """Batch rows that cut the frame into ``pieces`` batches."""
    return -(-len(frame) // pieces)


def _case(homes, layout, distance, weighted):
    """A layer (homes, or clustered), its distance setup, groups and weights for one case."""
    frame = homes.dropna(subset=["zone"]) if layout == "homes" else _clustered_layer()
    frame = frame.reset_index(drop=True)
    if distance == "geodesic":
        frame = frame.to_crs("EPSG:4326")
    setup = estimate.distance_setup(frame.crs, "the layer", distance=distance, script="test")
    weights = frame["pop"].to_numpy(dtype=float) if weighted else None
    return frame, ("pop" if weighted else None), setup, grouping.group_features(frame, ["zone"]), weights


every_case = pytest.mark.parametrize(
    "layout, distance, weighted",
    [(lay, d, w) for lay in ("homes", "clustered") for d in ("planar", "geodesic") for w in (False, True)],
)


@every_case
def test_streamed_intervals_contain_the_exact_total(homes, layout, distance, weighted):
    frame, weight, setup, whole, weights = _case(homes, layout, distance, weighted)
    truth = _exact_totals(frame, whole.codes, whole.count, weights, distance == "geodesic")
    totals = []
    for pieces in (1, 2, 7, 50):
        rows = _in_pieces(frame, pieces)
        for method in ("projection", "auto") if pieces == 7 else ("projection",):
            with prepare(
                layer_parts(frame), group_by=["zone"], weight=weight, setup=setup, batch_rows=rows
            ) as ready:
                sums = pair_sums(ready, tolerance=0.01, method=method)
            live = ~np.isnan(truth)
            assert np.all(sums.lower[live] <= truth[live]) and np.all(truth[live] <= sums.upper[live]), (
                pieces,
                method,
            )
            assert np.all(sums.rel_bound[live] <= 0.01)
            if method == "projection":
                totals.append(sums.total)
    # the same points cut differently give the same state, up to the order of additions (for
    # geodesic groups the frame's centre is itself such a sum, so the projection moves a little)
    for other in totals[1:]:
        np.testing.assert_allclose(other, totals[0], rtol=1e-9 if distance == "planar" else 1e-6)


def _one_pass(frame, weight, setup, pieces, method="projection"):
    rows = _in_pieces(frame, pieces)
    out = streaming.one_pass_sums(
        layer_parts(frame), group_by=["zone"], weight=weight, setup=setup, batch_rows=rows,
        tolerance=0.01, method=method,
    )  # fmt: skip
    return None if out is None else out[0]


def _assert_inside(sums, truth, label):
    live = ~np.isnan(truth)
    assert np.all(sums.lower[live] <= truth[live]) and np.all(truth[live] <= sums.upper[live]), label
    assert np.all(sums.rel_bound[live] <= 0.01), label
    assert np.isnan(sums.total[~live]).all(), label


@pytest.mark.parametrize("layout", ["homes", "clustered"])
@pytest.mark.parametrize("weighted", [False, True])
def test_one_pass_intervals_contain_the_exact_total(homes, layout, weighted, monkeypatch):
    frame, weight, setup, whole, weights = _case(homes, layout, "planar", weighted)
    truth = _exact_totals(frame, whole.codes, whole.count, weights, False)  # scipy pdist
    # small chunks, so that windows move and coarsen between the batches of one group
    monkeypatch.setattr(streaming, "ONE_PASS_CHUNK", 1)
    for pieces in (1, 2, 7, 50):
        for method in ("projection", "auto") if pieces == 7 else ("projection",):
            sums = _one_pass(frame, weight, setup, pieces, method)
            _assert_inside(sums, truth, (pieces, method))
            np.testing.assert_array_equal(sums.n_points, np.bincount(whole.codes, minlength=whole.count))


def test_one_pass_keeps_or_rereads_groups_too_dense_for_their_windows(monkeypatch):
    from toolbox.estimate import single_pass

    frame, weight, setup, whole, weights = _case(None, "clustered", "planar", True)
    truth = _exact_totals(frame, whole.codes, whole.count, weights, False)  # scipy pdist
    monkeypatch.setattr(streaming, "ONE_PASS_CHUNK", 1)
    monkeypatch.setattr(single_pass, "BIN_FACTOR", 1 / 8)  # 16 bins: the dense village fills one
    kept = []
    finish = single_pass.OnePass.finish
    monkeypatch.setattr(single_pass.OnePass, "finish", lambda self: kept.append(self.dense.copy()) or finish(self))
    _assert_inside(_one_pass(frame, weight, setup, 7), truth, "kept")
    assert kept[-1].any()  # the dense groups kept their points from their first batch on
    # not kept (as if the first points looked spread out): the groups over their budget are
    # read again, their points alone, and summed as in memory
    monkeypatch.setattr(single_pass, "DENSE_SHARE", np.inf)
    again = []
    monkeypatch.setattr(estimate, "pair_sums", lambda points, **kw: again.append(points.n_groups) or estimate.sums.pair_sums(points, **kw))
    _assert_inside(_one_pass(frame, weight, setup, 7), truth, "read again")
    assert again and not kept[-1].any()


def test_one_pass_gives_way_to_the_planned_passes(homes, monkeypatch):
    from toolbox.estimate import single_pass

    frame, weight, setup, whole, weights = _case(homes, "homes", "planar", True)
    assert _one_pass(frame, weight, setup, 3) is not None
    monkeypatch.setattr(single_pass, "WINDOW_BYTES", 1000)  # no room for one window
    assert _one_pass(frame, weight, setup, 3) is None
    geodesic = _case(homes, "homes", "geodesic", True)
    assert _one_pass(geodesic[0], weight, geodesic[2], 3) is None  # bins need a local frame first
    # and the script then streams with the planned passes, with the same guarantee
    truth = _exact_totals(frame, whole.codes, whole.count, weights, False)  # scipy pdist
    table = __import__("toolbox").group_spread(frame, group_by="zone", weight="pop", batch_rows=40)
    keyed = dict(zip(table["zone"], zip(table["total_lo"], table["total_hi"], strict=True), strict=True))
    keys = whole.keys["zone"].tolist()
    for g, t in enumerate(truth):
        if not np.isnan(t):
            lo, hi = keyed[keys[g]]
            assert lo <= t <= hi


def _exact_cross(frame, codes, n_groups, weights, geodesic: bool, other=None):
    """Σ_{a∈A, b∈B} w_a w_b d_ab for every pair of groups by brute force: scipy's cdist, or
    pyproj.Geod.inv. With ``other`` = (frame, codes, groups, weights), its groups follow."""
    xy, w = _coordinates(frame), np.ones(len(frame)) if weights is None else weights
    if other is not None:
        xy = np.concatenate([xy, _coordinates(other[0])])
        w = np.concatenate([w, np.ones(len(other[0])) if other[3] is None else other[3]])
        codes, n_groups = np.concatenate([codes, other[1] + n_groups]), n_groups + other[2]
    out = np.full((n_groups, n_groups), np.nan)
    for a in range(n_groups):
        for b in range(n_groups):
            ia, ib = np.flatnonzero(codes == a), np.flatnonzero(codes == b)
            if a == b or ia.size == 0 or ib.size == 0:
                continue
            if geodesic:
                i, j = (v.ravel() for v in np.meshgrid(ia, ib, indexing="ij"))
                d = np.reshape(GEOD.inv(xy[i, 0], xy[i, 1], xy[j, 0], xy[j, 1])[2], (ia.size, ib.size))
            else:
                d = cdist(xy[ia], xy[ib])
            out[a, b] = float(w[ia] @ d @ w[ib])
    return out


@every_case
def test_streamed_cross_intervals_contain_the_exact_totals(homes, layout, distance, weighted):
    frame, weight, setup, whole, weights = _case(homes, layout, distance, weighted)
    truth = _exact_cross(frame, whole.codes, whole.count, weights, distance == "geodesic")
    diagonal = _exact_totals(frame, whole.codes, whole.count, weights, distance == "geodesic")
    np.fill_diagonal(truth, diagonal)
    live = ~np.isnan(truth)
    totals = []
    for pieces in (1, 2, 7, 50):
        with prepare(
            layer_parts(frame), group_by=["zone"], weight=weight, setup=setup, batch_rows=_in_pieces(frame, pieces)
        ) as ready:
            sums = streaming.cross_sums(ready, tolerance=0.01, method="projection")
        assert np.all(sums.lower[live] <= truth[live]) and np.all(truth[live] <= sums.upper[live]), pieces
        assert np.all(sums.rel_bound[live] <= 0.01) and not np.isnan(sums.total[live]).any()
        np.testing.assert_array_equal(np.isnan(sums.total), ~live)
        totals.append(sums.total)
    for other in totals[1:]:  # the same state, up to the order of additions
        np.testing.assert_allclose(other, totals[0], rtol=1e-9 if distance == "planar" else 1e-6)


@pytest.mark.parametrize("distance", ["planar", "geodesic"])
@pytest.mark.parametrize("weighted", [False, True])
def test_streamed_cross_of_two_layers_contains_the_exact_totals(homes, distance, weighted):
    first = homes.dropna(subset=["zone"]).reset_index(drop=True)
    second = _clustered_layer()
    if distance == "geodesic":
        first, second = first.to_crs("EPSG:4326"), second.to_crs("EPSG:4326")
    weight = "pop" if weighted else None
    setup = estimate.distance_setup(first.crs, "the layer", distance=distance, script="test")
    a, b = grouping.group_features(first, ["zone"]), grouping.group_features(second, ["zone"])
    wa = first["pop"].to_numpy(dtype=float) if weighted else None
    wb = second["pop"].to_numpy(dtype=float) if weighted else None
    truth = _exact_cross(first, a.codes, a.count, wa, distance == "geodesic", (second, b.codes, b.count, wb))
    block = np.ix_(np.arange(a.count), a.count + np.arange(b.count))
    for pieces in (1, 2, 7, 50):
        with (
            prepare(layer_parts(first), group_by=["zone"], weight=weight, setup=setup,
                    batch_rows=_in_pieces(first, pieces)) as one,
            prepare(layer_parts(second), group_by=["zone"], weight=weight, setup=setup,
                    batch_rows=_in_pieces(second, pieces)) as two,
        ):  # fmt: skip
            sums = streaming.cross_sums(one, two, tolerance=0.01, method="auto")
        lower, upper, exact = sums.lower[block], sums.upper[block], truth[block]
        assert np.all(lower <= exact) and np.all(exact <= upper), pieces
        assert np.all(sums.rel_bound[block] <= 0.01)


def test_streamed_cross_at_tolerance_zero_is_exact(homes):
    frame = homes.dropna(subset=["zone"]).reset_index(drop=True)
    whole = grouping.group_features(frame, ["zone"])
    truth = _exact_cross(frame, whole.codes, whole.count, None, False)
    with prepare(layer_parts(frame), group_by=["zone"], weight=None, setup=PLANAR, batch_rows=40) as ready:
        sums = streaming.cross_sums(ready, tolerance=0, method="auto")
    off = ~np.isnan(truth)
    np.testing.assert_allclose(sums.total[off], truth[off], rtol=1e-12)
    assert sums.exact[off].all()


# --------------------------------------------------------------------------------------------
# the scripts: streamed, on a cluster, and bad input


def _run_cli(*args) -> tuple[int, str]:
    import contextlib
    import io

    from toolbox.cli import main

    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, err.getvalue()


def test_group_spread_on_a_cluster_matches_one_process(local_cluster, tmp_path, homes, reference):
    import toolbox

    _write_parts(homes, tmp_path / "homes", 4)
    address = local_cluster.scheduler.address
    common = dict(group_by="zone", weight="pop", tolerance=0.01)
    whole = toolbox.group_spread(tmp_path / "homes", **common)  # read whole, auto
    there = toolbox.group_spread(tmp_path / "homes", dask_scheduler=address, **common)
    streamed = toolbox.group_spread(tmp_path / "homes", batch_rows=40, method="projection", **common)
    for column in ("zone", "n_points", "weight_sum", "pair_weight", "units"):
        assert there[column].tolist() == whole[column].tolist(), column
    # the cluster merges one-pass windows of its tasks, streaming here fills one state batch
    # by batch: two estimates with the same guarantee, so their intervals meet
    live = streamed["total_dist"].notna()
    assert (there["total_lo"][live] <= streamed["total_hi"][live]).all()
    assert (streamed["total_lo"][live] <= there["total_hi"][live]).all()
    reference = reference(homes, ["zone"], "pop")  # scipy pdist
    for table in (there, streamed):
        for _, row in table.iterrows():
            key = (None if pd.isna(row["zone"]) else row["zone"],)
            truth = reference[key]["total_dist"]
            if not np.isnan(truth):
                assert row["total_lo"] <= truth <= row["total_hi"], key
    # the survey pass on the cluster gives the survey of this process (one cluster for both:
    # starting one is the slow part)
    parts = layer_parts(tmp_path / "homes")
    here = prepare(parts, group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=16, spill=False)
    far = prepare(parts, group_by=["zone"], weight="pop", setup=PLANAR, batch_rows=16, client=local_cluster)
    pd.testing.assert_frame_equal(far.keys.keys, here.keys.keys)
    np.testing.assert_array_equal(far.survey.count, here.survey.count)
    np.testing.assert_allclose(far.survey.sums, here.survey.sums, rtol=1e-12)
    frame = pytest.importorskip("dask_geopandas").from_geopandas(homes, npartitions=3)
    framed = toolbox.group_spread(frame, dask_scheduler=address, **common)
    assert framed["n_points"].tolist() == there["n_points"].tolist()
    live = there["total_dist"].notna()  # partitions cut differently: windows of other widths
    assert (framed["total_lo"][live] <= there["total_hi"][live]).all()
    assert (there["total_lo"][live] <= framed["total_hi"][live]).all()
    # cross-spread on the cluster against streaming here (the same common bins; an entry near
    # its tolerance may be recomputed from its points on one side only, so compare intervals)
    crossed = toolbox.cross_spread(tmp_path / "homes", group_by="zone", weight="pop", dask_scheduler=address)
    here = toolbox.cross_spread(tmp_path / "homes", group_by="zone", weight="pop", batch_rows=40)
    assert crossed["n_to"].tolist() == here["n_to"].tolist()
    live = here["total_dist"].notna()
    assert (crossed["total_lo"][live] <= here["total_hi"][live]).all()
    assert (here["total_lo"][live] <= crossed["total_hi"][live]).all()
    assert (crossed["rel_bound"][live] <= 0.01).all()
    # a file with null geometries: one clear error from the worker that read it
    holed = homes.iloc[:10].copy()
    holed.loc[holed.index[3], "geometry"] = None
    holed.to_parquet(tmp_path / "homes" / "part-1.parquet")
    with pytest.raises(GeometryError, match=r"part-1\.parquet.* have no geometry"):
        toolbox.group_spread(tmp_path / "homes", dask_scheduler=address, **common)
    # without a scheduler (and no default client) a Dask frame is read here, partition by partition
    alone = toolbox.group_spread(frame, **common)
    assert alone["n_points"].tolist() == whole["n_points"].tolist()
    live = whole["total_dist"].notna()  # a group of one point has no total
    assert (alone["total_lo"][live] <= whole["total_hi"][live]).all()
    assert (whole["total_lo"][live] <= alone["total_hi"][live]).all()


@pytest.mark.parametrize("weight", ["pop", None])
def test_group_spread_on_a_cluster_reads_the_files_once(local_cluster, tmp_path, homes, reference, monkeypatch, weight):
    """The tasks' one-pass windows merge on the workers: no planned pass (which would start
    with ``streaming.prepare``) runs, and the answer matches this process's one pass."""
    import toolbox

    _write_parts(homes, tmp_path / "homes", 5)
    common = dict(group_by="zone", weight=weight, tolerance=0.01)
    here = toolbox.group_spread(tmp_path / "homes", batch_rows=40, **common)  # one pass, here

    def planned(*args, **kwargs):
        raise AssertionError("the planned passes ran")

    monkeypatch.setattr(streaming, "prepare", planned)
    there = toolbox.group_spread(tmp_path / "homes", dask_scheduler=local_cluster.scheduler.address, **common)
    for column in ("zone", "n_points", "weight_sum", "units"):
        assert there[column].tolist() == here[column].tolist(), column
    np.testing.assert_allclose(there["pair_weight"], here["pair_weight"], rtol=1e-12)
    truth = reference(homes, ["zone"], weight)  # scipy pdist
    live = here["total_dist"].notna()
    for table in (here, there):
        for _, row in table[live].iterrows():
            key = (None if pd.isna(row["zone"]) else row["zone"],)
            assert row["total_lo"] <= truth[key]["total_dist"] <= row["total_hi"], key
        assert (table["rel_bound"][live] <= 0.01).all()
    # two estimates with the same guarantee: each total lies within the other's bound
    assert (np.abs(there["total_dist"][live] / here["total_dist"][live] - 1) <= 0.02).all()


def test_group_spread_streams_with_batch_rows(tmp_path, homes_gpkg, homes, reference):
    out = tmp_path / "spread.csv"
    code, err = _run_cli(
        "group-spread",
        *homes_gpkg.args,
        "--group-by",
        "zone",
        "--weight",
        "pop",
        "--batch-rows",
        "25",
        "--output",
        out,
    )
    assert code == 0, err
    table = pd.read_csv(out)
    reference = reference(homes, ["zone"], "pop")
    for _, row in table.iterrows():
        truth = reference[(None if pd.isna(row["zone"]) else row["zone"],)]["total_dist"]
        if not np.isnan(truth):
            assert row["total_lo"] <= truth <= row["total_hi"]


def test_cross_spread_streams_with_batch_rows(tmp_path, homes_gpkg, homes):
    import toolbox

    out = tmp_path / "cross.csv"
    code, err = _run_cli(
        "cross-spread", *homes_gpkg.args, "--group-by", "zone", "--weight", "pop", "--batch-rows", "25",
        "--output", out,
    )  # fmt: skip
    assert code == 0, err
    table = pd.read_csv(out, keep_default_na=False, na_values=[""])
    frame = homes.copy()
    whole = grouping.group_features(frame, ["zone"])
    weights = frame["pop"].to_numpy(dtype=float)
    truth = _exact_cross(frame, whole.codes, whole.count, weights, False)  # scipy cdist
    np.fill_diagonal(truth, _exact_totals(frame, whole.codes, whole.count, weights, False))
    assert len(table) == whole.count**2  # rows: every (from, to) pair in group order
    exact, live = truth.ravel(), ~np.isnan(truth.ravel())
    assert (table["total_lo"][live] <= exact[live]).all() and (exact[live] <= table["total_hi"][live]).all()
    # two layers, the second streamed from a GeoParquet folder: the in-memory run's groups and
    # intervals that overlap it
    second = _clustered_layer()
    _write_parts(second, tmp_path / "far", 3)
    common = dict(group_by="zone", to=tmp_path / "far", to_group_by="zone", to_weight="pop")
    streamed = toolbox.cross_spread(homes_gpkg.path, layer="homes", batch_rows=100, **common)
    whole = toolbox.cross_spread(homes_gpkg.path, layer="homes", **common)
    for column in ("from_group", "to_group", "n_from", "n_to", "units"):
        assert streamed[column].tolist() == whole[column].tolist(), column
    assert (streamed["total_lo"] <= whole["total_hi"]).all() and (whole["total_lo"] <= streamed["total_hi"]).all()
    assert (streamed["rel_bound"] <= 0.01).all()


def test_bad_input_on_streams_is_one_line_and_writes_nothing(tmp_path, homes, monkeypatch):
    out = tmp_path / "spread.csv"
    folder = tmp_path / "mixed"
    _write_parts(homes, folder, 2)
    homes.iloc[:5].to_crs("EPSG:4326").to_parquet(folder / "part-9.parquet")
    code, err = _run_cli("group-spread", folder, "--group-by", "zone", "--batch-rows", "50", "--output", out)
    assert (
        code != 0 and "do not agree" in err and "CRS EPSG:4326" in err and len(err.strip().splitlines()) == 1
    )
    (folder / "part-9.parquet").unlink()
    holed = homes.iloc[:10].copy()
    holed.loc[holed.index[3], "geometry"] = None
    holed.to_parquet(folder / "part-1.parquet")
    code, err = _run_cli("group-spread", folder, "--group-by", "zone", "--batch-rows", "50", "--output", out)
    assert (
        code != 0 and "part-1.parquet" in err and "no geometry" in err and len(err.strip().splitlines()) == 1
    )
    holed.to_parquet(folder / "part-1.parquet")
    code, err = _run_cli("cross-spread", folder, "--group-by", "zone", "--batch-rows", "50", "--output", out)
    assert code != 0 and "part-1.parquet" in err and "no geometry" in err and len(err.strip().splitlines()) == 1
    homes.iloc[:10].to_parquet(folder / "part-1.parquet")
    # a part whose fields disagree with the others' (a type changed, a field missing)
    renamed = homes.iloc[:10].assign(zone=np.arange(10))
    renamed.to_parquet(folder / "part-7.parquet")
    for script in ("group-spread", "cross-spread"):
        code, err = _run_cli(script, folder, "--group-by", "zone", "--batch-rows", "50", "--output", out)
        assert code != 0 and "do not agree" in err and "field 'zone'" in err, err
        assert len(err.strip().splitlines()) == 1
    homes.iloc[:10].drop(columns=["pop"]).to_parquet(folder / "part-7.parquet")
    code, err = _run_cli("group-spread", folder, "--group-by", "zone", "--batch-rows", "50", "--output", out)
    assert code != 0 and "do not agree" in err and "field 'pop'" in err and len(err.strip().splitlines()) == 1
    (folder / "part-7.parquet").unlink()
    # two layers streamed, only one of which has a CRS
    bare = tmp_path / "bare.parquet"
    homes.iloc[:10].set_crs(None, allow_override=True).to_parquet(bare)
    code, err = _run_cli(
        "cross-spread", folder, "--group-by", "zone", "--to", bare, "--batch-rows", "50", "--output", out
    )
    assert code != 0 and "Only one of" in err and len(err.strip().splitlines()) == 1
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT", 1)
    for script in ("group-spread", "cross-spread"):
        code, err = _run_cli(
            script, folder, "--group-by", "zone", "--dask-scheduler", "tcp://127.0.0.1:9", "--output", out
        )
        assert code != 0 and "No Dask scheduler answered" in err and len(err.strip().splitlines()) == 1
    code, err = _run_cli(
        "point-remoteness", folder, "--dask-scheduler", "tcp://127.0.0.1:9", "--output", tmp_path / "r.gpkg"
    )
    assert code != 0 and "one row per feature" in err and len(err.strip().splitlines()) == 1
    assert not out.exists() and not (tmp_path / "r.gpkg").exists()


def test_refinement_in_several_passes_gives_the_same_totals(monkeypatch):
    """Memory stays bounded: heavy cells are refined in passes of at most a given size."""
    frame = _clustered_layer()
    setup = estimate.distance_setup(frame.crs, "the layer", script="test")
    results = []
    for limit in (10**9, 300):  # one refinement pass, then many small ones
        monkeypatch.setattr(streaming, "REFINE_CELLS_PER_PASS", limit)
        with prepare(
            layer_parts(frame), group_by=["zone"], weight="pop", setup=setup, batch_rows=200
        ) as ready:
            plan = ready.survey.plan(tolerance=0.01, method="projection")
            refinement = ready.reduce(plan.accumulate).refinement(plan)
            results.append(pair_sums(ready, tolerance=0.01, method="projection"))
    parts = streaming._split(refinement, 300)
    assert len(parts) > 1 and sum(p.size for p in parts) == refinement.size
    assert all(p.size <= 300 or p.group.size == 1 for p in parts)
    np.testing.assert_allclose(results[1].total, results[0].total, rtol=1e-12)
    np.testing.assert_allclose(results[1].upper, results[0].upper, rtol=1e-12)
