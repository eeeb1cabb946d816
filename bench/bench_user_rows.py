"""Rows of the benchmark suite for what a user does with layers (issue 12).

* **In-memory GeoDataFrame**: ``toolbox.group_spread(gdf)`` on a GeoDataFrame of points (one
  group, tolerance 0.01), all of its work timed, against the sorting floor of the same points
  (8 × ``numpy.sort`` of the projected values; the projection is not timed), with the cost of
  turning shapely points into arrays (``shapely.get_coordinates``) shown apart.
* **point-remoteness to a GeoPackage**: the script end to end (read, compute, write the layer
  with its new fields) against pyogrio's own write of the same columns
  (``pyogrio.write_dataframe`` of the result table to a new GeoPackage), in the same rounds.
* **cross-spread at scale**: the cross-group kernel on 1,000 groups of 1,000 points, against
  its floor: the output is 10⁶ numbers, but each of them sums 10⁶ pair distances, so any method
  that sweeps every (point, group) pair once per direction does n·G·m = 8·10⁹ multiply-adds;
  the floor row times that much arithmetic as one matrix product (BLAS, every core), the most
  favourable form it can take.

Used by ``bench_suite.py``, which passes its ``Report`` and timing helper.
"""

from __future__ import annotations

import math
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

import numpy as np

import toolbox

CRS = "EPSG:32705"


def row_in_memory(rep, best_of, points: tuple, repeat: int) -> None:
    import geopandas
    import shapely

    x, y = points
    n = x.size
    rep.section(f"In-memory GeoDataFrame of {n:,} points against the sorting floor")
    frame = geopandas.GeoDataFrame(geometry=shapely.points(x, y), crs=CRS)
    m = toolbox.directions_for_tolerance(0.01)
    theta = np.arange(m) * np.pi / m
    projected = [x * np.cos(t) + y * np.sin(t) for t in theta]
    geometry = frame.geometry.values

    def floor():
        for p in projected:
            np.sort(p)

    best, results, cpu = best_of(
        repeat,
        [
            floor,
            lambda: toolbox.group_spread(frame, tolerance=0.01),
            lambda: shapely.get_coordinates(geometry),
        ],
    )
    table = results[1]
    rel_bound = float(table["rel_bound"].iloc[0])
    rep.check("in-memory row: rel_bound ≤ tolerance", rel_bound <= 0.01)
    rep.check("in-memory row: every point counted", int(table["n_points"].iloc[0]) == n)
    rep.say(
        f"`toolbox.group_spread(gdf, tolerance=0.01)` on a GeoDataFrame of {n:,} shapely points (one "
        f"skewed cluster, {CRS}), everything timed: geometry to arrays, checks, grouping, sums, the "
        "result table. The floor sorts the m = 8 projected arrays with `numpy.sort`. Plain 2-D points are "
        "read with shapely's `get_x`/`get_y` in blocks on the kernels' threads; `get_coordinates` (one "
        "thread, it holds the GIL) is shown for comparison."
    )
    rep.say()
    rep.table(
        ["alternative", "best time", "/ floor", "rel_bound"],
        [
            ["floor: 8 × numpy.sort", f"{best[0]:.2f} s", "1.00×", ""],
            ["toolbox.group_spread(gdf)", f"{best[1]:.2f} s", f"{best[1] / best[0]:.2f}×", f"{rel_bound:.1e}"],
            ["for comparison: shapely.get_coordinates (one thread)", f"{best[2]:.2f} s", f"{best[2] / best[0]:.2f}×", ""],
        ],
    )
    rep.target(
        f"group_spread(GeoDataFrame of {n:,} points) / sorting floor", best[1] / best[0], 1.2,
        cpu=cpu[1] / cpu[0], issue=12,
    )


