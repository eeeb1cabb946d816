"""Every user mistake: non-zero exit, one line on stderr naming the problem, nothing written.

Each case checks that the test's folder (inputs and outputs), hidden files included, is byte
for byte what it was before: inputs untouched, no partial output, no temporary files left
behind (issue 2, "Errors"). Most cases run the command line in-process through
:func:`toolbox.cli.main` with file-descriptor capture (so GDAL's own messages would show);
a representative set (``subprocess=True``) runs the console script or ``python -m toolbox``,
where start-up, warnings and exit codes are exactly what a user sees.
"""

from __future__ import annotations

import hashlib
import io
import os
import re
import shutil
import signal
import sys
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


def snapshot(folder: Path) -> dict[str, str]:
    """sha256 of every file below ``folder`` (hidden files too), by relative path."""
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def assert_one_error_line(code, stdout, stderr, *patterns: str) -> str:
    assert code != 0, stdout
    assert "Traceback" not in stderr + stdout
    lines = stderr.splitlines()
    assert len(lines) == 1, stderr
    line = lines[0]
    assert line.startswith("pairspread: error: "), line
    assert "unexpected" not in line, line  # the catch-all for bugs, not a handled mistake
    for pattern in patterns:
        assert re.search(pattern, line, re.IGNORECASE), (pattern, line)
    assert stdout == ""
    return line


@pytest.fixture
def fails(cli, tmp_path, capfd):
    """Run the CLI; check the one-line error and that no file below ``tmp_path`` changed.

    ``subprocess`` picks the console script ("script"), ``python -m toolbox`` ("module") or
    in-process :func:`toolbox.cli.main` (False).
    """

    def run(*args, match=(), subprocess=False):
        before = snapshot(tmp_path)
        if subprocess:
            proc = cli(*args, cwd=tmp_path, entry=subprocess)
            result = (proc.returncode, proc.stdout, proc.stderr)
        else:
            capfd.readouterr()
            code = main([str(a) for a in args])
            out, err = capfd.readouterr()
            result = (code, out, err)
        assert snapshot(tmp_path) == before, "a failed run changed, added or removed files"
        return assert_one_error_line(*result, *match)

    return run


# --------------------------------------------------------------------------------------------
# inputs


def test_missing_file(fails, tmp_path):
    fails(
        "group-spread",
        tmp_path / "nowhere.gpkg",
        match=[r"nowhere\.gpkg", "does not exist"],
        subprocess="script",
    )


def test_unknown_layer_lists_layers(fails, homes_gpkg):
    fails(
        "group-spread",
        homes_gpkg.path,
        "--layer",
        "rivers",
        match=["'rivers'", "'homes'", "'sites'", "'zones'"],
    )


def test_close_layer_name_is_suggested(fails, homes_gpkg):
    fails(
        "group-spread", homes_gpkg.path, "--layer", "home", match=["no layer 'home'", "did you mean 'homes'"]
    )


def test_several_layers_need_layer(fails, homes_gpkg):
    fails(
        "group-spread",
        homes_gpkg.path,
        match=["3 layers", "homes", "sites", "zones", "--layer"],
        subprocess="module",
    )


@pytest.mark.parametrize(
    ("option", "value", "close"), [("--group-by", "zone,tenur", "tenure"), ("--weight", "popp", "pop")]
)
def test_unknown_field_suggests_close_match(fails, homes_file, option, value, close):
    wrong = value.split(",")[-1]
    fails(
        "group-spread",
        *homes_file.args,
        option,
        value,
        match=[f"no field '{wrong}'", f"did you mean '{close}'"],
    )


def test_non_numeric_weight(fails, homes_gpkg):
    fails("group-spread", *homes_gpkg.args, "--weight", "label", match=["'label'", "not numbers"])


