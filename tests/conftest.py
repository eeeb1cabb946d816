"""Shared fixtures: tiny point layers written per format in ``tmp_path``, and CLI runners.

Modelled on pyogrio's own ``tests/conftest.py`` (``prepare_testfile``): one small layer is
built in memory once, then converted to each format a test asks for, so every test gets fresh
files it may damage. The reference sums the tests compare against come from
``scipy.spatial.distance.pdist`` (see :func:`reference_table`), never from pairspread itself.

The layer is an invented scenario (a few hundred "homes" on the fictional Isle of Quenwick) in
EPSG:32705 (WGS 84 / UTM zone 5S) near easting 500000, northing 6120000.
"""

from __future__ import annotations

import io
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import traceback
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from scipy.spatial.distance import pdist

CRS = "EPSG:32705"
X0, Y0 = 500_000.0, 6_120_000.0

#: Output columns after the group fields, in the order issue 2 fixes.
RESULT_COLUMNS = [
    "n_points",
    "weight_sum",
    "pair_weight",
    "total_dist",
    "total_lo",
    "total_hi",
    "mean_dist",
    "rel_bound",
    "method",
    "directions",
    "units",
    "note",  # issue 10: why a group could not be computed, else empty
]

#: Input formats every end-to-end test runs on: suffix -> OGR driver.
FORMATS = {".gpkg": "GPKG", ".shp": "ESRI Shapefile", ".geojson": "GeoJSON"}


# --------------------------------------------------------------------------------------------
# the tiny layers


def make_homes(seed: int = 20260605) -> gpd.GeoDataFrame:
    """Invented point layer with groups of very different sizes and shapes.

    ``zone`` (text, group field): "harbour" is a dense cluster large enough that ``auto`` uses
    the projection estimate, "upland" is spread over a few km, "ridge" lies on one line, "lone"
    has a single point and six homes have no zone (NULL). ``tenure`` is a second group field,
    ``pop`` a non-negative integer weight (some zeros), ``label`` a text field.
    """
    rng = np.random.default_rng(seed)
    parts = []
    n = 260
    parts.append(("harbour", X0 + 400 + rng.normal(0, 150, n), Y0 + 300 + rng.normal(0, 90, n)))
    n = 40
    parts.append(("upland", X0 - 2500 + rng.uniform(0, 3000, n), Y0 + 1500 + rng.uniform(0, 2000, n)))
    t = np.sort(rng.uniform(0, 1, 12))
    parts.append(("ridge", X0 + 3000 + 1800 * t, Y0 - 800 + 700 * t))
    parts.append(("lone", np.array([X0 - 4000.0]), np.array([Y0 - 3000.0])))
    parts.append((None, X0 + rng.uniform(-5000, 5000, 6), Y0 + rng.uniform(-5000, 5000, 6)))
    zone = [z for z, xs, _ in parts for _ in range(xs.size)]
    x = np.concatenate([xs for _, xs, _ in parts])
    y = np.concatenate([ys for _, _, ys in parts])
    order = rng.permutation(x.size)  # rows not sorted by group, as in real layers
    count = x.size
    return gpd.GeoDataFrame(
        {
            "zone": pd.array([zone[i] for i in order], dtype=object),
            "tenure": rng.choice(["owned", "rented"], count),
            "pop": rng.integers(0, 9, count).astype(np.int64),
            "label": [f"home-{i:04d}" for i in range(count)],
        },
        geometry=shapely.points(x[order], y[order]),
        crs=CRS,
    )


def make_sites() -> gpd.GeoDataFrame:
    """A second point layer of the GeoPackage (five invented service sites)."""
    return gpd.GeoDataFrame(
        {
            "site_name": ["Kestrel Hall", "Mossford", "Brinewell", "Old Quay", "Thornap"],
            "capacity": [5, 8, 2, 4, 9],
        },
        geometry=shapely.points(
            X0 + np.array([0.0, 900, -1200, 300, 2500]), Y0 + np.array([0.0, 50, 800, -700, 1000])
        ),
        crs=CRS,
    )


