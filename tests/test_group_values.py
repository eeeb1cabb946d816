"""Awkward group values: named like an output column, differing only by case, empty, null.

Every distance is checked against brute force with ``scipy.spatial.distance.cdist`` (the
reference library of /work/shared/REFERENCES.md) at tolerance 0, through the command line in
process. Null and empty-text groups must stay apart in every output shape (see toolbox/tables.py).
"""

from __future__ import annotations

import io
import sqlite3

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from scipy.spatial.distance import cdist

from toolbox.cli import main

CRS = "EPSG:32705"
#: awkward values of the field ``site``; None is a null
SITES = ["from_group", "North", "north", "", None, "FID", "(null)"]


@pytest.fixture(scope="module")
def awkward(tmp_path_factory):
    rng = np.random.default_rng(11)
    values, xs, ys = [], [], []
    for k, site in enumerate(SITES):
        n = 3 + k
        values += [site] * n
        xs += list(500_000 + 400 * k + rng.uniform(0, 300, n))
        ys += list(6_120_000 + rng.uniform(0, 300, n))
    frame = gpd.GeoDataFrame(
        {"site": pd.array(values, dtype=object)}, geometry=shapely.points(xs, ys), crs=CRS
    )
    path = tmp_path_factory.mktemp("awkward") / "sites.gpkg"
    pyogrio.write_dataframe(frame, path, layer="sites", driver="GPKG")
    # the GeoPackage really holds a NULL and an empty text (the fixture itself is right)
    with sqlite3.connect(path) as con:
        stored = {row[0] for row in con.execute("SELECT DISTINCT site FROM sites")}
    assert None in stored and "" in stored
    return path, frame


def _mean_between(frame, a, b) -> float:
    def pick(v):
        return frame["site"].isna() if v is None else frame["site"] == v

    pa = shapely.get_coordinates(frame.geometry[pick(a)].values)
    pb = shapely.get_coordinates(frame.geometry[pick(b)].values)
    d = cdist(pa, pb)
    if a == b or (a is None and b is None):
        n = len(pa)
        return d.sum() / (n * (n - 1))  # each pair twice over n(n-1) ordered pairs
    return d.mean()


def _run(capsys, *args):
    code = main([str(a) for a in args])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    return captured.out, captured.err


@pytest.mark.parametrize("suffix", [".csv", ".gpkg", ".parquet"])
def test_wide_matrix_of_awkward_groups(capsys, tmp_path, awkward, suffix):
    # bug: a group named from_group crashed the pivot ("cannot insert from_group, already
    # exists"); North/north and '' broke the GeoPackage write and blamed the disk
    path, frame = awkward
    target = tmp_path / f"wide{suffix}"
    args = ["cross-spread", path, "--group-by", "site", "--tolerance", "0", "--wide", "--quiet"]
    _, err = _run(capsys, *args, "--output", target)
    if suffix == ".csv":
        wide = pd.read_csv(target, keep_default_na=False, na_values=[])
    elif suffix == ".gpkg":
        wide = pyogrio.read_dataframe(target, layer="cross_spread")
    else:
        wide = pd.read_parquet(target)
    # groups come sorted, the null one last; the null group is '(null)' even beside a value
    # '(null)', and names are unique ignoring case and never from_group or fid
    named = {"": "(empty)", "(null)": "(null) (2)", "FID": "FID (2)", "North": "North",
             "from_group": "from_group (2)", "north": "north (2)", None: "(null)"}  # fmt: skip
    order = [*sorted(s for s in SITES if s is not None), None]
    assert list(wide.columns) == ["from_group", *(named[v] for v in order)]
    # the mapping is reported for every column whose name is not its group's value
    for value, name in named.items():
        if value is not None and name != value:
            assert f"{value!r} → {name!r}" in err, err
    groups = {named[v]: v for v in order}
    labels = wide["from_group"].tolist()
    for i, a in enumerate(order):
        if suffix == ".csv":  # a null row label is an empty field, an empty text is ""
            assert labels[i] == ("" if a is None or a == "" else a)
        else:
            assert pd.isna(labels[i]) if a is None else labels[i] == a
        for name, b in groups.items():
            np.testing.assert_allclose(wide[name].iloc[i], _mean_between(frame, a, b), rtol=1e-10)


def test_null_and_empty_groups_stay_apart_in_every_output(capsys, tmp_path, awkward):
    path, frame = awkward
    base = ["--group-by", "site", "--tolerance", "0", "--quiet"]
    # the printed table: (null) for the null group, "" for the empty one
    out, _ = _run(capsys, "group-spread", path, *base)
    first = [line.split()[0] for line in out.splitlines()[1:]]
    assert '""' in first and "(null)" in first
    # CSV: an empty field for null, a quoted empty text for ""
    out, _ = _run(capsys, "group-spread", path, *base, "--output", "-")
    rows = out.splitlines()[1:]
    assert sum(r.startswith('"",') for r in rows) == 1 and sum(r.startswith(",") for r in rows) == 1
    table = pd.read_csv(io.StringIO(out))
    assert table["n_points"].sum() == len(frame) and len(table) == len(SITES)
    # long cross-spread rows in a GeoPackage: NULL and '' as they were in the input
    target = tmp_path / "long.gpkg"
    _run(capsys, "cross-spread", path, *base, "--output", target)
    with sqlite3.connect(target) as con:
        pairs = con.execute("SELECT from_group, to_group, mean_dist FROM cross_spread").fetchall()
    assert len(pairs) == len(SITES) ** 2
    for a, b, mean in pairs:
        assert a in SITES and b in SITES
        np.testing.assert_allclose(mean, _mean_between(frame, a, b), rtol=1e-10)
    # long cross-spread as CSV: from_group is "" for one group and empty for the other
    out, _ = _run(capsys, "cross-spread", path, *base, "--output", "-")
    starts = [r.split(",")[0] for r in out.splitlines()[1:]]
    assert starts.count('""') == len(SITES) and starts.count("") == len(SITES)


def test_labels_of_several_fields_keep_null_and_empty_apart(capsys, tmp_path):
    rng = np.random.default_rng(5)
    a = ["x", "x", None, "", "x / y"]
    b = ["", None, "y", "y", "z"]
    n = 4
    frame = gpd.GeoDataFrame(
        {"a": np.repeat(np.array(a, dtype=object), n), "b": np.repeat(np.array(b, dtype=object), n)},
        geometry=shapely.points(500_000 + rng.uniform(0, 900, n * 5), 6_120_000 + rng.uniform(0, 900, n * 5)),
        crs=CRS,
    )
    path = tmp_path / "two.gpkg"
    pyogrio.write_dataframe(frame, path, driver="GPKG")
    out, _ = _run(capsys, "cross-spread", path, "--group-by", "a,b", "--quiet", "--output", "-")
    labels = pd.read_csv(io.StringIO(out), keep_default_na=False)["from_group"].unique().tolist()
    assert len(labels) == 5  # five groups, five different labels
    assert set(labels) == {"x / ", "x / (null)", "(null) / y", " / y", "x / y / z"}
