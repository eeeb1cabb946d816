"""``spread-contrast`` and its kernel ``energy_test``, checked from outside the project.

References, named beside each check:

* ``dcor.energy_distance`` and ``dcor.homogeneity.energy_test`` (dcor, Ramos-Carreño & Torrecilla;
  V-statistics, the energy test statistic ``n m / (n + m) · E`` of Székely & Rizzo 2004);
* DISCO's decomposition ``T = S + W`` and F ratio (Rizzo & Székely 2010, Annals of Applied
  Statistics 4(2), section 2 and eq. for F_n), on a hand-checked example;
* the brute-force definition with ``scipy.spatial.distance.cdist``;
* ``scipy.stats.kstest`` for the uniformity of null p-values (a property of every valid test);
* Holm (1979), "A simple sequentially rejective multiple test procedure", for ``p_adjusted``.
"""

from __future__ import annotations

import dcor
import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from scipy import stats
from scipy.spatial.distance import cdist

import toolbox
from toolbox.errors import ParameterError
from toolbox.estimate import Points
from toolbox.estimate import energy_test as estimate_energy_test
from toolbox.kernels.energy import energy_sums, holm_adjust


def energy_test(x, y, labels, weights=None, **options):
    """The estimator's energy test on planar coordinate arrays."""
    return estimate_energy_test(Points.build(x, y, weights=weights), labels, **options)


def _samples(seed, sizes=(30, 25), shift=0.5):
    rng = np.random.default_rng(seed)
    parts = [rng.normal(size=(n, 2)) + [shift * i, 0] for i, n in enumerate(sizes)]
    labels = np.concatenate([np.full(n, i) for i, n in enumerate(sizes)])
    return parts, np.vstack(parts), labels


def _dcor_orders(seed, n, count):
    """The permutations dcor draws: ``RandomState(seed).permutation(n)`` once per resample."""
    state = np.random.RandomState(seed)
    return np.array([state.permutation(n) for _ in range(count)])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_energy_distance_matches_dcor(seed):
    # reference: dcor.energy_distance (V-statistic, not square-rooted)
    (a, b), pts, labels = _samples(seed)
    expected = dcor.energy_distance(a, b)
    exact = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0, permutations=19, seed=seed)
    assert exact.method == "exact"
    assert exact.energy == pytest.approx(expected, rel=1e-12)
    assert exact.energy_lo <= expected <= exact.energy_hi
    for tolerance in (0.05, 0.01, 1e-4):
        projected = energy_test(
            pts[:, 0], pts[:, 1], labels, tolerance=tolerance, method="projection", permutations=19, seed=seed
        )
        assert projected.energy_lo <= expected <= projected.energy_hi  # the interval is guaranteed
        # absolute bound: every pair sum is within tolerance of its true value
        budget = tolerance * (2 * projected.between_mean + 2 * projected.within_mean.max())
        assert abs(projected.energy - expected) <= budget


def test_p_value_matches_dcor_with_the_same_permutations():
    # reference: dcor.homogeneity.energy_test replays RandomState(5) permutations; it counts
    # statistics strictly greater, we count ≥, which agree for continuous data (no ties)
    (a, b), pts, labels = _samples(3, shift=0.4)
    reference = dcor.homogeneity.energy_test(a, b, num_resamples=499, random_state=5)
    orders = _dcor_orders(5, labels.size, 499)
    ours = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0, orders=orders)
    assert ours.p_value == pytest.approx(reference.pvalue, abs=1e-12)
    # dcor's statistic is n m / (n + m) · E = 2 S for two samples
    assert 2 * ours.disco_between == pytest.approx(reference.statistic, rel=1e-12)


def test_projection_p_value_within_monte_carlo_error_of_dcor():
    # reference: dcor.homogeneity.energy_test, 999 resamples; two p-values from independent
    # permutations differ by sampling error of order sqrt(2 p (1 − p) / 999)
    (a, b), pts, labels = _samples(4, sizes=(40, 35), shift=0.3)
    reference = dcor.homogeneity.energy_test(a, b, num_resamples=999, random_state=11).pvalue
    ours = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0.01, permutations=999, seed=11).p_value
    spread = np.sqrt(2 * reference * (1 - reference) / 999)
    assert abs(ours - reference) <= 5 * spread + 0.005


