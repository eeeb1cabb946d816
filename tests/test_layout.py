"""The group layout every kernel starts from: points sorted by group and centred, with per-group sums.

References: the pair weight Σ_{i<j} w_i w_j against the identity ((Σw)² − Σw²)/2 summed with
``math.fsum`` (common practice), distances from the centre against ``numpy.hypot``, group order
against numpy's stable ``argsort``. The compiled route (numba) and numpy's route must give the
same layout; neither may touch its inputs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from toolbox.kernels import GroupLayout, _common

#: larger than one piece of the compiled passes (65,536 points), so a group spans pieces
BIG = 70_000


def layout_case(seed=7):
    """Shuffled points of groups of mixed sizes (one spanning several pieces), empty codes
    between them, UTM-like offsets, weights with zeros and one group of zero weights only."""
    rng = np.random.default_rng(seed)
    sizes = {1: 1, 3: 2, 4: 40, 6: BIG, 7: 5, 9: 300}
    codes = np.concatenate([np.full(n, g) for g, n in sizes.items()])
    x = 500_000.0 + rng.normal(0, 300, codes.size) + codes * 1e4
    y = 6_100_000.0 + rng.normal(0, 200, codes.size)
    w = rng.gamma(2.0, 1.5, codes.size) * (rng.random(codes.size) > 0.1)
    w[codes == 7] = 0.0
    order = rng.permutation(codes.size)
    return x[order], y[order], codes[order], 11, w[order]


def numpy_route(monkeypatch):
    original = _common.compiled_module
    monkeypatch.setattr(_common, "compiled_module", lambda name: None if name == "_layout" else original(name))


def check_layout(lay, x, y, codes, n_groups, w):
    reference_order = np.argsort(codes, kind="stable")  # numpy's stable sort
    assert np.array_equal(lay.order, reference_order)
    assert np.array_equal(lay.codes, codes[reference_order])
    assert np.array_equal(lay.counts, np.bincount(codes, minlength=n_groups))
    for g in range(n_groups):
        sl = slice(lay.starts[g], lay.starts[g] + lay.counts[g])
        if lay.counts[g] == 0:
            assert lay.radius_max()[g] == 0 and lay.pair_weight()[g] == 0
            continue
        xs, ys = x[codes == g], y[codes == g]
        ws = np.ones(xs.size) if w is None else w[codes == g]
        # one centre per group, inside the group's range of values
        cx, cy = xs - lay.x[sl], ys - lay.y[sl]
        assert np.ptp(cx) <= 1e-9 * abs(cx[0]) and np.ptp(cy) <= 1e-9 * abs(cy[0])
        assert xs.min() <= cx[0] <= xs.max() and ys.min() <= cy[0] <= ys.max()
        mean_w = ws if ws.sum() > 0 else np.ones(xs.size)  # all zero weights: the plain mean
        assert cx[0] == pytest.approx(np.average(xs, weights=mean_w), abs=1e-6)
        r = np.hypot(lay.x[sl], lay.y[sl])
        assert lay.radius_max()[g] == pytest.approx(r.max(), rel=1e-12)
        assert lay.radius_sum()[g] == pytest.approx(math.fsum(ws * r), rel=1e-12)
        total = math.fsum(ws)
        assert lay.weight_sum[g] == pytest.approx(total, rel=1e-12)
        identity = (total * total - math.fsum(ws * ws)) / 2  # ((Σw)² − Σw²)/2
        assert lay.pair_weight()[g] == pytest.approx(identity, rel=1e-12, abs=1e-300)
        if w is not None:
            assert np.array_equal(lay.w[sl], ws)


@pytest.mark.parametrize("route", ["compiled", "numpy"])
@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_layout_against_numpy_references(route, weighted, monkeypatch):
    if route == "numpy":
        numpy_route(monkeypatch)
    x, y, codes, n_groups, w = layout_case()
    w = w if weighted else None
    inputs = [a.copy() for a in (x, y, codes) + (() if w is None else (w,))]
    for a in (x, y, codes) + (() if w is None else (w,)):
        a.setflags(write=False)  # a layout never writes into its inputs
    lay = GroupLayout.build(x, y, codes, n_groups, w)
    check_layout(lay, x, y, codes, n_groups, w)
    for before, after in zip(inputs, (x, y, codes) + (() if w is None else (w,)), strict=True):
        assert np.array_equal(before, after)


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_compiled_and_numpy_layouts_agree(weighted, monkeypatch):
    x, y, codes, n_groups, w = layout_case(seed=8)
    w = w if weighted else None
    for threads in (1, 2):
        compiled = GroupLayout.build(x, y, codes, n_groups, w, threads=threads)
        one = GroupLayout.build(x, y, np.zeros_like(codes), 1, w, threads=threads)  # in order already
        assert one.order is None
        with monkeypatch.context() as m:
            numpy_route(m)
            plain = GroupLayout.build(x, y, codes, n_groups, w)
            plain_one = GroupLayout.build(x, y, np.zeros_like(codes), 1, w)
        for a, b in ((compiled, plain), (one, plain_one)):
            assert np.array_equal(a.codes, b.codes) and np.array_equal(a.starts, b.starts)
            # the centres may differ in their last bits (sums in another order)
            assert np.allclose(a.x, b.x, rtol=0, atol=1e-6) and np.allclose(a.y, b.y, rtol=0, atol=1e-6)
            for name in ("radius_max", "radius_sum", "pair_weight"):
                assert np.allclose(getattr(a, name)(), getattr(b, name)(), rtol=1e-9, atol=1e-300), name


def test_uncentred_layout_keeps_coordinates():
    # longitudes and latitudes for the geodesic kernels: sorted by group, not moved
    x, y, codes, n_groups, w = layout_case(seed=9)
    lay = GroupLayout.build(x, y, codes, n_groups, w, centred=False)
    order = np.argsort(codes, kind="stable")
    assert np.array_equal(lay.x, x[order]) and np.array_equal(lay.y, y[order])
    assert np.array_equal(lay.w, w[order])


@pytest.mark.parametrize("distance", ["planar", "geodesic"])
def test_every_estimate_passes_its_threads_to_the_layout(distance, monkeypatch):
    # --threads bounds every compiled pass, the layout's included: each estimate hands it on
    from toolbox import estimate

    asked = []
    build = GroupLayout.build.__func__

    def spy(cls, *args, threads=None, **kwargs):
        asked.append(threads)
        return build(cls, *args, threads=threads, **kwargs)

    monkeypatch.setattr(GroupLayout, "build", classmethod(spy))
    rng = np.random.default_rng(10)
    x, y = rng.uniform(0, 0.01, 40), rng.uniform(0, 0.01, 40)
    points = estimate.Points.build(x, y, np.arange(40) % 2, distance=distance)
    for sums in (estimate.pair_sums, estimate.point_sums, estimate.cross_sums):
        asked.clear()
        sums(points, tolerance=0.01, threads=1)
        assert asked and set(asked) == {1}, (sums.__name__, asked)
