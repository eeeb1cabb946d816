"""One-pass states of parts of a layer merged as a Dask tree merges them (toolbox/cluster_pass.py,
OnePass.merge, dyadic.merge_windows), and group-spread on a cluster in one pass.

References: scipy's ``pdist`` (Σ_{i<j} w_i w_j d_ij per group by brute force) and ``numpy``'s
``bincount``. Each part's state codes its groups its own way (as a task's key registry does),
travels through ``pickle`` (as between Dask workers) and is merged in sequence or in a tree;
the merged interval must contain the exact total whatever the cut and the order. Nothing is timed.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from scipy.spatial.distance import pdist

pytest.importorskip("numba")

from toolbox.estimate import single_pass  # noqa: E402
from toolbox.estimate.single_pass import OnePass, TooLarge  # noqa: E402

GROUPS = 6


def _layer(layout: str, weighted: bool, seed: int = 3):
    """x, y, weights (or None) and group codes: a spread group, a village with a far farm, a
    group near the exact-sums size, a small one, one that only the first parts hold, and one
    point alone."""
    rng = np.random.default_rng(seed)
    spread = layout == "spread"
    sizes = [1500, 801, 260, 40, 300, 1]
    xy = [
        rng.normal(0, 500, (1500, 2)),
        np.vstack([rng.normal(0, 2 if not spread else 400, (600, 2)), [3000, 0] + rng.normal(0, 50, (200, 2)), [[40_000, 5_000]]]),
        rng.normal(10_000, 80, (260, 2)),
        rng.normal(-5_000, 30, (40, 2)),
        rng.normal(2_000, 1_000, (300, 2)),
        np.array([[7.0, 7.0]]),
    ]
    xy = np.vstack(xy) + [500_000, 6_120_000]  # UTM-like metres
    groups = np.repeat(np.arange(GROUPS), sizes)
    w = rng.uniform(0.5, 3.0, groups.size) if weighted else None
    order = rng.permutation(groups.size)
    order = order[np.argsort(groups[order] != 4, kind="stable")]  # group 4 first: only early parts hold it
    return xy[order, 0].copy(), xy[order, 1].copy(), None if w is None else w[order], groups[order]


def _truth(x, y, w, groups):
    out = np.full(GROUPS, np.nan)
    for g in range(GROUPS):
        m = groups == g
        if m.sum() < 2:
            continue
        ww = np.ones(m.sum()) if w is None else w[m]
        i, j = np.triu_indices(m.sum(), k=1)  # pdist's condensed order
        out[g] = float(np.dot(ww[i] * ww[j], pdist(np.c_[x[m], y[m]])))
    return out


def _part_state(x, y, w, groups, rng, method):
    """A part's state, its groups coded in an order of its own; and the group each code is."""
    present = rng.permutation(np.unique(groups))
    code = np.empty(GROUPS, dtype=np.int64)
    code[present] = np.arange(present.size)
    state = OnePass(tolerance=0.01, method=method)
    state.add(x, y, w, code[groups], present.size)
    return pickle.loads(pickle.dumps(state)), present  # as it travels between workers


def _merge(a, b):
    """Merge ``b`` into ``a``: codes of ``b``'s groups in ``a``'s union, new ones appended."""
    (state, names), (other, other_names) = a, b
    position = {g: k for k, g in enumerate(names.tolist())}
    new = [g for g in other_names.tolist() if g not in position]
    names = np.concatenate([names, np.array(new, dtype=np.int64)])
    position.update({g: len(position) + k for k, g in enumerate(new)})
    codes = np.array([position[g] for g in other_names.tolist()], dtype=np.int64)
    return state.merge(pickle.loads(pickle.dumps(other)), codes, names.size), names


def _merged(x, y, w, groups, pieces, method, order, seed=0):
    rng = np.random.default_rng(seed)
    states = [
        _part_state(x[p], y[p], None if w is None else w[p], groups[p], rng, method)
        for p in np.array_split(np.arange(x.size), pieces)
    ]
    if order == "reversed":
        states = states[::-1]
    while len(states) > 1:
        if order == "tree":  # random pairs, as a reduction tree of fan-in two
            i, j = sorted(rng.choice(len(states), 2, replace=False))
            b = states.pop(j)
            states[i] = _merge(states[i], b)
        else:
            states[0:2] = [_merge(states[0], states[1])]
    state, names = states[0]
    sums = state.finish()
    position = np.empty(GROUPS, dtype=np.int64)
    position[names] = np.arange(names.size)
    return state, names, {k: getattr(sums, k)[position] for k in ("total", "lower", "upper", "rel_bound", "n_points")}, position


