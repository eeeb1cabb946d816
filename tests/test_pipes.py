"""Standard input and output: every input format in, every output format out, and real pipes.

References: pandas.read_csv, pyogrio.read_dataframe and pandas.read_parquet read what goes to
standard output; the same command with a file input and output is the expected table.
"""

from __future__ import annotations

import io
import subprocess
import sys

import geopandas as gpd
import pandas as pd
import pyarrow as pa
import pyogrio
import pytest

from toolbox.cli import main

ARGS = ("--group-by", "zone", "--weight", "pop", "--tolerance", "0")


class _Stdin(io.TextIOWrapper):
    def isatty(self):
        return False


@pytest.fixture
def run_piped(capsysbinary, monkeypatch):
    """Run the command line in-process with ``raw`` on standard input; returns (code, out bytes, err)."""

    def run(*args, raw: bytes | None = None):
        if raw is not None:
            monkeypatch.setattr(sys, "stdin", _Stdin(io.BytesIO(raw)))
        code = main([str(a) for a in args])
        captured = capsysbinary.readouterr()
        return code, captured.out, captured.err.decode()

    return run


def _as_bytes(frame: gpd.GeoDataFrame, kind: str) -> bytes:
    buffer = io.BytesIO()
    if kind == "geojson":
        pyogrio.write_dataframe(frame, buffer, driver="GeoJSON")
    elif kind == "geoparquet":
        frame.to_parquet(buffer)
    else:  # an Arrow IPC stream, geometry as GeoArrow WKB with its CRS (geopandas' to_arrow)
        table = pa.table(frame.to_arrow())
        with pa.ipc.new_stream(buffer, table.schema) as writer:
            writer.write_table(table)
    return buffer.getvalue()


@pytest.mark.parametrize("kind", ["geojson", "geoparquet", "arrow"])
@pytest.mark.parametrize("named", [False, True], ids=["detected", "named"])
def test_each_input_format_on_stdin(run_piped, homes, homes_gpkg, same_table, kind, named):
    expected_code, expected, _ = run_piped("group-spread", *homes_gpkg.args, *ARGS, "--output", "-")
    assert expected_code == 0
    extra = ("--input-format", kind) if named else ()
    code, out, err = run_piped(
        "group-spread", "-", *ARGS, *extra, "--output", "-", raw=_as_bytes(homes, kind)
    )
    assert code == 0, err
    same_table(pd.read_csv(io.BytesIO(out)), pd.read_csv(io.BytesIO(expected)), rtol=1e-12)


@pytest.mark.parametrize("kind", ["csv", "geojson", "geoparquet"])
def test_each_table_format_on_stdout(run_piped, tmp_path, homes_gpkg, same_table, kind):
    suffix = {"csv": ".csv", "geojson": ".gpkg", "geoparquet": ".parquet"}[kind]
    code, _, err = run_piped("group-spread", *homes_gpkg.args, *ARGS, "--output", tmp_path / f"t{suffix}")
    assert code == 0, err
    if suffix == ".gpkg":
        expected = pyogrio.read_dataframe(tmp_path / "t.gpkg", layer="group_spread")
    elif suffix == ".csv":
        expected = pd.read_csv(tmp_path / "t.csv")
    else:
        expected = pd.read_parquet(tmp_path / "t.parquet")
    code, out, err = run_piped(
        "group-spread", *homes_gpkg.args, *ARGS, "--output", "-", "--output-format", kind
    )
    assert code == 0, err
    read = {"csv": pd.read_csv, "geojson": pyogrio.read_dataframe, "geoparquet": pd.read_parquet}[kind]
    got = read(io.BytesIO(out))
    same_table(pd.DataFrame(got)[list(expected.columns)], pd.DataFrame(expected), rtol=1e-12)


