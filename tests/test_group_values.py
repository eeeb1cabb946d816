"""Awkward group values: named like an output column, differing only by case, empty, null.

Every distance is checked against brute force with ``scipy.spatial.distance.cdist`` (the
reference library of /work/shared/REFERENCES.md) at tolerance 0, through the command line in
process. Null and empty-text groups must stay apart in every output shape (see toolbox/tables.py).
"""

from __future__ import annotations

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
