"""Chain files: the same numbers as the commands run by hand, and every mistake caught first.

The reference for a chain is the sequence of single commands it stands for, each writing and
re-reading a file; the example chains are also checked against the published JSON schema with
the ``jsonschema`` library (draft 2020-12).
"""

from __future__ import annotations

import io
import json
import re
import shutil
import textwrap
from pathlib import Path

import geopandas as gpd
import pandas as pd
import pytest

import toolbox
from toolbox.chain import chain_schema, load_chain, plan_text

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "docs" / "examples"



FOUR_STEPS = """\
pairspread_chain = 1
title = "four steps"

[steps.remote]
script = "point-remoteness"
params = {{ data = "island.gpkg", layer = "homes", group_by = "zone", weight = "pop" }}

[steps.typical]
script = "keep-rows"
params = {{ data = {{ from = "remote" }}, where = "remote_idx <= 1.5" }}

[steps.spread]
script = "group-spread"
params = {{ data = {{ from = "typical" }}, group_by = "zone", weight = "pop", output = "{spread}" }}

[steps.sites]
script = "cross-spread"
[steps.sites.params]
data = {{ from = "typical" }}
group_by = "zone"
to = "island.gpkg"
to_layer = "sites"
to_group_by = "site_name"
output = "{sites}"
"""


def _write_chain(folder: Path, text: str, name: str = "chain.toml") -> Path:
    path = folder / name
    path.write_text(textwrap.dedent(text), "utf-8")
    return path


def test_four_steps_match_four_commands_by_hand(run_main, tmp_path, homes_gpkg, same_table):
    gpkg = homes_gpkg.path
    # by hand: every step writes a file that the next command reads
    steps = [
        ("point-remoteness", gpkg, "--layer", "homes", "--group-by", "zone", "--weight", "pop",
         "--output", tmp_path / "remote.parquet"),
        ("keep-rows", tmp_path / "remote.parquet", "--where", "remote_idx <= 1.5",
         "--output", tmp_path / "typical.parquet"),
        ("group-spread", tmp_path / "typical.parquet", "--group-by", "zone", "--weight", "pop",
         "--output", tmp_path / "spread_by_hand.csv"),
        ("cross-spread", tmp_path / "typical.parquet", "--group-by", "zone", "--to", gpkg,
         "--to-layer", "sites", "--to-group-by", "site_name", "--output", tmp_path / "sites_by_hand.csv"),
    ]  # fmt: skip
    for args in steps:
        code, _, err = run_main(*args, "--quiet")
        assert code == 0, err
    chain = _write_chain(tmp_path, FOUR_STEPS.format(spread="spread.csv", sites="sites.csv"))
    code, _, err = run_main("chain", chain)
    assert code == 0, err
    assert "step 'spread': wrote" in err and "step 'sites': wrote" in err
    for name in ("spread", "sites"):
        by_hand = pd.read_csv(tmp_path / f"{name}_by_hand.csv")
        same_table(pd.read_csv(tmp_path / f"{name}.csv"), by_hand, rtol=1e-12)
    kept = gpd.read_parquet(tmp_path / "typical.parquet")
    assert (kept["remote_idx"] <= 1.5).all() and len(kept) < len(gpd.read_file(gpkg, layer="homes"))
    # the same chain from Python, as a dict, returns every step's result
    doc = toolbox.chain.tomllib.loads(FOUR_STEPS.format(spread="unused.csv", sites="unused2.csv"))
    for step in doc["steps"].values():
        step["params"].pop("output", None)
        if step["params"].get("data") == "island.gpkg":
            step["params"]["data"] = str(gpkg)
        if step["params"].get("to") == "island.gpkg":
            step["params"]["to"] = str(gpkg)
    results = toolbox.run_chain(doc)
    assert list(results) == ["remote", "typical", "spread", "sites"]
    same_table(results["spread"], pd.read_csv(tmp_path / "spread_by_hand.csv"), rtol=1e-12)


