"""Third-party packs: scripts added through the entry-point group ``pairspread.scripts``.

A pack is an ordinary installed package carrying a ``manifest.toml``; its entry point names the
package (``toolbox/manifest.py`` reads ``ep.value`` as the package name). The packs here are
built in ``tmp_path`` with a hand-written ``*.dist-info`` folder, the metadata
``importlib.metadata`` finds on ``sys.path``, and used from a subprocess with ``PYTHONPATH``
pointing there, so nothing is installed into the test environment.

Registering commands through entry points so other packages can add their own, and testing
that every entry point is registered, follows rasterio's CLI (see /work/shared/STYLE.md).
"""

from __future__ import annotations

import importlib.metadata
import io
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import shapely

import toolbox
from toolbox.manifest import ENTRY_POINT_GROUP, scripts


def make_pack(root: Path, package: str, manifest: str, modules: dict[str, str], entry: str = "demo") -> Path:
    """A package ``root/package`` with a manifest and modules, plus its dist-info metadata."""
    folder = root / package
    folder.mkdir()
    (folder / "__init__.py").write_text('"""A test pack."""\n')
    (folder / "manifest.toml").write_text(textwrap.dedent(manifest))
    for name, source in modules.items():
        (folder / f"{name}.py").write_text(textwrap.dedent(source))
    info = root / f"{package}-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {package}\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text(f"[{ENTRY_POINT_GROUP}]\n{entry} = {package}\n")
    return folder


DEMO_MANIFEST = """\
    [pack]
    name = "demo"
    summary = "A demonstration pack."

    [[scripts]]
    name = "centroid-count"
    summary = "Number of points of a layer and their mean position."
    module = "demo_pack.counting"
    function = "centroid_count"
    params = ["data", "layer"]
    """

DEMO_MODULE = """\
    import pandas as pd

    from toolbox import layers


    def centroid_count(data, *, layer=None):
        points = layers.read_points(data, layer=layer)
        return pd.DataFrame(
            {"n_points": [points.x.size], "mean_x": [points.x.mean()], "mean_y": [points.y.mean()]}
        )
    """


@pytest.fixture
def demo_pack(tmp_path) -> Path:
    root = tmp_path / "site"
    root.mkdir()
    make_pack(root, "demo_pack", DEMO_MANIFEST, {"counting": DEMO_MODULE})
    return root


def test_pack_script_is_listed_and_runs(cli, demo_pack, homes_gpkg, homes):
    env = {"PYTHONPATH": str(demo_pack)}
    listed = cli("list", env=env)
    assert listed.returncode == 0, listed.stderr
    names = [line.split()[0] for line in listed.stdout.splitlines()]
    assert "group-spread" in names and "centroid-count" in names

    summary = next(line for line in listed.stdout.splitlines() if line.startswith("centroid-count"))
    assert "Number of points of a layer and their mean position." in summary

    proc = cli("centroid-count", *homes_gpkg.args, env=env, entry="module")
    assert proc.returncode == 0, proc.stderr
    printed = pd.read_fwf(io.StringIO(proc.stdout))
    assert list(printed.columns) == ["n_points", "mean_x", "mean_y"]
    assert printed["n_points"].tolist() == [len(homes)]  # the pack's own code read our fixture


def test_pack_script_from_python(cli, demo_pack, homes_gpkg, homes):
    # toolbox.run reaches pack scripts too; the expected numbers come from numpy on the fixture
    code = (
        f"import toolbox; t = toolbox.run('centroid-count', data={str(homes_gpkg.path)!r}, layer='homes');"
        "print(t.to_csv(index=False))"
    )
    proc = cli("-c", code, env={"PYTHONPATH": str(demo_pack)}, entry="python")
    assert proc.returncode == 0, proc.stderr
    table = pd.read_csv(io.StringIO(proc.stdout))
    xy = shapely.get_coordinates(homes.geometry.values)
    assert table["n_points"].tolist() == [len(homes)]
    np.testing.assert_allclose(table[["mean_x", "mean_y"]].to_numpy()[0], xy.mean(axis=0), rtol=1e-12)


