"""Rows of the benchmark suite that a user feels before any computing: start-up and first runs.

* **Command-line start-up**: ``pairspread list``, ``--version`` and ``--help`` as the console
  script, each in a fresh process, against a bare ``python -c pass`` (the interpreter's own
  start), with a check of which heavy modules the command imported.
* **First run after a fresh install**: the package is copied as an install lays it out (sources
  and manifest, no caches) and installed the way ``make`` does it (bytecode, then
  ``python -m toolbox.precompile``, whose time is reported apart); the first group-spread on the
  sample layers is then timed against the later (warm) ones, and a first run on the
  1,000,000-point layer of ``bench_group_spread.py`` against its limit of seconds. One more copy
  is installed without the compile step, to show what that step saves (full runs only).

Used by ``bench_suite.py``; run alone for these rows only::

    python bench/bench_startup.py [--quick]
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import toolbox

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = Path(toolbox.__file__).resolve().parent
SAMPLE = ROOT / "sample_layers" / "quenwick.gpkg"
#: modules a start-up command must not import (each costs a tenth of a second or more)
HEAVY = ("numpy", "pandas", "pyogrio", "geopandas", "shapely", "pyproj", "scipy", "numba", "pyarrow")


def console_script() -> list[str]:
    script = Path(sys.executable).with_name("pairspread")
    return [str(script)] if script.exists() else [sys.executable, "-m", "toolbox"]


def timed(cmd: list[str], env: dict | None = None, cwd: Path | None = None) -> tuple[float, float]:
    """(wall-clock, CPU) seconds of one run of ``cmd`` in a fresh process; a failure stops the bench.

    The CPU time is the child's (user and system): other work on the machine inflates it far
    less than the wall time. The working folder defaults to a neutral one, so that the
    repository's own ``toolbox/`` folder is never imported in place of the installed one.
    """
    before = os.times()
    start = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=cwd or tempfile.gettempdir())
    elapsed = time.perf_counter() - start
    after = os.times()
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}): {proc.stderr.strip()}")
    cpu = (after.children_user + after.children_system) - (before.children_user + before.children_system)
    return elapsed, cpu


def best(cmd: list[str], repeat: int, env: dict | None = None) -> tuple[float, float]:
    """Smallest wall-clock time of ``repeat`` runs, and the smallest CPU time."""
    runs = [timed(cmd, env) for _ in range(repeat)]
    return min(r[0] for r in runs), min(r[1] for r in runs)


def heavy_imports(args: list[str]) -> list[str]:
    """The heavy modules imported by ``pairspread ARGS``, run in a fresh interpreter."""
    code = (
        "import contextlib, io, sys\n"
        "from toolbox.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        f"    main({args!r})\n"
        f"print(','.join(m for m in {HEAVY!r} if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    return [m for m in out.strip().split(",") if m]


def row_startup(rep, repeat: int) -> None:
    rep.section("Command-line start-up: list, --version, --help")
    runs = max(5, repeat)
    floor, floor_cpu = best([sys.executable, "-c", "pass"], runs)
    rows, measured = [], {}
    rows.append(["python -c pass (the interpreter alone)", f"{floor * 1e3:.0f} ms", f"{floor_cpu * 1e3:.0f} ms", "", ""])
    for args in (["list"], ["--version"], ["--help"]):
        t, cpu = best([*console_script(), *args], runs)
        measured[" ".join(args)] = t, cpu
        heavy = heavy_imports(args)
        rep.check(f"pairspread {' '.join(args)} imports no heavy module ({', '.join(heavy) or 'none'})", not heavy)
        rows.append(
            [f"pairspread {' '.join(args)}", f"{t * 1e3:.0f} ms", f"{cpu * 1e3:.0f} ms", f"{t - floor:+.3f} s",
             ", ".join(heavy) or "none"]
        )
    rep.say(
        f"Each command is a fresh process of the console script; best of {runs}. Heavy modules: "
        f"{', '.join(HEAVY)} (a module `__getattr__` in `toolbox/__init__.py` loads them on first use)."
    )
    rep.say()
    rep.table(["command", "best time", "CPU time", "beyond the interpreter", "heavy modules imported"], rows)
    for name, (t, cpu) in measured.items():
        rep.target(f"`pairspread {name}`", t, 0.3, "s", cpu=cpu, issue=12)


def fresh_install(root: Path, *, compile_kernels: bool) -> tuple[dict, float]:
    """Copy the package as an install lays it out and install it; (environment, seconds of compiling).

    pip writes the bytecode at install time; ``make`` then runs ``python -m toolbox.precompile``
    (numba's cache). Both are timed together as the install's compile step.
    """
    site = root / "site"
    shutil.copytree(PACKAGE, site / "toolbox", ignore=shutil.ignore_patterns("__pycache__"))
    env = {**os.environ, "PYTHONPATH": str(site)}
    env.pop("NUMBA_CACHE_DIR", None)
    where = subprocess.run(
        [sys.executable, "-c", "import toolbox; print(toolbox.__file__)"],
        capture_output=True, text=True, env=env, check=True, cwd=root,
    ).stdout.strip()
    assert Path(where).is_relative_to(site), f"the fresh copy was not the one imported: {where}"
    start = time.perf_counter()
    subprocess.run([sys.executable, "-m", "compileall", "-q", str(site)], check=True, env=env, cwd=root)
    if compile_kernels:
        subprocess.run(
            [sys.executable, "-m", "toolbox.precompile"], check=True, env=env, capture_output=True, cwd=root
        )
    return env, time.perf_counter() - start


def row_first_run(rep, repeat: int, big_layer: Path, quick: bool) -> None:
    rep.section("First run after a fresh install")
    out = Path(tempfile.mkdtemp(prefix="pairspread-bench-"))
    try:
        sample = [
            sys.executable, "-m", "toolbox", "group-spread", str(SAMPLE), "--layer", "households",
            "--group-by", "district", "--weight", "residents", "--output", str(out / "sample.csv"),
            "--overwrite", "--quiet",
        ]
        big = [
            sys.executable, "-m", "toolbox", "group-spread", str(big_layer), "--group-by", "zone",
            "--weight", "pop", "--output", str(out / "big.csv"), "--overwrite", "--quiet",
        ]
        env, compiling = fresh_install(out / "a", compile_kernels=True)
        cold, cold_cpu = timed(sample, env)
        warm, warm_cpu = best(sample, repeat, env)
        env_big, compiling_big = fresh_install(out / "b", compile_kernels=True)
        cold_big, cold_big_cpu = timed(big, env_big)
        warm_big, _ = best(big, repeat, env_big)
        rows = [
            ["install's compile step (bytecode, python -m toolbox.precompile)", f"{compiling:.1f} s", ""],
            ["sample layers: first run", f"{cold:.2f} s", f"{cold / warm:.2f}×"],
            ["sample layers: later runs (best)", f"{warm:.2f} s", "1.00×"],
            [f"{big_layer.name}: first run", f"{cold_big:.2f} s", f"{cold_big / warm_big:.2f}×"],
            [f"{big_layer.name}: later runs (best)", f"{warm_big:.2f} s", "1.00×"],
        ]
        if not quick:  # what the compile step saves: a first run that compiles the kernels itself
            env_raw, _ = fresh_install(out / "c", compile_kernels=False)
            raw, _ = timed(sample, env_raw)
            rows.append(["sample layers: first run of an install without the compile step", f"{raw:.1f} s",
                         f"{raw / warm:.2f}×"])
        rep.say(
            "Each install is a fresh copy of `toolbox/` (no `__pycache__`, so no bytecode and no numba "
            "cache), imported through PYTHONPATH, then installed as `make` does it. Runs are "
            "`python -m toolbox group-spread ... --output CSV` in fresh processes: on "
            f"`sample_layers/quenwick.gpkg` (households by district, weighted) and on `{big_layer.name}` "
            "(by zone, weight pop). Every first run is the first process after its install; the "
            f"later runs are the best of {repeat}. The install's compile step of the second copy took "
            f"{compiling_big:.1f} s."
        )
        rep.say()
        rep.table(["run", "time", "/ later runs"], rows)
        rep.target(
            "first run after a fresh install / later runs, sample layers", cold / warm, 1.5,
            cpu=cold_cpu / warm_cpu, issue=12,
        )
        points = int(big_layer.name.split("_")[1])
        rep.target(f"first run after a fresh install, {points:,} points", cold_big, 5.0, "s", cpu=cold_big_cpu,
                   issue=12)
    finally:
        shutil.rmtree(out, ignore_errors=True)


def main() -> int:
    import bench_group_spread as spread_bench
    import bench_suite

    quick = "--quick" in sys.argv
    rep = bench_suite.Report()
    path, _ = spread_bench.ensure_data(100_000 if quick else 1_000_000, 100 if quick else 1_000)
    row_startup(rep, 5)
    row_first_run(rep, 3, path, quick)
    rep.close()
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    raise SystemExit(main())