BROKEN = {
    "unknown script": (
        'script = "group-spraed"',
        r"step 'last': There is no script 'group-spraed'; did you mean group-spread",
    ),
    "unknown parameter": (
        'script = "group-spread"\nparams = { data = { from = "first" }, group_bye = "zone" }',
        r"step 'last': group-spread has no parameter 'group_bye'; did you mean group_by( or group_shape)?\?",
    ),
    "bad value": (
        'script = "group-spread"\nparams = { data = { from = "first" }, tolerance = 2 }',
        r"step 'last': The parameter 'tolerance' of group-spread must be a number in \[0, 0.5\]",
    ),
    "bad reference": (
        'script = "group-spread"\nparams = { data = { from = "frist" } }',
        r"step 'last': data = \{ from = 'frist' \} names no step; did you mean 'first'\?",
    ),
    "reference to a table": (
        'script = "group-spread"\nparams = { data = { from = "middle" } }',
        r"step 'last': data takes the result of step 'middle' \(group-spread\), which is a table",
    ),
    "cycle": (
        'script = "keep-rows"\nparams = { data = { from = "loop" }, where = "pop > 1" }\n'
        '[steps.loop]\nscript = "keep-rows"\nparams = { data = { from = "last" }, where = "pop > 2" }',
        r"the steps form a cycle: last → loop → last",
    ),
    "existing output": (
        'script = "group-spread"\nparams = { data = { from = "first" }, output = "exists.csv" }',
        r"step 'last': .*exists\.csv' already exists; pass --overwrite to replace it",
    ),
    "missing input": (
        'script = "group-spread"\nparams = { data = "nowhere.gpkg" }',
        r"step 'last': data: input '.*nowhere\.gpkg' does not exist",
    ),
    "unknown step key": (
        'script = "group-spread"\ngroup_by = "zone"',
        r"step 'last': unknown key 'group_by'.*parameters go under params",
    ),
    # names checked against the input files themselves, before any step runs (issue 10)
    "unknown layer": (
        'script = "group-spread"\nparams = { data = "island.gpkg", layer = "hmes", group_by = "zone" }',
        r"step 'last': layer: .*island\.gpkg' has no layer 'hmes'; did you mean 'homes'\?",
    ),
    "unknown group field": (
        'script = "group-spread"\nparams = { data = "island.gpkg", layer = "homes", group_by = "zoen" }',
        r"step 'last': group_by: .*island\.gpkg', layer 'homes', has no field 'zoen'; did you mean 'zone'\?",
    ),
    "unknown weight field": (
        'script = "point-remoteness"\nparams = { data = "island.gpkg", layer = "homes", weight = "popp" }',
        r"step 'last': weight: .* has no field 'popp'; did you mean 'pop'\?",
    ),
    "unknown field of the second layer": (
        'script = "cross-spread"\nparams = { data = { from = "first" }, group_by = "zone", to = "island.gpkg", '
        'to_layer = "sites", to_group_by = "site_nme" }',
        r"step 'last': to_group_by: .*layer 'sites', has no field 'site_nme'; did you mean 'site_name'\?",
    ),
}


@pytest.mark.parametrize("case", list(BROKEN))
def test_a_broken_last_step_stops_the_chain_before_the_first_runs(run_main, tmp_path, homes_gpkg, case):
    last, message = BROKEN[case]
    (tmp_path / "exists.csv").write_text("keep me\n")
    text = (
        "pairspread_chain = 1\n"
        "[steps.first]\n"
        'script = "point-remoteness"\n'
        f'params = {{ data = "{homes_gpkg.path.name}", layer = "homes", output = "first.parquet" }}\n'
        "[steps.middle]\n"
        'script = "group-spread"\n'
        'params = { data = { from = "first" }, output = "middle.csv" }\n'
        f"[steps.last]\n{last}\n"
    )
    chain = _write_chain(tmp_path, text)
    code, out, err = run_main("chain", chain)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"pairspread: error: {chain}"), err
    assert re.search(message, lines[0]), lines[0]
    assert not (tmp_path / "first.parquet").exists() and not (tmp_path / "middle.csv").exists()
    assert (tmp_path / "exists.csv").read_text() == "keep me\n"


