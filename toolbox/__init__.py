"""pairspread: total and mean distances between points, per group, with guaranteed bounds.

The scripts of the pack are declared in ``toolbox/manifest.toml``; each is a Python function here
(``group_spread``), a subcommand of the ``pairspread`` command line, and reachable through
:func:`run`. The estimator layer (``toolbox.estimate``: points in, sums with intervals out) is public too.

Importing the package is cheap: every public name below is loaded on first use (module
``__getattr__``), so ``pairspread list``, ``--version`` and ``--help`` never import numpy,
pandas, GDAL or numba. A script's function (``group_spread``) is built from its manifest entry
when first asked for, so a new script needs only its name in ``__all__`` here.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

from .errors import (
    GeometryError,
    InputError,
    ManifestError,
    OutputError,
    PairspreadError,
    ParameterError,
    PartialResultError,
    PartialResultWarning,
)

#: public name -> the module that defines it, imported on first access
_LAZY = {
    "run": ".runner",
    "run_chain": ".chain",
    **dict.fromkeys(
        [
            "CrossPairSums",
            "GroupPairSums",
            "PairSum",
            "PointSums",
            "cross_pair_sums",
            "directions_for_tolerance",
            "exact_pair_sum",
            "grouped_pair_sums",
            "grouped_point_sums",
            "pair_distance_sum",
            "projection_directions",
            "projection_error",
            "projection_factors",
        ],
        ".estimate",
    ),
}
_SUBMODULES = {
    "api", "chain", "cli", "errors", "estimate", "grouping", "interrupts", "kernels", "layers", "manifest", "runner", "scripts"
}

if TYPE_CHECKING:  # the names as type checkers and editors should see them
    from .chain import run_chain
    from .estimate import (
        CrossPairSums,
        GroupPairSums,
        PairSum,
        PointSums,
        cross_pair_sums,
        directions_for_tolerance,
        exact_pair_sum,
        grouped_pair_sums,
        grouped_point_sums,
        pair_distance_sum,
        projection_directions,
        projection_error,
        projection_factors,
    )
    from .runner import run


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name], __name__), name)
    elif name in _SUBMODULES:
        return importlib.import_module(f".{name}", __name__)
    else:  # the Python function of one of our manifest's scripts (group_spread, ...)
        from .api import script_function
        from .manifest import scripts

        found = [s.name for s in scripts().values() if s.pack == "pairspread" and s.python_name == name]
        if not found:
            raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
        value = script_function(found[0])
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


__all__ = [
    "__version__",
    "run",
    "run_chain",
    "keep_rows",
    "group_spread",
    "point_remoteness",
    "cross_spread",
    "spread_contrast",
    "grouped_point_sums",
    "cross_pair_sums",
    "PointSums",
    "CrossPairSums",
    "pair_distance_sum",
    "grouped_pair_sums",
    "exact_pair_sum",
    "directions_for_tolerance",
    "projection_error",
    "projection_directions",
    "projection_factors",
    "PairSum",
    "GroupPairSums",
    "PairspreadError",
    "ParameterError",
    "InputError",
    "GeometryError",
    "OutputError",
    "ManifestError",
    "PartialResultError",
    "PartialResultWarning",
]