def row_remoteness_write(rep, best_of, path: Path, repeat: int) -> None:
    import pyogrio

    rep.section("point-remoteness to a GeoPackage against pyogrio's own write")
    folder = Path(tempfile.mkdtemp(prefix="pairspread-bench-"))
    try:
        ours = folder / "remote.gpkg"
        theirs = folder / "plain.gpkg"

        def script():
            return toolbox.run(
                "point-remoteness", data=path, group_by="zone", weight="pop", output=str(ours), overwrite=True
            )

        result = script()  # the table pyogrio writes below: the same columns and geometry

        def plain_write(arrow=False):
            if theirs.exists():
                theirs.unlink()
            pyogrio.write_dataframe(result, theirs, layer="point_remoteness", driver="GPKG", use_arrow=arrow)

        best, _, _ = best_of(repeat, [plain_write, script, lambda: plain_write(True)])
        written = pyogrio.read_info(ours, layer="point_remoteness")
        rep.check("remoteness row: every feature written", written["features"] == len(result))
        rep.say(
            f"`toolbox.run('point-remoteness', data={path.name}, group_by='zone', weight='pop', "
            f"output=<new>.gpkg)`: read, compute and write {len(result):,} features with "
            f"{len(result.columns) - 1} fields, against `pyogrio.write_dataframe` of that same result "
            "to a new GeoPackage (the write alone), in the same rounds."
        )
        rep.say()
        rep.table(
            ["alternative", "best time", "/ pyogrio's write"],
            [
                ["pyogrio.write_dataframe(result) to .gpkg", f"{best[0]:.2f} s", "1.00×"],
                ["point-remoteness end to end", f"{best[1]:.2f} s", f"{best[1] / best[0]:.2f}×"],
                ["pyogrio.write_dataframe(result, use_arrow=True)", f"{best[2]:.2f} s", f"{best[2] / best[0]:.2f}×"],
            ],
        )
        rep.say(
            "The script writes with pyogrio's Arrow path into a private temporary file with SQLite's "
            "journal and per-transaction syncs off, synced once before it is renamed into place. "
            f"End to end / pyogrio's Arrow write: {best[1] / best[2]:.2f}× (for information)."
        )
        rep.say()
        rep.target(
            f"point-remoteness of {len(result):,} points to .gpkg / pyogrio's write of the same columns",
            best[1] / best[0], 1.3, issue=12,
        )
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def sort_floor(x, y, m: int, threads: int) -> Callable[[], object]:
    """The m projections of the points sorted by ``numpy.sort`` on ``threads`` threads
    (numpy's sort lets go of the GIL): what any sort-based estimate needs at least."""
    from concurrent.futures import ThreadPoolExecutor

    angles = np.arange(m) * (math.pi / m)
    xc, yc = x - x.mean(), y - y.mean()

    def one(k):
        np.sort(xc * math.cos(angles[k]) + yc * math.sin(angles[k]))

    def run():
        with ThreadPoolExecutor(threads) as pool:
            list(pool.map(one, range(m)))

    return run


