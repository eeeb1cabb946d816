"""Data safety (issue 6): nothing the user had is lost, whatever happens during a run.

* Killing a real process (SIGKILL) at varied moments while it writes into an existing
  GeoPackage never loses or damages what was there, and never leaves a half-written table.
* An existing output that is not a GeoPackage (or is corrupt, or open elsewhere) is refused and
  left byte for byte as it was, even with ``--overwrite``.
* Ctrl-C (SIGINT) exits with code 130, one line, no partial output; a file-size limit
  (``ulimit -f``) leaves no partial output and says what happened.
* Inputs are only read: their bytes are unchanged after every script and output kind.
* No file is written anywhere but the named output (not in the working folder, the temporary
  folder, the home folder or the package).
* Security: no script runs a shell; packs only run code of their own package; ``--where`` is the
  user's own filter on a read-only input.

Everything runs on layers of an invented scenario (homes of the fictional Isle of Quenwick)
built in ``tmp_path``; nothing here needs the shared fixtures of ``conftest.py``.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import re
import shutil
import signal
import sqlite3
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

import toolbox
from toolbox.cli import main
from toolbox.manifest import parse_manifest

CRS = "EPSG:32705"  # WGS 84 / UTM zone 5S: the invented island lies in the South Pacific
X0, Y0 = 500_000.0, 6_120_000.0
PACKAGE = Path(toolbox.__file__).parent

#: kill-during-write trials with a pre-imported interpreter that forks one process per trial:
#: enough in ``make test`` for every mix of script, output state and kill moment (20 = 4 × 5)
#: to come up; ``make fuzz`` runs 500 through this variable
KILL_TRIALS = int(os.environ.get("PAIRSPREAD_KILL_TRIALS", "20"))
#: kill trials of the plain ``python -m toolbox`` command line (slower: a fresh start each)
CONSOLE_KILL_TRIALS = 4
#: name pattern of the scratch folder write_output makes beside its output
SCRATCH = re.compile(r"^\..+\.part$")


# --------------------------------------------------------------------------------------------
# helpers


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def snapshot(folder: Path) -> dict[str, str]:
    """sha256 of every file below ``folder`` (hidden ones too), by relative path."""
    return {str(p.relative_to(folder)): sha256(p) for p in sorted(Path(folder).rglob("*")) if p.is_file()}


def everything(folder: Path) -> set[str]:
    """Every file and folder below ``folder``, hidden ones too."""
    return {str(p.relative_to(folder)) for p in Path(folder).rglob("*")}


def make_homes(n: int, seed: int = 6) -> gpd.GeoDataFrame:
    """Invented homes: 8 districts, a resident count (weight), a label and a floor area."""
    rng = np.random.default_rng(seed)
    districts = np.array(
        ["Brinewell", "Mossford", "Old Quay", "Thornap", "Kestrel", "Saltmarsh", "Ferry", "Crag"]
    )
    return gpd.GeoDataFrame(
        {
            "district": districts[rng.integers(0, districts.size, n)],
            "residents": rng.integers(1, 9, n).astype(np.int64),
            "label": [f"home-{i:05d}" for i in range(n)],
            "floor_m2": rng.uniform(30, 250, n).round(1),
        },
        geometry=shapely.points(X0 + rng.normal(0, 1500, n), Y0 + rng.normal(0, 900, n)),
        crs=CRS,
    )


def make_sites() -> gpd.GeoDataFrame:
    """Five invented service sites, a second layer for cross-spread --to."""
    return gpd.GeoDataFrame(
        {"kind": ["clinic", "school", "clinic", "depot", "school"], "staff": [5, 8, 2, 4, 9]},
        geometry=shapely.points(
            X0 + np.array([0.0, 900, -1200, 300, 2500]), Y0 + np.array([0.0, 50, 800, -700, 1000])
        ),
        crs=CRS,
    )


def read_all(path: Path) -> dict[str, pd.DataFrame]:
    """Every layer or table of a GeoPackage, geometry as WKB so frames compare exactly."""
    out = {}
    for name, _ in pyogrio.list_layers(path):
        frame = pyogrio.read_dataframe(path, layer=name, use_arrow=True)
        if isinstance(frame, gpd.GeoDataFrame):
            wkb = shapely.to_wkb(frame.geometry.values)
            frame = pd.DataFrame(frame).assign(**{frame.geometry.name: wkb})
        out[str(name)] = frame
    return out


def assert_same_layers(got: dict[str, pd.DataFrame], want: dict[str, pd.DataFrame]) -> None:
    assert sorted(got) == sorted(want)
    for name in want:
        pd.testing.assert_frame_equal(got[name], want[name], obj=f"layer {name!r}")


def sqlite_ok(path: Path) -> bool:
    """SQLite's own consistency check, opened immutable so that no lock or journal is made."""
    con = sqlite3.connect(f"file:{path}?mode=ro&immutable=1", uri=True)
    try:
        return con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        con.close()


def one_error_line(stderr: str) -> str:
    lines = stderr.splitlines()
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr
    return lines[0]


