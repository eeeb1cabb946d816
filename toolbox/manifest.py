"""The manifest: scripts and their typed parameters, read once and checked.

Our own scripts live in ``toolbox/manifest.toml``. Other installed packages add theirs through
the entry-point group ``pairspread.scripts``: each entry names a package that carries a
``manifest.toml`` of the same form. Scripts of a pack may only live in that pack's own package.
"""

from __future__ import annotations

import difflib
import importlib
import importlib.resources
import math
import os
import tomllib
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import cache
from importlib.metadata import entry_points
from typing import Any

from .errors import ManifestError, ParameterError, param_noun

__all__ = ["ENTRY_POINT_GROUP", "KINDS", "KIND_MEANINGS", "DATASET_KINDS", "RESULT_KINDS", "Param", "Script", "scripts", "get_script", "validate"]

ENTRY_POINT_GROUP = "pairspread.scripts"
#: names of the command line's own commands, which no script may take
RESERVED_NAMES = ("list", "describe", "chain", "help")
#: every parameter kind, with what its value is; the CLI, the Python API, the docs and
#: ``describe --json`` read the kind to know how to take and show a value
KIND_MEANINGS = {
    "dataset": "the vector dataset to measure: a path, or a GeoDataFrame from Python",
    "second-dataset": "another vector dataset read beside the first (path or GeoDataFrame)",
    "layer-in-dataset": "the name of one layer inside a dataset that holds several",
    "column": "the name of one attribute column of the layer",
    "columns": "names of attribute columns, comma-separated or a list",
    "number": "a real number, possibly within a range",
    "integer": "a whole number, possibly within a range",
    "choice": "one word out of a fixed list",
    "text": "free text passed on as given",
    "result-table-file": "where a result table goes: a file path (its suffix picks the format) or -",
    "result-layer-file": "where a copy of the layer with added columns goes: a file path",
    "name-in-file": "the name a result gets inside a GeoPackage",
    "picture-file": "where a picture of the result goes: a .png file path",
    "flag": "on or off",
}
KINDS = tuple(KIND_MEANINGS)
#: kinds whose value is read (a dataset) and kinds whose value is where a result is written
DATASET_KINDS = ("dataset", "second-dataset")
RESULT_KINDS = ("result-table-file", "result-layer-file")


@dataclass(frozen=True)
class Param:
    """One declared parameter of a script."""

    name: str
    kind: str
    help: str
    default: Any = None
    required: bool = False
    cli_required: bool = False  # needed on the command line only (Python can return the result)
    runner: bool = False
    min: float | None = None
    max: float | None = None
    choices: tuple[str, ...] = ()

    @property
    def option(self) -> str:
        """Command-line spelling, e.g. ``--group-by``."""
        return "--" + self.name.replace("_", "-")

    def describe(self) -> dict[str, Any]:
        """Plain-data description, for ``describe --json`` (other programs read it to drive a script)."""
        out: dict[str, Any] = {"name": self.name, "kind": self.kind, "help": self.help}
        out["option"] = None if self.kind == "dataset" else self.option
        out["default"] = self.default
        out["required"] = self.required or self.cli_required or self.kind == "dataset"
        if self.min is not None or self.max is not None:
            out["range"] = [self.min, self.max]
        if self.choices:
            out["choices"] = list(self.choices)
        return out


@dataclass(frozen=True)
class Script:
    """One declared script: where its function lives and what it takes."""

    name: str
    summary: str
    module: str
    function: str
    params: tuple[Param, ...]
    pack: str = "pairspread"
    columns: Mapping[str, str] = field(default_factory=dict)

    @property
    def param_map(self) -> dict[str, Param]:
        return {p.name: p for p in self.params}

    @property
    def python_name(self) -> str:
        return self.name.replace("-", "_")

    def load(self):
        """Import and return the function that does the work."""
        module = importlib.import_module(self.module)
        try:
            return getattr(module, self.function)
        except AttributeError as exc:
            raise ManifestError(
                f"Script {self.name!r}: module {self.module!r} has no function {self.function!r}."
            ) from exc

    def describe(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "summary": self.summary,
            "pack": self.pack,
            "params": [p.describe() for p in self.params],
            "columns": dict(self.columns),
        }


