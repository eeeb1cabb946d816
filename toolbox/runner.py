"""Run any manifest script: validate, check the output first, compute, write.

The command line and the Python API both end here, so a script behaves the same however it
is called.
"""

from __future__ import annotations

import contextlib
import inspect
import os
import sys
import warnings
from typing import Any

from . import interrupts
from .errors import ParameterError, PartialResultError, PartialResultWarning, current_caller, speaking, spell
from .manifest import DATASET_KINDS, Script, get_script, validate
from .progress import ProgressLine

__all__ = ["run", "run_script"]


#: parameter kinds the runner acts on: datasets read (each with the layer parameter declared
#: after it), the result file and the name of the result inside it
LAYER_KIND = "layer-in-dataset"
RESULT_WHAT = {"result-table-file": "table", "result-layer-file": "layer"}
RESULT_NAME_KIND = "name-in-file"


def _inputs(script: Script, values: dict[str, Any]) -> list[tuple[str, str | None]]:
    """The (path, layer) pairs a script reads, which its output must never replace.

    Every dataset parameter is paired with the layer parameter declared after it (and before
    the next dataset), so a script declares what it reads by the kinds of its parameters.
    """
    found: list[list] = []
    for p in script.params:
        if p.kind in DATASET_KINDS:
            found.append([values.get(p.name), None])
        elif p.kind == LAYER_KIND and found and found[-1][1] is None:
            found[-1][1] = values.get(p.name)
    return [(os.fspath(data), layer) for data, layer in found if isinstance(data, (str, os.PathLike))]


def _is_dash(value: Any) -> bool:
    return isinstance(value, str) and value == "-"


def _read_piped(script: Script, values: dict[str, Any]) -> dict[str, Any]:
    """Input layers given as ``-`` read from standard input, once, into memory."""
    piped = [p for p in script.params if p.kind in DATASET_KINDS and _is_dash(values.get(p.name))]
    chosen = values.get("input_format")
    if len(piped) > 1:
        raise ParameterError(
            f"{' and '.join(spell(p.name) for p in piped)} are both '-'; "
            "only one input can come from standard input."
        )
    if not piped:
        if chosen is not None:
            raise ParameterError(
                f"{spell('input_format')} applies to an input given as '-' (standard input) only."
            )
        return values
    from . import layers

    return {**values, piped[0].name: layers.read_stdin(chosen)}


#: groups named in the one warning about groups that could not be computed
_NAMED = 10


def _check_notes(script: Script, result: Any, strict: bool) -> dict[str, str]:
    """The groups that could not be computed: one warning, or with ``strict`` an error.

    Scripts that can leave a group uncomputed declare ``strict`` and keep {group: note} in the
    result's ``attrs`` (:func:`toolbox.tables.add_notes`). Called before anything is written,
    so a strict run that fails writes nothing.
    """
    if "strict" not in script.param_map:
        return {}
    from .tables import NOTES

    notes = dict(getattr(result, "attrs", {}).get(NOTES) or {})
    if not notes:
        return {}
    names = list(notes)
    shown = ", ".join(repr(n) for n in names[:_NAMED])
    if len(names) > _NAMED:
        shown += f" and {len(names) - _NAMED} more"
    where = (
        "a note saying why in the note column"
        if "note" in getattr(result, "columns", ())
        else "the notes saying why in the output's provenance record (attrs['notes'] in Python)"
    )
    head = f"{script.name}: {len(names)} group(s) could not be computed: {shown}"
    reason = f"{names[0]!r}: {notes[names[0]].rstrip('.')}."
    if strict:
        raise PartialResultError(f"{head}, so nothing was written ({spell('strict', True)}). {reason}")
    how = "stop with exit status 3" if current_caller() == "cli" else "raise PartialResultError"
    warnings.warn(
        f"{head}; their rows have empty distances and {where}, and every other group is complete. "
        f"{reason} Pass {spell('strict', True)} to {how} instead.",
        PartialResultWarning,
        stacklevel=4,
    )
    return notes


def run_script(
    script: Script, values: dict[str, Any], *, cli: bool = False, made_in: dict | None = None
) -> tuple[Any, str | None]:
    """Run ``script`` with raw parameter values; returns the result and where it was written.

    ``made_in`` (a chain's file and step) is recorded with the output's provenance. Every
    message raised below names parameters as the caller writes them: options for the command
    line (``cli``), keyword arguments for Python (see :func:`toolbox.errors.spell`).
    """
    if cli:
        words = speaking("cli", {p.name: "DATASET" for p in script.params if p.kind == "dataset"})
    elif current_caller() == "chain":  # a chain's step: the chain file's words are kept
        words = contextlib.nullcontext()
    else:
        words = speaking("python")
    with words:
        return _run_script(script, values, cli=cli, made_in=made_in)