@pytest.mark.parametrize(
    ("bad", "what"), [(-2.0, "negative"), (np.nan, "null or NaN")], ids=["negative", "null"]
)
@pytest.mark.parametrize("suffix", [".gpkg", ".geojson"])
def test_bad_weight_values(fails, write_layer, homes, bad, what, suffix):
    frame = homes.copy()
    frame["pop"] = frame["pop"].astype(float)
    frame.loc[[3, 17], "pop"] = bad
    path = write_layer(frame, suffix)
    fails(
        "group-spread",
        path,
        "--weight",
        "pop",
        # the layer's FIDs: a GeoPackage numbers them from 1, OGR numbers GeoJSON features from 0
        match=[f"2 feature\\(s\\).*{what} weight", "'pop'", "FIDs 4, 18" if suffix == ".gpkg" else "FIDs 3, 17"],
    )


def test_nan_weight_in_memory(homes):
    # a float NaN (not a NULL) can only reach us in memory: files store it as NULL
    frame = homes.copy()
    frame["pop"] = frame["pop"].astype(float)
    frame.loc[5, "pop"] = np.nan
    frame.loc[6, "pop"] = np.inf
    with pytest.raises(toolbox.InputError, match=r"null or NaN weight in 'pop' \(index 5\)"):
        toolbox.group_spread(frame, weight="pop")


@pytest.mark.parametrize("value", ["0.7", "-1", "abc", "nan"])
def test_tolerance_out_of_range(fails, homes_gpkg, value):
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--tolerance",
        value,
        match=["--tolerance", re.escape("[0, 0.5]"), re.escape(repr(value))],
    )


def test_bad_method(fails, homes_gpkg):
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--method",
        "fastest",
        match=["--method", "auto, exact, projection", "'fastest'"],
    )


def test_projection_needs_a_tolerance(fails, homes_gpkg):
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--method",
        "projection",
        "--tolerance",
        "0",
        match=["projection", "tolerance", "exact"],
    )


def test_nan_and_infinite_coordinates(fails, write_layer, homes):
    frame = homes.copy()
    coords = shapely.get_coordinates(frame.geometry.values)
    coords[[4, 9], 0] = [np.nan, np.inf]
    coords[11, 1] = -np.inf
    frame.geometry = shapely.points(coords)
    path = write_layer(frame, ".gpkg")
    # precondition: GeoPackage (WKB blobs) keeps non-finite coordinates, unlike GeoJSON/Shapefile
    stored = shapely.get_coordinates(pyogrio.read_dataframe(path).geometry.values)
    assert (~np.isfinite(stored).all(axis=1)).sum() == 3
    fails(
        "group-spread",
        path,
        match=["3 feature\\(s\\)", "NaN or infinite", "FIDs 5, 10, 12"],
        subprocess="script",
    )


def test_nan_coordinates_in_memory(homes):
    frame = homes.copy()
    coords = shapely.get_coordinates(frame.geometry.values)
    coords[7, 1] = np.nan
    frame.geometry = shapely.points(coords)
    with pytest.raises(toolbox.GeometryError, match=r"1 feature\(s\).*NaN or infinite.*index 7"):
        toolbox.group_spread(frame)


def test_polygon_layer(fails, homes_gpkg):
    fails(
        "group-spread",
        homes_gpkg.path,
        "--layer",
        "zones",
        match=["3 feature\\(s\\) that are not points", "3 Polygon"],
    )


def test_mixed_geometry_types_are_counted(fails, write_layer, homes):
    frame = homes.iloc[:10].copy()
    geoms = list(frame.geometry)
    geoms[2] = shapely.LineString([(500_000, 6_120_000), (500_100, 6_120_050)])
    geoms[5] = shapely.LineString([(500_010, 6_120_000), (500_200, 6_120_050)])
    geoms[7] = shapely.box(500_000, 6_120_000, 500_010, 6_120_010)
    frame = frame.set_geometry(geoms)
    path = write_layer(frame, ".geojson")
    fails("group-spread", path, match=["3 feature\\(s\\) that are not points", "2 LineString", "1 Polygon"])


def test_null_geometries(fails, write_layer, homes):
    frame = homes.iloc[:20].copy()
    geoms = list(frame.geometry)
    geoms[3] = geoms[8] = None
    path = write_layer(frame.set_geometry(geoms), ".geojson")
    fails("group-spread", path, match=["2 of 20 features", "no geometry"])