def make_zones() -> gpd.GeoDataFrame:
    """A polygon layer of the GeoPackage: not usable as points."""
    boxes = [
        shapely.box(X0 + a, Y0 + b, X0 + a + 1000, Y0 + b + 1000)
        for a, b in [(0, 0), (-3000, 1000), (2500, -1000)]
    ]
    return gpd.GeoDataFrame({"zone": ["harbour", "upland", "ridge"]}, geometry=boxes, crs=CRS)


def prepare_layer(
    frame: gpd.GeoDataFrame, dst: Path, suffix: str, *, name: str = "homes", layer: str | None = None
) -> Path:
    """Write ``frame`` as ``dst/name+suffix`` (pyogrio's ``prepare_testfile`` idea)."""
    path = Path(dst) / f"{name}{suffix}"
    pyogrio.write_dataframe(frame, path, driver=FORMATS[suffix], layer=layer)
    return path


def write_multilayer_gpkg(path: Path, homes: gpd.GeoDataFrame) -> Path:
    """GeoPackage with layers ``homes`` and ``sites`` (points) and ``zones`` (polygons)."""
    pyogrio.write_dataframe(homes, path, layer="homes", driver="GPKG")
    pyogrio.write_dataframe(make_sites(), path, layer="sites", driver="GPKG")
    pyogrio.write_dataframe(make_zones(), path, layer="zones", driver="GPKG")
    return path


@dataclass(frozen=True)
class LayerFile:
    """A fixture layer on disk and how to name it on the command line / in Python."""

    path: Path
    layer: str | None
    suffix: str

    @property
    def args(self) -> list[str]:
        """``DATASET [--layer NAME]`` for the command line."""
        return [str(self.path), *(["--layer", self.layer] if self.layer else [])]

    @property
    def kwargs(self) -> dict:
        return {"layer": self.layer} if self.layer else {}


@pytest.fixture(scope="session")
def homes() -> gpd.GeoDataFrame:
    """The in-memory homes layer (do not modify; copy first)."""
    return make_homes()


@pytest.fixture(scope="session")
def _pristine(tmp_path_factory, homes) -> Path:
    """Every fixture file written once per session; tests get fresh copies of them."""
    folder = tmp_path_factory.mktemp("pristine")
    write_multilayer_gpkg(folder / "island.gpkg", homes)
    for suffix in (".shp", ".geojson"):
        prepare_layer(homes, folder, suffix)
    return folder


def _copy(pristine: Path, stem: str, dst: Path) -> None:
    for source in pristine.glob(stem + ".*"):  # a Shapefile is several files
        shutil.copyfile(source, dst / source.name)


@pytest.fixture
def homes_gpkg(tmp_path, _pristine) -> LayerFile:
    """Multi-layer GeoPackage (``homes``, ``sites``, ``zones``); ``homes`` is the one to read."""
    _copy(_pristine, "island", tmp_path)
    return LayerFile(tmp_path / "island.gpkg", "homes", ".gpkg")


@pytest.fixture(params=list(FORMATS), ids=lambda s: s.lstrip("."))
def homes_file(request, tmp_path, _pristine) -> LayerFile:
    """The homes layer in each input format (GeoPackage with several layers, Shapefile, GeoJSON)."""
    suffix = request.param
    stem = "island" if suffix == ".gpkg" else "homes"
    _copy(_pristine, stem, tmp_path)
    return LayerFile(tmp_path / f"{stem}{suffix}", "homes" if suffix == ".gpkg" else None, suffix)


@pytest.fixture
def write_layer(tmp_path):
    """Write a GeoDataFrame to ``tmp_path`` in a given format; returns its path."""

    def write(
        frame: gpd.GeoDataFrame, suffix: str = ".geojson", name: str = "layer", layer: str | None = None
    ) -> Path:
        return prepare_layer(frame, tmp_path, suffix, name=name, layer=layer)

    return write


# --------------------------------------------------------------------------------------------
# the independent reference