def test_integer_weights_are_frequencies():
    # reference: dcor.energy_distance of the samples with every point repeated w times
    (a, b), pts, labels = _samples(5, sizes=(12, 9))
    w = np.random.default_rng(5).integers(1, 4, size=labels.size)
    expanded = [np.repeat(part, w[labels == i], axis=0) for i, part in enumerate((a, b))]
    expected = dcor.energy_distance(*expanded)
    r = energy_test(pts[:, 0], pts[:, 1], labels, w, tolerance=0, permutations=19, seed=0)
    assert r.energy == pytest.approx(expected, rel=1e-12)
    assert r.weight_sum.tolist() == [w[labels == 0].sum(), w[labels == 1].sum()]
    p = energy_test(pts[:, 0], pts[:, 1], labels, w, tolerance=1e-3, permutations=19, seed=0)
    assert p.energy_lo <= expected <= p.energy_hi


def _brute_between(d, labels, w):
    """DISCO's S from the definition: P/N − Σ_a P_aa/W_a with P sums over unordered pairs."""
    n_total = w.sum()
    out = 0.5 * w @ d @ w / n_total
    for a in np.unique(labels):
        z = w * (labels == a)
        out -= 0.5 * z @ d @ z / z.sum()
    return out


def test_weighted_p_value_matches_brute_force_relabelling():
    # reference: the permutation test from its definition, distances by scipy's cdist; the
    # features (with their weights) are relabelled, as replayed from explicit permutations
    (_, _), pts, labels = _samples(6, sizes=(10, 8), shift=0.8)
    w = np.random.default_rng(6).uniform(0.5, 3.0, size=labels.size)
    d = cdist(pts, pts)
    orders = _dcor_orders(2, labels.size, 199)
    observed = _brute_between(d, labels, w)
    count = 0
    for order in orders:
        relabelled = np.empty_like(labels)
        relabelled[order] = labels
        count += _brute_between(d, relabelled, w) >= observed - 1e-12
    expected = (count + 1) / 200
    for tolerance in (0, 1e-6):
        r = energy_test(pts[:, 0], pts[:, 1], labels, w, tolerance=tolerance, orders=orders)
        assert r.p_value == pytest.approx(expected)
    assert r.disco_between == pytest.approx(observed, rel=1e-5)


def test_disco_decomposition_on_a_hand_checked_example():
    # Rizzo & Székely (2010): T = (N/2)·G(pooled), W = Σ (n_j/2)·G(A_j, A_j), S = T − W
    # = Σ_{j<k} (n_j n_k / 2N)·E(A_j, A_k), F = (S/(K−1)) / (W/(N−K)); G is the mean distance
    # over all ordered pairs (V-statistic). A = {0, 2}, B = {3, 5}, C = {1, 7} on a line:
    # pooled pair sum 48, G = 96/36, T = 8; within 1 + 1 + 3 = 5; S = 3; pairwise energies
    # E(A,B) = 4, E(A,C) = 3, E(B,C) = 2, so S = (4/12)(4 + 3 + 2) = 3; F = (3/2)/(5/3) = 0.9.
    x = np.array([0.0, 2.0, 3.0, 5.0, 1.0, 7.0])
    labels = np.array([0, 0, 1, 1, 2, 2])
    r = energy_test(x, np.zeros(6), labels, tolerance=0, permutations=99, seed=0)
    assert r.disco_between == pytest.approx(3.0)
    assert r.disco_within == pytest.approx(5.0)
    assert r.disco_between + r.disco_within == pytest.approx(8.0)  # total dispersion T
    assert r.f_ratio == pytest.approx(0.9)
    assert r.energy == pytest.approx(3.0)  # pair-size weighted mean of 4, 3, 2
    assert r.within_mean.tolist() == pytest.approx([2.0, 2.0, 6.0])
    assert r.between_mean == pytest.approx(38 / 12)
    projected = energy_test(x, np.zeros(6), labels, tolerance=0.01, method="projection", permutations=99, seed=0)
    assert projected.energy_lo <= 3.0 <= projected.energy_hi
    # k samples by projection: the same relabellings as exact mode, so the same p-value
    fine = energy_test(x, np.zeros(6), labels, tolerance=1e-6, method="projection", permutations=99, seed=0)
    assert fine.p_value == r.p_value and fine.f_ratio == pytest.approx(0.9, rel=1e-5)