def test_empty_geometries(fails, write_layer, homes):
    frame = homes.iloc[:20].copy()
    geoms = list(frame.geometry)
    geoms[0] = shapely.Point()
    path = write_layer(frame.set_geometry(geoms), ".gpkg")
    assert shapely.is_empty(pyogrio.read_dataframe(path).geometry.values[0])  # precondition
    fails("group-spread", path, match=["1 of 20 features", "no geometry"])


def test_planar_distance_on_geographic_crs_is_refused(fails, write_layer, homes):
    # issue 2 refused every geographic layer; issue 4 (newer) computes geodesic distances by
    # default and refuses only planar ones, suggesting --crs to reproject
    path = write_layer(homes.to_crs("EPSG:4326"), ".geojson")
    fails("group-spread", path, "--distance", "planar", match=["geographic", "--crs", "--distance geodesic"])


def test_no_crs_works_with_a_warning(cli, write_layer, homes, tmp_path, reference):
    frame = homes.set_crs(None, allow_override=True)
    with pytest.warns(UserWarning, match="crs"):  # pyogrio's own note on writing without a CRS
        path = write_layer(frame, ".shp")
    assert not path.with_suffix(".prj").exists()
    proc = cli("group-spread", path, "--tolerance", "0", "--output", "-", cwd=tmp_path, entry="main")
    assert proc.returncode == 0, proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("pairspread: warning: ") and "no CRS" in lines[0]
    table = pd.read_csv(io.StringIO(proc.stdout))
    assert table["units"].tolist() == ["unknown"]
    # in the layer's own units: the same numbers as scipy's pdist on the raw coordinates
    assert table["total_dist"][0] == pytest.approx(reference(frame)[()]["total_dist"], rel=1e-9)


def test_debug_shows_the_traceback(cli, tmp_path):
    proc = cli("--debug", "group-spread", "missing.gpkg", cwd=tmp_path)
    assert proc.returncode != 0
    assert "Traceback" in proc.stderr and "InputError" in proc.stderr and "missing.gpkg" in proc.stderr
    # after the subcommand too; in-process the exception itself comes out of main()
    with pytest.raises(toolbox.InputError, match="does not exist"):
        main(["group-spread", str(tmp_path / "missing.gpkg"), "--debug"])


def test_unknown_script(fails):
    fails("describe", "group-sprad", match=["no script 'group-sprad'", "did you mean group-spread"])


@pytest.mark.parametrize(
    ("args", "needle"),
    [(["group-spread"], "DATASET"), (["group-spread", "x.gpkg", "--group_by", "zone"], "--group_by")],
    ids=["no-input", "unknown-option"],
)
def test_command_line_mistakes_are_one_line(capfd, args, needle):
    # argparse's own errors (missing DATASET, unknown option) keep to one line too, and main()
    # returns their exit status like any other mistake's
    assert main(args) == 2
    out, err = capfd.readouterr()
    lines = err.splitlines()
    assert out == "" and len(lines) == 1 and re.match(r"pairspread( group-spread)?: error: ", lines[0]), err
    assert needle in lines[0]


@pytest.mark.parametrize("short", ["--group", "--group-b", "--tol", "--over"])
def test_shortened_options_are_refused(capfd, homes_gpkg, short):
    # argparse would take --group for --group-by (prefix matching), so a typo could quietly
    # select another option; every option must be spelled out
    value = {"--tol": ["0"], "--over": []}.get(short, ["zone"])
    assert main(["group-spread", *homes_gpkg.args, short, *value, "--output", "-"]) == 2
    out, err = capfd.readouterr()
    assert out == "" and f"unrecognized arguments: {short}" in err.lower()