def reference_table(
    frame: gpd.GeoDataFrame, group_by: Sequence[str] = (), weight: str | None = None
) -> dict[tuple, dict]:
    """Per-group sums by brute force with ``scipy.spatial.distance.pdist``.

    Keys are tuples of the group values (None for NULL); values hold ``n_points``,
    ``weight_sum``, ``pair_weight`` (Σ_{i<j} w_i w_j), ``total_dist`` (Σ_{i<j} w_i w_j d_ij) and
    ``mean_dist``. MultiPoint features count each of their points, carrying the feature's weight.
    Brute force over all pairs is the definition of the quantity (issue 2), computed here with
    scipy rather than pairspread's kernels.
    """
    coords, feature = shapely.get_coordinates(np.asarray(frame.geometry.values), return_index=True)
    weights = np.ones(len(frame)) if weight is None else frame[weight].to_numpy(dtype=float)
    w_points = weights[feature]
    if group_by:
        keys = pd.DataFrame({f: frame[f].astype(object) for f in group_by})
        point_keys = [tuple(None if pd.isna(v) else v for v in row) for row in keys.to_numpy()[feature]]
    else:
        point_keys = [()] * feature.size
    out = {}
    for key in dict.fromkeys(point_keys):
        members = np.array([k == key for k in point_keys])
        xy, w = coords[members], w_points[members]
        n = int(members.sum())
        iu = np.triu_indices(n, k=1)  # pdist's condensed order is the upper triangle, row by row
        ww = np.outer(w, w)[iu]
        pair_weight = float(ww.sum())
        total = float(np.dot(ww, pdist(xy))) if n >= 2 and pair_weight > 0 else np.nan
        out[key] = {
            "n_points": n,
            "weight_sum": float(w.sum()),
            "pair_weight": pair_weight,
            "total_dist": total,
            "mean_dist": total / pair_weight if pair_weight > 0 else np.nan,
        }
    return out


def rows_by_key(table: pd.DataFrame, group_by: Sequence[str] = ()) -> dict[tuple, pd.Series]:
    """Index the rows of a result table by their group values (NULL or empty -> None)."""

    def clean(v):
        return None if (v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NA or v == "") else v

    out = {}
    for _, row in table.iterrows():
        key = tuple(clean(row[f]) for f in group_by)
        assert key not in out, f"group {key} reported twice"
        out[key] = row
    return out


@pytest.fixture(scope="session")
def reference():
    """:func:`reference_table` as a fixture, for test modules."""
    return reference_table


@pytest.fixture(scope="session")
def by_key():
    """:func:`rows_by_key` as a fixture, for test modules."""
    return rows_by_key


@pytest.fixture(scope="session")
def result_columns():
    return list(RESULT_COLUMNS)


# --------------------------------------------------------------------------------------------
# running the command line


def console_script() -> Path:
    """The installed ``pairspread`` console script of the interpreter running the tests."""
    path = Path(sys.executable).parent / "pairspread"
    assert path.exists(), f"console script not installed beside {sys.executable}"
    return path


ENTRIES = {
    "script": lambda: [str(console_script())],
    "module": lambda: [sys.executable, "-m", "toolbox"],
    "python": lambda: [sys.executable],  # plain interpreter, e.g. for ``-c`` snippets
}


