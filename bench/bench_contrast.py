"""spread-contrast at scale: the energy-distance permutation test against dcor.

Two rows, each printed with its ratio (nothing is asserted):

1. ``energy_test`` on n = 200,000 points in two samples, 999 relabellings, tolerance 0.01
   (target of issue 11: at most 10 s on a 2-core machine), wall-clock and CPU time, after a
   warm-up that compiles the kernels.
2. ``dcor.homogeneity.energy_test`` (its defaults: one job, the n × n distance matrix) with 999
   resamples at doubling n until a run would pass 60 s (quadratic extrapolation from the last
   run stops the search early); at the largest n it finished, the same test by ``energy_test``
   and the ratio of the times. The 200,000-point figure for dcor is an extrapolation (n²), so
   labelled.

Writes its section of ``bench/results.md`` between the ``spread-contrast`` markers (the rest of
the file is kept).

    python bench/bench_contrast.py [--points N] [--permutations B] [--dcor-limit SECONDS]
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import time
from pathlib import Path

import numpy as np

from toolbox.estimate import Points
from toolbox.estimate import energy_test as estimate_energy_test


def energy_test(x, y, labels, **options):
    """The estimator's energy test (what spread-contrast runs per test) on planar arrays."""
    return estimate_energy_test(Points.build(x, y), labels, **options)

RESULTS = Path(__file__).with_name("results.md")
START, END = "<!-- spread-contrast:start -->", "<!-- spread-contrast:end -->"


def samples(n: int, seed: int = 20261202):
    """Two overlapping samples of an invented town (metres), the second shifted by 40 m."""
    rng = np.random.default_rng(seed)
    labels = (rng.random(n) < 0.45).astype(np.int64)
    x = 500_000.0 + rng.normal(size=n) * 1_500.0 + 40.0 * labels
    y = 6_120_000.0 + rng.normal(size=n) * 1_000.0
    return x, y, labels


def timed(function):
    wall, cpu = time.perf_counter(), time.process_time()
    result = function()
    return result, time.perf_counter() - wall, time.process_time() - cpu


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=200_000)
    parser.add_argument("--permutations", type=int, default=999)
    parser.add_argument("--dcor-limit", type=float, default=60.0, help="seconds a dcor run may take")
    parser.add_argument("--no-write", action="store_true", help="print only; leave bench/results.md alone")
    args = parser.parse_args()
    lines = [
        f"Run {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())} on {platform.processor() or platform.machine()}, "
        f"{os.cpu_count()} cores; load average at start {os.getloadavg()[0]:.2f} (other work shares the machine).",
        "",
    ]

    def say(text=""):
        print(text, flush=True)
        lines.append(text)

    x, y, labels = samples(args.points)
    energy_test(x[:2000], y[:2000], labels[:2000], permutations=9, seed=0)  # compile the kernels
    result, wall, cpu = timed(
        lambda: energy_test(x, y, labels, tolerance=0.01, permutations=args.permutations, seed=1)
    )
    verdict = "met" if wall <= 10 else "**not met**"
    cpu_verdict = "met" if cpu / (os.cpu_count() or 1) <= 10 else "not met"
    say(
        f"- energy_test, n = {args.points:,}, two samples, {args.permutations} relabellings, tolerance 0.01 "
        f"({result.directions} directions): **{wall:.1f} s** wall ({cpu:.1f} s CPU over all threads); "
        f"target ≤ 10 s: {verdict} (ratio to target {wall / 10:.2f}×). energy {result.energy:.3g} m in "
        f"[{result.energy_lo:.3g}, {result.energy_hi:.3g}], p = {result.p_value:.4f}. From CPU time shared "
        f"over the {os.cpu_count()} cores (what an idle machine would take, if the threads split the work "
        f"evenly): {cpu / (os.cpu_count() or 1):.1f} s, {cpu_verdict}."
    )

    import dcor

    n, best = 250, None
    while True:
        dx, dy, dl = samples(n, seed=7)
        a, b = np.c_[dx[dl == 0], dy[dl == 0]], np.c_[dx[dl == 1], dy[dl == 1]]
        _, took, _ = timed(lambda a=a, b=b: dcor.homogeneity.energy_test(a, b, num_resamples=args.permutations, random_state=1))
        say(f"- dcor.homogeneity.energy_test, n = {n:,}, {args.permutations} resamples: {took:.1f} s")
        if took > args.dcor_limit:
            break
        best = (n, took, dx, dy, dl)
        # next n: double, or as far as an n² extrapolation stays within 95 % of the limit
        step = min(2.0, 0.95 * (args.dcor_limit / max(took, 1e-3)) ** 0.5)
        if step < 1.05:
            break
        n = int(round(n * step, -1))
    if best is not None:
        n, took, dx, dy, dl = best
        ours, ours_wall, _ = timed(lambda: energy_test(dx, dy, dl, permutations=args.permutations, seed=1))
        say(
            f"- largest n dcor finished within {args.dcor_limit:.0f} s: {n:,} ({took:.1f} s); energy_test at the same n "
            f"({ours.method}, {ours.directions} directions): {ours_wall:.2f} s; **ratio dcor / ours {took / ours_wall:.0f}×**."
        )
        projected = took * (args.points / n) ** 2
        say(
            f"- dcor at n = {args.points:,} extrapolated as n² from n = {n:,}: about {projected / 3600:.0f} h "
            f"(and an n × n matrix of {8 * args.points**2 / 1e9:.0f} GB), against {wall:.1f} s: about "
            f"{projected / wall:,.0f}× (an extrapolation, not a measurement)."
        )
    say(f"- load average at end: {os.getloadavg()[0]:.2f}.")
    if not args.no_write:
        section = "\n".join([START, "## spread-contrast (issue 11)", "", *lines, END])
        text = RESULTS.read_text() if RESULTS.exists() else ""
        pattern = re.compile(re.escape(START) + ".*?" + re.escape(END), re.S)
        text = pattern.sub(lambda _: section, text) if pattern.search(text) else text.rstrip() + "\n\n" + section + "\n"
        RESULTS.write_text(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