def _param(name: str, spec: Mapping[str, Any], where: str) -> Param:
    kind = spec.get("kind")
    if kind not in KINDS:
        raise ManifestError(f"{where}: parameter {name!r} has kind {kind!r}; allowed: {', '.join(KINDS)}.")
    if not spec.get("help"):
        raise ManifestError(f"{where}: parameter {name!r} needs a help text.")
    if kind == "choice" and not spec.get("choices"):
        raise ManifestError(f"{where}: choice parameter {name!r} needs choices.")
    known = {"kind", "help", "default", "required", "cli_required", "runner", "min", "max", "choices"}
    unknown = set(spec) - known
    if unknown:
        raise ManifestError(f"{where}: parameter {name!r} has unknown keys {sorted(unknown)}.")
    return Param(
        name=name,
        kind=kind,
        help=spec["help"],
        default=spec.get("default"),
        required=bool(spec.get("required", False)),
        cli_required=bool(spec.get("cli_required", False)),
        runner=bool(spec.get("runner", False)),
        min=spec.get("min"),
        max=spec.get("max"),
        choices=tuple(spec.get("choices", ())),
    )


def parse_manifest(text: str, *, where: str, package: str, shared: Mapping[str, Param] = {}) -> list[Script]:
    """Parse one manifest's text into scripts; ``package`` is the only package it may import."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ManifestError(f"{where} is not valid TOML: {exc}") from exc
    pack = doc.get("pack", {}).get("name", package)
    params = dict(shared)
    params.update({n: _param(n, s, where) for n, s in doc.get("params", {}).items()})
    out = []
    for entry in doc.get("scripts", []):
        name = entry.get("name")
        if not name or not entry.get("summary") or not entry.get("module"):
            raise ManifestError(f"{where}: every script needs a name, a summary and a module.")
        module = entry["module"]
        if module != package and not module.startswith(package + "."):
            raise ManifestError(
                f"{where}: script {name!r} points to module {module!r} outside its own package "
                f"{package!r}; packs may only run their own code."
            )
        chosen = []
        defaults = entry.get("defaults", {})
        own = {n: _param(n, spec, where) for n, spec in entry.get("declare", {}).items()}
        for pname in entry.get("params", []):
            p = own.get(pname) or params.get(pname)
            if p is None:
                raise ManifestError(f"{where}: script {name!r} uses undeclared parameter {pname!r}.")
            if pname in defaults:
                p = Param(**{**p.__dict__, "default": defaults[pname]})
            chosen.append(p)
        kinds = [p.kind for p in chosen]
        if kinds.count("dataset") > 1 or (kinds and "dataset" in kinds and kinds[0] != "dataset"):
            raise ManifestError(f"{where}: script {name!r} must take at most one dataset, first.")
        out.append(
            Script(
                name=name,
                summary=entry["summary"],
                module=module,
                function=entry.get("function", name.replace("-", "_")),
                params=tuple(chosen),
                pack=pack,
                columns=dict(entry.get("columns", {})),
            )
        )
    return out


@cache
def _builtin() -> tuple[list[Script], dict[str, Param]]:
    text = importlib.resources.files("toolbox").joinpath("manifest.toml").read_text("utf-8")
    scripts_ = parse_manifest(text, where="toolbox/manifest.toml", package="toolbox")
    doc = tomllib.loads(text)
    shared = {n: _param(n, s, "toolbox/manifest.toml") for n, s in doc["params"].items()}
    return scripts_, shared


def scripts() -> dict[str, Script]:
    """Every script: ours first, then those of installed packs (entry points), by name."""
    ours, shared = _builtin()
    found = {s.name: s for s in ours}
    for ep in sorted(entry_points(group=ENTRY_POINT_GROUP), key=lambda e: e.name):
        package = ep.value.split(":")[0].strip()
        where = f"manifest of pack {ep.name!r} ({package})"
        try:
            text = importlib.resources.files(package).joinpath("manifest.toml").read_text("utf-8")
        except (ModuleNotFoundError, FileNotFoundError) as exc:
            warnings.warn(f"Skipping the {where}: {exc}", stacklevel=2)
            continue
        try:
            parsed = parse_manifest(text, where=where, package=package, shared=shared)
        except ManifestError as exc:  # one broken pack must not take the others down
            warnings.warn(f"Skipping the {where}: {exc}", stacklevel=2)
            continue
        for script in parsed:
            if script.name in RESERVED_NAMES:
                warnings.warn(
                    f"Skipping script {script.name!r} of the {where}: {script.name!r} is a command "
                    f"of pairspread itself ({', '.join(RESERVED_NAMES)}); the pack should rename it.",
                    stacklevel=2,
                )
                continue
            if script.name in found:
                warnings.warn(
                    f"Skipping script {script.name!r} of the {where}: the name is already taken.",
                    stacklevel=2,
                )
                continue
            found[script.name] = script
    return found


def get_script(name: str) -> Script:
    """The script called ``name``; the error suggests close names."""
    known = scripts()
    if name not in known:
        close = difflib.get_close_matches(name, list(known), n=3)
        hint = f"did you mean {' or '.join(close)}?" if close else "known: " + ", ".join(known)
        raise ParameterError(f"There is no script {name!r}; {hint}")
    return known[name]


def _fail(script: Script, p: Param, allowed: str, value: Any) -> ParameterError:
    return ParameterError(f"The {param_noun(p.name)} of {script.name} must be {allowed}. Got {value!r} instead.")


def _convert(script: Script, p: Param, value: Any) -> Any:
    kind = p.kind
    if kind in ("dataset", "second-dataset"):
        if hasattr(value, "geometry") or isinstance(value, (str, os.PathLike)):
            return value
        raise _fail(script, p, "a path or a GeoDataFrame", value)
    if kind == "columns":
        items = [value] if isinstance(value, str) else list(value)
        fields = [s.strip() for item in items for s in str(item).split(",")]
        if any(not f for f in fields):
            raise _fail(script, p, "field names separated by commas, none empty", value)
        return fields
    if kind in ("layer-in-dataset", "column", "text", "name-in-file"):
        if not isinstance(value, str) or (kind != "text" and not value.strip()):
            raise _fail(script, p, "a non-empty text", value)
        return value
    if kind in ("result-table-file", "result-layer-file"):
        if not isinstance(value, (str, os.PathLike)) or not str(value):
            raise _fail(script, p, "a file path or -", value)
        return os.fspath(value)
    if kind == "picture-file":
        if not isinstance(value, (str, os.PathLike)) or not str(value):
            raise _fail(script, p, "a .png file path", value)
        return os.fspath(value)
    if kind in ("number", "integer"):
        try:
            number = float(value) if kind == "number" else int(value)
        except (TypeError, ValueError):
            number = None
        if isinstance(value, bool) or number is None or (kind == "number" and math.isnan(number)):
            raise _fail(
                script, p, f"a{'n integer' if kind == 'integer' else ' number'}{describe_range(p)}", value
            )
        if (p.min is not None and number < p.min) or (p.max is not None and number > p.max):
            raise _fail(
                script, p, f"{'an integer' if kind == 'integer' else 'a number'}{describe_range(p)}", value
            )
        return number
    if kind == "choice":
        if value not in p.choices:
            raise _fail(script, p, "one of " + ", ".join(p.choices), value)
        return value
    if kind == "flag":
        if not isinstance(value, bool):
            raise _fail(script, p, "true or false", value)
        return value
    raise ManifestError(f"Unknown parameter kind {kind!r}.")  # pragma: no cover


def describe_range(p: Param) -> str:
    """The allowed range as text, e.g. " in [0, 0.5]" or " ≥ 1"."""
    if p.min is not None and p.max is not None:
        return f" in [{p.min:g}, {p.max:g}]"
    if p.min is not None:
        return f" ≥ {p.min:g}"
    if p.max is not None:
        return f" ≤ {p.max:g}"
    return ""


def validate(script: Script, values: Mapping[str, Any], *, cli: bool = False) -> dict[str, Any]:
    """Check and normalise parameter values; missing ones take their declared defaults.

    The one validator of the pack: the CLI and the Python API both go through it, so every
    message has the same form: which parameter, what is allowed, what was given.
    """
    declared = script.param_map
    for name in values:
        if name not in declared:
            close = difflib.get_close_matches(name, list(declared), n=2)
            hint = f"did you mean {' or '.join(close)}?" if close else "known: " + ", ".join(declared)
            raise ParameterError(f"{script.name} has no parameter {name!r}; {hint}")
    out: dict[str, Any] = {}
    for p in script.params:
        value = values.get(p.name)
        if value is None:
            if p.required or p.kind == "dataset" or (cli and p.cli_required):
                raise ParameterError(f"{script.name} needs the {param_noun(p.name)}: {p.help}")
            out[p.name] = [] if p.kind == "columns" and p.default is None else p.default
            continue
        out[p.name] = _convert(script, p, value)
    return out