def _in_process(args: list[str], cwd=None) -> subprocess.CompletedProcess:
    """``toolbox.cli.main(args)`` in this process, with what it writes captured at the file
    descriptors (so GDAL's own messages show too) and the exit status a process would have."""
    from toolbox.cli import main

    sys.stdout.flush()
    sys.stderr.flush()
    files = [tempfile.TemporaryFile() for _ in range(2)]
    saved = [os.dup(1), os.dup(2)]
    streams = sys.stdout, sys.stderr
    here = os.getcwd()
    try:
        for fd, f in zip((1, 2), files, strict=True):
            os.dup2(f.fileno(), fd)
        sys.stdout, sys.stderr = (
            io.TextIOWrapper(open(fd, "wb", closefd=False), encoding="utf-8", write_through=True)
            for fd in (1, 2)
        )
        if cwd is not None:
            os.chdir(cwd)
        try:
            code = main(args)
        except SystemExit as exc:  # what the interpreter makes of sys.exit(...)
            code = exc.code if isinstance(exc.code, int) else (exc.code is not None)
            if isinstance(exc.code, str):
                print(exc.code, file=sys.stderr)
        except Exception:  # an uncaught exception: traceback and status 1, as the interpreter does
            traceback.print_exc()
            code = 1
        sys.stdout.flush()
        sys.stderr.flush()
    finally:
        os.chdir(here)
        sys.stdout, sys.stderr = streams
        for fd, copy in zip((1, 2), saved, strict=True):
            os.dup2(copy, fd)
            os.close(copy)
    out, err = [],  []
    for f, text in zip(files, (out, err), strict=True):
        f.seek(0)
        text.append(f.read().decode("utf-8"))
        f.close()
    return subprocess.CompletedProcess(["pairspread", *args], int(code), out[0], err[0])


@pytest.fixture(scope="session")
def cli():
    """Run the command line: ``cli(*args, entry="script"|"module"|"main", ...)``.

    ``script`` and ``module`` start the console script or ``python -m toolbox`` in a
    subprocess; ``main`` calls :func:`toolbox.cli.main` in this process, which is the same code
    without the interpreter start-up (about a second and a half of imports here), for tests
    where a fresh process proves nothing more. Returns a CompletedProcess (text) either way.
    ``env`` entries are added to the environment (subprocesses only).
    """

    def run(*args, entry: str = "script", cwd=None, env: dict | None = None, stdin=None, timeout=120):
        if entry == "main":
            assert env is None and stdin is None, "environment and stdin need a subprocess"
            return _in_process([str(a) for a in args], cwd)
        full_env = {**os.environ, **(env or {})}
        full_env.pop("PYTHONWARNINGS", None)
        return subprocess.run(
            [*ENTRIES[entry](), *map(str, args)],
            capture_output=True,
            text=True,
            cwd=cwd,
            env=full_env,
            stdin=subprocess.DEVNULL if stdin is None else stdin,
            timeout=timeout,
        )

    return run


# --------------------------------------------------------------------------------------------
# comparing result tables


def _plain(values) -> list:
    """Text column values with every kind of null (None, NaN, pd.NA, empty CSV cell) as None."""
    return [
        None if (v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v)) or v == "") else v
        for v in values
    ]


def assert_same_table(left: pd.DataFrame, right: pd.DataFrame, *, rtol: float = 0.0) -> None:
    """Same columns in the same order, same rows; numbers equal to ``rtol`` (NaN == NaN).

    Dtypes may differ (a CSV read back has ``object`` text and ``float`` nulls), values may not.
    """
    assert list(left.columns) == list(right.columns)
    assert len(left) == len(right)
    for column in left.columns:
        a, b = left[column], right[column]
        if pd.api.types.is_numeric_dtype(a) and pd.api.types.is_numeric_dtype(b):
            np.testing.assert_allclose(
                a.to_numpy(float), b.to_numpy(float), rtol=rtol, atol=0, err_msg=column
            )
        else:
            assert _plain(a) == _plain(b), column


@pytest.fixture(scope="session")
def same_table():
    """:func:`assert_same_table` as a fixture, for test modules."""
    return assert_same_table


@pytest.fixture
def ctrl_c_handled():
    """Python's own Ctrl-C handler in this process for the test, whatever the test run inherited.

    A run started in the background of a non-interactive shell (``make test &``, ``nohup``)
    inherits SIGINT ignored, and Python then installs no handler of its own.
    """
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    yield
    signal.signal(signal.SIGINT, previous)


@pytest.fixture
def run_main(capsys):
    """The command line in-process: returns (exit code, stdout, stderr)."""
    from toolbox.cli import main

    def run(*args):
        code = main([str(a) for a in args])
        captured = capsys.readouterr()
        return code, captured.out, captured.err

    return run