def test_null_p_values_are_roughly_uniform():
    # under the null every valid permutation test has uniform p-values (up to the 1/(B+1)
    # grid); Kolmogorov–Smirnov with scipy.stats.kstest at a lenient level, seeded
    rng = np.random.default_rng(2026)
    p_values = []
    for rep in range(200):
        pts = rng.normal(size=(24, 2))
        labels = np.repeat([0, 1], 12)
        r = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0.05, method="projection", permutations=99, seed=rep)
        p_values.append(r.p_value)
    assert stats.kstest(p_values, "uniform").pvalue > 0.001


def test_clear_shift_is_detected():
    (_, _), pts, labels = _samples(7, sizes=(100, 100), shift=1.0)
    r = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0.01, permutations=199, seed=1)
    assert r.p_value == pytest.approx(1 / 200)
    assert r.energy_lo > 0


def test_same_seed_same_relabellings_in_exact_and_projection_mode():
    (_, _), pts, labels = _samples(8, sizes=(15, 15), shift=0.5)
    exact = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0, permutations=299, seed=4)
    fine = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=1e-6, method="projection", permutations=299, seed=4)
    assert fine.p_value == exact.p_value
    again = energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0.01, permutations=299, seed=4)
    assert again.p_value == energy_test(pts[:, 0], pts[:, 1], labels, tolerance=0.01, permutations=299, seed=4).p_value


def test_kernel_returns_raw_sums_of_all_pairs_and_of_each_sample():
    # brute force with scipy's cdist: Σ_{i<j} d_ij over all points and within each sample
    (_, _), pts, labels = _samples(9, sizes=(7, 6))
    d = cdist(pts, pts)
    raw = energy_sums(pts[:, 0], pts[:, 1], labels, directions=0, permutations=9, seed=0)
    assert raw.total == pytest.approx(d.sum() / 2, rel=1e-12)
    for a in (0, 1):
        assert raw.within[a] == pytest.approx(d[labels == a][:, labels == a].sum() / 2, rel=1e-12)


def test_holm_against_the_definition():
    # Holm (1979): sorted p's times (k, k−1, ...), running maximum, capped at 1
    p = [0.01, 0.04, 0.03, 0.005]
    assert holm_adjust(p).tolist() == pytest.approx([0.03, 0.06, 0.06, 0.02])


# --------------------------------------------------------------------------------------------
# the script


def _households(seed=1):
    rng = np.random.default_rng(seed)
    n = 120
    district = np.repeat(["north", "south", "east"], 40)
    tenure = np.where(rng.random(n) < 0.5, "owned", "rented")
    tenure[80:] = "owned"  # east: only one value, so nothing to compare
    x = rng.normal(size=n) * 300 + np.where(tenure == "rented", 400.0, 0.0) * (district == "north")
    y = rng.normal(size=n) * 300
    return gpd.GeoDataFrame(
        {"district": district, "tenure": tenure, "residents": rng.integers(1, 5, size=n)},
        geometry=shapely.points(500_000 + x, 6_120_000 + y),
        crs="EPSG:32705",
    )


def test_script_one_row_per_group_with_notes_and_holm():
    table = toolbox.spread_contrast(
        _households(), compare="tenure", group_by=["district"], permutations=199, seed=3
    )
    assert list(table["district"]) == ["east", "north", "south"]
    for column in ("energy", "energy_lo", "energy_hi", "p_value", "permutations", "p_adjusted"):
        assert column in table
    east, north, south = (table.iloc[i] for i in range(3))
    assert pd.isna(east["energy"]) and "nothing to compare" in east["note"]
    assert north["p_value"] < 0.05 and pd.isna(north["note"])
    assert north["energy_lo"] <= north["energy"] <= north["energy_hi"]
    assert north["p_adjusted"] == pytest.approx(min(1, 2 * north["p_value"]))
    assert north["adjustment"] == "Holm over 2 tests"
    assert (table["permutations"] == 199).all() and (table["seed"] == 3).all()
    again = toolbox.spread_contrast(_households(), compare="tenure", group_by=["district"], permutations=199, seed=3)
    pd.testing.assert_frame_equal(table, again)


