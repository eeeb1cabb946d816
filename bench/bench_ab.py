"""Before/after timings of the in-memory estimator: two source trees, the same work, one run.

Each workload runs in a fresh subprocess per tree (so the two never share imports or caches),
after a warm-up call that compiles the numba kernels; the trees take turns round after round,
so a burst of other work on the machine slows both alike, and the best time of each is kept.
Prints one row per workload with both times and their ratio (after / before).

    python bench/bench_ab.py BEFORE_TREE AFTER_TREE [--rounds 3]

A tree is a folder holding the ``toolbox`` package (e.g. ``git archive REV toolbox | tar -x``).
Data are invented (Gaussian clusters of the Isle of Quenwick scenario, EPSG:32705 metres).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import textwrap

WORKLOADS = {
    "pair sums, 1e6 points, 1 group, weighted": "pairs(1_000_000, 1, True)",
    "pair sums, 1e6 points, 1000 groups, weighted": "pairs(1_000_000, 1000, True)",
    "pair sums, 1e6 points, 1 group, 1e-4": "pairs(1_000_000, 1, False, 1e-4)",
    "pair sums, 2e5 points, 20000 groups (exact)": "pairs(200_000, 20_000, True)",
    "point sums, 2e5 points, 100 groups": "points(200_000, 100)",
    "cross sums, 1e5 points, 100 groups": "cross(100_000, 100)",
    "geodesic pair sums, 2e5 points, 20 groups": "geodesic(200_000, 20)",
}

PRELUDE = textwrap.dedent(
    """
    import time, json, numpy as np, toolbox
    rng = np.random.default_rng(20260503)

    def data(n, groups):
        x = 500000 + rng.normal(0, 1000, n) * np.where(rng.random(n) < 0.02, 10, 1)
        y = 6120000 + rng.normal(0, 1000, n) * np.where(rng.random(n) < 0.02, 10, 1)
        return x, y, rng.integers(0, groups, n), np.round(rng.gamma(2.0, 1.5, n), 2)

    def pairs(n, groups, weighted, tolerance=0.01):
        x, y, g, w = data(n, groups)
        return lambda: toolbox.grouped_pair_sums(x, y, g, groups, w if weighted else None, tolerance=tolerance)

    def points(n, groups):
        x, y, g, w = data(n, groups)
        return lambda: toolbox.grouped_point_sums(x, y, g, groups, w)

    def cross(n, groups):
        x, y, g, w = data(n, groups)
        return lambda: toolbox.cross_pair_sums(x, y, g, groups, w)

    def geodesic(n, groups):
        x, y, g, w = data(n, groups)
        lon, lat = 10 + (x - 500000) / 7e4, 50 + (y - 6120000) / 1.1e5
        if hasattr(toolbox, "grouped_geodesic_pair_sums"):
            return lambda: toolbox.grouped_geodesic_pair_sums(lon, lat, g, groups, w)
        return lambda: toolbox.grouped_pair_sums(lon, lat, g, groups, w, distance="geodesic")
    """
)


def run_once(tree: str, workload: str, repeat: int) -> float:
    code = PRELUDE + textwrap.dedent(
        f"""
        action = {workload}
        action()  # warm-up: numba compiles or loads its cache
        best = float("inf")
        for _ in range({repeat}):
            start = time.perf_counter(); action(); best = min(best, time.perf_counter() - start)
        print(json.dumps(best))
        """
    )
    env = {**os.environ, "PYTHONPATH": tree}
    out = subprocess.run([sys.executable, "-c", code], env=env, check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("before")
    parser.add_argument("after")
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--repeat", type=int, default=2)
    parser.add_argument("--only", default="", help="run only workloads whose name contains this")
    args = parser.parse_args(argv)
    print(f"{'workload':<48} {'before s':>9} {'after s':>9} {'after/before':>13}")
    for name, workload in WORKLOADS.items():
        if args.only not in name:
            continue
        best = {"before": float("inf"), "after": float("inf")}
        for _ in range(args.rounds):
            for side in ("before", "after"):
                best[side] = min(best[side], run_once(getattr(args, side), workload, args.repeat))
        print(f"{name:<48} {best['before']:9.3f} {best['after']:9.3f} {best['after'] / best['before']:13.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