OUTSIDE_MANIFEST = """\
    [[scripts]]
    name = "sneaky"
    summary = "Points to code outside its own package."
    module = "outside_code"
    function = "run"
    params = ["data"]
    """

# importing this module is the side effect the manifest check must prevent
OUTSIDE_MODULE = """\
    from pathlib import Path

    Path(__file__).with_name("IMPORTED").write_text("outside_code was imported")


    def run(data):
        Path(__file__).with_name("EXECUTED").write_text("outside_code ran")
    """


@pytest.fixture
def outside_pack(tmp_path, homes_gpkg) -> Path:
    root = tmp_path / "site"
    root.mkdir()
    make_pack(root, "sneaky_pack", OUTSIDE_MANIFEST, {}, entry="sneaky")
    (root / "outside_code.py").write_text(textwrap.dedent(OUTSIDE_MODULE))
    return root


def test_pack_pointing_outside_its_package_is_refused(cli, outside_pack, homes_gpkg):
    env = {"PYTHONPATH": str(outside_pack)}
    ran = cli("sneaky", homes_gpkg.path, env=env)
    assert ran.returncode != 0
    # refused with a message naming the module (as an error or as a skipped-pack warning)
    assert "outside_code" in ran.stderr and "outside its own package" in ran.stderr
    assert not (outside_pack / "IMPORTED").exists()
    assert not (outside_pack / "EXECUTED").exists()


def test_bad_pack_does_not_break_the_others(cli, outside_pack, homes_gpkg):
    env = {"PYTHONPATH": str(outside_pack)}
    proc = cli("group-spread", *homes_gpkg.args, "--output", "-", "--quiet", env=env)
    assert proc.returncode == 0 and "Traceback" not in proc.stderr
    assert "outside_code" in proc.stderr  # still told why the pack was skipped


def test_name_clash_with_a_builtin_is_skipped(cli, tmp_path, homes_gpkg):
    root = tmp_path / "site"
    root.mkdir()
    clash = DEMO_MANIFEST.replace('name = "centroid-count"', 'name = "group-spread"')
    make_pack(
        root, "clash_pack", clash.replace("demo_pack.", "clash_pack."), {"counting": DEMO_MODULE}, "clash"
    )
    env = {"PYTHONPATH": str(root)}
    proc = cli("group-spread", *homes_gpkg.args, "--group-by", "zone", "--output", "-", env=env)
    assert proc.returncode == 0, proc.stderr
    # pairspread's own group-spread ran, not the pack's: its columns, not centroid_count's
    assert proc.stdout.splitlines()[0].startswith("zone,n_points,weight_sum")
    assert "already taken" in proc.stderr


SECOND_SCRIPT = """
    [[scripts]]
    name = "centroid-count"
    summary = "Number of points of a layer and their mean position."
    module = "demo_pack.counting"
    function = "centroid_count"
    params = ["data", "layer"]
    """


@pytest.mark.parametrize("name", ["list", "describe"])
def test_pack_script_named_like_a_command_is_refused_alone(cli, tmp_path, homes_gpkg, name):
    # a pack naming a script like one of the command line's own commands used to crash every
    # command ("conflicting subparser"); now that one script is skipped with a warning
    root = tmp_path / "site"
    root.mkdir()
    clash = DEMO_MANIFEST.replace('name = "centroid-count"', f'name = "{name}"') + SECOND_SCRIPT
    make_pack(
        root, "clash_pack", clash.replace("demo_pack.", "clash_pack."), {"counting": DEMO_MODULE}, "clash"
    )
    env = {"PYTHONPATH": str(root)}
    listed = cli("list", env=env)
    assert listed.returncode == 0, listed.stderr
    assert "Traceback" not in listed.stderr and f"Skipping script {name!r}" in listed.stderr
    assert "command of pairspread itself" in listed.stderr
    names = [line.split()[0] for line in listed.stdout.splitlines()]
    assert "centroid-count" in names and name not in names  # the pack's other script stays
    ran = cli("centroid-count", homes_gpkg.path, "--layer", "homes", env=env)
    assert ran.returncode == 0, ran.stderr
    assert cli("describe", "group-spread", env=env).returncode == 0


