"""Chain files: several scripts declared once and run as one workflow.

A chain file is TOML in a format of this pack's own (documented in docs/chains.md, with a JSON
schema in docs/chain.schema.json generated from the manifest)::

    pairspread_chain = 1
    title = "Typical households per district"

    [steps.remote]
    script = "point-remoteness"
    params = { data = "quenwick.gpkg", layer = "households", group_by = "district" }

    [steps.typical]
    script = "keep-rows"
    params = { data = { from = "remote" }, where = "remote_idx <= 2" }

    [steps.spread]
    script = "group-spread"
    params = { data = { from = "typical" }, group_by = "district", output = "spread.csv" }

A parameter written ``{ from = "STEP" }`` takes that step's result, which stays in memory. The
whole chain is checked before any step runs (scripts and parameters through the manifest's one
validator, references, cycles, inputs that must exist, outputs that must be writable), so a
mistake in the last step costs nothing. Relative paths in the file are taken from the chain
file's folder; values given with ``--set STEP.PARAM=VALUE`` from the current folder.
"""

from __future__ import annotations

import difflib
import functools
import json
import os
import re
import sys
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from . import layers
from .errors import InputError, PairspreadError, ParameterError, current_caller, speaking, spell
from .manifest import DATASET_KINDS, RESULT_KINDS, Param, Script, get_script, scripts, validate

__all__ = ["FORMAT_VERSION", "Chain", "Step", "load_chain", "run_chain", "plan_text", "chain_schema"]

#: version of the chain file format this release reads and writes
FORMAT_VERSION = 1
_VERSION_KEY = "pairspread_chain"
_TOP_KEYS = (_VERSION_KEY, "title", "about", "steps")
_STEP_KEYS = ("script", "about", "params")
_REFERENCE_KEY = "from"
_STEP_NAME = "^[A-Za-z_][A-Za-z0-9_-]*$"  # a TOML bare key without dots, so --set can name it


@dataclass(frozen=True)
class Reference:
    """A parameter value that is the result of another step."""

    step: str


@dataclass
class Step:
    """One step: its name, script and parameters (paths resolved, references kept)."""

    name: str
    script: Script
    params: dict[str, Any]
    about: str = ""
    after: tuple[str, ...] = ()  # steps whose results it takes

    @property
    def output(self) -> str | None:
        return next((self.params.get(p.name) for p in self.script.params if _is_output(p)), None)


@dataclass
class Chain:
    """A checked chain, its steps in the order they run."""

    source: str
    folder: Path
    title: str
    steps: list[Step]
    notes: list[str] = field(default_factory=list)


def _is_input(p: Param) -> bool:
    return p.kind in DATASET_KINDS


def _is_output(p: Param) -> bool:
    return p.kind in RESULT_KINDS


def _produces_layer(step: Step, steps: Mapping[str, Step]) -> bool:
    """Whether a step's result keeps geometry (and so can be another step's input)."""
    target = next((p for p in step.script.params if _is_output(p)), None)
    if target is None:
        return False
    if target.kind == "result-layer-file":
        return True
    extras = step.params  # regions and group shapes turn a table into a layer
    return extras.get("output_on") == "regions" or extras.get("group_shape") in ("hull", "centre")


class _Place:
    """Prefix for messages: which chain and which step."""

    def __init__(self, source: str):
        self.source = source

    def error(self, step: str | None, message: str, kind=ParameterError) -> PairspreadError:
        where = f"{self.source}, step {step!r}" if step else self.source
        return kind(f"{where}: {message}")


def _suggest(name: str, known: Sequence[str]) -> str:
    close = difflib.get_close_matches(name, list(known), n=2)
    return f"did you mean {' or '.join(repr(c) for c in close)}?" if close else "known: " + ", ".join(known)


def _parse_value(text: str) -> Any:
    """A ``--set`` value: TOML when it reads as TOML (numbers, true, lists, {from=...}), else text."""
    try:
        return tomllib.loads(f"value = {text}")["value"]
    except tomllib.TOMLDecodeError:
        return text


