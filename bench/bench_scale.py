"""Benchmark of streaming and Dask runs of ``group-spread`` on a dataset larger than comfortable memory.

Issue 14 asks that ``group-spread`` on a GeoParquet dataset of 100,000,000 points in 1,000 groups,
streamed on this 2-core machine, peak at most 3 GiB of resident memory and take at most twice
as long as just reading the same files' coordinates with pyarrow; and that the same job run on
a ``distributed.LocalCluster`` of 2 workers. Every job runs in its own process, so each peak
resident size (``ru_maxrss``) is that job's alone; the ratios are measured in one run of this
script. Machines are noisy: the load average is printed beside the figures.

The data are invented (``bench/scale_data.py``): written once under ``bench/data/`` (about
3 GB for 1e8 points), in chunks, and reused.

Run from the repository root::

    python bench/bench_scale.py                       # 1e8 points, 1,000 groups, 100 files
    python bench/bench_scale.py --points 2e6 --files 4 --output -     # a quick look, printed only
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

BENCH_DIR = Path(__file__).resolve().parent
sys.path.insert(0, str(BENCH_DIR))

import scale_data  # noqa: E402

RESULTS = BENCH_DIR / "results.md"
BEGIN, END = "<!-- bench_scale: begin -->", "<!-- bench_scale: end -->"
TOLERANCE = 0.01
BATCH_ROWS = 1 << 20
RSS_TARGET = 3 * 2**30
WALL_TARGET = 2.0
#: producing the one pass's chunks (no binning) against the read floor: the rest is binning's
DECODE_TARGET = 1.3
#: groups checked against exact sums, and the size they are picked near (exact sums are O(n²))
CHECKED_GROUPS = 4
EXACT_SIZE = 20_000


def _cpu() -> float:
    """CPU seconds (user and system, every thread) this process has used: on a busy machine a
    steadier comparison than wall time, though not what the targets are about."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def _peak_rss() -> int:
    """This process's peak resident size in bytes (Linux reports kilobytes)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


# ----------------------------------------------------------------------------------------------
# jobs, each run in a fresh process


def job_read(folder: str) -> dict:
    """The floor: read every file's geometry column with pyarrow and take x, y out of the WKB."""
    import numpy as np
    import pyarrow.parquet as pq

    start, cpu = time.perf_counter(), _cpu()
    points, checksum = 0, 0.0
    for path in sorted(Path(folder).glob("*.parquet")):
        for batch in pq.ParquetFile(path).iter_batches(batch_size=BATCH_ROWS, columns=["geometry"]):
            column = batch.column(0)
            raw = np.frombuffer(column.buffers()[2], np.uint8)[: 21 * len(column)].reshape(-1, 21)
            xy = raw[:, 5:].copy().view("<f8")
            points += xy.shape[0]
            checksum += float(xy[:, 0].sum())
    return {"wall": time.perf_counter() - start, "cpu": _cpu() - cpu, "points": points, "checksum": checksum}


def job_decode(folder: str) -> dict:
    """Every chunk the one pass would bin (read, decoded, groups coded, joined), not binned:
    what the streamed job costs beside its binning."""
    import toolbox
    from toolbox import estimate, streaming
    from toolbox.batchkeys import KeyRegistry
    from toolbox.layers.stream import layer_parts

    start, cpu = time.perf_counter(), _cpu()
    parts = layer_parts(folder)
    setup = estimate.distance_setup(parts.crs, parts.label)
    registry = KeyRegistry(("zone",))
    chunks = streaming._coded_chunks(parts, ["zone", "residents"], "residents", setup, BATCH_ROWS, registry)
    points = 0
    for x, _, _, _, _ in chunks:
        points += x.size
    wall, cpu = time.perf_counter() - start, _cpu() - cpu
    return {"wall": wall, "cpu": cpu, "points": points, "groups": registry.count, "toolbox": toolbox.__file__}


def _result_summary(table) -> dict:
    import numpy as np

    return {
        "groups": len(table),
        "points": int(table["n_points"].sum()),
        "total": table["total_dist"].to_numpy(dtype=float).tolist(),
        "lower": table["total_lo"].to_numpy(dtype=float).tolist(),
        "upper": table["total_hi"].to_numpy(dtype=float).tolist(),
        "zone": table["zone"].to_numpy().tolist(),
        "n_points": table["n_points"].to_numpy().tolist(),
        "max_rel_bound": float(np.nanmax(table["rel_bound"].to_numpy(dtype=float))),
        "methods": table["method"].value_counts().to_dict(),
    }


