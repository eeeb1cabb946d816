"""In-memory GeoDataFrames: the plain-points path gives what the general path gives.

``toolbox.layers.read`` reads a layer of plain 2-D points with ``shapely.get_x``/``get_y`` in
threads (no type pass, no feature index); anything else (MultiPoints, nulls, empties, Z, NaN)
goes the general way with its messages. Each check runs both paths on the same frame, and
the sums are checked against brute force with ``scipy.spatial.distance.pdist`` (planar) or
``pyproj.Geod.inv`` (degrees).
"""

from __future__ import annotations

import contextlib

import geopandas as gpd
import numpy as np
import pyproj
import pytest
import shapely
from scipy.spatial.distance import pdist

import toolbox
from toolbox.layers import points_of, read

from .conftest import CRS, X0, Y0


@pytest.fixture
def small_blocks(monkeypatch):
    """Blocks of 7 features, so that even small layers are read in several threaded blocks."""
    monkeypatch.setattr(read, "_PLAIN_BLOCK", 7)


def _frame(geometry, crs=CRS, **fields) -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame(fields, geometry=list(geometry), crs=crs)


def _plain(n=50, seed=3) -> list:
    rng = np.random.default_rng(seed)
    return list(shapely.points(X0 + rng.normal(0, 300, n), Y0 + rng.normal(0, 200, n)))


def _read_both(frame, monkeypatch):
    """``points_of`` with the plain-points path, then without it (or the errors each raises)."""
    outcomes = []
    for plain in (True, False):
        with monkeypatch.context() as m:
            if not plain:
                m.setattr(read, "_plain_points", lambda geometry: None)
            try:
                outcomes.append(points_of(frame, [], "the GeoDataFrame"))
            except toolbox.PairspreadError as exc:
                outcomes.append(exc)
    return outcomes


def _same(fast, general):
    if isinstance(general, Exception):
        assert type(fast) is type(general) and str(fast) == str(general)
        return
    np.testing.assert_array_equal(fast.x, general.x)
    np.testing.assert_array_equal(fast.y, general.y)
    np.testing.assert_array_equal(fast.feature, general.feature)
    assert fast.crs == general.crs
    assert fast.attributes.equals(general.attributes)


@pytest.mark.usefixtures("small_blocks")
def test_plain_points_take_the_fast_path_and_match_the_general_one(monkeypatch):
    frame = _frame(_plain(), zone=["a", "b"] * 25)
    geometry = np.asarray(frame.geometry.values, dtype=object)
    assert read._plain_points(geometry) is not None  # the path under test really runs
    fast, general = _read_both(frame, monkeypatch)
    _same(fast, general)
    np.testing.assert_array_equal(fast.feature, np.arange(50))


@pytest.mark.usefixtures("small_blocks")
@pytest.mark.parametrize(
    "odd",
    [
        shapely.MultiPoint([(X0, Y0), (X0 + 5, Y0 + 5)]),
        None,
        shapely.Point(),
        shapely.Point(X0, Y0, 12.0),
        shapely.Point(np.nan, Y0),
        shapely.Point(np.inf, Y0),
        shapely.LineString([(X0, Y0), (X0 + 1, Y0)]),
        shapely.GeometryCollection([shapely.Point(X0, Y0)]),
    ],
    ids=["multipoint", "null", "empty", "z", "nan", "inf", "line", "collection"],
)
@pytest.mark.parametrize("where", [0, 33, 49], ids=["first", "middle", "last"])
def test_other_features_take_the_general_path(monkeypatch, odd, where):
    # one odd feature anywhere (first block, a later block, the last one) sends the whole
    # layer the general way: the same points, or the same message, as without the fast path
    geometry = _plain()
    geometry[where] = odd
    frame = _frame(geometry)
    assert read._plain_points(np.asarray(frame.geometry.values, dtype=object)) is None
    z = odd is not None and bool(shapely.has_z(odd))
    with pytest.warns(UserWarning, match="Z coordinates") if z else contextlib.nullcontext():
        fast, general = _read_both(frame, monkeypatch)
    _same(fast, general)


@pytest.mark.usefixtures("small_blocks")
def test_group_spread_of_plain_points_matches_pdist_and_the_general_path(monkeypatch):
    # reference: Σ_{i<j} w_i w_j d_ij by brute force with scipy's pdist (the definition)
    rng = np.random.default_rng(11)
    frame = _frame(_plain(60), zone=rng.choice(["a", "b", "c"], 60), pop=rng.integers(0, 9, 60).astype(float))
    ours = toolbox.group_spread(frame, group_by="zone", weight="pop", tolerance=0)
    with monkeypatch.context() as m:
        m.setattr(read, "_plain_points", lambda geometry: None)
        general = toolbox.group_spread(frame, group_by="zone", weight="pop", tolerance=0)
    assert ours.equals(general)
    xy = shapely.get_coordinates(np.asarray(frame.geometry.values))
    for row in ours.itertuples():
        members = (frame["zone"] == row.zone).to_numpy()
        w = frame["pop"].to_numpy()[members]
        iu = np.triu_indices(members.sum(), k=1)
        expected = float(np.dot(np.outer(w, w)[iu], pdist(xy[members])))
        assert row.total_dist == pytest.approx(expected, rel=1e-12)


@pytest.mark.usefixtures("small_blocks")
def test_group_spread_in_degrees_matches_geod_and_the_general_path(monkeypatch):
    # a layer in longitude and latitude (EPSG:4326) is measured on the ellipsoid; reference:
    # pyproj.Geod(ellps="WGS84").inv over all pairs
    rng = np.random.default_rng(5)
    lon, lat = -150.0 + rng.uniform(0, 0.3, 30), -35.0 + rng.uniform(0, 0.2, 30)
    frame = _frame(shapely.points(lon, lat), crs="EPSG:4326")
    ours = toolbox.group_spread(frame, tolerance=0)
    with monkeypatch.context() as m:
        m.setattr(read, "_plain_points", lambda geometry: None)
        general = toolbox.group_spread(frame, tolerance=0)
    assert ours.equals(general)
    i, j = np.triu_indices(30, k=1)
    _, _, d = pyproj.Geod(ellps="WGS84").inv(lon[i], lat[i], lon[j], lat[j])
    assert ours["total_dist"].item() == pytest.approx(d.sum(), rel=1e-9)
    assert ours["units"].item() == "metre"


@pytest.mark.usefixtures("small_blocks")
def test_multipoints_in_memory_count_each_of_their_points():
    # MultiPoints count each of their points (issue 2): a 3-4-5 triangle's sides by hand
    frame = _frame([shapely.MultiPoint([(X0, Y0), (X0 + 3, Y0 + 4)]), shapely.Point(X0, Y0 + 8)])
    table = toolbox.group_spread(frame, tolerance=0)
    assert table["n_points"].item() == 3
    assert table["total_dist"].item() == pytest.approx(5 + 8 + np.hypot(3, 4))