def _apply_sets(doc: dict, sets: Sequence[str] | Mapping[str, Any], place: _Place) -> set[tuple[str, str]]:
    """Put ``--set STEP.PARAM=VALUE`` values into the document; returns the (step, param) set."""
    items = sets.items() if isinstance(sets, Mapping) else []
    if not isinstance(sets, Mapping):
        parsed = []
        for text in sets:
            key, sep, value = text.partition("=")
            if not sep or "." not in key:
                raise place.error(None, f"--set takes STEP.PARAM=VALUE. Got {text!r} instead.")
            parsed.append((key.strip(), _parse_value(value.strip())))
        items = parsed
    steps = doc.get("steps") if isinstance(doc.get("steps"), dict) else {}
    done = set()
    for key, value in items:
        step, _, param = key.partition(".")
        if step not in steps:
            raise place.error(
                None,
                f"--set names step {step!r}, which the chain does not have; {_suggest(step, list(steps))}",
            )
        entry = steps[step]
        if isinstance(entry, dict):
            entry.setdefault("params", {})[param] = value
        done.add((step, param))
    return done


def _resolve_path(value: Any, folder: Path) -> Any:
    if isinstance(value, str) and value != "-" and "://" not in value and not value.startswith("/vsi"):
        return os.path.normpath(folder / value) if not Path(value).is_absolute() else value
    return value


def _reference(value: Any) -> Reference | None:
    if isinstance(value, dict) and set(value) == {_REFERENCE_KEY} and isinstance(value[_REFERENCE_KEY], str):
        return Reference(value[_REFERENCE_KEY])
    return None