@pytest.mark.parametrize("kind", ["geojson", "geoparquet", "csv"])
def test_point_remoteness_layer_on_stdout_round_trips(run_piped, tmp_path, homes_gpkg, kind):
    suffix = {"geojson": ".geojson", "geoparquet": ".parquet", "csv": ".geojson"}[kind]
    file_out = tmp_path / f"r{suffix}"
    args = ("point-remoteness", *homes_gpkg.args, "--group-by", "zone", "--quiet")
    assert run_piped(*args, "--output", file_out)[0] == 0
    options = () if kind == "geojson" else ("--output-format", kind)  # GeoJSON is the default
    code, out, err = run_piped(*args, "--output", "-", *options)
    assert code == 0, err
    expected = gpd.read_parquet(file_out) if kind == "geoparquet" else pyogrio.read_dataframe(file_out)
    if kind == "csv":  # geometry as WKT text
        got = pd.read_csv(io.BytesIO(out))
        got = gpd.GeoDataFrame(got, geometry=gpd.GeoSeries.from_wkt(got.pop("geometry")), crs=expected.crs)
    elif kind == "geoparquet":
        got = gpd.read_parquet(io.BytesIO(out))
    else:
        got = pyogrio.read_dataframe(io.BytesIO(out))
    assert got.crs == expected.crs
    assert got.geometry.geom_equals_exact(expected.geometry, tolerance=1e-6).all()
    pd.testing.assert_series_equal(got["remote_idx"], expected["remote_idx"], rtol=1e-9, check_dtype=False)


def test_a_real_shell_pipe(tmp_path, homes_gpkg, homes):
    """point-remoteness | keep-rows | group-spread through operating-system pipes."""
    exe = [sys.executable, "-m", "toolbox"]
    first = subprocess.Popen(
        [
            *exe,
            "point-remoteness",
            *homes_gpkg.args,
            "--group-by",
            "zone",
            "--output",
            "-",
            "--output-format",
            "geoparquet",
            "--quiet",
        ],
        stdout=subprocess.PIPE,
    )
    second = subprocess.Popen(
        [
            *exe,
            "keep-rows",
            "-",
            "--where",
            "remote_idx <= 1.2 AND zone IS NOT NULL",
            "--output",
            "-",
            "--output-format",
            "geoparquet",
        ],
        stdin=first.stdout,
        stdout=subprocess.PIPE,
    )
    first.stdout.close()
    third = subprocess.run(
        [*exe, "group-spread", "-", "--group-by", "zone", "--tolerance", "0", "--output", "-"],
        stdin=second.stdout,
        capture_output=True,
        timeout=300,
    )
    second.stdout.close()
    assert first.wait(timeout=300) == 0 and second.wait(timeout=300) == 0
    assert third.returncode == 0, third.stderr.decode()
    piped = pd.read_csv(io.BytesIO(third.stdout))
    # the same three steps in Python, with geopandas doing the filtering
    import toolbox

    remote = toolbox.point_remoteness(homes_gpkg.path, layer="homes", group_by="zone")
    kept = remote[(remote["remote_idx"] <= 1.2) & remote["zone"].notna()]
    direct = toolbox.group_spread(kept, group_by="zone", tolerance=0)
    assert piped["n_points"].tolist() == direct["n_points"].tolist()
    pd.testing.assert_series_equal(piped["total_dist"], direct["total_dist"], rtol=1e-12)


def test_stdin_mistakes_are_named(run_piped, homes_gpkg, tmp_path, monkeypatch):
    code, _, err = run_piped("group-spread", "-", raw=b"")
    assert code == 2 and "Nothing arrived on standard input" in err
    code, _, err = run_piped("group-spread", "-", raw=b"id;x;y\n1;2;3\n")
    assert code == 2 and "Cannot tell the format" in err and "--input-format" in err
    code, _, err = run_piped("group-spread", "-", raw=homes_gpkg.path.read_bytes())
    assert code == 2 and "GeoPackage" in err and "give its path" in err
    code, _, err = run_piped("group-spread", "-", "--input-format", "geoparquet", raw=b'{"type": "x"}')
    assert code == 2 and "Cannot read the layer on standard input as geoparquet" in err
    code, _, err = run_piped("cross-spread", "-", "--group-by", "zone", "--to", "-", raw=b"{}")
    assert code == 2 and "only one input can come from standard input" in err
    code, _, err = run_piped("group-spread", *homes_gpkg.args, "--input-format", "geojson")
    assert code == 2 and "--input-format applies to an input given as '-'" in err
    code, _, err = run_piped(
        "group-spread", *homes_gpkg.args, "--output", tmp_path / "t.csv", "--output-format", "csv"
    )
    assert code == 2 and "--output-format chooses the format of standard output (--output -) only" in err
    assert not (tmp_path / "t.csv").exists()

    class Terminal(_Stdin):
        def isatty(self):
            return True

    monkeypatch.setattr(sys, "stdin", Terminal(io.BytesIO(b"")))
    code, _, err = run_piped("group-spread", "-")
    assert code == 2 and "nothing is piped in" in err