def test_dry_run_set_and_paths_from_the_chain_folder(run_main, tmp_path, homes_gpkg, monkeypatch):
    folder = tmp_path / "work"
    folder.mkdir()
    chain = _write_chain(folder, FOUR_STEPS.format(spread="spread.csv", sites="sites.csv"))
    shutil.move(homes_gpkg.path, folder / "island.gpkg")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    code, out, err = run_main(
        "chain", chain, "--dry-run", "--set", "spread.tolerance=0", "--set", "sites.output=mine.csv"
    )
    assert code == 0, err
    assert "4 step(s)" in out and "data=(result of typical)" in out and re.search(r"tolerance=0\b", out)
    assert "writes mine.csv" in out  # --set paths are relative to where the command runs
    assert "island.gpkg" in out and not list(folder.glob("*.csv"))
    code, out, err = run_main("chain", chain, "--set", "spread.tolerance=0", "--set", "sites.output=mine.csv")
    assert code == 0, err
    assert (folder / "spread.csv").exists() and (elsewhere / "mine.csv").exists()
    spread = pd.read_csv(folder / "spread.csv")
    assert set(spread["method"].dropna()) == {"exact"}
    code, _, err = run_main("chain", chain)
    assert code == 2 and "already exists; pass --overwrite" in err
    code, _, err = run_main("chain", chain, "--overwrite", "--quiet")
    assert code == 0 and err == ""


def test_a_chain_without_outputs_prints_its_last_table(run_main, tmp_path, homes_gpkg):
    text = f"""\
        pairspread_chain = 1
        [steps.spread]
        script = "group-spread"
        params = {{ data = "{homes_gpkg.path}", layer = "homes", group_by = "zone" }}
        """
    code, out, err = run_main("chain", _write_chain(tmp_path, text))
    assert code == 0, err
    assert out.splitlines()[0].split()[:2] == ["zone", "n_points"] and "harbour" in out


@pytest.mark.parametrize("example", sorted(p.name for p in EXAMPLES.glob("*.toml")))
def test_examples_run_on_the_sample_layers(tmp_path, example):
    import tomllib

    path = EXAMPLES / example
    doc = tomllib.loads(path.read_text("utf-8"))
    outputs = {
        f"{name}.output": str(tmp_path / Path(step["params"]["output"]).name)
        for name, step in doc["steps"].items()
        if "output" in step.get("params", {})
    }
    assert outputs, "an example should write something"
    print(plan_text(load_chain(path, sets=outputs)))
    results = toolbox.run_chain(path, sets=outputs)
    assert list(results) == list(doc["steps"])
    for name in (key.split(".")[0] for key in outputs):
        assert len(results[name]) > 0 and results[name].select_dtypes("number").notna().any().any()
    assert {Path(p).name for p in outputs.values()} <= {p.name for p in tmp_path.iterdir()}


def test_examples_follow_the_published_schema():
    import tomllib

    import jsonschema

    committed = json.loads((ROOT / "docs" / "chain.schema.json").read_text("utf-8"))
    assert committed == chain_schema(), "docs/chain.schema.json is out of date; run `make docs`"
    jsonschema.Draft202012Validator.check_schema(committed)
    validator = jsonschema.Draft202012Validator(committed)
    for path in EXAMPLES.glob("*.toml"):
        validator.validate(tomllib.loads(path.read_text("utf-8")))
    broken = {"pairspread_chain": 1, "steps": {"a": {"script": "group-spread", "params": {"tolerance": 2}}}}
    assert not validator.is_valid(broken)


def test_steps_can_read_from_a_pipe(tmp_path, homes, monkeypatch, capsys):
    raw = io.BytesIO()
    homes.to_parquet(raw)
    monkeypatch.setattr("sys.stdin", io.TextIOWrapper(io.BytesIO(raw.getvalue())))
    monkeypatch.setattr("sys.stdin.isatty", lambda: False)
    doc = {
        "pairspread_chain": 1,
        "steps": {
            "rented": {"script": "keep-rows", "params": {"data": "-", "where": "tenure = 'rented'"}},
            "spread": {"script": "group-spread", "params": {"data": {"from": "rented"}, "group_by": "zone"}},
        },
    }
    results = toolbox.run_chain(doc)
    expected = toolbox.group_spread(homes[homes["tenure"] == "rented"], group_by="zone")
    pd.testing.assert_frame_equal(results["spread"], expected)