def _copy(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {k: _copy(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_copy(v) for v in value]
    return value


def _read_document(path_or_dict, place_hint: str | None) -> tuple[dict, str, Path]:
    if isinstance(path_or_dict, Mapping):
        doc = _copy(path_or_dict)  # ours to change; layers in memory are kept as they are
        return doc, place_hint or "the chain", Path.cwd()
    path = Path(os.fspath(path_or_dict))
    if not path.is_file():
        raise ParameterError(f"The chain file {str(path)!r} does not exist; check the path.")
    try:
        doc = tomllib.loads(path.read_text("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ParameterError(f"{path}: not a valid TOML file: {exc}") from exc
    return doc, str(path), path.resolve().parent


def _check_top(doc: dict, place: _Place) -> dict:
    for key in doc:
        if key not in _TOP_KEYS:
            raise place.error(None, f"unknown key {key!r}; {_suggest(key, _TOP_KEYS)}")
    version = doc.get(_VERSION_KEY)
    if version is None:
        raise place.error(
            None, f"the first line must say which format it uses: {_VERSION_KEY} = {FORMAT_VERSION}"
        )
    if version != FORMAT_VERSION:
        raise place.error(
            None,
            f"{_VERSION_KEY} = {version!r} is not a format this release reads ({FORMAT_VERSION}); "
            "upgrade pairspread or write the chain in format 1.",
        )
    steps = doc.get("steps")
    if not isinstance(steps, dict) or not steps:
        raise place.error(None, "has no steps; declare at least one as [steps.NAME] with a script.")
    return steps


def _order(steps: dict[str, Step], place: _Place) -> list[Step]:
    """Steps in an order where each comes after the steps it takes results from (file order else)."""
    done: list[str] = []
    state: dict[str, str] = {}

    def visit(name: str, path: list[str]):
        if state.get(name) == "done":
            return
        if state.get(name) == "active":
            cycle = path[path.index(name) :] + [name]
            raise place.error(
                None, "the steps form a cycle: " + " → ".join(cycle) + "; a step cannot take its own result."
            )
        state[name] = "active"
        for before in steps[name].after:
            visit(before, [*path, name])
        state[name] = "done"
        done.append(name)

    for name in steps:
        visit(name, [])
    return [steps[n] for n in done]


def _in_chain_words(function):
    """Messages about a chain's steps name parameters as its file does (``tolerance = 2``);
    the chain's own switches (overwrite, quiet) as the chain's caller writes them."""

    @functools.wraps(function)
    def wrapped(*args, **kwargs):
        if current_caller() == "chain":
            return function(*args, **kwargs)
        own = {name: spell(name, True) for name in ("overwrite", "strict", "quiet")}
        with speaking("chain", own):
            return function(*args, **kwargs)

    return wrapped


@_in_chain_words
def load_chain(
    path_or_dict,
    *,
    sets: Sequence[str] | Mapping[str, Any] = (),
    overwrite: bool = False,
    strict: bool = False,
    name: str | None = None,
) -> Chain:
    """Read and check a whole chain; nothing runs and nothing is written.

    Parameters
    ----------
    path_or_dict : str, os.PathLike or dict
        A chain file, or the same structure as a dict (relative paths then from the current folder).
    sets : sequence of "STEP.PARAM=VALUE", or dict {"STEP.PARAM": value}
        Values replacing those of the file (paths relative to the current folder).
    overwrite : bool
        Let every output replace an existing file or table (as each step's ``overwrite``).
    strict : bool
        Stop at the first step with a group that cannot be computed, before its outputs are
        written (as each step's ``strict``).
    name : str, optional
        How messages name a chain given as a dict.

    Returns
    -------
    Chain
    """
    doc, source, folder = _read_document(path_or_dict, name)
    place = _Place(source)
    raw_steps = _check_top(doc, place)
    from_command_line = _apply_sets(doc, sets, place)
    known = scripts()
    steps: dict[str, Step] = {}
    for step_name, entry in raw_steps.items():
        if not re.fullmatch(_STEP_NAME, step_name):
            raise place.error(
                step_name, "a step name is letters, digits, _ and -, starting with a letter or _."
            )
        if not isinstance(entry, dict):
            raise place.error(step_name, "must be a table with a script and its params.")
        for key in entry:
            if key not in _STEP_KEYS:
                raise place.error(
                    step_name,
                    f"unknown key {key!r}; {_suggest(key, _STEP_KEYS)} (parameters go under params)",
                )
        if "script" not in entry:
            raise place.error(step_name, f'names no script; add script = "..." (one of {", ".join(known)}).')
        try:
            script = get_script(entry["script"])
        except PairspreadError as exc:
            raise place.error(step_name, str(exc)) from exc
        params = dict(entry.get("params", {}))
        if not isinstance(entry.get("params", {}), dict):
            raise place.error(step_name, "params must be a table of parameter names and values.")
        declared = script.param_map
        after = []
        for pname, value in list(params.items()):
            p = declared.get(pname)
            ref = _reference(value)
            if ref is not None:
                if p is None:
                    continue  # the validator below names the unknown parameter
                if not _is_input(p):
                    raise place.error(
                        step_name,
                        f"parameter {pname!r} cannot take a step's result; only the input layers "
                        f"({', '.join(q.name for q in script.params if _is_input(q))}) can.",
                    )
                if ref.step not in raw_steps:
                    raise place.error(
                        step_name,
                        f"{pname} = {{ from = {ref.step!r} }} names no step; {_suggest(ref.step, list(raw_steps))}",
                    )
                if ref.step == step_name:
                    raise place.error(
                        step_name, f"{pname} takes the step's own result; a step cannot read what it makes."
                    )
                params[pname] = ref
                after.append(ref.step)
            elif p is not None and (_is_input(p) or _is_output(p) or p.kind == "picture-file"):
                base = Path.cwd() if (step_name, pname) in from_command_line else folder
                params[pname] = _resolve_path(value, base)
        for switch, on in (("overwrite", overwrite), ("strict", strict)):
            if on and switch in declared:
                params[switch] = True
        steps[step_name] = Step(step_name, script, params, str(entry.get("about", "")), tuple(after))
    ordered = _order(steps, place)
    _check_steps(ordered, steps, place)
    return Chain(source, folder, str(doc.get("title", "")), ordered)


def _placeholder(step: str) -> str:
    return f"<result of step {step!r}>"


def _check_steps(ordered: list[Step], steps: dict[str, Step], place: _Place) -> None:
    """Every step's parameters through the validator, inputs present, outputs writable."""
    piped_in = piped_out = None
    targets: dict[tuple[str, str], str] = {}
    for step in ordered:
        values = {
            k: (_placeholder(v.step) if isinstance(v, Reference) else v) for k, v in step.params.items()
        }
        try:
            checked = validate(step.script, values)
        except PairspreadError as exc:
            raise place.error(step.name, str(exc)) from exc
        for p in step.script.params:
            value = step.params.get(p.name)
            if isinstance(value, Reference):
                source = steps[value.step]
                if not _produces_layer(source, steps):
                    raise place.error(
                        step.name,
                        f"{p.name} takes the result of step {value.step!r} ({source.script.name}), "
                        "which is a table without geometry; only layers can be inputs.",
                    )
            elif _is_input(p) and isinstance(value, str) and value == "-":
                if piped_in:
                    raise place.error(
                        step.name,
                        f"standard input is read by step {piped_in!r} already; only one step can read '-'.",
                    )
                piped_in = step.name
            elif _is_input(p) and isinstance(value, str) and not _exists(value):
                raise place.error(
                    step.name, f"{p.name}: input {value!r} does not exist; check the path.", kind=InputError
                )
        _check_names(step, checked, {path for path, _ in targets}, place)
        picture = checked.get("map")
        if picture is not None:  # refused before any step runs, as an unwritable output is
            from . import maps

            try:
                maps.check_map(picture, overwrite=bool(checked.get("overwrite")), wide=bool(checked.get("wide")))
            except PairspreadError as exc:
                raise place.error(step.name, str(exc), kind=type(exc)) from exc
        output = step.output
        if output is None:
            continue
        if output == "-":
            if piped_out:
                raise place.error(
                    step.name,
                    f"step {piped_out!r} writes to standard output already; only one step can write '-'.",
                )
            piped_out = step.name
        target = next(p for p in step.script.params if _is_output(p))
        key = (os.path.abspath(output) if output != "-" else "-", checked.get("output_layer") or "")
        if key in targets and output != "-":
            raise place.error(
                step.name, f"writes {output!r} as step {targets[key]!r} does; give each step its own output."
            )
        targets[key] = step.name
        inputs = [
            (v, None)
            for p in step.script.params
            if _is_input(p) and isinstance(v := step.params.get(p.name), str)
        ]
        try:
            layers.check_output(
                output,
                what="layer" if target.kind == "result-layer-file" or _produces_layer(step, steps) else "table",
                layer_name=checked.get("output_layer") or "",
                overwrite=bool(checked.get("overwrite")),
                inputs=inputs,
                stdout_as=checked.get("output_format"),
            )
        except PairspreadError as exc:
            raise place.error(step.name, str(exc), kind=type(exc)) from exc


def _read_blocks(script: Script) -> list[tuple[Param, Param | None, list[Param]]]:
    """Each dataset a script reads, with its layer parameter and the parameters naming its fields.

    The manifest declares them in that order: a dataset, then the layer and the fields that
    belong to it, up to the next dataset (the runner pairs datasets and layers the same way).
    """
    blocks: list[tuple[Param, Param | None, list[Param]]] = []
    for p in script.params:
        if _is_input(p):
            blocks.append((p, None, []))
        elif blocks and p.kind == "layer-in-dataset" and blocks[-1][1] is None:
            blocks[-1] = (blocks[-1][0], p, blocks[-1][2])
        elif blocks and p.kind in ("column", "columns"):
            blocks[-1][2].append(p)
    return blocks


def _check_names(step: Step, checked: dict[str, Any], written: set[str], place: _Place) -> None:
    """A step's layer and field names, checked against the input files themselves.

    Only files the chain does not write itself (one there now may be an older run's); results
    of steps, standard input and inputs read with fiona are checked when the step runs.
    """
    from .layers import stream

    if checked.get("engine") == "fiona":
        return
    for data, layer, fields in _read_blocks(step.script):
        path = step.params.get(data.name)
        if not isinstance(path, str) or path == "-" or "://" in path or os.path.abspath(path) in written:
            continue
        wanted = checked.get(layer.name) if layer is not None else None
        try:
            available = stream.layer_parts(path, layer=wanted).fields
        except PairspreadError as exc:
            name = layer.name if layer is not None and wanted is not None else data.name
            raise place.error(step.name, f"{name}: {exc}", kind=type(exc)) from exc
        for p in fields:
            value = checked.get(p.name)
            for name in [value] if isinstance(value, str) else list(value or ()):
                if name not in available:
                    shown = f"{path!r}" + (f", layer {wanted!r}," if wanted else "")
                    raise place.error(
                        step.name,
                        f"{p.name}: {shown} has no field {name!r}; {_suggest(name, available)}",
                        kind=InputError,
                    )


def _exists(path: str) -> bool:
    if "://" in path or path.startswith("/vsi"):
        return True
    if layers.is_parquet(path) and any(c in path for c in "*?["):
        import glob

        return bool(glob.glob(path, recursive=True))
    return Path(path).exists()


def _shown(value: Any) -> str:
    if isinstance(value, Reference):
        return f"(result of {value.step})"
    if isinstance(value, list):
        return ",".join(map(str, value))
    text = str(value)
    if os.path.isabs(text):  # shorter from where the user stands
        relative = os.path.relpath(text)
        text = relative if len(relative) < len(text) else text
    return repr(text) if " " in text else text


def plan_text(chain: Chain) -> str:
    """What a chain will do, step by step, as ``--dry-run`` prints it."""
    title = f" ({chain.title})" if chain.title else ""
    lines = [f"chain {chain.source}{title}: {len(chain.steps)} step(s), format {FORMAT_VERSION}"]
    for number, step in enumerate(chain.steps, 1):
        shown = " ".join(
            f"{k}={_shown(v)}" for k, v in step.params.items() if not (v is None or v is False or (isinstance(v, list) and not v)) and k != "quiet"
        )
        lines.append(f"{number:>3}. {step.name} = {step.script.name} {shown}")
        output = step.output
        if output is None:
            lines.append("       result kept in memory")
        elif output == "-":
            lines.append("       writes to standard output")
        elif Path(output).suffix.lower() == ".gpkg":
            table = step.params.get("output_layer") or step.script.param_map["output_layer"].default
            lines.append(f"       writes table {table!r} in {_shown(output)}")
        else:
            verb = "replaces" if Path(output).exists() else "writes"
            lines.append(f"       {verb} {_shown(output)}")
    return "\n".join(lines)


@_in_chain_words
def run_chain(
    path_or_dict,
    *,
    sets: Sequence[str] | Mapping[str, Any] = (),
    overwrite: bool = False,
    strict: bool = False,
    dry_run: bool = False,
    quiet: bool = True,
    report=None,
) -> dict[str, Any]:
    """Check a whole chain, then run its steps in order; returns each step's result by name.

    Parameters
    ----------
    path_or_dict : str, os.PathLike or dict
        A chain file (see docs/chains.md), or the same structure as a dict.
    sets : sequence of "STEP.PARAM=VALUE", or dict {"STEP.PARAM": value}
        Values replacing those of the chain, as ``--set`` does on the command line.
    overwrite : bool
        Let every output replace an existing file or table.
    strict : bool
        All or nothing per step: a step with a group that cannot be computed raises
        :class:`~toolbox.errors.PartialResultError` before its outputs are written, and the
        chain stops there (outputs of earlier steps stay). Otherwise such a step warns once
        (:class:`~toolbox.errors.PartialResultWarning`) and the chain goes on.
    dry_run : bool
        Check everything and return ``{}`` without running a step.
    quiet : bool
        No progress bars.
    report : callable, optional
        Called as ``report(step, result, written)`` after each step (the command line prints
        where each output went).

    Returns
    -------
    dict
        Step name → its result (a DataFrame or GeoDataFrame), in the order the steps ran.

    Examples
    --------
    >>> import geopandas, shapely
    >>> pts = geopandas.GeoDataFrame({"kind": ["a", "a", "b", "a"]},
    ...     geometry=shapely.points([0, 3, 1, 0], [0, 0, 1, 4]), crs="EPSG:32705")
    >>> chain = {"pairspread_chain": 1, "steps": {
    ...     "only_a": {"script": "keep-rows", "params": {"data": pts, "where": "kind = 'a'"}},
    ...     "spread": {"script": "group-spread",
    ...                "params": {"data": {"from": "only_a"}, "tolerance": 0}}}}
    >>> run_chain(chain)["spread"]["total_dist"].tolist()
    [12.0]
    """
    from .runner import run_script

    chain = load_chain(path_or_dict, sets=sets, overwrite=overwrite, strict=strict)
    if dry_run:
        return {}
    place = _Place(chain.source)
    results: dict[str, Any] = {}
    for step in chain.steps:
        values = {k: results[v.step] if isinstance(v, Reference) else v for k, v in step.params.items()}
        if "quiet" in step.script.param_map:
            values.setdefault("quiet", quiet)
        try:
            result, written = run_script(
                step.script, values, made_in={"chain": chain.source, "step": step.name}
            )
        except PairspreadError as exc:
            raise place.error(step.name, str(exc), kind=type(exc)) from exc
        results[step.name] = result
        if report is not None:
            report(step, result, written)
    return results


def command(args, *, print_table) -> int:
    """``pairspread chain FILE ...``: check, then run or (``--dry-run``) print the plan."""
    with speaking("cli"):  # the chain's own switches are options of this command
        return _command(args, print_table=print_table)


def _command(args, *, print_table) -> int:
    if args.dry_run:
        print(plan_text(load_chain(args.file, sets=args.sets, overwrite=args.overwrite, strict=args.strict)))
        return 0
    last: dict[str, Any] = {}

    def report(step: Step, result, written) -> None:
        last.update(step=step, result=result, written=written)
        if written is not None and written != "standard output" and not args.quiet:
            print(f"pairspread: step {step.name!r}: wrote {len(result)} row(s) to {written}", file=sys.stderr)

    results = run_chain(
        args.file, sets=args.sets, overwrite=args.overwrite, strict=args.strict, quiet=args.quiet, report=report
    )
    if results and last.get("written") is None:
        print_table(last["result"])
    return 0


def _param_schema(p: Param) -> dict[str, Any]:
    text = {"type": "string"}
    if _is_input(p):
        schema: dict[str, Any] = {"anyOf": [text, {"$ref": "#/$defs/result"}]}
    elif p.kind == "columns":
        schema = {"anyOf": [text, {"type": "array", "items": text}]}
    elif p.kind in ("number", "integer"):
        schema = {"type": p.kind}
        if p.min is not None:
            schema["minimum"] = p.min
        if p.max is not None:
            schema["maximum"] = p.max
    elif p.kind == "choice":
        schema = {"enum": list(p.choices)}
    elif p.kind == "flag":
        schema = {"type": "boolean"}
    else:
        schema = dict(text)
    schema["description"] = p.help
    return schema


def chain_schema() -> dict[str, Any]:
    """A JSON Schema (draft 2020-12) of the chain format, with the parameters of every script.

    Scripts of packs installed later are allowed by name; their parameters are checked when the
    chain is loaded.
    """
    defs: dict[str, Any] = {
        "result": {
            "type": "object",
            "description": "The result of another step, kept in memory.",
            "required": [_REFERENCE_KEY],
            "additionalProperties": False,
            "properties": {_REFERENCE_KEY: {"type": "string", "pattern": _STEP_NAME}},
        }
    }
    cases = []
    for script in scripts().values():
        key = f"params-{script.name}"
        defs[key] = {
            "type": "object",
            "additionalProperties": False,
            "properties": {p.name: _param_schema(p) for p in script.params},
        }
        cases.append(
            {
                "if": {"properties": {"script": {"const": script.name}}},
                "then": {"properties": {"params": {"$ref": f"#/$defs/{key}"}}},
            }
        )
    defs["step"] = {
        "type": "object",
        "required": ["script"],
        "additionalProperties": False,
        "properties": {
            "script": {"type": "string", "description": "Name of a script of any installed pack."},
            "about": {"type": "string", "description": "What the step is for (shown by --dry-run)."},
            "params": {"type": "object", "description": "The script's parameters by their Python names."},
        },
        "allOf": cases,
    }
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": f"pairspread chain file, format {FORMAT_VERSION}",
        "description": "Named steps, each running one script; see docs/chains.md.",
        "type": "object",
        "required": [_VERSION_KEY, "steps"],
        "additionalProperties": False,
        "properties": {
            _VERSION_KEY: {"const": FORMAT_VERSION, "description": "Version of the chain file format."},
            "title": {"type": "string"},
            "about": {"type": "string"},
            "steps": {
                "type": "object",
                "minProperties": 1,
                "propertyNames": {"pattern": _STEP_NAME},
                "additionalProperties": {"$ref": "#/$defs/step"},
            },
        },
        "$defs": defs,
    }


def main(argv: Sequence[str] | None = None) -> int:
    """Write (or ``--check``) the JSON schema: ``make docs`` calls ``main(["schema", PATH])``."""
    import argparse

    parser = argparse.ArgumentParser(prog="toolbox.chain")
    parser.add_argument("what", choices=["schema"])
    parser.add_argument("path", type=Path)
    parser.add_argument("--check", action="store_true", help="Fail if the file is out of date.")
    args = parser.parse_args(argv)
    text = json.dumps(chain_schema(), indent=2, ensure_ascii=False) + "\n"
    if args.check:
        if not args.path.exists() or args.path.read_text("utf-8") != text:
            print(f"{args.path} is out of date with the manifest; run `make docs`.", file=sys.stderr)
            return 1
        return 0
    args.path.write_text(text, "utf-8")
    return 0