def test_required_option_shows_as_required_in_help(capsys):
    # point-remoteness cannot print its result (a layer), so --output is required on the command
    # line: the usage line must not show it in brackets as an optional one
    with pytest.raises(SystemExit) as stopped:
        main(["point-remoteness", "--help"])
    assert stopped.value.code == 0
    text = capsys.readouterr().out
    usage = " ".join(text.split("\n\n")[0].split())  # the usage paragraph, unwrapped
    assert "--output PATH" in usage and "[--output PATH]" not in usage, usage
    assert "[--output-layer NAME]" in usage  # a really optional one keeps its brackets
    assert main(["point-remoteness", "x.gpkg"]) == 2
    assert "required: --output" in capsys.readouterr().err


# --------------------------------------------------------------------------------------------
# outputs


def test_output_folder_missing(fails, homes_gpkg, tmp_path):
    for name in ("out.csv", "out.gpkg"):
        fails(
            "group-spread",
            *homes_gpkg.args,
            "--output",
            tmp_path / "no_such_folder" / name,
            match=["no_such_folder", "does not exist"],
        )


@pytest.mark.skipif(
    hasattr(os, "geteuid") and os.geteuid() == 0,
    reason="running as root: file permissions do not stop writes, so a read-only folder cannot fail",
)
def test_output_folder_read_only(fails, homes_gpkg, tmp_path):
    folder = tmp_path / "locked"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        fails(
            "group-spread", *homes_gpkg.args, "--output", folder / "out.csv", match=["locked", "not writable"]
        )
    finally:
        folder.chmod(0o755)


def test_unknown_output_suffix(fails, homes_gpkg, tmp_path):
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--output",
        tmp_path / "out.xlsx",
        match=[r"out\.xlsx", r"\.csv", r"\.gpkg"],
    )


@pytest.mark.parametrize("script", ["group-spread", "cross-spread"])
@pytest.mark.parametrize("suffix", [".shp", ".geojson"])
def test_table_script_asked_for_a_layer_format(fails, homes_gpkg, tmp_path, script, suffix):
    # the suffix is known, just not for a table: say so and list what a table can be written as
    fails(
        script,
        *homes_gpkg.args,
        "--group-by",
        "zone",
        "--output",
        tmp_path / f"out{suffix}",
        match=["writes a table", "without geometry", re.escape(suffix), r"\.gpkg, \.csv, \.parquet"],
    )


def test_output_is_a_folder(fails, homes_gpkg, tmp_path):
    (tmp_path / "out.csv").mkdir()
    fails("group-spread", *homes_gpkg.args, "--output", tmp_path / "out.csv", match=["is a folder"])


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_existing_file_without_overwrite(fails, homes_gpkg, tmp_path, suffix):
    existing = tmp_path / f"out{suffix}"
    existing.write_bytes(b"precious,contents\n1,2\n")
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--output",
        existing,
        match=["already exists", "--overwrite"],
        subprocess="module" if suffix == ".csv" else False,
    )
    # (the snapshot in `fails` proved the bytes are unchanged)


def test_existing_table_without_overwrite(fails, homes_gpkg, tmp_path):
    target = tmp_path / "project.gpkg"
    shutil.copyfile(homes_gpkg.path, target)
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--output",
        target,
        "--output-layer",
        "sites",
        match=["already has a layer 'sites'", "--overwrite"],
    )


@pytest.mark.parametrize("name", ["homes", "HOMES", "Homes"])
def test_output_never_replaces_the_input_layer(fails, homes_gpkg, name):
    # GeoPackage layer names ignore case, so every spelling of the input layer is the input
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--output",
        homes_gpkg.path,
        "--output-layer",
        name,
        "--overwrite",
        match=["would replace the input", "--output-layer"],
    )


def test_output_gpkg_that_is_not_a_geopackage(fails, homes_gpkg, tmp_path):
    (tmp_path / "notes.gpkg").write_text("not a database\n")
    fails(
        "group-spread",
        *homes_gpkg.args,
        "--output",
        tmp_path / "notes.gpkg",
        match=["cannot be opened as a GeoPackage", "untouched"],
    )


