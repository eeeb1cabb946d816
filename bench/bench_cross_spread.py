"""cross-spread at scale: 1,000 groups of 1,000 points, every pair of groups.

Times ``toolbox.cross_pair_sums`` (the kernel behind ``cross-spread``) on 1,000,000 points in
1,000 compact groups laid out on a grid (an invented region in UTM-sized metres), weighted,
tolerance 0.01, and checks a sample of entries against scipy's ``cdist`` (exact). Prints the
time and the observed error; it asserts no timing.

    python bench/bench_cross_spread.py [--groups G] [--per-group N] [--check K]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
from scipy.spatial.distance import cdist

import toolbox


def layout(groups: int, per_group: int, seed: int = 20261202):
    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(groups)))
    codes = np.repeat(np.arange(groups), per_group)
    cx = 500_000.0 + (codes % side) * 3_000.0
    cy = 6_100_000.0 + (codes // side) * 3_000.0
    spread = rng.uniform(200.0, 1_200.0, groups)[codes]
    x = cx + rng.normal(size=codes.size) * spread
    y = cy + rng.normal(size=codes.size) * spread
    w = rng.integers(1, 8, codes.size).astype(np.float64)
    order = rng.permutation(codes.size)
    return x[order], y[order], codes[order], w[order]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--groups", type=int, default=1000)
    parser.add_argument("--per-group", type=int, default=1000)
    parser.add_argument("--check", type=int, default=20, help="entries checked against cdist")
    args = parser.parse_args()
    x, y, g, w = layout(args.groups, args.per_group)
    print(f"machine: {os.cpu_count()} cores; load average {os.getloadavg()[0]:.2f}")
    toolbox.cross_pair_sums(x[:2000], y[:2000], g[:2000] % 5, 5, w[:2000])  # warm-up
    start = time.perf_counter()
    r = toolbox.cross_pair_sums(x, y, g, args.groups, w, tolerance=0.01)
    elapsed = time.perf_counter() - start
    print(f"cross_pair_sums: {x.size:,} points, {args.groups:,} groups, tolerance 0.01: {elapsed:.1f} s")
    rng = np.random.default_rng(1)
    worst, inside = 0.0, 0
    for _ in range(args.check):
        a, b = rng.choice(args.groups, 2, replace=False)
        pa, pb = g == a, g == b
        exact = float(w[pa] @ cdist(np.c_[x[pa], y[pa]], np.c_[x[pb], y[pb]]) @ w[pb])  # scipy cdist
        worst = max(worst, abs(r.total[a, b] - exact) / exact)
        inside += bool(r.lower[a, b] <= exact <= r.upper[a, b])
    print(
        f"accuracy on {args.check} entries against cdist: max relative error {worst:.2e}, "
        f"max rel_bound {np.nanmax(r.rel_bound):.2e}, exact inside [lower, upper] in {inside}/{args.check}"
    )
    return 0 if inside == args.check else 1


if __name__ == "__main__":
    raise SystemExit(main())