def ctrl_c_default() -> None:
    """``preexec_fn`` for a child that a test interrupts: SIGINT back to its default action
    (a test run started in the background passes SIGINT ignored on to its children)."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def env_for_subprocess(**extra: str) -> dict[str, str]:
    env = {**os.environ, **extra}
    env.pop("PYTHONWARNINGS", None)
    return env


# --------------------------------------------------------------------------------------------
# fixtures


@pytest.fixture(scope="module")
def big_input(tmp_path_factory) -> Path:
    """20,000 homes: large enough that writing the output layer takes a noticeable while."""
    folder = tmp_path_factory.mktemp("big_input")
    path = folder / "homes.gpkg"
    pyogrio.write_dataframe(make_homes(20_000), path, layer="homes", driver="GPKG")
    return path


@pytest.fixture(scope="module")
def kill_inputs(tmp_path_factory) -> dict[str, Path]:
    """Inputs of the kill trials: their runs are short, while the write of the 10,000-feature
    output layer of point-remoteness takes a good part of its run."""
    folder = tmp_path_factory.mktemp("kill_inputs")
    paths = {"point-remoteness": folder / "homes10k.gpkg", "group-spread": folder / "homes1k.gpkg"}
    pyogrio.write_dataframe(
        make_homes(10_000, seed=8), paths["point-remoteness"], layer="homes", driver="GPKG"
    )
    pyogrio.write_dataframe(make_homes(1_000, seed=9), paths["group-spread"], layer="homes", driver="GPKG")
    return paths


@pytest.fixture(scope="module")
def project(tmp_path_factory, big_input) -> dict[str, Path]:
    """Pristine 'project' GeoPackages, the only copy of someone's work.

    ``without_t`` holds a point layer ``parcels`` and an attribute table ``notes``; ``with_t``
    also has an old table ``t`` (the output layer name, so a run with --overwrite replaces it).
    """
    folder = tmp_path_factory.mktemp("project")
    parcels = make_homes(3000, seed=11).rename(columns={"district": "ward"})
    notes = pd.DataFrame(
        {"note": ["survey done", "check ferry road", "new wells"], "year": [2019, 2021, 2024]}
    )
    without_t = folder / "without_t.gpkg"
    pyogrio.write_dataframe(parcels, without_t, layer="parcels", driver="GPKG")
    pyogrio.write_dataframe(notes, without_t, layer="notes", driver="GPKG")
    with_t = folder / "with_t.gpkg"
    shutil.copyfile(without_t, with_t)
    pyogrio.write_dataframe(
        pd.DataFrame({"old": ["previous result"], "value": [1.5]}), with_t, layer="t", driver="GPKG"
    )
    return {"without_t": without_t, "with_t": with_t}


@pytest.fixture(scope="module")
def small_inputs(tmp_path_factory) -> dict[str, tuple[Path, str | None]]:
    """300 homes as a GeoPackage (with a second layer ``sites``), a Shapefile and a GeoJSON."""
    folder = tmp_path_factory.mktemp("small_inputs")
    homes = make_homes(300, seed=3)
    gpkg = folder / "island.gpkg"
    pyogrio.write_dataframe(homes, gpkg, layer="homes", driver="GPKG")
    pyogrio.write_dataframe(make_sites(), gpkg, layer="sites", driver="GPKG")
    pyogrio.write_dataframe(homes, folder / "homes.shp", driver="ESRI Shapefile")
    pyogrio.write_dataframe(homes, folder / "homes.geojson", driver="GeoJSON")
    pyogrio.write_dataframe(make_sites(), folder / "sites.geojson", driver="GeoJSON")
    return {
        "gpkg": (gpkg, "homes"),
        "shp": (folder / "homes.shp", None),
        "geojson": (folder / "homes.geojson", None),
        "sites": (folder / "sites.geojson", None),
    }


# --------------------------------------------------------------------------------------------
# kill during write

# A pre-imported interpreter that forks one process per trial, so a trial costs the run itself
# rather than a fresh start of Python, numpy and GDAL (about a second each here). Each forked
# process runs toolbox.cli.main with the trial's arguments, exactly what `python -m toolbox`
# runs; the parent watches for the output's scratch folder to appear (the write has begun),
# waits the trial's delay and sends SIGKILL.
FORK_SERVER = textwrap.dedent(
    """
    import json, os, resource, signal, sys, time

    from toolbox.cli import main
    import toolbox.scripts.group_spread, toolbox.scripts.point_remoteness  # noqa: F401
    import pyogrio, scipy.spatial.distance  # noqa: F401
    import numba, numpy

    # numba's compiler set up once here (its first use imports a second or more of modules),
    # not in every trial; a plain function, so no thread pool is started before the forks
    numba.njit(lambda a: a.sum())(numpy.zeros(2))

    def scratch(folder, prefix):
        return any(n.startswith(prefix) and n.endswith(".part") for n in os.listdir(folder))

    print("ready", flush=True)
    for line in sys.stdin:
        job = json.loads(line)
        start = time.perf_counter()
        pid = os.fork()
        if pid == 0:
            code = 99
            try:
                fd = os.open(job["log"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
                os.dup2(fd, 1)
                os.dup2(fd, 2)
                if job.get("err"):  # stderr apart from stdout
                    os.dup2(os.open(job["err"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC), 2)
                if job.get("fsize"):  # `ulimit -f`: no file of this process grows beyond it
                    resource.setrlimit(resource.RLIMIT_FSIZE, (job["fsize"], job["fsize"]))
                if job.get("kill_at"):  # SIGKILL just before or after the k-th rename there
                    k, when, where = job["kill_at"]
                    real_replace, calls = os.replace, [0]

                    def replace(src, dst, *args, **kwargs):
                        ours = str(dst).startswith(where) or str(src).startswith(where)
                        calls[0] += ours
                        if ours and calls[0] == k and when == "before":
                            os.kill(os.getpid(), signal.SIGKILL)
                        real_replace(src, dst, *args, **kwargs)
                        if ours and calls[0] == k and when == "after":
                            os.kill(os.getpid(), signal.SIGKILL)

                    os.replace = replace
                code = main(job["args"])
            finally:
                os._exit(code)
        seen = gone = None
        status = None
        while True:
            done, st = os.waitpid(pid, os.WNOHANG)
            if done:
                status = st
                if seen is not None and gone is None:  # it ended before a poll saw the scratch go
                    gone = time.perf_counter()
                break
            now = time.perf_counter()
            if seen is None and scratch(job["folder"], job["prefix"]):
                seen = now
            elif seen is not None and gone is None and not scratch(job["folder"], job["prefix"]):
                gone = now
            if job["mode"] == "run" and now - start >= job["delay"]:
                break
            if job["mode"] == "write" and seen is not None and now - seen >= job["delay"]:
                break
            time.sleep(0.0002)
        writing = status is None and scratch(job["folder"], job["prefix"])
        if status is None:
            os.kill(pid, signal.SIGKILL)
            status = os.waitpid(pid, 0)[1]
        killed = os.WIFSIGNALED(status)  # not if it finished just before the signal
        end = time.perf_counter()
        print(json.dumps({
            "killed": killed,
            "writing": writing,
            "seen": seen is not None,
            "code": os.waitstatus_to_exitcode(status),
            "total": end - start,
            "write": None if seen is None or gone is None else gone - seen,
        }), flush=True)
    """
)


class ForkServer:
    """One pre-imported interpreter running trials sent to it, one at a time."""

    def __init__(self, folder: Path):
        script = folder / "fork_server.py"
        script.write_text(FORK_SERVER)
        self.proc = subprocess.Popen(
            [sys.executable, str(script)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
            cwd=folder,
            # one BLAS/numba thread: the forked processes then need no threads of the parent
            env=env_for_subprocess(OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", NUMBA_NUM_THREADS="1"),
        )
        assert self.proc.stdout.readline().strip() == "ready"

    def run(self, job: dict) -> dict:
        self.proc.stdin.write(json.dumps(job) + "\n")
        self.proc.stdin.flush()
        line = self.proc.stdout.readline()
        assert line, "the fork server died"
        return json.loads(line)

    def close(self) -> None:
        self.proc.stdin.close()
        self.proc.wait(timeout=30)


def trial_args(script: str, data: Path, target: Path) -> list[str]:
    args = [script, str(data), "--layer", "homes", "--group-by", "district", "--weight", "residents"]
    return [*args, "--output", str(target), "--output-layer", "t", "--overwrite", "--quiet"]


def check_killed_project(folder: Path, pristine: Path, before: dict, expected_t: pd.DataFrame) -> str:
    """Check one trial's project GeoPackage; returns 'unchanged' or 'replaced'.

    The file must open, pass SQLite's integrity check, and either be byte for byte the pristine
    file, or hold every earlier layer unchanged plus a complete table ``t`` equal to the one an
    uninterrupted run writes. Beside it there may only be hidden scratch folders of the killed
    process (``.project.gpkg.*.part``) and the empty lock file it held
    (``.project.gpkg.lock``, see ``writer_lock``), never a journal or a second GeoPackage.
    """
    target = folder / "project.gpkg"
    names = sorted(os.listdir(folder))
    assert target.is_file(), f"the project GeoPackage is gone; the folder holds {names}"
    extra = [n for n in names if n not in ("project.gpkg", "log.txt", ".project.gpkg.lock")]
    assert all(SCRATCH.match(n) and (folder / n).is_dir() for n in extra), names
    if ".project.gpkg.lock" in names:
        assert (folder / ".project.gpkg.lock").stat().st_size == 0
    assert sqlite_ok(target)
    layers = [str(row[0]) for row in pyogrio.list_layers(target)]
    if sha256(target) == sha256(pristine):
        return "unchanged"
    assert "t" in layers, layers
    after = read_all(target)
    want = {**before, "t": expected_t}
    assert_same_layers(after, want)
    return "replaced"


def run_trials(servers, jobs):
    """Run jobs spread over the fork servers in parallel threads; results in job order."""
    results: list[dict | None] = [None] * len(jobs)

    def worker(k: int) -> None:
        for i in range(k, len(jobs), len(servers)):
            results[i] = servers[k].run(jobs[i])

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(len(servers))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return results


def test_sigkill_during_write_never_loses_data(tmp_path, kill_inputs, project, record_property):
    # The design says a GeoPackage output is written into a copy beside the file and renamed
    # over it in one step (toolbox/layers/write.py, write_output); POSIX rename() replaces the name
    # atomically, so a reader sees the old file or the new one, never a mix.
    input_hashes = {script: sha256(path) for script, path in kill_inputs.items()}
    before = {key: read_all(path) for key, path in project.items()}
    servers = [ForkServer(tmp_path) for _ in range(2)]
    try:
        # calibration: uninterrupted runs give the complete table and the length of the write
        expected, write_time, run_time = {}, {}, {}
        calib = []
        for script in ("point-remoteness", "group-spread"):
            for key in ("with_t", "without_t"):
                folder = tmp_path / f"calib-{script}-{key}"
                folder.mkdir()
                shutil.copyfile(project[key], folder / "project.gpkg")
                job = {
                    "args": trial_args(script, kill_inputs[script], folder / "project.gpkg"),
                    "folder": str(folder),
                    "prefix": ".project.gpkg.",
                    "mode": "none",
                    "delay": 0,
                    "log": str(tmp_path / f"calib-{script}-{key}.log"),
                }
                calib.append((script, key, folder, job))
        for (script, key, folder, _), result in zip(
            calib, run_trials(servers, [c[3] for c in calib]), strict=True
        ):
            assert result["code"] == 0 and not result["killed"], Path(
                tmp_path / f"calib-{script}-{key}.log"
            ).read_text()
            assert result["seen"], "the write never went through a scratch folder"
            assert os.listdir(folder) == ["project.gpkg"]  # an uninterrupted run leaves nothing else
            after = read_all(folder / "project.gpkg")
            if script in expected:  # the same table whether or not an old one was replaced
                pd.testing.assert_frame_equal(after["t"], expected[script])
            expected[script] = after["t"]
            assert_same_layers(after, {**before[key], "t": after["t"]})
            write_time[script] = min(write_time.get(script, np.inf), result["write"])
            run_time[script] = max(run_time.get(script, 0), result["total"])
        # the complete table is the whole thing: one row per home, or one per district
        assert len(expected["point-remoteness"]) == 10_000
        homes = pyogrio.read_dataframe(kill_inputs["group-spread"], layer="homes")
        counts = homes["district"].value_counts()
        got = expected["group-spread"].set_index("district")["n_points"]
        assert got.sort_index().to_dict() == counts.sort_index().to_dict()

        rng = random.Random(20260606)
        jobs, plans = [], []
        for i in range(KILL_TRIALS):
            script = ("point-remoteness", "group-spread")[i % 2]
            key = ("with_t", "without_t")[(i // 2) % 2]
            if i % 5 == 4:  # any moment of the run, reading and computing included
                mode, delay = "run", rng.uniform(0, run_time[script])
            else:  # a moment of the write itself
                mode, delay = "write", rng.uniform(0, write_time[script])
            folder = tmp_path / f"trial-{i:03d}"
            folder.mkdir()
            shutil.copyfile(project[key], folder / "project.gpkg")
            jobs.append(
                {
                    "args": trial_args(script, kill_inputs[script], folder / "project.gpkg"),
                    "folder": str(folder),
                    "prefix": ".project.gpkg.",
                    "mode": mode,
                    "delay": delay,
                    "log": str(folder / "log.txt"),
                }
            )
            plans.append((script, key, folder))
        results = run_trials(servers, jobs)
    finally:
        for server in servers:
            server.close()

    tally = {
        "killed while writing": 0,
        "killed before writing": 0,
        "killed after the rename": 0,
        "finished": 0,
    }
    outcomes = {"unchanged": 0, "replaced": 0}
    leftovers = 0
    for (script, key, folder), result in zip(plans, results, strict=True):
        log = (folder / "log.txt").read_text() if (folder / "log.txt").exists() else ""
        if not result["killed"]:
            assert result["code"] == 0, log
        else:
            assert result["code"] == -signal.SIGKILL
        outcome = check_killed_project(folder, project[key], before[key], expected[script])
        outcomes[outcome] += 1
        scratch = [n for n in os.listdir(folder) if SCRATCH.match(n)]
        leftovers += bool(scratch)
        if not result["killed"]:
            tally["finished"] += 1
            assert outcome == "replaced" and not scratch
        elif outcome == "replaced":
            tally["killed after the rename"] += 1
        elif result["writing"]:
            tally["killed while writing"] += 1
        else:
            tally["killed before writing"] += 1
    # the inputs were only read, by every trial
    assert {script: sha256(path) for script, path in kill_inputs.items()} == input_hashes

    summary = f"{len(results)} SIGKILL trials: {tally}; files {outcomes}; {leftovers} left a scratch folder"
    print(summary)
    record_property("kill_trials", summary)
    assert len(results) == KILL_TRIALS
    assert KILL_TRIALS >= 20 or "PAIRSPREAD_KILL_TRIALS" in os.environ
    # the delays were spread so that most kills hit the write itself
    assert tally["killed while writing"] >= len(results) // 3, summary

    # a later run in a folder holding a killed run's scratch folder works and leaves it alone
    folder = next((f for _, _, f in plans if any(SCRATCH.match(n) for n in os.listdir(f))), None)
    if folder is not None:
        stale = sorted(n for n in os.listdir(folder) if SCRATCH.match(n))
        code = main(trial_args("group-spread", kill_inputs["group-spread"], folder / "project.gpkg"))
        assert code == 0
        assert sorted(n for n in os.listdir(folder) if SCRATCH.match(n)) == stale
        assert "t" in [str(r[0]) for r in pyogrio.list_layers(folder / "project.gpkg")]


def test_sigkill_of_the_console_command_during_write(tmp_path, capfd, big_input, project):
    # The same check with the plain command line `python -m toolbox`, started afresh each time.
    before = read_all(project["with_t"])
    reference = tmp_path / "reference.gpkg"
    shutil.copyfile(project["with_t"], reference)
    assert main(trial_args("point-remoteness", big_input, reference)) == 0, capfd.readouterr().err
    expected = read_all(reference)["t"]
    rng = random.Random(7)
    pending = []
    for i in range(CONSOLE_KILL_TRIALS):
        folder = tmp_path / f"console-{i}"
        folder.mkdir()
        shutil.copyfile(project["with_t"], folder / "project.gpkg")
        proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "toolbox",
                *trial_args("point-remoteness", big_input, folder / "project.gpkg"),
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            env=env_for_subprocess(),
        )
        pending.append([folder, proc, rng.uniform(0, 0.3), None])
    folders, states = [item[0] for item in pending], []
    while pending:
        for item in list(pending):
            folder, proc, delay, seen = item
            if proc.poll() is not None:
                states.append("finished")
                pending.remove(item)
                continue
            now = time.perf_counter()
            if seen is None and any(SCRATCH.match(n) for n in os.listdir(folder)):
                item[3] = seen = now
            if seen is not None and now - seen >= delay:
                proc.send_signal(signal.SIGKILL)
                proc.wait()
                states.append("killed")
                pending.remove(item)
        time.sleep(0.0005)
    for folder in folders:
        check_killed_project(folder, project["with_t"], before, expected)
    assert states.count("killed") >= 1, states




@pytest.mark.parametrize("kind", ["gpkg", "shp"])
def test_sigkill_at_every_rename_of_the_write(tmp_path, kill_inputs, project, kind):
    # The random trials above rarely land between two renames; here each run is killed just
    # before or just after its k-th rename (os.replace) in the output folder, for k = 1, 2, ...
    # until a run gets to its end.
    data = kill_inputs["group-spread"]  # 1,000 homes: a quick run
    reference = tmp_path / "reference"
    reference.mkdir()
    parts = (".shp", ".shx", ".dbf", ".prj", ".cpg")
    shp_args = ["point-remoteness", str(data), "--layer", "homes", "--quiet", "--overwrite"]
    if kind == "gpkg":
        before = read_all(project["with_t"])
        shutil.copyfile(project["with_t"], reference / "project.gpkg")
        assert main(trial_args("group-spread", data, reference / "project.gpkg")) == 0
        expected = read_all(reference / "project.gpkg")["t"]
    else:
        assert main([*shp_args, "--where", "residents > 4", "--output", str(reference / "old.shp")]) == 0
        assert main([*shp_args, "--output", str(reference / "new.shp")]) == 0
        old = {s: (reference / f"old{s}").read_bytes() for s in parts}
        new = {s: (reference / f"new{s}").read_bytes() for s in parts}
    server = ForkServer(tmp_path)
    killed, k = 0, 0
    try:
        while True:
            k += 1
            for when in ("before", "after"):
                folder = tmp_path / f"{k}-{when}"
                folder.mkdir()
                if kind == "gpkg":
                    shutil.copyfile(project["with_t"], folder / "project.gpkg")
                    args = trial_args("group-spread", data, folder / "project.gpkg")
                else:
                    for s in parts:
                        (folder / f"far{s}").write_bytes(old[s])
                    args = [*shp_args, "--output", str(folder / "far.shp")]
                job = {
                    "args": args,
                    "folder": str(folder),
                    "prefix": ".",
                    "mode": "none",
                    "delay": 0,
                    "log": str(tmp_path / f"{k}-{when}.log"),
                    "kill_at": [k, when, str(folder)],
                }
                result = server.run(job)
                killed += result["killed"]
                if kind == "gpkg":
                    check_killed_project(folder, project["with_t"], before, expected)
                else:
                    # a Shapefile is several files renamed one by one: a kill between two renames
                    # may leave parts of both versions, but never a part missing
                    for s in parts:
                        part = folder / f"far{s}"
                        assert part.is_file(), (k, when, sorted(os.listdir(folder)))
                        assert part.read_bytes() in (old[s], new[s]), (k, when, s)
            if not result["killed"]:  # the k-th rename was never reached: all were tried
                break
            assert k < 40
    finally:
        server.close()
    assert killed >= 2, killed  # the write renames at least once, killed before and after it


# --------------------------------------------------------------------------------------------
# outputs that are not GeoPackages, corrupt, or open elsewhere


def _not_geopackages(folder: Path, good: Path) -> dict[str, Path]:
    files = {}
    rng = np.random.default_rng(1)
    files["random bytes"] = folder / "random.gpkg"
    files["random bytes"].write_bytes(rng.integers(0, 256, 4096, dtype=np.uint8).tobytes())
    files["text"] = folder / "text.gpkg"
    files["text"].write_text("meeting notes: keep the survey results\n")
    files["empty file"] = folder / "empty.gpkg"
    files["empty file"].write_bytes(b"")
    files["truncated GeoPackage"] = folder / "truncated.gpkg"
    files["truncated GeoPackage"].write_bytes(good.read_bytes()[:40_000])
    files["plain SQLite"] = folder / "plain.gpkg"
    con = sqlite3.connect(files["plain SQLite"])
    con.execute("CREATE TABLE budget (item TEXT, cost REAL)")
    con.execute("INSERT INTO budget VALUES ('boat', 1200.0)")
    con.commit()
    con.close()
    files["GeoJSON content"] = folder / "geojson.gpkg"
    pyogrio.write_dataframe(make_sites(), folder / "content.geojson", driver="GeoJSON")
    os.replace(folder / "content.geojson", files["GeoJSON content"])
    files["FlatGeobuf content"] = folder / "flatgeobuf.gpkg"
    pyogrio.write_dataframe(make_sites(), folder / "content.fgb", driver="FlatGeobuf")
    os.replace(folder / "content.fgb", files["FlatGeobuf content"])
    return files


NOT_GEOPACKAGE_KINDS = [
    "random bytes",
    "text",
    "empty file",
    "truncated GeoPackage",
    "plain SQLite",
    "GeoJSON content",
    "FlatGeobuf content",
]


@pytest.mark.parametrize("overwrite", [False, True], ids=["plain", "overwrite"])
@pytest.mark.parametrize("script", ["group-spread", "point-remoteness", "cross-spread"])
def test_existing_output_that_is_not_a_geopackage_is_left_alone(
    tmp_path, capfd, small_inputs, script, overwrite
):
    data, layer = small_inputs["gpkg"]
    files = _not_geopackages(tmp_path, data)
    before = snapshot(tmp_path)
    for kind in NOT_GEOPACKAGE_KINDS:
        capfd.readouterr()
        args = [script, str(data), "--layer", layer, "--group-by", "district", "--output", str(files[kind])]
        code = main([*args, *(["--overwrite"] if overwrite else []), "--quiet"])
        out, err = capfd.readouterr()
        assert code != 0, kind
        line = one_error_line(err)
        assert line.startswith("pairspread: error: ") and files[kind].name in line, (kind, line)
        assert "unexpected" not in line, (kind, line)
        # never deleted, replaced or touched, and no scratch or journal left beside it
        assert snapshot(tmp_path) == before, kind


@pytest.mark.parametrize("kind", ["GeoJSON content", "FlatGeobuf content"])
def test_output_in_another_format_named_gpkg_is_called_not_a_geopackage(tmp_path, capfd, small_inputs, kind):
    # refused before any work, saying what the file is not (and never naming a scratch copy)
    data, layer = small_inputs["gpkg"]
    target = _not_geopackages(tmp_path, data)[kind]
    capfd.readouterr()
    code = main(["group-spread", str(data), "--layer", layer, "--output", str(target), "--quiet"])
    line = one_error_line(capfd.readouterr().err)
    assert code != 0
    assert "not a GeoPackage" in line or "cannot be opened as a GeoPackage" in line, line
    assert ".part" not in line, line


LOCK_HOLDER = textwrap.dedent(
    """
    import sqlite3, sys

    path, lock = sys.argv[1], sys.argv[2]
    con = sqlite3.connect(path, isolation_level=None)
    if lock == "WAL mode":
        con.execute("PRAGMA journal_mode=WAL")
        con.execute("BEGIN")
    else:
        con.execute("BEGIN EXCLUSIVE")
    if lock != "exclusive lock":
        con.execute("CREATE TABLE pending (a)")
    print("locked", flush=True)
    sys.stdin.read()
    con.execute("ROLLBACK")
    """
)


def test_output_geopackage_open_in_another_program_is_refused(tmp_path, small_inputs):
    # another program holding the file: SQLite's lock, or its -journal / -wal files, show it.
    # SQLite's locks belong to a process (and closing any handle of the file drops them), so the
    # lock is held by a helper process and pairspread runs as a third one.
    data, layer = small_inputs["gpkg"]
    holders, procs = [], {}
    try:
        for lock in ("exclusive lock", "uncommitted write", "WAL mode"):
            folder = tmp_path / lock.replace(" ", "_")
            folder.mkdir()
            target = folder / "project.gpkg"
            shutil.copyfile(data, target)
            holder = subprocess.Popen(
                [sys.executable, "-c", LOCK_HOLDER, str(target), lock],
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                text=True,
            )
            holders.append(holder)
            assert holder.stdout.readline().strip() == "locked"
            args = ["group-spread", str(data), "--layer", layer, "--output", str(target), "--overwrite"]
            procs[lock] = (
                folder,
                snapshot(folder),
                subprocess.Popen(
                    [sys.executable, "-m", "toolbox", *args],
                    stdout=subprocess.PIPE,
                    stderr=subprocess.PIPE,
                    text=True,
                    # GDAL's SQLite waits 5 s per open for a lock to go; 0.1 s shows the same
                    env=env_for_subprocess(SQLITE_BUSY_TIMEOUT="100"),
                ),
            )
        for lock, (folder, before, proc) in procs.items():
            stdout, stderr = proc.communicate(timeout=120)
            assert proc.returncode != 0, (lock, stderr)
            line = one_error_line(stderr)
            assert line.startswith("pairspread: error: ") and "project.gpkg" in line, line
            assert re.search("open in another program|locked", line), line
            assert snapshot(folder) == before, lock
    finally:
        for holder in holders:
            holder.communicate(timeout=30)


# --------------------------------------------------------------------------------------------
# Ctrl-C and file-size limits


def _input_closed_again(proc: subprocess.Popen, path: Path) -> None:
    """Wait until ``proc`` has opened ``path`` and closed it again (reading is under way)."""
    target = str(path.resolve())
    opened = False
    while proc.poll() is None:
        try:
            fds = os.listdir(f"/proc/{proc.pid}/fd")
            now_open = any(os.readlink(f"/proc/{proc.pid}/fd/{fd}") == target for fd in fds)
        except OSError:
            now_open = False
        if now_open:
            opened = True
        elif opened:
            return
        time.sleep(0.001)


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs /proc to follow the run")
def test_ctrl_c_during_a_long_run(tmp_path, big_input, project):
    # exact sums over 50,000 points in one group (2.5e9 distances): seconds of computing
    slow_input = tmp_path / "homes50k.gpkg"
    pyogrio.write_dataframe(make_homes(50_000, seed=12), slow_input, layer="homes", driver="GPKG")
    out = tmp_path / "out"
    out.mkdir()
    target = out / "project.gpkg"
    shutil.copyfile(project["with_t"], target)
    pristine = sha256(target)
    console = str(Path(sys.executable).with_name("pairspread"))
    compute = ["point-remoteness", str(slow_input), "--tolerance", "0", "--output"]
    runs = {
        "compute": [console, *compute, str(out / "far.parquet")],
        "compute, python -m": [sys.executable, "-m", "toolbox", *compute, str(out / "far2.parquet")],
        # interrupted while it writes into the project GeoPackage
        "write": [console, *trial_args("point-remoteness", big_input, target)],
    }

    def start(phase):
        return subprocess.Popen(
            runs[phase], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env_for_subprocess(),
            preexec_fn=ctrl_c_default,
        )

    procs = {}
    for phase in ("compute", "compute, python -m"):
        procs[phase] = start(phase)
        _input_closed_again(procs[phase], slow_input)
        time.sleep(0.3)  # well inside the computing, which takes seconds
        procs[phase].send_signal(signal.SIGINT)
    for phase, proc in procs.items():
        stdout, stderr = proc.communicate(timeout=120)
        if phase == "compute, python -m" and proc.returncode == -signal.SIGINT:
            # observed: when Ctrl-C lands in a lazy import (scipy, inside the kernels) under
            # `python -m`, CPython ends the process by SIGINT after main() has returned 130; a
            # shell reports that as 130 too
            pass
        else:
            assert proc.returncode == 130, (phase, stderr)
        assert one_error_line(stderr) == "pairspread: interrupted; no output was written.", phase
        assert stdout == ""
    assert sorted(os.listdir(out)) == ["project.gpkg"]

    # Interrupted while it writes into the project GeoPackage. On a busy machine the write can
    # be over before the signal lands (it once exited 0 here): such a run must have finished
    # properly, and the trial is repeated with the signal sent sooner, until one lands inside
    # the write, which must then leave the project file as it was and nothing beside it.
    attempts = []
    for delay in (0.05, 0.02, 0.01, 0.0, 0.0, 0.0, 0.0, 0.0):
        proc = start("write")
        while proc.poll() is None and not any(SCRATCH.match(n) for n in os.listdir(out)):
            time.sleep(0.0005)  # until the copy of the project file is being made
        time.sleep(delay)
        proc.send_signal(signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=120)
        assert stdout == ""
        replaced = sha256(target) != pristine
        attempts.append((delay, proc.returncode, replaced))
        if proc.returncode == 130 and not replaced:  # the interrupt landed inside the write
            assert one_error_line(stderr) == "pairspread: interrupted; no output was written."
            break
        # too late: the run completed its write (and was perhaps interrupted just after it)
        assert replaced and proc.returncode in (0, 130), (attempts, stderr)
        if proc.returncode == 130:  # then it must not claim that nothing was written
            assert one_error_line(stderr).startswith("pairspread: interrupted after writing "), stderr
        assert_same_layers(read_all(target), {**read_all(project["with_t"]), "t": read_all(target)["t"]})
        shutil.copyfile(project["with_t"], target)
    else:
        pytest.fail(f"no interrupt landed inside the write in {len(attempts)} tries: {attempts}")
    # no partial output and no scratch folder: the interrupted write cleaned up after itself
    assert sorted(os.listdir(out)) == ["project.gpkg"]
    assert sha256(target) == pristine


#: what a message about a full disk or a file-size limit should mention
DISK_FULL = re.compile(r"too large|no space|disk|full|size limit|quota", re.IGNORECASE)

#: output kinds under a file-size limit: (script, suffix, limit in bytes). Every output is
#: several times larger than its limit; where GDAL's writers notice the limit depends on it.
LIMITS = {
    "existing gpkg": ("point-remoteness", ".gpkg", None),  # the project's size + 200 kB
    "gpkg": ("point-remoteness", ".gpkg", 400_000),  # full while adding features
    "gpkg at commit": ("point-remoteness", ".gpkg", 1_500_000),  # full when committing them
    "geojson": ("point-remoteness", ".geojson", 1_000_000),
    "parquet": ("point-remoteness", ".parquet", 400_000),
    "csv": ("group-spread", ".csv", 400_000),
    "shp": ("point-remoteness", ".shp", 400_000),  # the .shp part overflows first
    "shp, dbf part": ("point-remoteness", ".shp", 1_000_000),  # .shp (560 kB) fits, .dbf does not
}


@pytest.fixture(scope="module")
def limited_runs(tmp_path_factory, big_input, project):
    """Every case of LIMITS, each in a process of its own under its file-size limit.

    The processes are forked from a pre-imported interpreter (the ForkServer of the kill
    trials), which sets the limit and runs the command line's main(); the limit is a property
    of the process, which a fresh interpreter would not change.
    """
    root = tmp_path_factory.mktemp("limited")
    jobs = {}
    for kind, (script, suffix, limit) in LIMITS.items():
        folder = root / re.sub(r"\W+", "_", kind)
        folder.mkdir()
        if kind == "existing gpkg":  # the copy of the project fits, the new layer does not
            target = folder / "project.gpkg"
            shutil.copyfile(project["without_t"], target)
            limit = target.stat().st_size + 200_000
            args = trial_args(script, big_input, target)
        elif script == "group-spread":  # 20,000 groups of one home: a 2 MB table
            target = folder / f"spread{suffix}"
            args = [script, str(big_input), "--group-by", "label", "--output", str(target)]
        else:  # the 20,000 homes with their new fields
            target = folder / f"far{suffix}"
            args = [script, str(big_input), "--output", str(target)]
        jobs[kind] = (
            {
                "args": [*args, "--quiet"],
                "folder": str(root),
                "prefix": "-",
                "mode": "none",
                "delay": 0,
                "log": str(root / f"{folder.name}.out"),
                "err": str(root / f"{folder.name}.err"),
                "fsize": limit,
            },
            target,
        )
    servers = [ForkServer(root) for _ in range(2)]
    try:
        results = run_trials(servers, [job for job, _ in jobs.values()])
    finally:
        for server in servers:
            server.close()
    return {
        kind: (Path(job["log"]).read_text(), Path(job["err"]).read_text(), result["code"], target)
        for (kind, (job, target)), result in zip(jobs.items(), results, strict=True)
    }




@pytest.mark.parametrize(
    "kind", list(LIMITS)
)
def test_file_size_limit_leaves_no_partial_output(limited_runs, project, kind):
    stdout, stderr, code, target = limited_runs[kind]
    assert code != 0, stderr
    line = one_error_line(stderr)
    assert line.startswith("pairspread: error: ") and target.name in line, line
    assert "unexpected" not in line, line
    if kind == "existing gpkg":  # the project file as it was, nothing beside it
        assert os.listdir(target.parent) == ["project.gpkg"]
        assert sha256(target) == sha256(project["without_t"])
    else:
        assert os.listdir(target.parent) == []


@pytest.mark.parametrize(
    "kind",
    list(LIMITS),
)
def test_file_size_limit_says_what_happened(limited_runs, kind):
    stdout, stderr, code, target = limited_runs[kind]
    assert code != 0
    line = one_error_line(stderr)
    assert DISK_FULL.search(line), line


def test_failed_shapefile_replace_keeps_the_old_shapefile(tmp_path, monkeypatch, capfd, small_inputs):
    data, layer = small_inputs["gpkg"]
    out = tmp_path / "far.shp"
    args = ["point-remoteness", str(data), "--layer", layer, "--output", str(out), "--quiet"]
    assert main([*args, "--where", "residents > 4"]) == 0
    before = snapshot(tmp_path)
    real_replace = os.replace
    calls = []

    def failing_replace(src, dst):  # the third part fails, as an I/O error would
        calls.append(dst)
        if len(calls) == 3:
            raise OSError(5, "Input/output error")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", failing_replace)
    code = main([*args, "--overwrite"])
    monkeypatch.undo()
    assert code != 0 and "nothing was written" in capfd.readouterr().err
    assert snapshot(tmp_path) == before  # the previous Shapefile, every part of it


# --------------------------------------------------------------------------------------------
# inputs are only read


def _runs(data: Path, layer: str | None, sites: Path, out: Path) -> list[list[str]]:
    """Every script with every kind of output it offers."""
    src = [str(data), *(["--layer", layer] if layer else [])]
    g = ["--group-by", "district", "--weight", "residents"]
    return [
        ["group-spread", *src, *g],
        ["group-spread", *src, *g, "--output", "-"],
        ["group-spread", *src, *g, "--output", str(out / "spread.csv")],
        ["group-spread", *src, "--tolerance", "0", "--output", str(out / "spread.parquet")],
        ["group-spread", *src, *g, "--where", "residents > 2", "--output", str(out / "spread.gpkg")],
        [
            "group-spread",
            *src,
            *g,
            "--engine",
            "fiona",
            "--output",
            str(out / "spread.gpkg"),
            "--output-layer",
            "fiona",
        ],
        ["point-remoteness", *src, *g, "--output", str(out / "far.gpkg")],
        ["point-remoteness", *src, *g, "--output", str(out / "far.shp")],
        ["point-remoteness", *src, "--method", "projection", "--output", str(out / "far.geojson")],
        ["point-remoteness", *src, *g, "--output", str(out / "far.parquet")],
        ["cross-spread", *src, *g],
        ["cross-spread", *src, *g, "--output", str(out / "cross.csv")],
        ["cross-spread", *src, *g, "--wide", "--output", str(out / "cross.gpkg")],
        [
            "cross-spread",
            *src,
            *g,
            "--to",
            str(sites),
            "--to-group-by",
            "kind",
            "--output",
            str(out / "cross.parquet"),
        ],
    ]


@pytest.mark.parametrize("fmt", ["gpkg", "shp", "geojson"])
def test_inputs_are_unchanged_by_every_script(tmp_path, capfd, small_inputs, fmt):
    data, layer = small_inputs[fmt]
    sites = small_inputs["sites"][0]
    inputs = data.parent
    out = tmp_path / "out"
    out.mkdir()
    before = snapshot(inputs)
    for args in _runs(data, layer, sites, out):
        code = main([*args, "--quiet"])
        err = capfd.readouterr().err
        assert code == 0, (args, err)
        # every file of the input folder (sidecars like .aux.xml, -wal or .qix would show too)
        assert snapshot(inputs) == before, args


def test_output_into_the_input_geopackage_keeps_its_layers(tmp_path, capfd, small_inputs):
    # writing a new table into the very GeoPackage being read changes its bytes by design, but
    # the layers it had are read back exactly as they were
    data = tmp_path / "island.gpkg"
    shutil.copyfile(small_inputs["gpkg"][0], data)
    before = read_all(data)
    for script in ("group-spread", "point-remoteness", "cross-spread"):
        code = main(
            [
                script,
                str(data),
                "--layer",
                "homes",
                "--group-by",
                "district",
                "--output",
                str(data),
                "--quiet",
            ]
        )
        assert code == 0, capfd.readouterr().err
    after = read_all(data)
    assert_same_layers({k: after[k] for k in before}, before)
    assert sorted(set(after) - set(before)) == ["cross_spread", "group_spread", "point_remoteness"]
    assert sorted(os.listdir(tmp_path)) == ["island.gpkg"]


def test_overwriting_the_only_table_keeps_other_sqlite_tables(tmp_path, capfd, small_inputs):
    # A GeoPackage holding only the table being replaced is written afresh (faster than
    # dropping its old rows); one that also holds a table of the user's own, even one that
    # GeoPackage does not list as a layer, keeps that table.
    out = tmp_path / "result.gpkg"
    args = ["group-spread", str(small_inputs["gpkg"][0]), "--layer", "homes", "--group-by", "district",
            "--output", str(out), "--quiet"]  # fmt: skip
    assert main(args) == 0, capfd.readouterr().err
    assert main([*args, "--overwrite"]) == 0, capfd.readouterr().err
    assert [str(r[0]) for r in pyogrio.list_layers(out)] == ["group_spread"]
    with sqlite3.connect(out) as db:  # sqlite3 from the standard library, not our writer
        db.execute("CREATE TABLE my_notes (note TEXT)")
        db.execute("INSERT INTO my_notes VALUES ('kept')")
    db.close()
    assert main([*args, "--overwrite"]) == 0, capfd.readouterr().err
    with sqlite3.connect(out) as db:
        assert db.execute("SELECT note FROM my_notes").fetchall() == [("kept",)]
    db.close()
    table = pyogrio.read_dataframe(out, layer="group_spread")
    assert len(table) > 0 and "total_dist" in table.columns


# --------------------------------------------------------------------------------------------
# no file outside the named output


def _output_files(path: Path) -> set[str]:
    # CSV and Shapefile outputs get their provenance record as a sidecar (issue 9)
    if path.suffix == ".shp":  # a Shapefile is several files
        return {path.with_suffix(s).name for s in (".shp", ".shx", ".dbf", ".prj", ".cpg", ".shp.json")}
    return {path.name, path.name + ".json"} if path.suffix == ".csv" else {path.name}


def test_no_file_is_written_beside_the_output(tmp_path, capfd, monkeypatch, small_inputs):
    data, layer = small_inputs["gpkg"]
    sites = small_inputs["sites"][0]
    inputs = snapshot(data.parent)
    work = tmp_path / "cwd"
    work.mkdir()
    monkeypatch.chdir(work)
    for k, args in enumerate(_runs(data, layer, sites, Path("<out>"))):
        out = tmp_path / f"out-{k}"
        out.mkdir()
        args = [a.replace("<out>", str(out)) for a in args]
        code = main([*args, "--quiet"])
        assert code == 0, capfd.readouterr().err
        target = next((Path(a) for a in args if a.startswith(str(out))), None)
        want = set() if target is None else _output_files(target)
        assert everything(out) == want, args
        assert everything(work) == set(), args
    assert snapshot(data.parent) == inputs


def test_no_file_is_written_anywhere_else(tmp_path, small_inputs):
    # fresh processes with their own empty working, temporary and home folders; Python's own
    # bytecode cache is switched off so that any other file written in the package would show
    data, layer = small_inputs["gpkg"]
    package_before = {p for p in everything(PACKAGE) if "__pycache__" not in p}
    inputs = snapshot(data.parent)
    procs = []
    for script, suffix in (("group-spread", ".gpkg"), ("point-remoteness", ".shp"), ("cross-spread", ".csv")):
        root = tmp_path / script
        dirs = {name: root / name for name in ("cwd", "tmp", "home", "out")}
        for d in dirs.values():
            d.mkdir(parents=True)
        target = dirs["out"] / f"result{suffix}"
        env = env_for_subprocess(
            TMPDIR=str(dirs["tmp"]),
            TEMP=str(dirs["tmp"]),
            CPL_TMPDIR=str(dirs["tmp"]),
            HOME=str(dirs["home"]),
            XDG_CACHE_HOME=str(dirs["home"] / ".cache"),
            PYTHONDONTWRITEBYTECODE="1",
        )
        args = [script, str(data), "--layer", layer, "--group-by", "district", "--output", str(target)]
        proc = subprocess.Popen(
            [sys.executable, "-m", "toolbox", *args],
            cwd=dirs["cwd"],
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        procs.append((proc, dirs, target))
    for proc, dirs, target in procs:
        _, stderr = proc.communicate(timeout=300)
        assert proc.returncode == 0, stderr
        assert everything(dirs["out"]) == _output_files(target)
        for name in ("cwd", "tmp", "home"):
            assert everything(dirs[name]) == set(), (name, everything(dirs[name]))
    assert snapshot(data.parent) == inputs
    # compiled-code caches (Python's .pyc, numba's index files) live in __pycache__ folders
    assert {p for p in everything(PACKAGE) if "__pycache__" not in p} <= package_before


# --------------------------------------------------------------------------------------------
# security


SHELL_PATTERNS = {
    "subprocess": r"\bsubprocess\b",
    "os.system": r"\bos\.system\b",
    "shell=True": r"shell\s*=\s*True",
    "os.popen": r"\bos\.popen\b",
    "os.exec*": r"\bos\.exec[lv]p?e?\b",
    "os.spawn*": r"\bos\.spawn",
    "pty": r"\bimport\s+pty\b|\bfrom\s+pty\b",
    "eval/exec": r"(?<![\w.])(eval|exec)\s*\(",
}


def test_no_script_runs_a_shell():
    sources = sorted(PACKAGE.rglob("*.py"))
    assert len(sources) > 10
    found = []
    for path in sources:
        for lineno, line in enumerate(path.read_text("utf-8").splitlines(), 1):
            for what, pattern in SHELL_PATTERNS.items():
                if re.search(pattern, line):
                    found.append(f"{path.relative_to(PACKAGE.parent)}:{lineno}: {what}: {line.strip()}")
    assert found == []


def test_the_pattern_check_would_catch_a_shell_call():
    # the grep above is only worth something if its patterns match the calls it looks for
    samples = [
        "import subprocess",
        "os.system('rm x')",
        "run(cmd, shell=True)",
        "os.popen('ls')",
        "os.execvp('sh', [])",
        "os.spawnl(0, 'x')",
        "import pty",
        "eval(text)",
    ]
    for sample, (what, pattern) in zip(samples, SHELL_PATTERNS.items(), strict=True):
        assert re.search(pattern, sample), what
    assert not re.search(SHELL_PATTERNS["eval/exec"], "values.eval(x); self.exec_module(m)")


@pytest.mark.parametrize(
    ("module", "allowed"),
    [
        ("demo_pack.counting", True),
        ("demo_pack", True),
        ("os", False),
        ("toolbox.scripts.group_spread", False),  # our code, but not the pack's own package
        ("demo_pack_evil.counting", False),  # a name that only starts like the package
        ("demo_packs", False),
    ],
)
def test_pack_manifest_may_only_name_its_own_modules(module, allowed):
    text = textwrap.dedent(
        f"""
        [params.data]
        kind = "dataset"
        help = "Input."

        [[scripts]]
        name = "count"
        summary = "Count points."
        module = "{module}"
        params = ["data"]
        """
    )
    if allowed:
        (script,) = parse_manifest(text, where="test manifest", package="demo_pack")
        assert script.module == module
    else:
        with pytest.raises(toolbox.ManifestError, match="outside its own package"):
            parse_manifest(text, where="test manifest", package="demo_pack")


def test_our_manifest_only_names_our_modules():
    ours = [s for s in toolbox.manifest.scripts().values() if s.pack == "pairspread"]
    assert len(ours) >= 3
    for script in ours:
        assert script.module.startswith("toolbox.scripts."), script.module
        assert (PACKAGE / "scripts" / (script.module.rsplit(".", 1)[1] + ".py")).is_file()


@pytest.mark.parametrize(
    ("where", "expect"),
    [
        ("1=1; DROP TABLE homes", "readonly|read-only"),
        ("district = 'Ferry') OR (1=1", "syntax"),
        ("load_extension('/nonexistent/evil') IS NULL", "not authorized|no such function"),
    ],
    ids=["drop-table", "unbalanced", "load-extension"],
)
def test_where_is_only_a_filter_on_a_read_only_input(tmp_path, capfd, small_inputs, where, expect):
    # --where goes to the reader as the user's own OGR SQL filter on the user's own file; the
    # file is opened read-only, so even a statement smuggled into it cannot change the file
    data = tmp_path / "island.gpkg"
    shutil.copyfile(small_inputs["gpkg"][0], data)
    before = snapshot(tmp_path)
    capfd.readouterr()
    code = main(["group-spread", str(data), "--layer", "homes", "--where", where, "--output", "-"])
    out, err = capfd.readouterr()
    line = one_error_line(err)
    assert code != 0 and out == ""
    assert line.startswith("pairspread: error: ") and "--where" in line, line
    assert re.search(expect, line, re.IGNORECASE), line
    assert snapshot(tmp_path) == before
    assert len(pyogrio.read_dataframe(data, layer="homes")) == 300


def test_where_filters_as_asked(tmp_path, capfd, small_inputs):
    data, layer = small_inputs["gpkg"]
    homes = pyogrio.read_dataframe(data, layer=layer)
    capfd.readouterr()
    code = main(
        [
            "group-spread",
            str(data),
            "--layer",
            layer,
            "--where",
            "district = 'Ferry' AND residents >= 4",
            "--output",
            str(tmp_path / "out.csv"),
            "--quiet",
        ]
    )
    assert code == 0, capfd.readouterr().err
    table = pd.read_csv(tmp_path / "out.csv")
    # the count pandas finds with the same condition on the same file
    assert table["n_points"].tolist() == [
        int(((homes["district"] == "Ferry") & (homes["residents"] >= 4)).sum())
    ]


def _mapped(pid: int, needle: str) -> bool:
    try:
        return needle in Path(f"/proc/{pid}/maps").read_text()
    except OSError:
        return False


@pytest.mark.skipif(not Path("/proc/self/maps").is_file(), reason="needs /proc to follow the start-up")
@pytest.mark.parametrize("library", ["numpy", "pandas", "pyogrio"])
def test_ctrl_c_while_starting_up(tmp_path, small_inputs, library):
    # A Ctrl-C in the first half second, while the libraries load, printed a KeyboardInterrupt
    # traceback and ended the process by SIGINT. The moment is found from the process's own
    # state (the library's compiled module is mapped, so its import is under way), not from a
    # delay, so a busy machine cannot move it.
    data, layer = small_inputs["gpkg"]
    console = str(Path(sys.executable).with_name("pairspread"))
    needle = f"site-packages/{library}"
    # Some libraries swallow the KeyboardInterrupt while they load (pandas' compiled modules did,
    # about 1 run in 20: the run went on and wrote its output; or turned it into an ImportError);
    # so several runs are interrupted, and every one caught loading must end with 130 and nothing
    # written. (tests/test_errors.py checks both library behaviours deterministically.)
    caught_runs = 0
    for attempt in range(4):
        out = tmp_path / f"out{attempt}.csv"
        proc = subprocess.Popen(
            [console, "group-spread", str(data), "--layer", layer, "--output", str(out)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=env_for_subprocess(),
            preexec_fn=ctrl_c_default,
        )
        while proc.poll() is None and not _mapped(proc.pid, needle):
            time.sleep(0.0002)
        caught = proc.poll() is None
        proc.send_signal(signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=120)
        if not caught:  # the run ended before the library was seen loading (a quick machine)
            continue
        caught_runs += 1
        assert proc.returncode == 130, stderr
        assert "Traceback" not in stderr
        assert one_error_line(stderr) == "pairspread: interrupted; no output was written.", stderr
        assert stdout == "" and not out.exists()
    assert caught_runs >= 2, f"{library} was seen loading in only {caught_runs} of 4 runs"