def test_console_script_and_builtin_scripts_are_registered():
    dist = importlib.metadata.distribution("pairspread")
    console = {ep.name: ep.value for ep in dist.entry_points if ep.group == "console_scripts"}
    assert console == {"pairspread": "toolbox.cli:main"}
    # every script of our own manifest is reachable as a Python function and through run()
    for script in scripts().values():
        if script.pack == "pairspread":
            assert callable(getattr(toolbox, script.python_name)), script.name
            assert callable(script.load()), script.name


PARTS_MANIFEST = """\
    [pack]
    name = "parts"
    summary = "A pack built on pairspread's estimator layer alone."

    [params.parts]
    kind = "integer"
    default = 3
    min = 1
    help = "Number of parts the layer is split into; their states are merged."

    [[scripts]]
    name = "spread-in-parts"
    summary = "Mean pair distance per group from parts of the layer whose states are merged."
    module = "parts_pack.spread"
    function = "spread_in_parts"
    params = ["data", "layer", "group_by", "tolerance", "parts", "output", "overwrite"]
    """

# Only the estimator layer computes: no kernels, no planar/geodesic choice of its own.
PARTS_MODULE = """\
    import numpy as np

    from toolbox import estimate, grouping, layers
    from toolbox.estimate.state import pair_sums_from


    def spread_in_parts(data, *, layer, group_by, tolerance, parts):
        read = layers.read_points(data, layer=layer, fields=group_by)
        setup = estimate.distance_setup(read.crs, read.label, script="spread-in-parts")
        groups = grouping.group_features(read.attributes, group_by)
        whole = estimate.Points.from_layer(
            setup, read.x, read.y, read.crs, read.label, groups.codes[read.feature], groups.count
        )
        pieces = [
            estimate.Points.build(whole.x[k::parts], whole.y[k::parts], whole.groups[k::parts],
                                  whole.n_groups, distance=setup)
            for k in range(parts)
        ]
        sums = pair_sums_from(lambda: iter(pieces), tolerance=tolerance)
        table = groups.keys.copy()
        table["mean_dist"] = sums.mean
        table["mean_lo"] = sums.lower / sums.pair_weight
        table["mean_hi"] = sums.upper / sums.pair_weight
        return table
    """


def test_pack_script_on_the_estimator_layer(cli, tmp_path, homes_gpkg, homes):
    root = tmp_path / "site"
    root.mkdir()
    make_pack(root, "parts_pack", PARTS_MANIFEST, {"spread": PARTS_MODULE}, entry="parts")
    proc = cli(
        "spread-in-parts", *homes_gpkg.args, "--group-by", "zone", "--parts", "4", "--output", "-",
        env={"PYTHONPATH": str(root)},
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    table = pd.read_csv(io.StringIO(proc.stdout)).set_index("zone")
    # the reference: scipy's pdist over each zone's points (brute force, outside pairspread)
    from scipy.spatial.distance import pdist

    for zone, rows in homes.groupby("zone"):
        xy = shapely.get_coordinates(rows.geometry.values)
        if len(xy) < 2:
            continue
        mean = pdist(xy).mean()
        assert table.loc[zone, "mean_lo"] <= mean * (1 + 1e-12)
        assert mean <= table.loc[zone, "mean_hi"] * (1 + 1e-12)
        assert abs(table.loc[zone, "mean_dist"] / mean - 1) <= 0.01