def job_stream(folder: str) -> dict:
    """group-spread streamed in batches of BATCH_ROWS features, in this process."""
    import toolbox

    start, cpu = time.perf_counter(), _cpu()
    table = toolbox.group_spread(
        folder, group_by="zone", weight="residents", tolerance=TOLERANCE, batch_rows=BATCH_ROWS
    )
    wall, cpu = time.perf_counter() - start, _cpu() - cpu
    return {"wall": wall, "cpu": cpu, **_result_summary(table), "toolbox": toolbox.__file__}


def job_planned(folder: str) -> dict:
    """The same job through the planned passes (survey, sums, heavy bins), which the script
    takes for geodesic distances and on a cluster: the one-pass path's alternative."""
    import numpy as np

    import toolbox
    from toolbox import estimate, streaming
    from toolbox.layers.stream import layer_parts

    start = time.perf_counter()
    parts = layer_parts(folder)
    setup = estimate.distance_setup(parts.crs, parts.label)
    common = dict(group_by=["zone"], weight="residents", setup=setup, batch_rows=BATCH_ROWS)
    with streaming.prepare(parts, **common) as ready:
        sums = streaming.pair_sums(ready, tolerance=TOLERANCE, method="auto")
    wall = time.perf_counter() - start
    assert toolbox  # imported first, as the script does
    return {"wall": wall, "max_rel_bound": float(np.nanmax(sums.rel_bound)), "total": sums.total.tolist()}


def job_dask(folder: str) -> dict:
    """The same job on a LocalCluster of 2 single-threaded worker processes."""
    from distributed import LocalCluster

    import toolbox

    start = time.perf_counter()
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        up = time.perf_counter() - start
        table = toolbox.group_spread(
            folder,
            group_by="zone",
            weight="residents",
            tolerance=TOLERANCE,
            batch_rows=BATCH_ROWS,
            dask_scheduler=cluster.scheduler_address,
        )
        from distributed import Client

        with Client(cluster.scheduler_address, set_as_default=False) as client:
            workers = client.run(_peak_rss)
    wall = time.perf_counter() - start
    return {
        "wall": wall,
        "cluster_start": up,
        "workers_rss": sorted(workers.values()),
        **_result_summary(table),
    }


def job_exact(folder: str, zones: list) -> dict:
    """Exact weighted totals of a few groups (read with a filter, summed with scipy's cdist)."""
    import numpy as np
    import pyarrow.dataset as pads
    from scipy.spatial.distance import cdist

    table = pads.dataset(folder, format="parquet").to_table(
        columns=["zone", "residents", "geometry"], filter=pads.field("zone").isin(zones)
    )
    column = table.column("geometry").combine_chunks()
    raw = np.frombuffer(column.buffers()[2], np.uint8)[: 21 * len(column)].reshape(-1, 21)
    xy = raw[:, 5:].copy().view("<f8").reshape(-1, 2)
    zone = table.column("zone").to_numpy()
    w = table.column("residents").to_numpy()
    totals = {}
    for z in zones:
        pts, wz = xy[zone == z], w[zone == z]
        pts = pts - pts.mean(axis=0)
        total = 0.0
        for a in range(0, len(pts), 2000):
            d = cdist(pts[a : a + 2000], pts)
            total += float(wz[a : a + 2000] @ d @ wz)
        totals[str(z)] = total / 2  # each unordered pair was counted twice
    return {"totals": totals}


JOBS = {"read": job_read, "decode": job_decode, "stream": job_stream, "planned": job_planned, "dask": job_dask}


