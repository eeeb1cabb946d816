"""The one-pass windows of power-of-two bins (toolbox/kernels/dyadic.py) against brute force.

References: the exact projected pair sum Σ_{i<j} w_i w_j |p_i − p_j| of each direction, by
sorting (a handbook identity: with the values sorted, Σ_i w_i p_i (2·W_<i + w_i − W)); and the
binned state's own finishing arithmetic (state._bin_sums), which the compiled sums repeat.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("numba")

from toolbox.estimate.state import _bin_sums  # noqa: E402
from toolbox.kernels import UNIT_ROUNDOFF, dyadic  # noqa: E402


def _projected_pair_sum(p, w):
    order = np.argsort(p, kind="stable")
    p, w = p[order], w[order]
    before = np.cumsum(w) - w
    return float(np.sum(w * p * (2 * before + w - w.sum())))


def _windows(batches, bins=64, m=3, weighted=True):
    """One group's windows after adding ``batches`` of (x, y, w) one after the other."""
    theta = np.arange(m) * np.pi / m
    cells, expo, origin = dyadic.new_windows(1, m, bins, weighted)
    for x, y, w in batches:
        starts = np.array([0, x.size], dtype=np.int64)
        w = w if weighted else np.zeros(1)
        dyadic.add_segments(x, y, w, weighted, starts, np.array([0]), cells, expo, origin, np.cos(theta), np.sin(theta))
    return cells, expo, origin, np.cos(theta), np.sin(theta)


@pytest.mark.parametrize("weighted", [True, False])
@pytest.mark.parametrize(
    "layout",
    ["spread", "growing", "far_apart", "one_value", "near_zero"],
)
def test_windows_hold_the_exact_projected_sum(layout, weighted):
    rng = np.random.default_rng(5)
    if layout == "spread":  # UTM-like metres, batches from the same cloud
        xy = [rng.normal((500_000, 6_120_000), 300, (400, 2)) for _ in range(5)]
    elif layout == "growing":  # each batch wider than the last: the window coarsens each time
        xy = [rng.normal((500_000, 6_120_000), 10.0**k, (300, 2)) for k in range(6)]
    elif layout == "far_apart":  # a cluster, then one point a thousand kilometres off, then more
        xy = [rng.normal(0, 1, (200, 2)), np.array([[1e6, -1e6]]), rng.normal(0, 1, (200, 2))]
    elif layout == "one_value":  # one repeated value, then a second one
        xy = [np.full((50, 2), 7.25), np.full((50, 2), 7.25), np.array([[7.5, 7.0]])]
    else:  # zero and values near the smallest normal float, then ordinary ones
        xy = [np.zeros((10, 2)), np.full((10, 2), 1e-300), rng.normal(0, 1, (100, 2))]
    batches = [(v[:, 0].copy(), v[:, 1].copy(), rng.uniform(0.5, 3, len(v))) for v in xy]
    cells, expo, origin, cos_t, sin_t = _windows(batches, weighted=weighted)
    x, y, w = (np.concatenate(c) for c in zip(*batches, strict=True))
    w = w if weighted else np.ones(x.size)
    exact, uncertain, fullest = dyadic.window_sums(cells, expo, np.array([0]), UNIT_ROUNDOFF)
    for d in range(cos_t.size):
        p = x * cos_t[d] + y * sin_t[d]
        truth = _projected_pair_sum(p, w)
        slack = 1e-9 * max(abs(truth), 1e-300) + 1e-12 * np.sum(w) ** 2 * np.abs(np.r_[x, y]).max()
        assert exact[0, d] - slack <= truth <= exact[0, d] + uncertain[0, d] + slack, (layout, d)
        # brute force: every value sits in the bin its value names, floor(p·2^-e) − origin
        bins = np.floor(np.ldexp(p, -int(expo[0, d]))).astype(np.int64) - origin[0, d]
        held = np.bincount(bins, minlength=cells.shape[2])
        count = cells[0, d, :, 3] if weighted else cells[0, d, :, 0]
        np.testing.assert_array_equal(count, held)
        assert fullest[0, d] == held.max()
    if weighted:  # the exact part repeats the binned state's arithmetic (up to the order of additions)
        W, S, Q, C = np.moveaxis(cells[0], -1, 0)
        zero = np.zeros_like(W)
        reference, _ = _bin_sums(W, S, Q, C, zero, zero)
        np.testing.assert_allclose(exact[0], reference, rtol=1e-9, atol=1e-9 * np.abs(reference).max() + 1e-300)


def test_bins_are_ordered_like_their_values():
    rng = np.random.default_rng(8)
    values = rng.normal(6_120_000, 2_000, 5_000)
    batches = [(values[a : a + 500], np.zeros(500), np.ones(500)) for a in range(0, 5_000, 500)]
    cells, expo, origin, _, _ = _windows(batches, bins=256, m=1)
    width = np.ldexp(1.0, int(expo[0, 0]))
    left = (origin[0, 0] + np.arange(256)) * width
    window = cells[0, 0]
    used = window[:, 3] > 0
    mean = window[used, 1] / window[used, 0]  # weights are 1: the mean value of each bin
    assert np.all((left[used] <= mean) & (mean < left[used] + width))
    assert window[:, 3].sum() == values.size


@pytest.mark.parametrize("weighted", [True, False])
@pytest.mark.parametrize("into_empty", [False, True])
def test_merged_windows_hold_the_exact_projected_sum(weighted, into_empty):
    rng = np.random.default_rng(9)
    # a narrow cloud (fine bins) and a wide one around it (coarse bins): merged on common bins
    narrow = [rng.normal((500_000, 6_120_000), 3, (300, 2))]
    wide = [rng.normal((500_300, 6_119_000), 2_000, (400, 2)), rng.normal((500_000, 6_120_000), 50, (100, 2))]
    parts = [[(v[:, 0].copy(), v[:, 1].copy(), rng.uniform(0.5, 3, len(v))) for v in xy] for xy in (narrow, wide)]
    a, b = (_windows(batches, weighted=weighted) for batches in parts)
    assert (a[1][0] < b[1][0]).all()  # the narrow cloud's windows are finer
    if into_empty:  # a window with no value yet takes the other as it is
        a = (*dyadic.new_windows(1, 3, 64, weighted), a[3], a[4])
        parts[0] = []
    cells, expo, origin, cos_t, sin_t = a
    dyadic.merge_windows(cells, expo, origin, np.array([0]), *b[:3], np.array([0]))
    assert (expo[0] >= b[1][0]).all()
    x, y, w = (np.concatenate(c) for c in zip(*(parts[0] + parts[1]), strict=True))
    w = w if weighted else np.ones(x.size)
    exact, uncertain, _ = dyadic.window_sums(cells, expo, np.array([0]), UNIT_ROUNDOFF)
    for d in range(cos_t.size):
        p = x * cos_t[d] + y * sin_t[d]
        truth = _projected_pair_sum(p, w)
        slack = 1e-9 * abs(truth)
        assert exact[0, d] - slack <= truth <= exact[0, d] + uncertain[0, d] + slack, d
        # every value sits in the bin its value names at the merged exponent
        bins = np.floor(np.ldexp(p, -int(expo[0, d]))).astype(np.int64) - origin[0, d]
        count = cells[0, d, :, 3] if weighted else cells[0, d, :, 0]
        np.testing.assert_array_equal(count, np.bincount(bins, minlength=cells.shape[2]))
