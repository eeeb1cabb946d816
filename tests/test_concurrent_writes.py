"""Runs writing into one GeoPackage at the same time: every table arrives, or a loud failure.

A GeoPackage output is written into a copy of the file that then replaces it in one rename
(toolbox/layers/write.py). Two runs doing that at once, each adding its own table, used to
lose the table of the run that renamed first. Writers into one file now take a lock beside it
for the whole copy-write-rename, and a file changed by a program that does not take the lock is
copied again (or, if that keeps happening, the run fails and writes nothing).

``PAIRSPREAD_WRITER_TRIALS`` sets the number of trials (``make fuzz`` runs many more).
"""

from __future__ import annotations

import multiprocessing
import os
import shutil
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from toolbox import group_spread
from toolbox.errors import OutputError
from toolbox.layers import write as write_module
from toolbox.layers.write import lock_path, write_output, writer_lock

WRITERS = 4
WRITER_TRIALS = int(os.environ.get("PAIRSPREAD_WRITER_TRIALS", "4"))
CRS = "EPSG:32705"
_REAL_WRITE = pyogrio.write_dataframe  # the tests below wrap it; other programs' writes do not


def _homes(n: int = 400, seed: int = 3) -> gpd.GeoDataFrame:
    rng = np.random.default_rng(seed)
    return gpd.GeoDataFrame(
        {"district": rng.choice(["harbour", "upland", "ridge"], n)},
        geometry=shapely.points(500_000 + rng.uniform(0, 3000, n), 6_120_000 + rng.uniform(0, 2000, n)),
        crs=CRS,
    )


def _layers(path: Path) -> dict[str, pd.DataFrame]:
    return {str(name): pyogrio.read_dataframe(path, layer=str(name)) for name, _ in pyogrio.list_layers(path)}


def _writer(k: int, data: str, targets: list[str], warmup: str, barrier, results) -> None:
    """One concurrent run per trial: the command line, released together with the others."""
    from toolbox.cli import main

    base = ["group-spread", data, "--layer", "homes", "--group-by", "district", "--quiet"]
    main([*base, "--output", warmup])  # imports and compiled kernels ready before the race
    codes = []
    for target in targets:
        barrier.wait(timeout=300)
        codes.append(main([*base, "--output", target, "--output-layer", f"t_{k}"]))
    results.put((k, codes))


@pytest.fixture(scope="module")
def homes_file(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("writers") / "homes.gpkg"
    pyogrio.write_dataframe(_homes(), path, layer="homes", driver="GPKG")
    return path


def test_concurrent_writers_keep_every_table(tmp_path, homes_file):
    folders = []
    for trial in range(WRITER_TRIALS):
        folder = tmp_path / f"trial-{trial:03d}"
        folder.mkdir()
        shutil.copyfile(homes_file, folder / "results.gpkg")  # an existing layer to keep too
        folders.append(folder)
    targets = [str(f / "results.gpkg") for f in folders]
    context = multiprocessing.get_context("spawn")  # fresh interpreters, as separate runs are
    barrier, results = context.Barrier(WRITERS), context.Queue()
    procs = [
        context.Process(
            target=_writer,
            args=(k, str(homes_file), targets, str(tmp_path / f"warm-{k}.csv"), barrier, results),
        )
        for k in range(WRITERS)
    ]
    for proc in procs:
        proc.start()
    codes = dict(results.get(timeout=600) for _ in procs)
    for proc in procs:
        proc.join(timeout=60)
    assert codes == {k: [0] * WRITER_TRIALS for k in range(WRITERS)}
    expected = group_spread(homes_file, layer="homes", group_by="district")
    source = pyogrio.read_dataframe(homes_file, layer="homes")
    lost = []
    for folder in folders:
        assert sorted(os.listdir(folder)) == ["results.gpkg"]  # no scratch folder, no lock file
        layers = _layers(folder / "results.gpkg")
        lost += [(folder.name, f"t_{k}") for k in range(WRITERS) if f"t_{k}" not in layers]
        for k in range(WRITERS):
            if f"t_{k}" in layers:
                got = layers[f"t_{k}"]
                assert got["district"].tolist() == expected["district"].tolist()
                np.testing.assert_allclose(got["total_dist"], expected["total_dist"], rtol=1e-12)
        pd.testing.assert_frame_equal(layers["homes"], source)
    assert lost == [], f"tables lost by concurrent writers: {lost}"


def _table(name: str) -> pd.DataFrame:
    return pd.DataFrame({"name": [name], "value": [1.0]})


def _foreign_write(target: Path, layer: str) -> None:
    """Another program adding a layer straight into the GeoPackage, without our lock."""
    _REAL_WRITE(_table(layer), target, layer=layer, driver="GPKG")


def test_change_by_another_program_during_the_write_is_redone(tmp_path, monkeypatch):
    target = tmp_path / "results.gpkg"
    _foreign_write(target, "theirs_0")
    calls = []

    def meddling(frame, path, **kwargs):
        _REAL_WRITE(frame, path, **kwargs)
        calls.append(path)
        if len(calls) == 1:  # while our copy is being written, the original changes
            _foreign_write(target, "theirs_1")

    monkeypatch.setattr(write_module.pyogrio, "write_dataframe", meddling)
    write_output(_table("ours"), str(target), layer_name="ours")
    assert len(calls) == 2  # the first copy missed their change and was thrown away
    assert sorted(_layers(target)) == ["ours", "theirs_0", "theirs_1"]
    assert sorted(os.listdir(tmp_path)) == ["results.gpkg"]


def test_file_that_keeps_changing_fails_loudly_and_keeps_their_changes(tmp_path, monkeypatch):
    target = tmp_path / "results.gpkg"
    _foreign_write(target, "theirs_0")
    count = iter(range(1, 100))

    def meddling(frame, path, **kwargs):
        _REAL_WRITE(frame, path, **kwargs)
        if Path(path) != target:
            _foreign_write(target, f"theirs_{next(count)}")

    monkeypatch.setattr(write_module.pyogrio, "write_dataframe", meddling)
    with pytest.raises(OutputError, match=r"changed by another program.*nothing was written"):
        write_output(_table("ours"), str(target), layer_name="ours")
    layers = _layers(target)
    assert "ours" not in layers and {"theirs_0", "theirs_1", "theirs_2", "theirs_3"} <= set(layers)
    assert sorted(os.listdir(tmp_path)) == ["results.gpkg"]


def test_a_writer_that_holds_the_file_too_long_is_reported(tmp_path, monkeypatch):
    target = tmp_path / "results.gpkg"
    _foreign_write(target, "theirs")
    before = target.read_bytes()
    monkeypatch.setattr(write_module, "LOCK_WAIT_SECONDS", 0.3)
    with writer_lock(target):  # another pairspread run in the middle of its write
        with pytest.raises(OutputError, match=r"Another run has been writing into .* nothing was written"):
            write_output(_table("ours"), str(target), layer_name="ours")
        assert lock_path(target).exists()
    assert target.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["results.gpkg"]  # the holder removed its lock file


def test_lock_file_left_by_a_killed_run_is_reused_and_removed(tmp_path):
    target = tmp_path / "results.gpkg"
    lock_path(target).touch()  # as a SIGKILL in the middle of a write leaves it
    write_output(_table("ours"), str(target), layer_name="ours")
    assert sorted(os.listdir(tmp_path)) == ["results.gpkg"]
    assert list(_layers(target)) == ["ours"]