def run_job(name: str, folder: Path, *extra: str, tree: str | None = None) -> dict:
    """Run one job in a fresh interpreter; its JSON result plus its own peak RSS.

    With ``tree`` (a folder holding a ``toolbox`` package), that package is imported instead of
    the installed one.
    """
    command = [sys.executable, __file__, "--job", name, "--data", str(folder), *extra]
    env = None if tree is None else {**os.environ, "PYTHONPATH": os.path.abspath(tree)}
    done = subprocess.run(command, capture_output=True, text=True, check=False, env=env)
    if done.returncode != 0:
        raise SystemExit(f"job {name} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


# ----------------------------------------------------------------------------------------------
# the report


def _gib(value: float) -> str:
    return f"{value / 2**30:.2f} GiB"


def _load() -> str:
    return " / ".join(f"{v:.2f}" for v in os.getloadavg())


def report(
    args, folder, read: dict, decode: dict, stream: dict, planned: dict | None, dask: dict | None, exact: dict
) -> list[str]:
    import numpy as np

    lines = [
        BEGIN,
        "## Streaming and Dask: `bench_scale.py`",
        "",
        f"- date: {datetime.now(UTC).isoformat(timespec='seconds')}; {os.cpu_count()} cores; "
        f"{platform.platform()}; Python {platform.python_version()}",
        f"- load average (1 / 5 / 15 min) at the start: {args.load_start}; at the end: {_load()} "
        "(other sessions may share the machine: a load well above this run's own 1–2 means the "
        "times are those of a busy machine).",
        f"- data: {stream['points']:,} points in {stream['groups']:,} groups, {args.files} GeoParquet "
        f"files (WKB points, snappy) under `bench/data/`; tolerance {TOLERANCE}, weight `residents`, "
        f"batches of {BATCH_ROWS:,} features. Every job ran once, in its own process.",
        "",
        "| job | wall | ratio to the read floor | peak RSS | target |",
        "| --- | --- | --- | --- | --- |",
        f"| read the coordinates with pyarrow (floor) | {read['wall']:.1f} s | 1× | {_gib(read['rss'])} | |",
        f"| the one pass's chunks read, decoded and coded, not binned | {decode['wall']:.1f} s | "
        f"{decode['wall'] / read['wall']:.2f}× | {_gib(decode['rss'])} | ≤ {DECODE_TARGET:g}×: "
        f"{'met' if decode['wall'] <= DECODE_TARGET * read['wall'] else 'NOT met'} |",
        f"| group-spread, streamed in this process (one pass) | {stream['wall']:.1f} s | "
        f"{stream['wall'] / read['wall']:.2f}× | {_gib(stream['rss'])} | "
        f"≤ {WALL_TARGET:g}× and ≤ {_gib(RSS_TARGET)}: "
        f"{'met' if stream['wall'] <= WALL_TARGET * read['wall'] and stream['rss'] <= RSS_TARGET else 'NOT met'} |",
    ]
    if planned is not None:
        lines.append(
            f"| the same through the planned passes (survey, sums, heavy bins) | {planned['wall']:.1f} s | "
            f"{planned['wall'] / read['wall']:.2f}× | {_gib(planned['rss'])} | |"
        )
    if dask is not None:
        workers = ", ".join(_gib(v) for v in dask["workers_rss"])
        lines.append(
            f"| group-spread on a LocalCluster of 2 workers | {dask['wall']:.1f} s (of which "
            f"{dask['cluster_start']:.1f} s starting the cluster) | {dask['wall'] / read['wall']:.2f}× | "
            f"client {_gib(dask['rss'])}; workers {workers} | |"
        )
    lines += [""]
    if dask is None:
        lines += [
            "The LocalCluster job was not run this time (`--no-dask`); docs/scale.md §3 has its "
            "last figures.",
            "",
        ]
    total = np.asarray(stream["total"])
    bound = stream["max_rel_bound"]
    lines.append(f"Streamed result: largest rel_bound {bound:.2e}; methods {stream['methods']}.")
    if dask is not None:
        other = np.asarray(dask["total"])
        lo = np.maximum(np.asarray(stream["lower"]), np.asarray(dask["lower"]))
        hi = np.minimum(np.asarray(stream["upper"]), np.asarray(dask["upper"]))
        diff = np.nanmax(np.abs(other - total) / np.abs(total))
        lines.append(
            f"Dask against streamed: same groups and counts: "
            f"{dask['zone'] == stream['zone'] and dask['n_points'] == stream['n_points']}; largest "
            f"relative difference of the totals {diff:.1e}; intervals overlap for every group: "
            f"{bool(np.all(lo <= hi))}."
        )
    rows = []
    for zone, exact_total in exact["totals"].items():
        i = [str(z) for z in stream["zone"]].index(zone)
        inside = stream["lower"][i] <= exact_total <= stream["upper"][i]
        error = abs(stream["total"][i] - exact_total) / exact_total
        rows.append(f"zone {zone} ({stream['n_points'][i]:,} points): error {error:.1e}, inside: {inside}")
    lines.append(
        "Against exact sums (scipy cdist; the smallest group and those nearest 20,000 points): "
        + "; ".join(rows)
        + "."
    )
    lines += ["", END]
    return lines


def compare(folder: Path, before: str, rounds: int) -> None:
    """Before/after wall times of the chunks and the streamed job in one run: the trees take
    turns round after round (a burst of other work slows both alike); the best of each is kept,
    with the least CPU time (steadier than wall time on a busy machine)."""
    jobs: dict[str, list] = {}
    print(f"load average at the start: {_load()}", flush=True)
    for _ in range(rounds):
        for name, job, tree in (
            ("read", "read", None),
            ("decode before", "decode", before),
            ("decode after", "decode", None),
            ("stream before", "stream", before),
            ("stream after", "stream", None),
        ):
            result = run_job(job, folder, tree=tree)
            jobs.setdefault(name, []).append((result["wall"], result["cpu"]))
            print(f"{name}: {result['wall']:.2f} s, CPU {result['cpu']:.2f} s", flush=True)
    floor = min(wall for wall, _ in jobs["read"])
    print(f"load average at the end: {_load()}")
    print("| job | best wall | / floor | all rounds | least CPU |\n| --- | --- | --- | --- | --- |")
    for name, runs in jobs.items():
        best = min(wall for wall, _ in runs)
        walls = ", ".join(f"{wall:.2f}" for wall, _ in runs)
        print(f"| {name} | {best:.2f} s | {best / floor:.2f}× | {walls} | {min(c for _, c in runs):.2f} s |")


def write_section(lines: list[str], output: Path) -> None:
    """Put the section into ``output``, replacing an earlier one and keeping everything else."""
    text = output.read_text(encoding="utf-8") if output.exists() else ""
    section = "\n".join(lines)
    if BEGIN in text and END in text:
        head, rest = text.split(BEGIN, 1)
        text = head + section + rest.split(END, 1)[1]
    else:
        text = text.rstrip() + "\n\n" + section + "\n"
    output.write_text(text, encoding="utf-8")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=float, default=1e8)
    parser.add_argument("--groups", type=int, default=1000)
    parser.add_argument("--files", type=int, default=100)
    parser.add_argument("--no-dask", action="store_true", help="skip the LocalCluster run")
    parser.add_argument("--no-planned", action="store_true", help="skip the run through the planned passes")
    parser.add_argument("--output", default=str(RESULTS), help="file for the section; - prints only")
    parser.add_argument(
        "--before", metavar="TREE", help="compare with the toolbox package in TREE (read, chunks, stream; printed only)"
    )
    parser.add_argument("--rounds", type=int, default=3, help="rounds of the comparison (best of each kept)")
    parser.add_argument("--job", choices=[*JOBS, "exact"], help=argparse.SUPPRESS)
    parser.add_argument("--data", help=argparse.SUPPRESS)
    parser.add_argument("--zones", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.job:
        if args.job == "exact":
            result = job_exact(args.data, json.loads(args.zones))
        else:
            result = JOBS[args.job](args.data)
        result["rss"] = _peak_rss()
        print(json.dumps(result))
        return
    args.load_start = _load()
    folder = scale_data.make_dataset(int(args.points), args.groups, args.files)
    print(f"data: {folder}", flush=True)
    if args.before:
        compare(folder, args.before, args.rounds)
        return
    read = run_job("read", folder)
    print(f"read floor: {read['wall']:.1f} s, peak RSS {_gib(read['rss'])}", flush=True)
    decode = run_job("decode", folder)
    print(f"chunks, not binned: {decode['wall']:.1f} s, peak RSS {_gib(decode['rss'])}", flush=True)
    stream = run_job("stream", folder)
    print(f"streamed: {stream['wall']:.1f} s, peak RSS {_gib(stream['rss'])}", flush=True)
    planned = None
    if not args.no_planned:
        planned = run_job("planned", folder)
        print(f"planned passes: {planned['wall']:.1f} s, peak RSS {_gib(planned['rss'])}", flush=True)
    dask = None
    if not args.no_dask:
        dask = run_job("dask", folder)
        print(f"LocalCluster: {dask['wall']:.1f} s, client peak RSS {_gib(dask['rss'])}", flush=True)
    # the smallest group and the ones nearest EXACT_SIZE points (large enough to be projected)
    sizes = stream["n_points"]
    near = sorted(range(len(sizes)), key=lambda i: abs(sizes[i] - EXACT_SIZE))[: CHECKED_GROUPS - 1]
    checked = sorted({min(range(len(sizes)), key=sizes.__getitem__), *near})
    exact = run_job("exact", folder, "--zones", json.dumps([stream["zone"][i] for i in checked]))
    lines = report(args, folder, read, decode, stream, planned, dask, exact)
    print("\n".join(lines))
    if args.output != "-":
        write_section(lines, Path(args.output))


if __name__ == "__main__":
    main()
