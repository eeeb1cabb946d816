"""``spread-contrast``: are the samples laid out differently? Energy distance and DISCO tests."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from .. import estimate, grouping, tables
from ..errors import InputError, ParameterError, spell
from ..kernels.energy import check_permutations, holm_adjust
from ._common import Places, read_measured

_SAMPLE = "__sample__"


def _setup(data, layer, compare, group_by, weight, to, to_layer, to_weight, distance, crs, where, engine, places):
    """Read → the estimator's distance set-up → test groups → weights (features as frequencies).

    Returns the points (in the set-up's frame: planar, or longitude and latitude), the feature
    of every point, its weight, the sample value of every feature and the test groups.
    """
    fields = [*group_by, *([compare] if compare else []), *([weight] if weight else [])]
    how = dict(engine=engine, distance=distance, crs=crs, script="spread-contrast", places=places)
    first, setup = read_measured(data, layer=layer, fields=fields, where=where, **how)
    parts = [(first, weight, None)]
    if to is not None:
        second, _ = read_measured(to, layer=to_layer, fields=[*group_by, *([to_weight] if to_weight else [])], where=None, setup=setup, **how)
        names = (first.label, second.label) if first.label != second.label else ("first layer", "second layer")
        parts = [(first, weight, names[0]), (second, to_weight, names[1])]
    xs, ys, features, attrs, w = [], [], [], [], []
    for points, field, name in parts:
        weights = grouping.feature_weights(points.attributes, field, points.label)
        one = estimate.Points.from_layer(setup, points.x, points.y, points.crs, points.label, None, 1,
                                         None if weights is None else weights[points.feature],
                                         note=crs is None and name is not None)  # fmt: skip
        xs.append(one.x), ys.append(one.y), features.append(points.feature + sum(len(a) for a in attrs))
        w.append(np.ones(one.x.size) if weights is None else one.weights)
        attrs.append(points.attributes.assign(**{_SAMPLE: name}) if name is not None else points.attributes)
    table = pd.concat(attrs, ignore_index=True)
    groups = grouping.group_features(table, group_by)
    values = table[_SAMPLE if to is not None else compare]
    return (np.concatenate(xs), np.concatenate(ys), np.concatenate(features), np.concatenate(w),
            values, groups, setup)  # fmt: skip


def spread_contrast(
    data, *, layer, compare, group_by, weight, to, to_layer, to_weight, tolerance, method, permutations, seed,
    distance, crs, where, engine, as_points, progress=None,
) -> pd.DataFrame:  # fmt: skip
    """One row per test (per group): the samples' mean distances, energy statistics and p-value."""
    group_by = list(group_by or ())
    if (compare is None) == (to is None):
        raise ParameterError(
            f"spread-contrast needs exactly one of {spell('compare')} (the field whose values are the "
            f"samples) and {spell('to')} (a second layer: the two layers are the samples)."
        )
    if as_points == "fill":
        raise ParameterError(
            f"spread-contrast takes each feature as one point carrying its weight as a frequency, so "
            f"{spell('as_points', 'fill')} (the weight spread over the feature) has no bound for its "
            f"statistics here; use {spell('as_points', 'centroid')} or {spell('as_points', 'inside')}."
        )
    permutations = check_permutations(permutations)
    x, y, feature, w, values, groups, setup = _setup(
        data, layer, compare, group_by, weight, to, to_layer, to_weight, distance, crs, where, engine,
        Places(as_points=as_points),
    )
    if values.isna().any():
        warnings.warn(f"{int(values.isna().sum())} feature(s) without a value in {compare!r} are left out.", UserWarning, stacklevel=2)
    seed = int(np.random.SeedSequence(seed).entropy % 2**63) if seed is None else int(seed)
    streams = np.random.SeedSequence(seed).spawn(groups.count)
    rows = []
    for code in range(groups.count):
        members = np.flatnonzero((groups.codes == code) & values.notna().to_numpy())
        names, labels = np.unique(values.to_numpy()[members].astype(str), return_inverse=True)
        names = names.tolist()
        unit_of = np.full(len(values), -1)
        unit_of[members] = np.arange(members.size)
        at = np.flatnonzero(unit_of[feature] >= 0)
        sizes = np.bincount(labels[unit_of[feature[at]]], minlength=len(names))
        row = {"samples": " | ".join(names), "n_samples": len(names), "n_points": at.size}
        row["sizes"] = " | ".join(str(c) for c in sizes)
        row["note"] = _problem(names, sizes, np.bincount(labels[unit_of[feature[at]]], w[at], len(names)), compare or "the layers")
        if row["note"] is None:
            done, weighted = code * permutations, bool(weight or to_weight)
            points = estimate.Points.build(x[at], y[at], weights=w[at] if weighted else None, distance=setup)
            try:
                r = estimate.energy_test(points, labels, units=unit_of[feature[at]], tolerance=tolerance, method=method,
                                         permutations=permutations, seed=streams[code],
                                         progress=None if progress is None else lambda i, _, d=done: progress(d + i, groups.count * permutations))  # fmt: skip
            except InputError as exc:  # this group cannot be tested (e.g. too wide): a note, not an error
                row["note"] = str(exc)
                rows.append(row)
                continue
            row.update(within_means=" | ".join(f"{v:.6g}" for v in r.within_mean), between_mean=r.between_mean,
                       energy=r.energy, energy_lo=r.energy_lo, energy_hi=r.energy_hi, disco_between=r.disco_between,
                       disco_within=r.disco_within, f_ratio=r.f_ratio, p_value=r.p_value, method=r.method,
                       directions=r.directions)  # fmt: skip
        rows.append(row)
    table = pd.concat([groups.keys, pd.DataFrame(rows)], axis=1)
    for column in ("within_means", "between_mean", "energy", "energy_lo", "energy_hi", "disco_between",
                   "disco_within", "f_ratio", "p_value", "method", "directions"):  # fmt: skip
        if column not in table:
            table[column] = np.nan
    tested = int(table["p_value"].notna().sum())
    table["p_adjusted"] = holm_adjust(table["p_value"].to_numpy(dtype=float))
    table["adjustment"] = f"Holm over {tested} tests" if tested > 1 else "none (one test)"
    table["permutations"], table["seed"], table["units"] = permutations, seed, setup.units
    order = [*groups.keys.columns, "samples", "n_samples", "sizes", "n_points", "within_means", "between_mean",
             "energy", "energy_lo", "energy_hi", "disco_between", "disco_within", "f_ratio", "p_value",
             "p_adjusted", "adjustment", "permutations", "seed", "method", "directions", "units", "note"]  # fmt: skip
    table["method"] = table["method"].astype("string")
    table["directions"] = table["directions"].astype("Int64")
    table = table[order].copy()
    return tables.add_notes(table, table["note"], tables.noted_groups(tables.group_labels(groups.keys), table["note"]))


def _problem(names, counts, weights, what):
    """Why a group cannot be tested (a note for its row), or None."""
    if len(names) < 2:
        only = f" (only {names[0]!r})" if names else ""
        return f"one value of {what}{only} in this group: nothing to compare"
    small = [f"{n!r} has {c} point{'s' if c != 1 else ''}" for n, c in zip(names, counts, strict=True) if c < 2]
    if small:
        return "; ".join(small) + f": a sample needs at least 2 points (group more coarsely or drop that value with {spell('where')})"
    empty = [repr(n) for n, v in zip(names, weights, strict=True) if not v > 0]
    if empty:
        return f"sample(s) {', '.join(empty)} have zero total weight: nothing to compare"
    return None