@pytest.mark.parametrize("layout", ["spread", "clustered"])
@pytest.mark.parametrize("weighted", [False, True])
def test_merged_parts_contain_the_exact_totals(layout, weighted):
    x, y, w, groups = _layer(layout, weighted)
    truth = _truth(x, y, w, groups)  # scipy pdist
    live = ~np.isnan(truth)
    for pieces in (1, 2, 7, 50):
        for method in ("projection", "auto") if pieces == 7 else ("projection",):
            results = []
            for order in ("sequence", "reversed", "tree") if pieces == 7 else ("tree",):
                state, names, r, position = _merged(x, y, w, groups, pieces, method, order, seed=pieces)
                label = (pieces, method, order)
                assert np.all(r["lower"][live] <= truth[live]) and np.all(truth[live] <= r["upper"][live]), label
                assert np.isnan(r["total"][~live]).all(), label
                np.testing.assert_array_equal(r["n_points"], np.bincount(groups, minlength=GROUPS))
                within = live & ~state.over_budget[position]  # those over budget are read again
                assert np.all(r["rel_bound"][within] <= 0.01), label
                results.append(r)
            # any order and tree: the same guarantee, so the intervals of different orders meet
            for a in results:
                for b in results:
                    assert np.all(a["lower"][live] <= b["upper"][live]), pieces


def test_windows_at_different_exponents_and_groups_binned_in_one_part_kept_in_another():
    x, y, w, groups = _layer("spread", True)
    narrow = np.flatnonzero(groups == 0)[:200]
    rest = np.setdiff1d(np.arange(x.size), narrow)
    rng = np.random.default_rng(1)
    # the narrow part: group 0's 200 points squeezed a hundredfold along x: finer windows
    xs = x.copy()
    xs[narrow] = x[narrow].mean() + (x[narrow] - x[narrow].mean()) * 0.01
    truth = _truth(xs, y, w, groups)
    narrow_state, narrow_names = _part_state(xs[narrow], y[narrow], w[narrow], groups[narrow], rng, "projection")
    rest_state, rest_names = _part_state(xs[rest], y[rest], w[rest], groups[rest], rng, "projection")
    fine = narrow_state.arenas[0][1][narrow_state.slot[0]]
    coarse = rest_state.arenas[0][1][rest_state.slot[int(np.flatnonzero(rest_names == 0)[0])]]
    assert (fine < coarse).any()  # windows of one group at different exponents
    merged, names = _merge((rest_state, rest_names), (narrow_state, narrow_names))
    r = merged.finish()
    position = np.empty(GROUPS, dtype=np.int64)
    position[names] = np.arange(names.size)
    assert r.lower[position[0]] <= truth[0] <= r.upper[position[0]]
    # group 2 (260 points) under "auto": kept where a part has at most 183 of its points,
    # binned where it has more; merged either way round, its interval holds the exact total
    x, y, w, groups = _layer("spread", True)
    truth = _truth(x, y, w, groups)
    two = np.flatnonzero(groups == 2)
    few, many = two[:60], two[60:]
    others = np.flatnonzero(groups != 2)
    a = _part_state(x[many], y[many], w[many], groups[many], rng, "auto")
    b = _part_state(x[few], y[few], w[few], groups[few], rng, "auto")
    assert a[0].slot[0] >= 0 and b[0].slot[0] < 0  # binned there, kept here
    c = _part_state(x[others], y[others], w[others], groups[others], rng, "auto")
    for first, second in ((a, b), (b, a)):
        merged, names = _merge(_merge(pickle.loads(pickle.dumps(c)), first), second)  # c is merged into
        k = int(np.flatnonzero(names == 2)[0])
        r = merged.finish()
        assert merged.slot[k] >= 0 and merged.count[k] == 260
        assert r.lower[k] <= truth[2] <= r.upper[k]
    # kept in both parts, together over the exact-sums size: binned after the merge
    half = two[:130], two[130:]
    p, q = (_part_state(x[h], y[h], w[h], groups[h], rng, "auto") for h in half)
    assert p[0].slot[0] < 0 and q[0].slot[0] < 0
    merged, names = _merge(p, q)
    r = merged.finish()
    assert merged.slot[0] >= 0 and r.lower[0] <= truth[2] <= r.upper[0]


@pytest.mark.parametrize("weighted", [False, True])
def test_a_state_travels_whole(weighted):
    """Only bins that hold points are sent (the others hold zeros): what arrives, through
    ``pickle`` as between workers, is the same state, and finishes to the same sums."""
    x, y, w, groups = _layer("clustered", weighted)
    state = OnePass(tolerance=0.01, method="auto")
    state.add(x, y, w, groups, GROUPS)
    back = pickle.loads(pickle.dumps(state))
    assert len(pickle.dumps(state)) < sum(part.nbytes for part in state.arenas[0]) / 4
    for mine, theirs in zip(state.arenas[0], back.arenas[0], strict=True):
        np.testing.assert_array_equal(mine, theirs)
        assert theirs.flags.writeable
    for name in ("count", "weight_sum", "pair_weight", "size_sum", "slot", "dense"):
        np.testing.assert_array_equal(getattr(back, name), getattr(state, name))
    a, b = state.finish(), back.finish()
    np.testing.assert_array_equal(a.total, b.total)
    np.testing.assert_array_equal(a.upper, b.upper)


