"""Benchmark suite of pairspread against its alternatives, as ratios measured in one run.

Every row runs the alternatives side by side, on the same data, in the same process: brute
force (``scipy.spatial.distance.pdist``), random sampling of pairs, the sorting floor (m calls
of ``numpy.sort``) and the read floor (``pyogrio.read_dataframe``). Each timing is repeated and
the best (smallest) time is kept; the alternatives of a row take turns within every round, so
a burst of other work on the machine slows all of them alike. The suite prints one table per
row, then every target of issue 5 with the ratio measured and whether it is met, and writes the
same text to ``bench/results.md`` with the machine's CPU, core count, load, date and versions.

Run from the repository root::

    python bench/bench_suite.py            # full run, under 10 minutes on 2 cores
    python bench/bench_suite.py --quick    # smaller sizes, about a minute; prints only

The data are invented (the fictional Isle of Quenwick, EPSG:32705): Gaussian clusters around
easting 500000, northing 6120000 with 2 % of the points ten times further out, and the
1,000,000-point GeoPackage of ``bench_group_spread.py``.
"""

from __future__ import annotations

import argparse
import datetime
import gc
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

BENCH_DIR = Path(__file__).resolve().parent
if str(BENCH_DIR) not in sys.path:  # the shared data generator and timing helpers
    sys.path.insert(0, str(BENCH_DIR))

import bench_group_spread as spread_bench  # noqa: E402
import bench_startup as startup  # noqa: E402
import bench_user_rows as user_rows  # noqa: E402

import toolbox  # noqa: E402
from toolbox import grouping, layers  # noqa: E402

RESULTS = BENCH_DIR / "results.md"
SEED = 20260503
CENTRE = spread_bench.CENTRE
#: standard deviation (metres) of the single-cluster layouts
SPREAD = 1_000.0
TOLERANCE = 0.01
#: a row stops repeating once its rounds have taken this long (at least one round always runs)
ROW_BUDGET = 60.0
MB = 1e6


@dataclass(frozen=True)
class Sizes:
    """Problem sizes of one run (full or quick)."""

    exact: tuple[int, ...]
    extrapolate: tuple[int, ...]
    sampling: int
    floor: int
    layer_points: int
    layer_groups: int
    strict: int
    exact_memory: int
    seeds: int


FULL = Sizes(
    (5_000, 10_000, 20_000), (100_000, 1_000_000), 20_000, 10_000_000, 1_000_000, 1_000, 1_000_000, 50_000, 20
)
QUICK = Sizes(
    (2_000, 4_000, 8_000), (100_000, 1_000_000), 5_000, 1_000_000, 100_000, 100, 100_000, 20_000, 20
)


# ----------------------------------------------------------------------------------------------
# data


