"""End to end: the ``pairspread`` command line and the Python API on real files.

The command line runs as a subprocess of both the console script and ``python -m toolbox``
(as pyproj tests its CLI, see /work/shared/STYLE.md) on a representative set of runs, and
in-process through :func:`toolbox.cli.main` for the many variations, which is the same code
without the interpreter start-up. Every number is checked against brute force with
``scipy.spatial.distance.pdist`` (see ``conftest.reference_table``), the reference library
named in /work/shared/REFERENCES.md.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import io
import json
import math
import shutil
import tomllib
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from geopandas.testing import assert_geodataframe_equal

import toolbox
from toolbox.cli import main

MANIFEST = Path(toolbox.__file__).with_name("manifest.toml")


def read_csv_text(text: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text))


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def directions_for(tolerance: float) -> int:
    # m = ceil(pi / (4 arctan sqrt(eps))): the smallest m with tan^2(pi/(4m)) <= eps, from the
    # Cauchy-Crofton discretisation bound in /work/shared/DESIGN.md ("m = 8 for 1 %").
    return math.ceil(math.pi / (4 * math.atan(math.sqrt(tolerance))))


def check_exact(table, reference, by_key, group_by, *, rtol=1e-9):
    """Every group of ``table`` equals the pdist reference; tolerance 0 gives exact sums."""
    got = by_key(table, group_by)
    assert set(got) == set(reference)
    for key, ref in reference.items():
        row = got[key]
        assert row["n_points"] == ref["n_points"], key
        assert row["weight_sum"] == pytest.approx(ref["weight_sum"], rel=1e-12), key
        assert row["pair_weight"] == pytest.approx(ref["pair_weight"], rel=1e-12), key
        if np.isnan(ref["total_dist"]):
            for column in ("total_dist", "total_lo", "total_hi", "mean_dist"):
                assert pd.isna(row[column]), (key, column)
            assert pd.isna(row["method"]) or row["method"] == "", key
            continue
        assert row["total_dist"] == pytest.approx(ref["total_dist"], rel=rtol), key
        assert row["mean_dist"] == pytest.approx(ref["mean_dist"], rel=rtol), key
        assert row["method"] == "exact" and row["directions"] == 0, key
        # the reference has its own summation rounding (~n u), hence the 1e-12 slack
        assert row["total_lo"] * (1 - 1e-12) <= ref["total_dist"] <= row["total_hi"] * (1 + 1e-12), key


def check_bounded(table, reference, by_key, group_by, tolerance):
    """Estimates: the true (pdist) total lies in [total_lo, total_hi] and within rel_bound."""
    got = by_key(table, group_by)
    assert set(got) == set(reference)
    for key, ref in reference.items():
        row = got[key]
        if np.isnan(ref["total_dist"]):
            assert pd.isna(row["total_dist"]), key
            continue
        truth = ref["total_dist"]
        assert row["total_lo"] <= truth * (1 + 1e-12) and truth <= row["total_hi"] * (1 + 1e-12), key
        assert row["rel_bound"] <= tolerance, key
        assert abs(row["total_dist"] - truth) <= (row["rel_bound"] + 1e-12) * truth, key
        assert row["mean_dist"] == pytest.approx(row["total_dist"] / row["pair_weight"], rel=1e-12), key
        assert row["method"] in ("exact", "projection"), key
        assert row["directions"] == (directions_for(tolerance) if row["method"] == "projection" else 0), key



# --------------------------------------------------------------------------------------------
# subprocess runs: both entry points, every input format


# each input format once, each entry point at least once (``main``: in-process, see conftest)
PAIRS = [(".gpkg", "script"), (".shp", "module"), (".geojson", "main")]


@pytest.mark.parametrize(
    ("homes_file", "entry"), PAIRS, indirect=["homes_file"], ids=[f"{s[1:]}-{e}" for s, e in PAIRS]
)
def test_exact_weighted_csv_on_stdout(cli, entry, homes_file, homes, reference, by_key, result_columns):
    proc = cli(
        "group-spread",
        *homes_file.args,
        "--group-by",
        "zone",
        "--weight",
        "pop",
        "--tolerance",
        "0",
        "--output",
        "-",
        entry=entry,
    )
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    table = read_csv_text(proc.stdout)
    assert list(table.columns) == ["zone", *result_columns]
    assert (table["units"] == "metre").all()  # EPSG:32705 axes are in metres (pyproj unit_name)
    # scipy.spatial.distance.pdist per group, weighted: sum over pairs of w_i w_j d_ij
    check_exact(table, reference(homes, ["zone"], "pop"), by_key, ["zone"])
    # the NULL zone is a group of its own, written as an empty CSV cell
    assert any(line.startswith(",6,") for line in proc.stdout.splitlines())


def test_printed_table_without_output(cli, homes_gpkg, homes, reference, by_key, result_columns):
    proc = cli("group-spread", *homes_gpkg.args, "--group-by", "zone", "--tolerance", "0", entry="main")
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.splitlines()
    assert lines[0].split() == ["zone", *result_columns]
    assert len(lines) == 1 + 5  # header and five groups (four zones and the NULL one)
    table = pd.read_fwf(io.StringIO(proc.stdout), na_values=["(null)"])  # how a null group prints
    ref = reference(homes, ["zone"])
    got = by_key(table, ["zone"])
    assert set(got) == set(ref)
    for key, r in ref.items():
        assert got[key]["n_points"] == r["n_points"]
        if r["n_points"] > 1:  # printed to 6 significant digits
            assert got[key]["total_dist"] == pytest.approx(r["total_dist"], rel=1e-5)


@pytest.mark.parametrize("homes_file", [".shp"], indirect=True, ids=["shp"])
def test_gpkg_output_new_file(cli, tmp_path, homes_file, homes, reference, by_key, result_columns):
    out = tmp_path / "result.gpkg"
    proc = cli(
        "group-spread",
        *homes_file.args,
        "--group-by",
        "zone,tenure",
        "--weight",
        "pop",
        "--tolerance",
        "0",
        "--output",
        out,
        entry="main",
    )
    assert proc.returncode == 0, proc.stderr
    ref = reference(homes, ["zone", "tenure"], "pop")
    assert f"wrote {len(ref)} row(s)" in proc.stderr
    listed = pyogrio.list_layers(out)
    assert [str(n) for n in listed[:, 0]] == ["group_spread"]  # the manifest's default name
    assert listed[0, 1] is None  # a non-spatial attribute table
    table = pyogrio.read_dataframe(out, layer="group_spread")
    assert list(table.columns) == ["zone", "tenure", *result_columns]
    check_exact(table, ref, by_key, ["zone", "tenure"])


def test_gpkg_output_into_existing_geopackage(cli, tmp_path, homes_gpkg, homes, reference, by_key):
    target = tmp_path / "project.gpkg"
    shutil.copyfile(homes_gpkg.path, target)
    before = {name: pyogrio.read_dataframe(target, layer=name) for name in ("homes", "sites", "zones")}

    def unchanged_layers():
        assert sorted(str(n) for n in pyogrio.list_layers(target)[:, 0]) == [
            "homes",
            "sites",
            "spread",
            "zones",
        ]
        for name, frame in before.items():
            assert_geodataframe_equal(pyogrio.read_dataframe(target, layer=name), frame)

    args = [
        "group-spread",
        *homes_gpkg.args,
        "--tolerance",
        "0",
        "--output",
        target,
        "--output-layer",
        "spread",
    ]
    proc = cli(*args, "--group-by", "zone", entry="main")
    assert proc.returncode == 0, proc.stderr
    unchanged_layers()
    check_exact(pyogrio.read_dataframe(target, layer="spread"), reference(homes, ["zone"]), by_key, ["zone"])

    digest = sha256(target)
    refused = cli(*args, "--group-by", "tenure", entry="main")
    assert refused.returncode != 0
    assert "'spread'" in refused.stderr and "--overwrite" in refused.stderr
    assert sha256(target) == digest

    replaced = cli(*args, "--group-by", "tenure", "--overwrite", entry="main")
    assert replaced.returncode == 0, replaced.stderr
    unchanged_layers()
    table = pyogrio.read_dataframe(target, layer="spread")
    check_exact(table, reference(homes, ["tenure"]), by_key, ["tenure"])


def test_quiet(cli, tmp_path, homes_gpkg, same_table):
    loud = cli("group-spread", *homes_gpkg.args, "--output", tmp_path / "a.csv", entry="main")
    quiet = cli("group-spread", *homes_gpkg.args, "--output", tmp_path / "b.gpkg", "--quiet", entry="main")
    assert loud.returncode == quiet.returncode == 0
    assert loud.stderr.startswith("pairspread: wrote 1 row(s) to")
    # nothing at all with --quiet; a GeoPackage output once drew a GDAL warning about the
    # temporary file's name here
    assert quiet.stderr == ""
    same_table(pyogrio.read_dataframe(tmp_path / "b.gpkg"), pd.read_csv(tmp_path / "a.csv"))


def test_multipoint_features_are_split(run_main, tmp_path, reference, by_key):
    rng = np.random.default_rng(5)
    geoms = [
        shapely.multipoints(np.c_[500_000 + rng.uniform(0, 900, k), 6_120_000 + rng.uniform(0, 600, k)])
        for k in (3, 1, 4, 2, 5)
    ]
    geoms += list(shapely.points(500_000 + rng.uniform(0, 900, 4), 6_120_000 + rng.uniform(0, 600, 4)))
    frame = gpd.GeoDataFrame(
        {"zone": list("ababaabab"), "pop": [2, 1, 3, 5, 1, 4, 2, 2, 1]}, geometry=geoms, crs="EPSG:32705"
    )
    path = tmp_path / "multi.geojson"
    pyogrio.write_dataframe(frame, path)
    code, out, err = run_main(
        "group-spread", path, "--group-by", "zone", "--weight", "pop", "--tolerance", "0", "--output", "-"
    )
    assert code == 0, err
    table = read_csv_text(out)
    # every point of a MultiPoint is a point of the group with the feature's weight
    assert table["n_points"].sum() == 3 + 1 + 4 + 2 + 5 + 4
    check_exact(table, reference(frame, ["zone"], "pop"), by_key, ["zone"])


# --------------------------------------------------------------------------------------------
# in-process command line: the variations


@pytest.mark.parametrize(
    ("suffix", "homes_file"),
    [(".csv", ".shp"), (".parquet", ".geojson")],
    indirect=["homes_file"],
    ids=["csv", "parquet"],
)
def test_csv_and_parquet_outputs(
    run_main, tmp_path, suffix, homes_file, homes, reference, by_key, same_table
):
    out = tmp_path / f"result{suffix}"
    code, stdout, stderr = run_main(
        "group-spread",
        *homes_file.args,
        "--group-by",
        "zone",
        "--weight",
        "pop",
        "--tolerance",
        "0",
        "--output",
        out,
    )
    assert code == 0, stderr
    assert stdout == ""
    table = pd.read_csv(out) if suffix == ".csv" else pd.read_parquet(out)
    check_exact(table, reference(homes, ["zone"], "pop"), by_key, ["zone"])
    code, printed, _ = run_main(
        "group-spread",
        *homes_file.args,
        "--group-by",
        "zone",
        "--weight",
        "pop",
        "--tolerance",
        "0",
        "--output",
        "-",
    )
    same_table(table, read_csv_text(printed))


@pytest.mark.parametrize("method", ["auto", "projection"])
@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
def test_default_tolerance_bounds(run_main, method, weighted, homes_gpkg, homes, reference, by_key):
    extra = ["--weight", "pop"] if weighted else []
    code, out, err = run_main(
        "group-spread", *homes_gpkg.args, "--group-by", "zone", "--method", method, *extra, "--output", "-"
    )
    assert code == 0, err
    table = read_csv_text(out)
    check_bounded(table, reference(homes, ["zone"], "pop" if weighted else None), by_key, ["zone"], 0.01)
    if method == "projection":
        assert set(table["method"].dropna()) == {"projection"}


def test_tighter_tolerance_uses_more_directions(run_main, homes_gpkg, homes, reference, by_key):
    code, out, err = run_main(
        "group-spread",
        *homes_gpkg.args,
        "--group-by",
        "zone",
        "--method",
        "projection",
        "--tolerance",
        "0.001",
        "--output",
        "-",
    )
    assert code == 0, err
    table = read_csv_text(out)
    check_bounded(table, reference(homes, ["zone"]), by_key, ["zone"], 0.001)
    assert set(table["directions"][table["n_points"] > 1]) == {directions_for(0.001)}


def test_no_group_by_gives_one_row(run_main, homes_file, homes, reference, by_key, result_columns):
    code, out, err = run_main("group-spread", *homes_file.args, "--tolerance", "0", "--output", "-")
    assert code == 0, err
    table = read_csv_text(out)
    assert list(table.columns) == result_columns
    assert len(table) == 1 and table["n_points"][0] == len(homes)
    check_exact(table, reference(homes), by_key, [])


def test_group_by_combination(run_main, homes_gpkg, homes, reference, by_key):
    code, out, err = run_main(
        "group-spread",
        *homes_gpkg.args,
        "--group-by",
        "tenure,zone",
        "--weight",
        "pop",
        "--tolerance",
        "0",
        "--output",
        "-",
    )
    assert code == 0, err
    table = read_csv_text(out)
    assert list(table.columns[:3]) == ["tenure", "zone", "n_points"]
    ref = reference(homes, ["tenure", "zone"], "pop")
    assert len(table) == len(ref) == len(homes[["tenure", "zone"]].drop_duplicates())
    check_exact(table, ref, by_key, ["tenure", "zone"])


def test_null_group_and_single_point_group(run_main, homes_file, homes):
    code, out, err = run_main("group-spread", *homes_file.args, "--group-by", "zone", "--output", "-")
    assert code == 0, err
    table = read_csv_text(out)
    nulls = table[table["zone"].isna()]
    assert len(nulls) == 1 and nulls["n_points"].item() == homes["zone"].isna().sum() == 6
    lone = table[table["zone"] == "lone"].iloc[0]
    assert lone["n_points"] == 1 and lone["pair_weight"] == 0
    for column in ("total_dist", "total_lo", "total_hi", "mean_dist", "rel_bound", "method"):
        assert pd.isna(lone[column]), column


def test_zero_pair_weight_group_has_null_distances(run_main, write_layer, homes):
    frame = homes.copy()
    frame.loc[frame["zone"] == "ridge", "pop"] = 0
    path = write_layer(frame, ".gpkg")
    code, out, err = run_main("group-spread", path, "--group-by", "zone", "--weight", "pop", "--output", "-")
    assert code == 0, err
    ridge = read_csv_text(out).set_index("zone").loc["ridge"]
    assert ridge["n_points"] == 12 and ridge["pair_weight"] == 0
    assert pd.isna(ridge["total_dist"]) and pd.isna(ridge["mean_dist"])


def test_where_filters(run_main, homes_file, homes, reference, by_key):
    code, out, err = run_main(
        "group-spread",
        *homes_file.args,
        "--group-by",
        "zone",
        "--weight",
        "pop",
        "--tolerance",
        "0",
        "--where",
        "tenure = 'owned' AND pop > 2",
        "--output",
        "-",
    )
    assert code == 0, err
    subset = homes[(homes["tenure"] == "owned") & (homes["pop"] > 2)]
    assert 0 < len(subset) < len(homes)
    check_exact(read_csv_text(out), reference(subset, ["zone"], "pop"), by_key, ["zone"])


def test_fiona_engine_gives_the_same_table(run_main, homes_file, same_table):
    args = ["group-spread", *homes_file.args, "--group-by", "zone", "--weight", "pop", "--output", "-"]
    code_p, out_p, err_p = run_main(*args)
    code_f, out_f, err_f = run_main(*args, "--engine", "fiona")
    assert code_p == code_f == 0, (err_p, err_f)
    same_table(read_csv_text(out_f), read_csv_text(out_p), rtol=1e-12)


def test_geographic_layer_geodesic_by_default(run_main, write_layer, homes, by_key):
    frame = homes.to_crs("EPSG:4326")
    path = write_layer(frame, ".gpkg")
    code, out, err = run_main("group-spread", path, "--group-by", "zone", "--tolerance", "0", "--output", "-")
    assert code == 0, err
    table = by_key(read_csv_text(out), ["zone"])
    # reference: pyproj.Geod(ellps="WGS84").inv, Karney, "Algorithms for geodesics" (2013)
    geod = pyproj.Geod(ellps="WGS84")
    lon, lat = shapely.get_coordinates(frame.geometry.values).T
    for key, row in table.items():
        members = np.flatnonzero([(None if pd.isna(z) else z,) == key for z in frame["zone"]])
        i, j = np.triu_indices(members.size, k=1)
        if i.size == 0:
            assert pd.isna(row["total_dist"])
            continue
        _, _, dist = geod.inv(lon[members[i]], lat[members[i]], lon[members[j]], lat[members[j]])
        assert row["total_dist"] == pytest.approx(dist.sum(), rel=1e-9), key
        assert row["units"] == "metre"


def test_crs_option_reprojects_first(run_main, write_layer, homes, reference, by_key):
    path = write_layer(homes.to_crs("EPSG:4326"), ".gpkg")
    code, out, err = run_main(
        "group-spread", path, "--group-by", "zone", "--tolerance", "0", "--crs", "EPSG:32705", "--output", "-"
    )
    assert code == 0, err
    # back in UTM 5S the planar totals are pdist's on the original coordinates (the round trip
    # through pyproj moves points by far less than a millimetre)
    check_exact(read_csv_text(out), reference(homes, ["zone"]), by_key, ["zone"])


# --------------------------------------------------------------------------------------------
# the pack's own description


def manifest_entry(name: str) -> tuple[dict, dict]:
    doc = tomllib.loads(MANIFEST.read_text("utf-8"))
    return next(s for s in doc["scripts"] if s["name"] == name), doc["params"]


def test_list(cli):
    proc = cli("list", entry="module")
    assert proc.returncode == 0, proc.stderr
    doc = tomllib.loads(MANIFEST.read_text("utf-8"))
    for script in doc["scripts"]:
        assert any(
            line.split()[0] == script["name"] and script["summary"] in line
            for line in proc.stdout.splitlines()
        )


def test_describe_text(run_main):
    code, out, err = run_main("describe", "group-spread")
    assert code == 0, err
    entry, params = manifest_entry("group-spread")
    assert entry["summary"] in out
    for name in entry["params"]:
        spelling = "DATASET" if params[name]["kind"] == "dataset" else "--" + name.replace("_", "-")
        assert spelling in out
        assert params[name]["help"] in out


def test_describe_json(run_main, result_columns):
    code, out, err = run_main("describe", "group-spread", "--json")
    assert code == 0, err
    described = json.loads(out)
    entry, params = manifest_entry("group-spread")
    assert described["name"] == "group-spread"
    assert [p["name"] for p in described["params"]] == entry["params"]
    for p in described["params"]:
        declared = params[p["name"]]
        default = entry.get("defaults", {}).get(p["name"], declared.get("default"))
        assert (p["kind"], p["default"], p["help"]) == (declared["kind"], default, declared["help"])
        if "choices" in declared:
            assert p["choices"] == declared["choices"]
    tolerance = next(p for p in described["params"] if p["name"] == "tolerance")
    assert tolerance["range"] == [0.0, 0.5] and tolerance["default"] == 0.01
    # the documented columns are the ones the script writes, in the same order (as_points only
    # with --as-points, geometry only with --group-shape)
    assert [c for c in described["columns"] if c not in ("group field(s)", "as_points", "geometry")] == result_columns


def test_kinds_and_positional_are_the_packs_own(run_main, capsys):
    # every kind a script shows is one the pack defines and explains; the positional is DATASET
    from toolbox.manifest import KIND_MEANINGS, scripts

    for name in scripts():
        code, out, err = run_main("describe", name, "--json")
        assert code == 0, err
        for p in json.loads(out)["params"]:
            assert p["kind"] in KIND_MEANINGS, (name, p)
        with pytest.raises(SystemExit) as stopped:
            main([name, "--help"])
        out = capsys.readouterr().out
        assert stopped.value.code == 0 and "DATASET" in out and "INPUT" not in out


def test_engine_help_states_that_fiona_is_slow(run_main):
    # measured in this repository (100,000 points: about 100 times pyogrio's time); a user who
    # picks fiona must be told before waiting minutes
    code, out, _ = run_main("describe", "group-spread", "--json")
    engine = next(p for p in json.loads(out)["params"] if p["name"] == "engine")
    assert "fiona is far slower" in engine["help"] and "100 times" in engine["help"]


def test_version(cli):
    proc = cli("--version")
    assert proc.returncode == 0
    assert proc.stdout.strip() == f"pairspread {importlib.metadata.version('pairspread')}"
    assert toolbox.__version__ == importlib.metadata.version("pairspread")


# --------------------------------------------------------------------------------------------
# Python API


def test_api_equals_cli_csv(cli, homes_gpkg, homes, same_table, reference, by_key):
    proc = cli(
        "group-spread", *homes_gpkg.args, "--group-by", "zone", "--weight", "pop", "--output", "-", entry="main"
    )
    assert proc.returncode == 0, proc.stderr
    from_cli = read_csv_text(proc.stdout)
    check_bounded(from_cli, reference(homes, ["zone"], "pop"), by_key, ["zone"], 0.01)
    options = {"group_by": "zone", "weight": "pop", "tolerance": 0.01, "method": "auto"}
    same_table(toolbox.group_spread(homes_gpkg.path, layer="homes", **options), from_cli)
    same_table(toolbox.group_spread(str(homes_gpkg.path), layer="homes", **options), from_cli)
    same_table(toolbox.run("group-spread", data=homes_gpkg.path, layer="homes", **options), from_cli)
    # a GeoDataFrame in memory: the same points, the same table
    frame = gpd.read_file(homes_gpkg.path, layer="homes")
    same_table(toolbox.group_spread(frame, **options), from_cli)
    same_table(toolbox.run("group-spread", data=frame, **options), from_cli)


def test_api_exact_and_field_lists(homes, reference, by_key, same_table):
    by_text = toolbox.group_spread(homes, group_by="zone,tenure", tolerance=0)
    by_list = toolbox.group_spread(homes, group_by=["zone", "tenure"], method="exact")
    same_table(by_text, by_list)
    check_exact(by_text, reference(homes, ["zone", "tenure"]), by_key, ["zone", "tenure"])


def test_api_writes_output_too(tmp_path, homes_file, same_table):
    out = tmp_path / "api.csv"
    table = toolbox.group_spread(homes_file.path, group_by="zone", output=out, **homes_file.kwargs)
    same_table(pd.read_csv(out), table)


def test_api_unknown_parameter_suggests_close_name(homes):
    with pytest.raises(toolbox.ParameterError, match=r"'group_bye'.*did you mean group_by"):
        toolbox.run("group-spread", data=homes, group_bye="zone")
    with pytest.raises(toolbox.ParameterError, match=r"did you mean group-spread"):
        toolbox.run("group-sprad", data=homes)


def test_api_function_unknown_parameter_suggests_close_name(homes):
    with pytest.raises(toolbox.ParameterError, match=r"'tolerence'.*did you mean tolerance"):
        toolbox.group_spread(homes, tolerence=0)