@pytest.mark.parametrize("when", ["adding the table", "after the table is in the copy"])
def test_failure_during_write_leaves_nothing(fails, homes_gpkg, tmp_path, monkeypatch, when):
    # GDAL fails inside the write itself: the project GeoPackage must stay byte for byte as it was
    # (checked by `fails`), no scratch copy may remain, and the message must give GDAL's reason
    # without blaming the disk, which is not the cause here
    from toolbox.layers import write as write_module

    target = tmp_path / "project.gpkg"
    shutil.copyfile(homes_gpkg.path, target)
    real = write_module.pyogrio.write_dataframe
    written_to = []

    def failing(frame, path, **kwargs):
        written_to.append(Path(path))
        if when == "after the table is in the copy":
            real(frame, path, **kwargs)
        raise pyogrio.errors.DataSourceError("sqlite3_step() failed: constraint violated")

    monkeypatch.setattr(write_module.pyogrio, "write_dataframe", failing)
    line = fails(
        "group-spread",
        *homes_gpkg.args,
        "--output",
        target,
        "--output-layer",
        "spread",
        match=["Writing", "project.gpkg", "constraint violated", "nothing was written"],
    )
    assert written_to and written_to[0] != target and written_to[0].parent.parent == tmp_path
    assert not re.search(r"disk|ulimit|file-size", line, re.IGNORECASE), line


@pytest.mark.parametrize("suffix", [".gpkg", ".csv", ".parquet"])
def test_failed_run_leaves_no_partial_output(fails, write_layer, homes, tmp_path, suffix):
    frame = homes.copy()
    frame.loc[10, "pop"] = -1
    path = write_layer(frame, ".gpkg")
    out_folder = tmp_path / "out"
    out_folder.mkdir()
    fails(
        "group-spread",
        path,
        "--weight",
        "pop",
        "--output",
        out_folder / f"result{suffix}",
        match=["negative"],
    )
    assert list(out_folder.iterdir()) == []