def test_script_two_layers_equal_one_layer_with_compare():
    layer = _households()
    owned, rented = layer[layer.tenure == "owned"], layer[layer.tenure == "rented"]
    # the same features in the same order: the same relabellings, so the same p-value
    one = toolbox.spread_contrast(pd.concat([owned, rented]), compare="tenure", permutations=99, seed=5)
    two = toolbox.spread_contrast(owned, to=rented, permutations=99, seed=5)
    for column in ("energy", "energy_lo", "energy_hi", "between_mean", "p_value"):
        assert two[column].iloc[0] == pytest.approx(one[column].iloc[0], rel=1e-9)


def test_script_weights_are_frequencies():
    layer = _households().iloc[:40]
    weighted = toolbox.spread_contrast(layer, compare="tenure", weight="residents", tolerance=0, permutations=19, seed=1)
    expanded = layer.loc[layer.index.repeat(layer["residents"])]
    a, b = (np.column_stack([part.geometry.x, part.geometry.y]) for _, part in expanded.groupby("tenure"))
    # reference: dcor.energy_distance of the layer with every household repeated `residents` times
    assert weighted["energy"].iloc[0] == pytest.approx(dcor.energy_distance(a, b), rel=1e-9)


def test_script_small_sample_gets_a_note():
    layer = _households().iloc[:40].copy()
    layer["tenure"] = "owned"
    layer.loc[layer.index[0], "tenure"] = "rented"
    with pytest.warns(UserWarning, match="could not be computed"):
        table = toolbox.spread_contrast(layer, compare="tenure", permutations=19)
    assert "'rented' has 1 point" in table["note"].iloc[0] and "'where'" in table["note"].iloc[0]


@pytest.mark.parametrize(
    ("params", "error", "match"),
    [
        ({"compare": "tenure", "permutations": 0}, ParameterError, "permutations"),
        ({"compare": "tenure", "permutations": 10**9}, ParameterError, "1,000,000"),
        ({}, ParameterError, "exactly one of 'compare'"),
        ({"compare": "tenure", "tolerance": 0, "method": "projection"}, ParameterError, "exact"),
    ],
)
def test_script_bad_parameters(params, error, match):
    with pytest.raises(error, match=match):
        toolbox.spread_contrast(_households(), **params)


def test_script_geodesic_interval_holds_against_pyproj():
    # reference: ellipsoidal distances over all pairs from pyproj.Geod(ellps="WGS84").inv
    # (Karney 2013), combined into the energy distance by its definition (V-statistic means)
    layer = _households().iloc[:40].to_crs("EPSG:4326")
    table = toolbox.spread_contrast(layer, compare="tenure", tolerance=0.001, permutations=19, seed=1)
    lon, lat = layer.geometry.x.to_numpy(), layer.geometry.y.to_numpy()
    i, j = np.triu_indices(lon.size, 1)
    d = np.zeros((lon.size, lon.size))
    d[i, j] = d[j, i] = pyproj.Geod(ellps="WGS84").inv(lon[i], lat[i], lon[j], lat[j])[2]
    rented = (layer["tenure"] == "rented").to_numpy()
    expected = 2 * d[~rented][:, rented].mean() - d[~rented][:, ~rented].mean() - d[rented][:, rented].mean()
    row = table.iloc[0]
    assert row["units"] == "metre" and row["method"] == "projection"
    assert row["energy_lo"] <= expected <= row["energy_hi"]
    assert abs(row["energy"] - expected) <= 0.01 * row["between_mean"]
    with pytest.raises(ParameterError, match="'crs'"):
        toolbox.spread_contrast(layer, compare="tenure", tolerance=0, permutations=19)
    planar = toolbox.spread_contrast(layer, compare="tenure", crs="EPSG:32705", permutations=19, seed=1)
    assert planar["units"].iloc[0] == "metre"