def row_cross(rep, best_of, groups: int, per_group: int, repeat: int) -> None:
    from bench_cross_spread import layout
    from scipy.spatial.distance import cdist

    rep.section(f"cross-spread: {groups:,} groups of {per_group:,} points, every pair of groups")
    x, y, g, w = layout(groups, per_group)
    m = toolbox.directions_for_tolerance(0.01)
    n = x.size
    # n·G·m multiply-adds as one BLAS product (G × 8K) @ (8K × n·m/8K), K points per group
    left = np.random.default_rng(1).random((groups, per_group * 8))
    right = np.random.default_rng(2).random((per_group * 8, n * m // (per_group * 8)))
    threads = os.cpu_count()

    def argsorts():  # the sweep's own floor: m orders of all points
        for k in range(m):
            np.argsort(x * np.cos(k * np.pi / m) + y * np.sin(k * np.pi / m))

    best, results, cpu = best_of(
        repeat,
        [
            lambda: left @ right,
            lambda: toolbox.cross_pair_sums(x, y, g, groups, w, tolerance=0.01),
            argsorts,
            sort_floor(x, y, m, threads),
        ],
        budget=120.0,
    )
    r = results[1]
    rng = np.random.default_rng(1)
    worst, inside = 0.0, 0
    checks = 20
    for _ in range(checks):
        a, b = rng.choice(groups, 2, replace=False)
        pa, pb = g == a, g == b
        exact = float(w[pa] @ cdist(np.c_[x[pa], y[pa]], np.c_[x[pb], y[pb]]) @ w[pb])  # scipy cdist
        worst = max(worst, abs(r.total[a, b] - exact) / exact)
        inside += bool(r.lower[a, b] <= exact <= r.upper[a, b])
    rep.check("cross row: exact inside [lower, upper] on 20 entries", inside == checks)
    rep.check("cross row: rel_bound ≤ tolerance", bool(np.nanmax(r.rel_bound) <= 0.01))
    flops = groups * per_group * 8 * right.shape[1]
    rep.say(
        f"`toolbox.cross_pair_sums(x, y, codes, {groups}, weights, tolerance=0.01)` on {n:,} points "
        f"(weighted; the layout of `bench_cross_spread.py`). Output: {groups * groups:,} totals. Floor: "
        f"{flops:.1e} multiply-adds (n·G·m) as one `numpy` matrix product on {threads} threads."
    )
    rep.say()
    rep.table(
        ["alternative", "best time", "/ floor", "CPU / wall"],
        [
            [f"floor: {flops:.0e} multiply-adds (BLAS)", f"{best[0]:.2f} s", "1.00×", f"{cpu[0] / best[0]:.2f}"],
            ["cross_pair_sums", f"{best[1]:.2f} s", f"{best[1] / best[0]:.2f}×", f"{cpu[1] / best[1]:.2f}"],
            [f"{m} × numpy.argsort of {n:,} (1 thread)", f"{best[2]:.2f} s", f"{best[2] / best[0]:.2f}×",
             f"{cpu[2] / best[2]:.2f}"],
            [f"{m} × numpy.sort of {n:,} ({threads} threads)", f"{best[3]:.2f} s", f"{best[3] / best[0]:.2f}×",
             f"{cpu[3] / best[3]:.2f}"],
        ],
    )  # fmt: skip
    rep.say(
        "The BLAS product is the floor of the block method (every point against every group); the "
        "sweep does one multiply-add per point and *open* group (groups whose projected range holds "
        "that point), so on compact groups it runs below it. What it cannot beat is ordering the "
        f"points along each direction: the argsort and sort rows (the sweep sorts on {threads} threads)."
    )
    rep.say()
    rep.say(
        f"Accuracy on {checks} entries against scipy cdist: max relative error {worst:.1e}, max rel_bound "
        f"{np.nanmax(r.rel_bound):.1e}, exact inside [lower, upper] in {inside}/{checks}."
    )
    rep.say()
    rep.target(f"cross-spread kernel, {groups:,} groups × {per_group:,} points", best[1], 4.0, "s",
               cpu=cpu[1], issue=12)


def row_test_suite(rep, root: Path) -> None:
    """``make test``'s pytest part on a fresh clone of the commit measured (compiling first, as make does)."""
    import subprocess
    import sys
    import time

    rep.section("make test on a fresh clone: the pytest part")
    folder = Path(tempfile.mkdtemp(prefix="pairspread-bench-"))
    try:
        clone = folder / "clone"
        subprocess.run(["git", "clone", "-q", str(root), str(clone)], check=True)
        env = {**os.environ, "PYTHONPATH": str(clone)}
        start = time.perf_counter()
        subprocess.run([sys.executable, "-m", "toolbox.precompile"], cwd=clone, env=env, check=True,
                       capture_output=True)
        compiling = time.perf_counter() - start
        before = os.times()
        start = time.perf_counter()
        proc = subprocess.run(
            [sys.executable, "-m", "pytest", "-q", "-n", "2", "toolbox", "tests"],
            cwd=clone, env=env, capture_output=True, text=True,
        )
        wall = time.perf_counter() - start
        after = os.times()
        cpu = (after.children_user + after.children_system) - (before.children_user + before.children_system)
        summary = proc.stdout.strip().splitlines()[-1] if proc.stdout.strip() else proc.stderr.strip()[-300:]
        rep.check("test-suite row: every test passed", proc.returncode == 0)
        rep.say(
            "`git clone` of the commit measured, its kernels compiled as `make` does it "
            f"(`python -m toolbox.precompile`, {compiling:.0f} s, not counted), then "
            "`python -m pytest -q -n 2 toolbox tests` (two worker processes) with that clone first on "
            f"the path. Result: {summary}"
        )
        rep.say()
        failures = [line for line in proc.stdout.splitlines() if line.startswith(("FAILED", "ERROR"))]
        for line in failures[:10]:  # pytest's short summary (-q prints it for failures)
            rep.say(f"- {line}")
        if failures:
            rep.say()
        rep.table(
            ["what", "wall time", "CPU time (all processes)"],
            [["pytest part of make test", f"{wall:.0f} s", f"{cpu:.0f} s"]],
        )
        rep.target("make test's pytest part on a fresh clone", wall, 150.0, "s", cpu=cpu / 2, issue=12)
        rep.say(
            "(The CPU column of that target is the CPU time over the two workers: what the wall time "
            "would be on two otherwise idle cores, were the work spread evenly.)"
        )
        rep.say()
    finally:
        shutil.rmtree(folder, ignore_errors=True)