def test_successful_runs_leave_inputs_unchanged(capfd, homes_file, tmp_path):
    inputs = snapshot(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    runs = [
        ["--group-by", "zone", "--weight", "pop", "--output", out / "a.csv"],
        ["--group-by", "zone,tenure", "--where", "pop > 1", "--output", out / "b.gpkg"],
        ["--method", "projection", "--output", out / "c.parquet"],
    ]
    for extra in runs:
        code = main(["group-spread", *homes_file.args, *map(str, extra), "--quiet"])
        assert code == 0, capfd.readouterr().err
    after = snapshot(tmp_path)
    assert {k: v for k, v in after.items() if not k.startswith("out")} == inputs
    # no leftovers; the CSV's provenance record is its sidecar (issue 9)
    assert sorted(p.name for p in out.iterdir()) == ["a.csv", "a.csv.json", "b.gpkg", "c.parquet"]


def test_api_errors_are_exceptions_of_one_root(homes, tmp_path):
    with pytest.raises(
        toolbox.ParameterError, match=r"keyword argument 'tolerance' .* in \[0, 0\.5\]\. Got 0\.7 instead"
    ):
        toolbox.group_spread(homes, tolerance=0.7)
    with pytest.raises(toolbox.InputError, match="does not exist"):
        toolbox.group_spread(tmp_path / "missing.gpkg")
    with pytest.raises(toolbox.OutputError, match="Cannot tell the output format"):
        toolbox.group_spread(homes, output=tmp_path / "x.txt")
    for error in (toolbox.ParameterError, toolbox.InputError, toolbox.GeometryError, toolbox.OutputError):
        assert issubclass(error, toolbox.PairspreadError)
    assert list(tmp_path.iterdir()) == []


def test_messages_speak_the_callers_language(homes_gpkg, tmp_path, capfd):
    # the same mistakes from Python and from the command line: keyword arguments in the one,
    # options in the other, never the other's spelling
    existing = tmp_path / "out.csv"
    existing.write_text("kept\n")
    degrees = gpd.GeoDataFrame({"zone": ["a", "a", "b"]}, geometry=shapely.points([0, 1, 2], [50, 50, 51]), crs="EPSG:4326")
    degrees.to_file(tmp_path / "degrees.gpkg")
    python_cases = [
        (lambda: toolbox.group_spread(homes_gpkg.path, layer="homes", output=existing), "overwrite=True"),
        (lambda: toolbox.group_spread(homes_gpkg.path), "choose one with 'layer'"),
        (lambda: toolbox.group_spread(homes_gpkg.path, layer="homes", tolerance=2), "keyword argument 'tolerance'"),
        (lambda: toolbox.run("group-spread", data=homes_gpkg.path, layer="homes", output=existing), "overwrite=True"),
        # raised below the scripts: the estimator's distance set-up, cross-spread, spread-contrast
        (lambda: toolbox.group_spread(degrees, distance="planar"), "distance='planar' cannot be used"),
        (lambda: toolbox.group_spread(degrees, crs="EPSG:4326"), "The 'crs' parameter"),
        (lambda: toolbox.cross_spread(degrees), "needs 'group_by'"),
        (lambda: toolbox.cross_spread(degrees, group_by="zone", to_layer="x"), "'to_layer', 'to_group_by'"),
        (lambda: toolbox.spread_contrast(degrees), "exactly one of 'compare'"),
    ]
    for call, said in python_cases:
        with pytest.raises(toolbox.PairspreadError) as raised:
            call()
        assert said in str(raised.value) and "--" not in str(raised.value), str(raised.value)
    cli_cases = [
        (["--layer", "homes", "--output", str(existing)], "pass --overwrite"),
        ([], "choose one with --layer"),
        (["--layer", "homes", "--tolerance", "2"], "option --tolerance"),
    ]
    on_degrees = [
        (["group-spread", "--distance", "planar"], "--distance planar cannot be used"),
        (["group-spread", "--crs", "EPSG:4326"], "The --crs parameter"),
        (["cross-spread"], "needs --group-by"),
        (["cross-spread", "--group-by", "zone", "--to-layer", "x"], "--to-layer, --to-group-by"),
        (["spread-contrast"], "exactly one of --compare"),
    ]
    for args, said in on_degrees:
        assert main([args[0], str(tmp_path / "degrees.gpkg"), *args[1:]]) == 2
        err = capfd.readouterr().err
        assert said in err and "=" not in err.split("Got")[0] and "'group_by'" not in err, err
    for extra, said in cli_cases:
        assert main(["group-spread", str(homes_gpkg.path), *extra]) == 2
        err = capfd.readouterr().err
        assert said in err and "=" not in err.split("Got")[0], err
    assert existing.read_text() == "kept\n"


def test_messages_on_the_command_line_read_as_sentences(capfd, homes_gpkg):
    # errors and warnings used to begin with a capital or not depending on where they came from
    assert main(["group-spread", *homes_gpkg.args, "--weight", "popp"]) == 2
    line = capfd.readouterr().err.strip()
    assert line.startswith("pairspread: error: Layer 'homes' of "), line
    assert main(["group-spread", *homes_gpkg.args, "--group-by", "zone", "--where", "pop < 0"]) == 0
    err = capfd.readouterr().err
    assert "pairspread: warning: No feature of layer 'homes'" in err, err


def test_interrupt_just_after_the_rename_says_the_output_was_written(homes_gpkg, tmp_path, monkeypatch, capfd, ctrl_c_handled):
    # a Ctrl-C that lands after the output is in place must not claim that nothing was written
    from toolbox.layers import write as write_module

    real = write_module._move_into_place

    def then_interrupted(*args, **kwargs):
        real(*args, **kwargs)
        os.kill(os.getpid(), signal.SIGINT)  # Ctrl-C right after the rename

    monkeypatch.setattr(write_module, "_move_into_place", then_interrupted)
    target = tmp_path / "out.csv"
    assert main(["group-spread", *homes_gpkg.args, "--output", str(target), "--quiet"]) == 130
    assert capfd.readouterr().err == f"pairspread: interrupted after writing {target}.\n"
    assert target.is_file()


def _assert_interrupted_while_writing(stand_in, homes_gpkg, tmp_path, monkeypatch, capfd):
    """group-spread with ``stand_in`` in place of the CSV writer's text step (where a Ctrl-C is
    simulated): exit 130, one line, nothing written."""
    from toolbox.layers import write as write_module

    monkeypatch.setattr(write_module, "csv_text", stand_in)
    target = tmp_path / "out.csv"
    assert main(["group-spread", *homes_gpkg.args, "--output", str(target), "--quiet"]) == 130
    assert capfd.readouterr().err == "pairspread: interrupted; no output was written.\n"
    assert not target.exists()


def test_interrupt_swallowed_by_a_library_still_stops_the_run(homes_gpkg, tmp_path, monkeypatch, capfd, ctrl_c_handled):
    # a compiled library that clears the KeyboardInterrupt while it loads (pandas' modules did,
    # about 1 run in 20) must not let the run go on to write its output
    from toolbox.layers import write as write_module

    real = write_module.csv_text

    def swallowing(*args, **kwargs):
        try:
            os.kill(os.getpid(), signal.SIGINT)  # Ctrl-C inside library code ...
            time.sleep(1)  # (the handler runs here)
        except KeyboardInterrupt:
            pass  # ... which clears it and carries on
        return real(*args, **kwargs)

    _assert_interrupted_while_writing(swallowing, homes_gpkg, tmp_path, monkeypatch, capfd)


def test_interrupt_turned_into_another_error_by_a_library_still_stops_the_run(homes_gpkg, tmp_path, monkeypatch, capfd, ctrl_c_handled):
    # pandas' compiled start-up turned a Ctrl-C into "ImportError: pd_parser.c could not import
    # module pandas", which the run reported as an unexpected failure (exit 1)
    def converting(*args, **kwargs):
        try:
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(1)
        except KeyboardInterrupt:
            raise ImportError("pd_parser.c could not import module pandas") from None

    _assert_interrupted_while_writing(converting, homes_gpkg, tmp_path, monkeypatch, capfd)


def test_interrupt_inside_a_callback_from_compiled_code_is_one_line(homes_gpkg, tmp_path, monkeypatch, capfd, ctrl_c_handled):
    # numba compiling a kernel calls back into Python (llvmlite's object cache); a Ctrl-C there
    # cannot be raised, and Python printed it as "Exception ignored on calling ctypes callback
    # function" with a traceback before the run's own line. Simulated with libc's qsort.
    import ctypes

    from toolbox.layers import write as write_module

    real = write_module.csv_text
    compare = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.POINTER(ctypes.c_int), ctypes.POINTER(ctypes.c_int))

    def interrupted(a, b):
        os.kill(os.getpid(), signal.SIGINT)
        time.sleep(1)  # the handler raises here, inside the callback
        return 0

    def through_a_callback(*args, **kwargs):
        values = (ctypes.c_int * 2)(2, 1)
        ctypes.CDLL(None).qsort(values, 2, ctypes.sizeof(ctypes.c_int), compare(interrupted))
        return real(*args, **kwargs)

    monkeypatch.setattr(sys, "unraisablehook", sys.__unraisablehook__)  # Python's, not pytest's
    _assert_interrupted_while_writing(through_a_callback, homes_gpkg, tmp_path, monkeypatch, capfd)


def test_api_docstring_states_python_types():
    doc = toolbox.group_spread.__doc__
    assert "threads : int" in doc and "tolerance : float" in doc and "overwrite : bool" in doc
    assert "data : str, os.PathLike or geopandas.GeoDataFrame" in doc


def test_geodataframe_without_points(homes):
    frame = gpd.GeoDataFrame(
        {"zone": ["a", "b"]},
        geometry=[shapely.box(0, 0, 1, 1), shapely.LineString([(0, 0), (1, 1)])],
        crs="EPSG:32705",
    )
    with pytest.raises(
        toolbox.GeometryError, match=r"2 feature\(s\) that are not points \(1 LineString, 1 Polygon\)"
    ):
        toolbox.group_spread(frame, group_by="zone")
