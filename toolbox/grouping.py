"""From attribute columns to what the kernels take: group codes, weights, planar units.

Shared by every script, so that grouping, weight checks and CRS rules mean the same thing
everywhere.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import InputError, spell
from .tables import feature_ids

__all__ = ["Grouping", "group_features", "feature_weights", "planar_units", "group_namer"]


@dataclass(frozen=True)
class Grouping:
    """Group code of every feature and the table of group keys (one row per code)."""

    codes: np.ndarray
    keys: pd.DataFrame

    @property
    def count(self) -> int:
        return len(self.keys)


def group_features(attributes: pd.DataFrame, fields: Sequence[str]) -> Grouping:
    """Code the features by the combination of their values in ``fields``.

    No fields: every feature is in one group (and ``keys`` has no columns). Null values form
    their own group; groups are ordered by their keys, nulls last.
    """
    n = len(attributes)
    if not fields:
        return Grouping(np.zeros(n, dtype=np.int64), pd.DataFrame(index=range(1)))
    grouped = attributes.groupby(list(fields), dropna=False, sort=True, observed=True)
    codes = grouped.ngroup().to_numpy(dtype=np.int64)
    keys = grouped.size().reset_index()[list(fields)]
    return Grouping(codes, keys.reset_index(drop=True))


def group_namer(keys: pd.DataFrame):
    """A function naming group ``code`` for messages, e.g. ``group (zone='harbour')``."""

    def name(code: int) -> str:
        if keys.shape[1] == 0:
            return "the whole layer"
        row = keys.iloc[int(code)]
        values = ", ".join(f"{field}={None if pd.isna(v) else v!r}" for field, v in row.items())
        return f"group ({values})"

    return name


def feature_weights(attributes: pd.DataFrame, field: str | None, label: str) -> np.ndarray | None:
    """Validated non-negative weights from ``field`` (None when no weight field is given)."""
    if field is None:
        return None
    column = attributes[field]
    if not (pd.api.types.is_numeric_dtype(column) or column.isna().all()) or pd.api.types.is_bool_dtype(
        column
    ):
        kind = column.dtype.categories.dtype if isinstance(column.dtype, pd.CategoricalDtype) else column.dtype
        raise InputError(
            f"The weight field {field!r} of {label} holds {kind} values, not numbers; "
            "choose a numeric field."
        )
    values = column.to_numpy(dtype=np.float64, na_value=np.nan)
    # a finite sum and a non-negative minimum mean every weight is fine (NaN fails both): two
    # reductions; only a batch that fails them pays for naming the bad features
    with np.errstate(over="ignore", invalid="ignore"):
        if values.size == 0 or (values.min() >= 0 and np.isfinite(values.sum())):
            return values
    problems = {
        "null or NaN": np.isnan(values),
        "infinite": np.isinf(values),
        "negative": values < 0,
    }
    for what, bad in problems.items():
        if bad.any():
            rows = np.flatnonzero(bad)
            raise InputError(
                f"{rows.size} feature(s) of {label} have a {what} weight in {field!r} "
                f"({feature_ids(attributes, rows)}); weights must be finite and "
                f"non-negative: fix them or filter them out with {spell('where')}."
            )
    return values


def planar_units(crs, label: str) -> str:
    """Name of the linear unit of a projected CRS; refuses geographic ones.

    A missing CRS is allowed with a warning: distances are then in the layer's own units.
    Which distance a layer gets (planar, geodesic, or planar after --crs) is decided first by
    :func:`toolbox.estimate.distance_setup`; this is its planar branch.
    """
    if crs is None:
        warnings.warn(
            f"{label} has no CRS; distances are computed in its own coordinate units "
            "(units reported as 'unknown').",
            UserWarning,
            stacklevel=3,
        )
        return "unknown"
    if crs.is_geographic:
        raise InputError(
            f"{label} is in a geographic CRS ({crs.name}), so its coordinates are degrees and planar "
            "distances would be wrong; use geodesic distances (the default for such layers) or "
            f"reproject it with {spell('crs')} to a projected CRS in metres (a UTM zone or a national grid)."
        )
    axes = crs.axis_info
    return axes[0].unit_name if axes else "unknown"
