"""Python functions generated from the manifest, one per script.

``toolbox.group_spread(data, *, group_by=None, ...)`` is built here from the manifest entry of
``group-spread``: its signature and docstring come from the declared parameters, and calling it
goes through :func:`toolbox.run`, so the validator and the output handling are the same ones the
command line uses.
"""

from __future__ import annotations

import inspect
from typing import Any

from .manifest import Script, get_script, validate
from .runner import run_script

__all__ = ["script_function"]


#: the Python type of each parameter kind, as the generated docstrings state it
_PYTHON_TYPES = {
    "dataset": "str, os.PathLike or geopandas.GeoDataFrame",
    "second-dataset": "str, os.PathLike or geopandas.GeoDataFrame",
    "columns": "str or list of str",
    "number": "float",
    "integer": "int",
    "flag": "bool",
    "result-table-file": "str or os.PathLike",
    "result-layer-file": "str or os.PathLike",
    "picture-file": "str or os.PathLike",
}


def _docstring(script: Script) -> str:
    lines = [script.summary, "", "Parameters", "----------"]
    for p in script.params:
        kind = _PYTHON_TYPES.get(p.kind, "str")
        if p.kind == "choice":
            kind = "{" + ", ".join(repr(c) for c in p.choices) + "}"
        default = "" if p.kind == "dataset" else f", default {p.default!r}"
        lines += [f"{p.name} : {kind}{default}", f"    {p.help}"]
    lines += [
        "",
        "Returns",
        "-------",
        "pandas.DataFrame",
        "    The result table (also written to ``output`` if given).",
    ]
    lines += ["", f"Generated from the manifest entry {script.name!r}; see docs/scripts.md."]
    return "\n".join(lines)


def script_function(name: str):
    """Build the Python function of the manifest script ``name``."""
    script = get_script(name)
    params = []
    for p in script.params:
        if p.kind == "dataset":
            params.append(inspect.Parameter(p.name, inspect.Parameter.POSITIONAL_OR_KEYWORD))
        else:
            default = True if p.name == "quiet" else p.default
            params.append(inspect.Parameter(p.name, inspect.Parameter.KEYWORD_ONLY, default=default))
    signature = inspect.Signature(params)

    def function(*args: Any, **kwargs: Any):
        try:
            bound = signature.bind(*args, **kwargs)
        except TypeError:
            validate(script, kwargs)  # names the unknown parameter and suggests close ones
            raise
        bound.apply_defaults()
        result, _ = run_script(script, dict(bound.arguments))
        return result

    function.__name__ = function.__qualname__ = script.python_name
    function.__signature__ = signature  # type: ignore[attr-defined]
    function.__doc__ = _docstring(script)
    function.__module__ = "toolbox"
    return function