def _run_script(
    script: Script, values: dict[str, Any], *, cli: bool, made_in: dict | None
) -> tuple[Any, str | None]:
    from . import layers  # here, not at the top: the command line's list/--help stay light
    from .kernels import thread_limit

    interrupts.check()  # the imports above are where libraries may swallow a Ctrl-C
    values = validate(script, values, cli=cli)
    runner_params = {p.name for p in script.params if p.runner}
    target = next((p for p in script.params if p.kind in RESULT_WHAT), None)
    output = values.get(target.name) if target else None
    name = next((values.get(p.name) for p in script.params if p.kind == RESULT_NAME_KIND), None)
    what = RESULT_WHAT[target.kind] if target is not None else "table"
    if values.get("output_on") == "regions" or values.get("group_shape") in ("hull", "centre"):
        what = "layer"  # the result then carries geometries
    where = dict(
        what=what,
        layer_name=name or "",
        overwrite=bool(values.get("overwrite")),
        stdout_as=values.get("output_format"),
    )
    sidecar = not values.get("no_sidecar")
    if output is not None:
        layers.check_output(output, inputs=_inputs(script, values), sidecar=sidecar, **where)
    elif values.get("output_format") is not None:
        raise ParameterError(
            f"{spell('output_format')} applies to {spell('output', '-')} (standard output) only."
        )
    if values.get("output_on") == "regions" and values.get("group_shape", "none") != "none":
        raise ParameterError(
            f"{spell('group_shape')} and {spell('output_on', 'regions')} both give the rows a geometry; "
            "choose one."
        )
    picture = values.get("map")
    if picture is not None:
        from . import maps

        maps.check_map(picture, overwrite=bool(values.get("overwrite")), wide=bool(values.get("wide")))
    values = _read_piped(script, values)
    function = script.load()
    call = {k: v for k, v in values.items() if k not in runner_params}
    # a map of group-spread draws the groups' hulls even when the output is a plain table
    borrowed = (
        picture is not None
        and call.get("group_shape") == "none"
        and values.get("output_on") != "regions"  # the regions are the shapes then
        and maps.draws_areas(script.name)
    )
    if borrowed:
        call["group_shape"] = "hull"
    # phases on stderr when it is a terminal: reading until the kernels first report, then
    # computing, then writing (see toolbox/progress.py)
    line = ProgressLine(script.name, not values.get("quiet", True) and sys.stderr.isatty())
    if "progress" in inspect.signature(function).parameters:
        call["progress"] = line
    try:
        line.phase("reading")
        with thread_limit(values.get("threads")):
            result = function(**call)
        interrupts.check()
        notes = _check_notes(script, result, bool(values.get("strict")))
        drawn = result
        if borrowed and hasattr(result, "geometry"):  # the shapes were for the map only
            import pandas as pd

            result = pd.DataFrame(result.drop(columns=result.geometry.name))
            result.attrs.update(drawn.attrs)
        written = None
        if output is not None:
            if output == "-":  # the table goes to the terminal too: clear the line first
                line.close()
            else:
                line.phase("writing")
            record = layers.provenance(script.name, values, made_in=made_in, notes=notes)
            written = layers.write_output(result, output, record=record, sidecar=sidecar, **where)
        elif isinstance(result, layers.FrameBatches):  # no file to stream into: the whole result
            result = result.frame()
        if picture is not None:
            line.phase("writing")
            if isinstance(drawn, layers.FrameBatches):  # a layer written in batches: drawn whole
                drawn = drawn.frame()
            names = [*(values.get("group_by") or ()), *([values["region_id"]] if values.get("region_id") else [])]
            shapes = "regions" if values.get("output_on") == "regions" else call.get("group_shape", "hull")
            maps.draw_map(
                script.name, drawn, picture, overwrite=bool(values.get("overwrite")), labels=names, shapes=shapes
            )
    finally:
        line.close()
    return result, written


def run(name: str, /, **params: Any) -> Any:
    """Run the manifest script ``name`` with keyword parameters and return its result.

    Parameters
    ----------
    name : str
        Script name as listed by ``pairspread list``, e.g. ``"group-spread"``.
    **params
        The script's parameters under their manifest names (``group_by``, ``tolerance``, ...).
        With ``output`` the result is also written there.

    Returns
    -------
    pandas.DataFrame
        The script's result table.

    Examples
    --------
    >>> import geopandas, shapely
    >>> pts = geopandas.GeoDataFrame(geometry=shapely.points([0, 3, 0], [0, 0, 4]), crs="EPSG:32705")
    >>> run("group-spread", data=pts, tolerance=0)["total_dist"].tolist()
    [12.0]
    """
    script = get_script(name)
    if "quiet" in script.param_map:  # no progress bar from Python unless asked for
        params.setdefault("quiet", True)
    result, _ = run_script(script, params)
    return result