def test_merging_keeps_the_memory_limits(monkeypatch):
    x, y, w, groups = _layer("spread", False)
    rng = np.random.default_rng(2)
    halves = np.array_split(np.arange(x.size), 2)
    a, b = (_part_state(x[h], y[h], None, groups[h], rng, "auto") for h in halves)
    monkeypatch.setattr(single_pass, "GATHER_POINTS", 30)  # groups 3 and 5 keep 41 points together
    with pytest.raises(TooLarge):
        _merge(a, b)
    monkeypatch.undo()
    monkeypatch.setattr(single_pass, "DENSE_SHARE", np.inf)  # no window emptied for reuse
    without_4 = _part_state(*(v[groups != 4] for v in (x, y)), None, groups[groups != 4], rng, "projection")
    only_4 = _part_state(x[groups == 4], y[groups == 4], None, groups[groups == 4], rng, "projection")
    full = without_4[0]
    assert not full.free
    # room for the windows it has and no more (unweighted: 16 bytes a bin)
    monkeypatch.setattr(single_pass, "WINDOW_BYTES", full.used * full.m * full.bins * 16)
    with pytest.raises(TooLarge):  # a group binned there and new here needs one more window
        _merge(without_4, only_4)
    monkeypatch.undo()
    b = _part_state(x, y, None, groups, rng, "projection")
    weighted = _part_state(x, y, np.ones(x.size), groups, rng, "projection")
    with pytest.raises(ValueError, match="weighted"):
        _merge(weighted, b)


# --------------------------------------------------------------------------------------------
# on a cluster: threads of this process, so that the limits below can be lowered for the test


@pytest.fixture(scope="module")
def threads_cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
    ) as running:
        with distributed.Client(running, set_as_default=False) as client:
            yield client


def _layer_files(folder, weighted: bool):
    """The clustered layer as four GeoParquet files (a village narrower than its bins)."""
    import geopandas as gpd
    import shapely

    x, y, w, groups = _layer("clustered", weighted)
    zone = np.array(["north", "south", "east", "west", "early", "alone"])[groups]
    frame = gpd.GeoDataFrame(
        {"zone": zone, "pop": np.ones(x.size) if w is None else w},
        geometry=shapely.points(x, y), crs="EPSG:32705",
    )  # fmt: skip
    folder.mkdir()
    for i, rows in enumerate(np.array_split(np.arange(x.size), 4)):
        frame.iloc[rows].to_parquet(folder / f"part-{i}.parquet")
    return frame


def _by_zone(sums, keys):
    return {z: (lo, hi) for z, lo, hi in zip(keys.keys["zone"], sums.lower, sums.upper, strict=True)}


def test_groups_over_budget_are_read_again_on_the_workers(threads_cluster, tmp_path, monkeypatch, reference):
    from toolbox import cluster_pass, estimate
    from toolbox.layers.stream import layer_parts

    frame = _layer_files(tmp_path / "layer", weighted=True)
    truth = reference(frame, ["zone"], "pop")  # scipy pdist
    setup = estimate.DistanceSetup("planar", "metre")
    common = dict(group_by=["zone"], weight="pop", setup=setup, batch_rows=100, tolerance=0.01)
    monkeypatch.setattr(single_pass, "BIN_FACTOR", 1 / 8)  # 16 bins: the village fills one
    monkeypatch.setattr(single_pass, "DENSE_SHARE", np.inf)  # and is not kept: over budget
    again = []
    in_memory = estimate.pair_sums
    monkeypatch.setattr(estimate, "pair_sums", lambda points, **kw: again.append(points.n_groups) or in_memory(points, **kw))
    sums, keys = cluster_pass.pair_sums(layer_parts(tmp_path / "layer"), **common, method="projection", client=threads_cluster)
    assert again  # some group was read again and summed as in memory
    for zone, (lo, hi) in _by_zone(sums, keys).items():
        exact = truth[(zone,)]["total_dist"]
        if not np.isnan(exact):
            assert lo <= exact <= hi, zone
    assert (sums.rel_bound[~np.isnan(sums.rel_bound)] <= 0.01).all()
    # more windows than allowed: None, and the script runs the planned passes instead
    monkeypatch.setattr(single_pass, "WINDOW_BYTES", 1000)
    assert cluster_pass.pair_sums(layer_parts(tmp_path / "layer"), **common, method="projection", client=threads_cluster) is None
    import toolbox

    table = toolbox.group_spread(tmp_path / "layer", group_by="zone", weight="pop", dask_scheduler=threads_cluster.scheduler.address)
    for _, row in table.iterrows():
        exact = truth[(row["zone"],)]["total_dist"]
        if not np.isnan(exact):
            assert row["total_lo"] <= exact <= row["total_hi"], row["zone"]