def skewed_cluster(n: int, seed: int = SEED) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One Gaussian cluster (σ = 1 km) in UTM metres, 2 % of it ten times further out; weights."""
    rng = np.random.default_rng(seed)
    scale = SPREAD * np.where(rng.random(n) < 0.02, 10.0, 1.0)
    x = CENTRE[0] + rng.normal(0.0, 1.0, n) * scale
    y = CENTRE[1] + rng.normal(0.0, 1.0, n) * scale
    w = np.round(rng.gamma(2.0, 1.5, n), 2)
    return x, y, w


def remote_layout(n: int, seed: int = SEED) -> tuple[np.ndarray, np.ndarray]:
    """A dense village (σ = 20 m) of n − 1 points and one homestead 100 km away."""
    rng = np.random.default_rng(seed)
    x = CENTRE[0] + rng.normal(0.0, 20.0, n)
    y = CENTRE[1] + rng.normal(0.0, 20.0, n)
    x[-1] += 100_000.0
    return x, y


# ----------------------------------------------------------------------------------------------
# timing and measuring


def best_of(
    repeat: int,
    actions: Sequence[Callable[[], object]],
    budget: float = ROW_BUDGET,
) -> tuple[list[float], list[object], list[float]]:
    """Smallest wall-clock time of each action, its last result, and the CPU time of its best run.

    Each round runs every action once. Rounds stop after ``repeat``, or earlier once they have
    taken ``budget`` seconds in all (at least one round runs). The CPU time is the process's
    (all threads, no child processes); other work on the machine inflates it less than the
    wall time of a single-threaded action.
    """
    best = [math.inf] * len(actions)
    best_cpu = [math.nan] * len(actions)
    results: list[object] = [None] * len(actions)
    spent = 0.0
    for _ in range(repeat):
        for i, action in enumerate(actions):
            start, start_cpu = time.perf_counter(), time.process_time()
            results[i] = action()
            elapsed, used = time.perf_counter() - start, time.process_time() - start_cpu
            if elapsed < best[i]:
                best[i], best_cpu[i] = elapsed, used
            spent += elapsed
        if spent > budget:
            break
    return best, results, best_cpu


def load() -> str:
    if not hasattr(os, "getloadavg"):
        return "n/a"
    return " / ".join(f"{v:.2f}" for v in os.getloadavg())


def cpu_snapshot() -> tuple[float, float, float] | None:
    """(wall time, busy CPU seconds of the whole machine, CPU seconds of this run and its children)."""
    try:
        fields = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
    except (OSError, IndexError):
        return None
    user, nice, system, _idle, _iowait, irq, softirq = (int(v) for v in fields[:7])
    busy = (user + nice + system + irq + softirq) / os.sysconf("SC_CLK_TCK")
    own = os.times()
    return time.perf_counter(), busy, own.user + own.system + own.children_user + own.children_system


def others_busy(since: tuple[float, float, float] | None) -> str:
    """Cores kept busy by other processes since the snapshot ``since`` (machine busy minus ours)."""
    now = cpu_snapshot()
    if since is None or now is None or now[0] <= since[0]:
        return "n/a"
    cores = ((now[1] - since[1]) - (now[2] - since[2])) / (now[0] - since[0])
    return f"{max(cores, 0.0):.2f} of {os.cpu_count()} cores"


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown CPU"


def versions() -> str:
    import numba
    import pyogrio
    import scipy

    return (
        f"Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"numba {numba.__version__}, pyogrio {pyogrio.__version__} (GDAL "
        f"{pyogrio.__gdal_version_string__}), pairspread {toolbox.__version__}"
    )


def source_state() -> str:
    """Git commit of the package that was measured, and whether toolbox/ had local changes."""
    root = BENCH_DIR.parent
    try:
        head = subprocess.run(
            ["git", "-C", str(root), "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "-C", str(root), "status", "--porcelain", "--", "toolbox"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "not a git checkout"
    return f"git {head}" + (", with uncommitted changes in toolbox/" if dirty else ", clean toolbox/")


def warm_up() -> float:
    """Run every compiled path once (numba compiles on first use, then loads from its cache)."""
    start = time.perf_counter()
    x, y, w = skewed_cluster(10_000, seed=1)  # enough points for the narrow-bin kernel of 1e-6
    codes = np.zeros(x.size, dtype=np.int64)
    for weights in (None, w):
        for threads in (None, 1):
            toolbox.grouped_pair_sums(
                x, y, codes, 1, weights, tolerance=1e-6, method="projection", threads=threads
            )
    toolbox.pair_distance_sum(x[:200], y[:200], tolerance=0)
    return time.perf_counter() - start


def parallel_probe(threads: int) -> Callable[[], object]:
    """A trivially parallel compiled loop on ``threads`` threads: what the machine gives now.

    Eight independent tasks of arithmetic on an array that fits in cache; timed with 1 thread
    and with every thread in the same rounds as the kernels, it bounds the speed-up any kernel
    could get from threads at that moment.
    """
    import numba

    @numba.njit(parallel=True)
    def spin(values, rounds):
        out = np.zeros(8)
        for task in numba.prange(8):
            acc = 0.0
            for _ in range(rounds):
                for v in values:
                    acc += math.sqrt(v * 1.0001 + task)
            out[task] = acc
        return out

    values = np.random.default_rng(0).random(20_000)
    spin(values, 1)  # compile

    def run():
        previous = numba.get_num_threads()
        numba.set_num_threads(threads)
        try:
            return spin(values, 400)
        finally:
            numba.set_num_threads(previous)

    return run


def rel_error(value: float, exact: float) -> float:
    return abs(value - exact) / exact


def secs(t: float) -> str:
    if t < 1e-3:
        return f"{t * 1e6:.0f} µs"
    if t < 1.0:
        return f"{t * 1e3:.1f} ms"
    return f"{t:.2f} s"


def times(ratio: float) -> str:
    return f"{ratio:,.0f}×" if ratio >= 100 else f"{ratio:.2f}×"


def _status() -> dict[str, int]:
    values = {}
    for line in Path("/proc/self/status").read_text().splitlines():
        key, _, rest = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            values[key] = int(rest.split()[0]) * 1024
    return values


def measure_memory(case: str, n: int) -> dict[str, float | str]:
    """Peak memory of one call, run in this (fresh) process; see ``memory_subprocess``."""
    x, y, w = skewed_cluster(n)
    codes = np.zeros(n, dtype=np.int64)
    warm_up()
    if case == "exact":

        def call():
            return toolbox.pair_distance_sum(x, y, tolerance=0)

    else:
        weights = w if case == "kernel-weighted" else None

        def call():
            return toolbox.grouped_pair_sums(x, y, codes, 1, weights, tolerance=TOLERANCE)

    gc.collect()
    how = "peak RSS (VmHWM, reset through /proc/self/clear_refs) minus RSS before the call"
    try:
        Path("/proc/self/clear_refs").write_text("5")  # resets the high-water mark to the RSS
        before = _status()["VmRSS"]
    except OSError:  # not Linux, or not allowed: ru_maxrss cannot be reset, so this may read low
        import resource

        how = "ru_maxrss after minus before the call (may read low)"
        before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    tracemalloc.start()
    start = time.perf_counter()
    call()
    elapsed = time.perf_counter() - start
    traced = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    try:
        peak = _status()["VmHWM"]
    except OSError:
        import resource

        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return {"extra_rss": peak - before, "traced": traced, "seconds": elapsed, "how": how}


def memory_subprocess(case: str, n: int) -> dict[str, float | str]:
    """Run ``measure_memory`` in a child interpreter, so no earlier row leaves memory behind."""
    done = subprocess.run(
        [sys.executable, str(Path(__file__).resolve()), "--memory-case", case, "--points", str(n)],
        capture_output=True,
        text=True,
    )
    if done.returncode != 0:
        raise RuntimeError(f"memory case {case} failed ({done.returncode}):\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


# ----------------------------------------------------------------------------------------------
# report


@dataclass
class Target:
    name: str
    measured: float
    limit: float
    unit: str = "×"
    at_least: bool = False  # the measured value must reach the limit rather than stay under it
    cpu: float | None = None  # the same figure from process CPU times, for comparison
    issue: int = 5  # the issue that set the limit

    @property
    def met(self) -> bool:
        return self.measured >= self.limit if self.at_least else self.measured <= self.limit

    def cells(self) -> list[str]:
        sign = "≥" if self.at_least else "≤"
        if self.unit == "×":
            value, bound = f"{self.measured:.2f}×", f"{sign} {self.limit:g}×"
            cpu = "" if self.cpu is None else f"{self.cpu:.2f}×"
        else:
            value, bound = f"{self.measured:.3g} {self.unit}", f"{sign} {self.limit:g} {self.unit}"
            cpu = "" if self.cpu is None else f"{self.cpu:.3g} {self.unit}"
        return [self.name, value, bound, "met" if self.met else "**not met**", cpu]


@dataclass
class Report:
    lines: list[str] = field(default_factory=list)
    targets: list[Target] = field(default_factory=list)
    checks: list[tuple[str, bool]] = field(default_factory=list)
    opened: tuple[float, float, float] | None = None

    def say(self, text: str = "") -> None:
        print(text, flush=True)
        self.lines.append(text)

    def close(self) -> None:
        """End the open section with the CPU that other processes used meanwhile."""
        if self.opened is not None:
            self.say(
                f"_Other processes kept {others_busy(self.opened)} busy on average during this section "
                "(machine busy time from /proc/stat minus this run's own)._"
            )
            self.say()
            self.opened = None

    def section(self, title: str) -> None:
        self.close()
        self.opened = cpu_snapshot()
        self.say(f"## {title}")
        self.say()
        self.say(f"_Load average (1 / 5 / 15 min) at the start of this section: {load()}._")
        self.say()

    def table(self, header: Sequence[str], rows: Sequence[Sequence[str]]) -> None:
        widths = [max(len(str(c)) for c in column) for column in zip(header, *rows, strict=True)]
        for cells in (header, ["-" * w for w in widths], *rows):
            self.say("| " + " | ".join(f"{str(c):<{w}}" for c, w in zip(cells, widths, strict=True)) + " |")
        self.say()

    def target(
        self,
        name: str,
        measured: float,
        limit: float,
        unit: str = "×",
        at_least: bool = False,
        cpu: float | None = None,
        issue: int = 5,
    ) -> None:
        t = Target(name, measured, limit, unit, at_least, cpu, issue)
        self.targets.append(t)
        cells = t.cells()
        extra = f"; from CPU times {cells[4]}" if cells[4] else ""
        self.say(f"Target: {name}: {cells[1]} (target {cells[2]}): {cells[3]}{extra}.")
        self.say()

    def check(self, name: str, ok: bool) -> None:
        self.checks.append((name, ok))


# ----------------------------------------------------------------------------------------------
# the rows


def row_exact(rep: Report, sizes: Sizes, repeat: int) -> dict[str, float]:
    from scipy.spatial.distance import pdist

    rep.section("Exact: scipy pdist against pairspread")
    rep.say(
        "Same points for every column: one skewed cluster (σ = 1 km, 2 % at 10 σ) in UTM metres. "
        "pairspread is `toolbox.pair_distance_sum(x, y, tolerance=t)` (method auto, which may pick "
        "exact sums when they are cheaper); tolerance 0 is its exact mode. Error is |total − pdist "
        "sum| / pdist sum."
    )
    rep.say()
    x, y, _ = skewed_cluster(max(sizes.exact))
    tolerances = (0.01, 1e-4, 1e-6, 0.0)
    rows, pdist_times, out = [], [], {}
    for n in sizes.exact:
        xs, ys = x[:n], y[:n]
        pts = np.column_stack([xs, ys])
        actions = [lambda pts=pts: float(pdist(pts).sum())]
        actions += [
            lambda t=t, xs=xs, ys=ys: toolbox.pair_distance_sum(xs, ys, tolerance=t) for t in tolerances
        ]
        best, results, cpu = best_of(repeat, actions)
        exact = results[0]
        pdist_times.append(best[0])
        rows.append([f"{n:,}", "pdist(...).sum()", secs(best[0]), "1×", "exact", "", ""])
        for t, seconds, r in zip(tolerances, best[1:], results[1:], strict=True):
            err = rel_error(r.total, exact)
            how = r.method + (f", {r.directions} directions" if r.directions else "")
            label = "pairspread exact mode" if t == 0 else f"pairspread tolerance {t:g}"
            rows.append(
                [
                    f"{n:,}",
                    label,
                    secs(seconds),
                    times(best[0] / seconds),
                    how,
                    f"{r.rel_bound:.1e}",
                    f"{err:.1e}",
                ]
            )
            rep.check(f"exact row n={n:,} tolerance {t:g}: error ≤ rel_bound", err <= r.rel_bound + 1e-15)
            if t > 0:
                rep.check(f"exact row n={n:,} tolerance {t:g}: rel_bound ≤ tolerance", r.rel_bound <= t)
            rep.check(
                f"exact row n={n:,} tolerance {t:g}: pdist sum inside [lower, upper]",
                r.lower <= exact <= r.upper,
            )
        out = {
            "n": n,
            "pdist": best[0],
            "exact_mode": best[-1],
            "pdist_cpu": cpu[0],
            "exact_mode_cpu": cpu[-1],
        }
    rep.table(
        ["n", "alternative", "best time", "pdist time / this", "method", "rel_bound", "observed error"], rows
    )

    # pdist costs c·n²: least-squares fit through the origin on the measured sizes
    n_arr = np.array(sizes.exact, dtype=np.float64)
    t_arr = np.array(pdist_times)
    c = float((t_arr * n_arr**2).sum() / (n_arr**4).sum())
    worst = float(np.max(np.abs(t_arr / (c * n_arr**2) - 1)))
    rep.say(
        f"pdist fit: time = c·n² with c = {c * 1e9:.3f} ns (per n², i.e. {2 * c * 1e9:.2f} ns per pair); "
        f"the measured sizes are within {worst:.0%} of the fit."
    )
    rep.say()
    rows = []
    xl, yl, _ = skewed_cluster(max(sizes.extrapolate), seed=SEED + 7)
    for n in sizes.extrapolate:
        xs, ys = xl[:n], yl[:n]
        actions = [
            lambda t=t, xs=xs, ys=ys: toolbox.pair_distance_sum(xs, ys, tolerance=t) for t in (0.01, 1e-4)
        ]
        best, results, cpu = best_of(repeat, actions)
        predicted = c * n * n
        memory = n * (n - 1) / 2 * 8
        rows.append(
            [
                f"{n:,}",
                f"{predicted:,.0f} s (extrapolated)",
                f"{memory / 1e9:,.0f} GB",
                secs(best[0]),
                times(predicted / best[0]),
                secs(best[1]),
                times(predicted / best[1]),
            ]
        )
    rep.table(
        ["n", "pdist time", "pdist memory", "pairspread 0.01", "speed-up", "pairspread 1e-4", "speed-up"],
        rows,
    )
    return out


def row_sampling(rep: Report, sizes: Sizes, repeat: int) -> None:
    from scipy.spatial.distance import pdist

    n = sizes.sampling
    rep.section("Random pair sampling against pairspread, same time budget")
    x, y = remote_layout(n)
    exact = float(pdist(np.column_stack([x, y])).sum())
    share = float(np.hypot(x[:-1] - x[-1], y[:-1] - y[-1]).sum()) / exact
    rep.say(
        f"Layout: a village of {n - 1:,} points (σ = 20 m) and one homestead 100 km away, which "
        f"carries {share:.0%} of the total pair distance. Exact total from scipy pdist. The sampler "
        "draws pairs i ≠ j uniformly (numpy, vectorized) and scales their mean distance by "
        f"n(n−1)/2; it gets as many pairs as it can draw in pairspread's time, over {sizes.seeds} seeds."
    )
    rep.say()
    pair_count = n * (n - 1) / 2

    def sample(pairs: int, seed: int) -> float:
        rng = np.random.default_rng(seed)
        total = 0.0
        for done in range(0, pairs, 1 << 20):  # chunks keep memory small at large budgets
            k = min(1 << 20, pairs - done)
            i = rng.integers(0, n, k)
            j = rng.integers(0, n - 1, k)
            j += j >= i
            total += float(np.hypot(x[i] - x[j], y[i] - y[j]).sum())
        return total / pairs * pair_count

    probe = 1_000_000
    best, results, cpu = best_of(
        repeat, [lambda: toolbox.pair_distance_sum(x, y, tolerance=TOLERANCE), lambda: sample(probe, 0)]
    )
    t_ps, r = best[0], results[0]
    rate = probe / best[1]
    ps_err = rel_error(r.total, exact)
    rep.check("sampling row: pairspread error ≤ rel_bound", ps_err <= r.rel_bound)
    rows = [
        [
            f"pairspread, tolerance {TOLERANCE:g}",
            secs(t_ps),
            f"{r.directions} directions",
            f"{ps_err:.1e}",
            f"{ps_err:.1e}",
            f"{r.rel_bound:.1e} (guaranteed)",
        ]
    ]
    for factor in (1, 10):
        pairs = max(1, int(rate * t_ps * factor))
        errs, spent = [], []
        for seed in range(1, sizes.seeds + 1):
            start = time.perf_counter()
            errs.append(rel_error(sample(pairs, seed), exact))
            spent.append(time.perf_counter() - start)
        label = "random pairs, same time" if factor == 1 else f"random pairs, {factor}× the time"
        rows.append(
            [
                label,
                secs(float(np.median(spent))) + " (median)",
                f"{pairs:,} pairs",
                f"{np.median(errs):.1e}",
                f"{max(errs):.1e}",
                "none",
            ]
        )
    rep.table(
        ["alternative", "time", "work", "median error", f"max error ({sizes.seeds} seeds)", "bound"], rows
    )


def row_floor(rep: Report, sizes: Sizes, repeat: int) -> None:
    import numba

    n = sizes.floor
    m = toolbox.directions_for_tolerance(TOLERANCE)
    rep.section(f"Sorting floor: {m} × numpy.sort of {n:,} values, and threads")
    x, y, w = skewed_cluster(n, seed=SEED + 1)
    codes = np.zeros(n, dtype=np.int64)
    angles = np.arange(m) * (math.pi / m)
    projected = [x * math.cos(a) + y * math.sin(a) for a in angles]
    threads = numba.get_num_threads()
    rep.say(
        f"One group of {n:,} points (skewed cluster), tolerance {TOLERANCE:g}, so m = {m} directions. "
        f"The floor sorts the m projected arrays (projection not timed) with `numpy.sort`. pairspread is "
        "`toolbox.grouped_pair_sums(x, y, codes, 1, weights, tolerance=0.01, threads=...)` on "
        "uncentred UTM coordinates, with all its work timed (grouping, centring, projection, sums). "
        f"Default threads: {threads} (numba)."
    )
    rep.say()

    def kernel(weights, th):
        return toolbox.grouped_pair_sums(x, y, codes, 1, weights, tolerance=TOLERANCE, threads=th)

    actions = [
        lambda: [np.sort(p) for p in projected],
        lambda: kernel(None, None),
        lambda: kernel(w, None),
        lambda: kernel(None, 1),
        lambda: kernel(w, 1),
        parallel_probe(1),
        parallel_probe(threads),
    ]
    best, results, cpu = best_of(repeat, actions)
    floor, unweighted, weighted, one_unw, one_w, probe_one, probe_all = best
    rep.say(f"numba threading layer: {numba.threading_layer()}.")
    rep.say()
    labels = [
        f"floor: {m} × numpy.sort",
        f"pairspread unweighted, {threads} threads",
        f"pairspread weighted, {threads} threads",
        "pairspread unweighted, 1 thread",
        "pairspread weighted, 1 thread",
    ]
    rows = []
    for label, seconds, used, r in zip(labels, best[:5], cpu[:5], results[:5], strict=True):
        bound = "" if isinstance(r, list) else f"{float(r.rel_bound[0]):.1e}"
        cells = [
            label,
            secs(seconds),
            f"{used / seconds:.2f}",
            f"{seconds / floor:.2f}×",
            f"{seconds / unweighted:.2f}×",
        ]
        rows.append([*cells, bound])
        if bound:
            rep.check(f"floor row {label}: rel_bound ≤ tolerance", float(r.rel_bound[0]) <= TOLERANCE)
    rep.table(["alternative", "best time", "CPU / wall", "/ floor", "/ unweighted", "rel_bound"], rows)
    rep.say(
        "CPU / wall is the process CPU time (all threads) over the wall time of the fastest run: "
        f"near {threads} means every thread was busy; well below it with {threads} threads, the "
        "cores were shared with other work or the threads waited."
    )
    rep.say()
    rep.target(
        f"unweighted kernel / sorting floor (n = {n:,}, tolerance 0.01)",
        unweighted / floor,
        1.3,
        cpu=cpu[1] / cpu[0],
    )
    rep.target("weighted / unweighted kernel (same data)", weighted / unweighted, 2.0, cpu=cpu[2] / cpu[1])
    rep.say(
        f"Parallel ceiling, timed in the same rounds: a trivially parallel compiled loop (8 independent "
        f"tasks of arithmetic in cache) took {secs(probe_one)} on 1 thread (CPU / wall {cpu[5] / probe_one:.2f}) "
        f"and {secs(probe_all)} on {threads} (CPU / wall {cpu[6] / probe_all:.2f}): "
        f"{probe_one / probe_all:.2f}× is about the most threads could give while this row ran."
    )
    rep.say()
    for limit, issue in ((1.6, 5), (1.75, 12)):
        rep.target(
            f"thread speed-up, time with 1 thread / with {threads}, unweighted n = {n:,}",
            one_unw / unweighted,
            limit,
            at_least=True,
            issue=issue,
        )
    rep.say(f"(Weighted: 1 thread / {threads} threads = {one_w / weighted:.2f}×, for information.)")
    rep.say()


def row_strict(rep: Report, sizes: Sizes, repeat: int) -> None:
    n = sizes.strict
    rep.section(f"Tolerance 1e-6 at n = {n:,}")
    x, y, _ = skewed_cluster(n, seed=SEED + 2)
    tolerances = (0.01, 1e-4, 1e-6)
    m = toolbox.pair_distance_sum(x[:1000], y[:1000], tolerance=1e-6, method="projection").directions
    threads = os.cpu_count() or 1
    rep.say(
        "One skewed cluster, unweighted, `toolbox.pair_distance_sum(x, y, tolerance=t)`. No exact "
        "reference is affordable here; accuracy is checked on the smaller rows. The floor, timed in "
        f"the same rounds: the {m} projections sorted with `numpy.sort` on {threads} threads "
        "(projection included)."
    )
    rep.say()
    actions = [lambda t=t: toolbox.pair_distance_sum(x, y, tolerance=t) for t in tolerances]
    best, results, cpu = best_of(repeat, [*actions, user_rows.sort_floor(x, y, m, threads)])
    rows = []
    for t, seconds, r in zip(tolerances, best[:-1], results[:-1], strict=True):
        rows.append(
            [f"{t:g}", f"{r.directions}", secs(seconds), f"{seconds / best[0]:.1f}×", f"{r.rel_bound:.6e}"]
        )
        rep.check(f"strict row tolerance {t:g}: rel_bound ≤ tolerance", r.rel_bound <= t)
    rows.append([f"floor: {m} × numpy.sort", f"{m}", secs(best[-1]), f"{best[-1] / best[0]:.1f}×", ""])
    rep.table(["tolerance", "directions", "best time", "/ tolerance 0.01", "rel_bound"], rows)
    rep.say(
        f"Tolerance 1e-6 / its sorting floor: {best[2] / best[-1]:.2f}× (CPU {cpu[2] / cpu[-1]:.2f}×); the "
        f"floor alone took {secs(best[-1])} ({secs(cpu[-1])} CPU); the target, 3 s, is "
        f"{3.0 / best[-1]:.2f}× the floor's time in this run."
    )
    rep.say()
    for limit, issue in ((15.0, 5), (3.0, 12)):
        rep.target(f"tolerance 1e-6 at n = {n:,}", best[2], limit, "s", cpu=cpu[2], issue=issue)


def row_exact_mode(rep: Report, sizes: Sizes, exact_row: dict[str, float]) -> None:
    n = exact_row["n"]
    rep.section("Exact mode: throughput and peak memory")
    pairs = n * (n - 1) / 2
    rep.say(
        f"Throughput at n = {n:,} from the exact row above (same run, same points): pdist "
        f"{pairs / exact_row['pdist'] / 1e6:,.0f} M pairs/s, pairspread exact mode "
        f"{pairs / exact_row['exact_mode'] / 1e6:,.0f} M pairs/s."
    )
    rep.say()
    rep.target(
        f"exact-mode throughput / pdist throughput (n = {n:,})",
        exact_row["pdist"] / exact_row["exact_mode"],
        1.0,
        at_least=True,
        cpu=exact_row["pdist_cpu"] / exact_row["exact_mode_cpu"],
    )
    m = sizes.exact_memory
    result = memory_subprocess("exact", m)
    need = m * (m - 1) / 2 * 8
    rep.say(
        f"Peak memory of `pair_distance_sum(x, y, tolerance=0)` at n = {m:,}, in a fresh subprocess "
        f"after a warm-up ({result['seconds']:.1f} s): {result['extra_rss'] / MB:,.0f} MB measured as "
        f"{result['how']}; tracemalloc (numpy allocations) peak {result['traced'] / MB:,.0f} MB. "
        f"pdist would need {need / 1e9:.1f} GB for its output alone (not run)."
    )
    rep.say()
    rep.target(f"exact-mode peak memory at n = {m:,}", result["extra_rss"] / MB, 512.0, "MB")


def grouped_errors(result, x, y, codes, weights, picks) -> tuple[float, bool, bool]:
    """Largest relative error over ``picks`` against scipy cdist, and the two interval checks."""
    order = np.argsort(codes, kind="stable")
    counts = np.bincount(codes, minlength=result.total.size)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    worst, within, inside = 0.0, True, True
    for g in picks:
        rows = order[starts[g] : starts[g] + counts[g]]
        w = np.ones(rows.size) if weights is None else weights[rows]
        exact = spread_bench.exact_weighted_sum(x[rows], y[rows], w)
        err = rel_error(float(result.total[g]), exact)
        worst = max(worst, err)
        within &= err <= float(result.rel_bound[g])
        inside &= float(result.lower[g]) <= exact <= float(result.upper[g])
    return worst, within, inside


def row_grouped(rep: Report, sizes: Sizes, repeat: int, arrays) -> None:
    x, y, codes, weights, n_groups = arrays
    n = x.size
    rep.section(f"Grouped: {n:,} points in {n_groups:,} groups against one group")
    counts = np.bincount(codes, minlength=n_groups)
    rep.say(
        f"Points of the GeoPackage of `bench_group_spread.py` (group sizes {counts.min():,}–{counts.max():,}), "
        f"tolerance {TOLERANCE:g}, method auto, default threads; the one-group rows use the same points "
        "with every code 0."
    )
    rep.say()
    zeros = np.zeros(n, dtype=np.int64)

    def run(c, g, w):
        return toolbox.grouped_pair_sums(x, y, c, g, w, tolerance=TOLERANCE)

    actions = [
        lambda: run(zeros, 1, None),
        lambda: run(codes, n_groups, None),
        lambda: run(zeros, 1, weights),
        lambda: run(codes, n_groups, weights),
    ]
    best, results, cpu = best_of(repeat, actions)
    labels = [
        "one group, unweighted",
        f"{n_groups:,} groups, unweighted",
        "one group, weighted",
        f"{n_groups:,} groups, weighted",
    ]
    rows = []
    for i, (label, seconds, r) in enumerate(zip(labels, best, results, strict=True)):
        base = best[i - i % 2]
        exact_groups = int(r.exact.sum())
        rows.append(
            [
                label,
                secs(seconds),
                f"{seconds / base:.2f}×",
                f"{exact_groups:,}",
                f"{np.nanmax(r.rel_bound):.1e}",
            ]
        )
    rep.table(["alternative", "best time", "/ one group", "groups summed exactly", "max rel_bound"], rows)
    for limit, issue in ((1.5, 5), (1.3, 12)):
        rep.target(
            f"{n_groups:,} groups / one group, unweighted (n = {n:,})",
            best[1] / best[0],
            limit,
            cpu=cpu[1] / cpu[0],
            issue=issue,
        )
    rep.say(f"(Weighted: {best[3] / best[2]:.2f}×, for information.)")
    rep.say()
    live = np.flatnonzero(counts >= 2)
    by_size = live[np.argsort(counts[live], kind="stable")]
    picks = by_size[np.unique(np.linspace(0, by_size.size - 1, 20).round().astype(int))]
    for label, r, w in (("unweighted", results[1], None), ("weighted", results[3], weights)):
        worst, within, inside = grouped_errors(r, x, y, codes, w, picks)
        rep.say(
            f"Accuracy, {label}, {picks.size} groups of {counts[picks].min():,}–{counts[picks].max():,} points "
            f"against scipy cdist: max error {worst:.1e}; error ≤ rel_bound: {within}; exact inside "
            f"[lower, upper]: {inside}."
        )
        rep.check(f"grouped row {label}: error ≤ rel_bound", within)
        rep.check(f"grouped row {label}: exact inside interval", inside)
    rep.say()


def row_read_floor(rep: Report, sizes: Sizes, repeat: int, path: Path, arrays) -> None:
    import pandas as pd
    import pyogrio

    rep.section(
        f"Read floor: pyogrio.read_dataframe against group-spread end to end ({sizes.layer_points:,} points)"
    )
    rep.say(
        f"`{path.name}` ({path.stat().st_size / MB:.0f} MB), layer `{spread_bench.LAYER}`, {sizes.layer_groups:,} "
        f"groups (`zone`), weights (`pop`), tolerance {TOLERANCE:g}. The read floor reads every field with "
        "`use_arrow=True`; one read and one run before the timings warm the page cache, the imports and "
        "numba's cache. The CLI row includes interpreter start-up, imports and numba's cache load."
    )
    rep.say()
    work = Path(tempfile.mkdtemp(prefix="bench_suite_"))
    out_py, out_cli = work / "spread_py.csv", work / "spread_cli.csv"
    params = dict(
        data=str(path), group_by="zone", weight="pop", tolerance=TOLERANCE, output=str(out_py), overwrite=True
    )
    cli_args = [
        "group-spread",
        str(path),
        "--group-by",
        "zone",
        "--weight",
        "pop",
        "--tolerance",
        str(TOLERANCE),
    ]
    cli_args += ["--output", str(out_cli), "--overwrite", "--quiet"]
    try:
        pyogrio.read_dataframe(path, use_arrow=True)
        toolbox.run("group-spread", **params)
        actions = [
            lambda: pyogrio.read_dataframe(path, use_arrow=True),
            lambda: toolbox.run("group-spread", **params),
            lambda: spread_bench.run_cli(cli_args),
            lambda: layers.read_points(path, fields=["zone", "pop"]),
            lambda: spread_bench.run_cli(["--version"]),
        ]
        best, results, cpu = best_of(repeat, actions)
        labels = [
            "read floor: pyogrio.read_dataframe(use_arrow=True)",
            "group-spread in-process: toolbox.run(...)",
            "group-spread CLI subprocess: pairspread ...",
            "its reader alone: toolbox.layers.read_points (2 fields)",
            "CLI start-up alone: pairspread --version",
        ]
        rep.table(
            ["alternative", "best time", "/ read floor"],
            [[label, secs(s), f"{s / best[0]:.2f}×"] for label, s in zip(labels, best, strict=True)],
        )
        rep.target("group-spread in-process / read floor", best[1] / best[0], 2.0, cpu=cpu[1] / cpu[0])
        rep.target("group-spread CLI subprocess / read floor", best[2] / best[0], 2.0)
        table = results[1]
        lines, ok = spread_bench.check_accuracy(table, arrays[:4])
        for line in lines:
            rep.say(line.strip() + "  ")
        same = pd.read_csv(out_py)["total_dist"].to_numpy()
        other = pd.read_csv(out_cli)["total_dist"].to_numpy()
        agree = same.shape == other.shape and np.allclose(same, other, rtol=1e-12, equal_nan=True)
        rep.say(f"CLI and in-process outputs agree: {agree}.")
        rep.say()
        rep.check("read-floor row: group-spread accuracy on 20 groups", ok)
        rep.check("read-floor row: CLI and in-process outputs agree", agree)
    finally:
        shutil.rmtree(work, ignore_errors=True)


def row_kernel_memory(rep: Report, sizes: Sizes) -> None:
    n = sizes.floor
    rep.section(f"Kernel peak memory at n = {n:,}")
    coords = 2 * n * 8
    rows, extra = [], {}
    for case in ("kernel", "kernel-weighted"):
        r = memory_subprocess(case, n)
        extra[case] = r["extra_rss"]
        rows.append(
            [
                "weighted" if case.endswith("weighted") else "unweighted",
                f"{r['extra_rss'] / MB:,.0f} MB",
                f"{r['extra_rss'] / coords:.2f}×",
                f"{r['traced'] / MB:,.0f} MB",
                f"{r['seconds']:.2f} s",
            ]
        )
    rep.say(
        f"`grouped_pair_sums(x, y, codes, 1, weights, tolerance=0.01)` in a fresh subprocess after a "
        f"warm-up; inputs (x, y: {coords / MB:.0f} MB; codes; weights) are held before the call and not "
        f"counted. Measured as {r['how']}; tracemalloc counts numpy allocations only (not numba's)."
    )
    rep.say()
    rep.table(["case", "extra peak RSS", "/ coordinate arrays", "tracemalloc peak", "time"], rows)
    rep.target(
        f"kernel peak memory / coordinate arrays (n = {n:,}, unweighted)", extra["kernel"] / coords, 4.0
    )
    rep.target(
        f"kernel peak memory / coordinate arrays (n = {n:,}, weighted)",
        extra["kernel-weighted"] / coords,
        4.0,
    )


# ----------------------------------------------------------------------------------------------
# main


def other_sections(text: str) -> str:
    """The sections other benchmark scripts keep in results.md between their own markers
    (``<!-- name:start -->`` … ``<!-- name:end -->``, or ``begin`` … ``end``), kept as they are."""
    import re

    found = re.finditer(r"<!-- ?([\w-]+): ?(?:start|begin) ?-->.*?<!-- ?\1: ?end ?-->", text, flags=re.S)
    return "".join("\n" + m.group(0) + "\n" for m in found)


def parse_args(argv=None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes for a smoke run (about a minute)")
    parser.add_argument(
        "--repeat", type=int, default=None, help="rounds per row; the best is kept (default 3, quick 2)"
    )
    parser.add_argument(
        "--output",
        type=Path,
        default=None,
        help="where to write the table (default bench/results.md; quick: nowhere)",
    )
    parser.add_argument(
        "--tests",
        action="store_true",
        help="also time make test's pytest part on a fresh clone (adds several minutes; make bench does)",
    )
    parser.add_argument(
        "--memory-case", choices=["exact", "kernel", "kernel-weighted"], help=argparse.SUPPRESS
    )
    parser.add_argument("--points", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.repeat is None:
        args.repeat = 2 if args.quick else 3
    if args.repeat < 1:
        parser.error("--repeat must be at least 1")
    return args


def main(argv=None) -> int:
    args = parse_args(argv)
    if args.memory_case:  # child process of memory_subprocess
        print(json.dumps(measure_memory(args.memory_case, args.points)))
        return 0
    sizes = QUICK if args.quick else FULL
    output = args.output if args.output is not None else (None if args.quick else RESULTS)
    started = time.perf_counter()
    rep = Report()
    threads_usable = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    rep.say(
        f"# pairspread benchmark suite{' (quick run: reduced sizes, targets indicative)' if args.quick else ''}"
    )
    rep.say()
    rep.say(f"- date: {datetime.datetime.now().astimezone().isoformat(timespec='seconds')}")
    rep.say(
        f"- machine: {cpu_model()}; {os.cpu_count()} logical cores ({threads_usable} usable); {platform.platform()}"
    )
    rep.say(f"- software: {versions()}; source: {source_state()}")
    rep.say(f"- load average (1 / 5 / 15 min) at start: {load()}; other sessions may share the machine")
    warm = warm_up()
    rep.say(
        f"- warm-up: numba compiles the kernels on first use and caches them; every compiled path ran "
        f"once before any timing ({warm:.1f} s)"
    )
    rep.say(f"- timings: best of {args.repeat} rounds (a row stops early after {ROW_BUDGET:.0f} s of rounds)")
    rep.say()

    exact_row = row_exact(rep, sizes, args.repeat)
    row_sampling(rep, sizes, args.repeat)
    row_floor(rep, sizes, args.repeat)

    path, made = spread_bench.ensure_data(sizes.layer_points, sizes.layer_groups)
    if made is not None:
        print(f"(generated {path} in {made:.1f} s)", file=sys.stderr)
    points = layers.read_points(path, fields=["zone", "pop"])
    codes = grouping.group_features(points.attributes, ["zone"]).codes[points.feature].astype(np.int64)
    weights = grouping.feature_weights(points.attributes, "pop", points.label)[points.feature]
    arrays = (points.x, points.y, codes, weights, int(codes.max()) + 1)
    row_grouped(rep, sizes, args.repeat, arrays)
    row_strict(rep, sizes, args.repeat)
    row_exact_mode(rep, sizes, exact_row)
    row_read_floor(rep, sizes, args.repeat, path, arrays)
    del points, arrays
    gc.collect()
    row_kernel_memory(rep, sizes)
    user_rows.row_in_memory(rep, best_of, skewed_cluster(sizes.floor)[:2], args.repeat)
    gc.collect()
    remote_layer, made = spread_bench.ensure_data(sizes.floor // 5, sizes.layer_groups)
    if made is not None:
        print(f"(generated {remote_layer} in {made:.1f} s)", file=sys.stderr)
    user_rows.row_remoteness_write(rep, best_of, remote_layer, args.repeat)
    user_rows.row_cross(rep, best_of, sizes.layer_groups, 1_000, args.repeat)
    gc.collect()
    startup.row_startup(rep, args.repeat)
    startup.row_first_run(rep, args.repeat, path, args.quick)
    if args.tests:
        user_rows.row_test_suite(rep, BENCH_DIR.parent)

    rep.close()
    for issue in (12, 5):
        targets = [t for t in rep.targets if t.issue == issue]
        rep.say(f"## Targets of issue {issue}")
        rep.say()
        rep.table(
            ["target", "measured", "target", "verdict", "same from CPU times"], [t.cells() for t in targets]
        )
        rep.say(f"{sum(t.met for t in targets)} of {len(targets)} targets of issue {issue} met.")
        rep.say()
    rep.say(
        "The verdicts use wall-clock times, as the issues state them. The last column repeats the figure "
        "from process CPU times (all threads), which other work on the machine disturbs less; it is "
        "blank where CPU time means nothing (threads, subprocesses, memory)."
    )
    rep.say()
    failed = [name for name, ok in rep.checks if not ok]
    rep.say(
        "Accuracy checks (error within rel_bound, exact value inside [lower, upper], rel_bound "
        f"within the tolerance asked for): {len(rep.checks) - len(failed)} of {len(rep.checks)} passed."
    )
    for name in failed:
        rep.say(f"- FAILED: {name}")
    rep.say()
    rep.say(f"Load average at end: {load()}. Whole run: {time.perf_counter() - started:.0f} s.")
    if output is not None:
        kept = other_sections(output.read_text(encoding="utf-8")) if output.exists() else ""
        output.write_text("\n".join(rep.lines).rstrip() + "\n" + kept, encoding="utf-8")
        print(f"(written to {output})", file=sys.stderr)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
