"""Maps of results (``--map PATH.png``), drawn with matplotlib.

Three kinds of figure, chosen by what the result holds:

- areas (regions with results, or group hulls) coloured by ``mean_dist``, with a labelled colour
  bar in the layer's unit and a scale bar;
- features coloured by ``remote_idx`` (point-remoteness), outlining those above
  :data:`REMOTE_THRESHOLD`;
- a heat map of the mean distance between groups (cross-spread), or a bar per group for the
  nearest-feature distance (``--nearest``).

The palette and layout are the project's own. matplotlib is an optional dependency
(``pip install 'pairspread[maps]'``); without it ``--map`` stops before any work with a message
naming that command.
"""

from __future__ import annotations

import math
import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import OutputError, ParameterError, spell

__all__ = ["REMOTE_THRESHOLD", "check_map", "draw_map", "draws_areas"]

#: features whose remote_idx exceeds this are outlined: more than twice as far from the rest of
#: their group, on average, as two members of the group are from each other
REMOTE_THRESHOLD = 2.0

#: the project's own sequential palette: pale sand to deep teal-blue
_PALETTE = ["#f6efd9", "#e7c98f", "#c98a5a", "#8f5a6e", "#3f4f7d", "#1d2f4f"]
_EMPTY = "#d9d9d9"
_OUTLINE = "#e0301e"

INSTALL_HINT = "pip install 'pairspread[maps]' (or: pip install matplotlib)"


def _pyplot():
    try:
        import matplotlib
    except ImportError as exc:
        raise ParameterError(
            f"{spell('map')} needs matplotlib, which is not installed; install it with {INSTALL_HINT}."
        ) from exc
    matplotlib.use("Agg", force=True)  # files only: never open a window
    import matplotlib.pyplot as plt

    return plt


def check_map(path: str, *, overwrite: bool = False, wide: bool = False) -> None:
    """Refuse, before any work, a --map path that cannot be written (or matplotlib missing).

    Examples
    --------
    >>> check_map("map.jpg")
    Traceback (most recent call last):
    ...
    toolbox.errors.ParameterError: 'map' must name a .png file. Got 'map.jpg' instead.
    """
    if wide:
        raise ParameterError(
            f"{spell('map')} draws cross-spread's long table as a matrix itself; drop {spell('wide')} "
            "(or draw no map)."
        )
    if Path(path).suffix.lower() != ".png":
        raise ParameterError(f"{spell('map')} must name a .png file. Got {path!r} instead.")
    folder = Path(path).parent if str(Path(path).parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"The folder of {spell('map')} {str(folder)!r} does not exist; create it first.")
    if Path(path).is_dir():
        raise OutputError(f"{spell('map')} {path!r} is a folder; name a .png file.")
    if Path(path).exists() and not overwrite:
        raise OutputError(f"The map {path!r} already exists; pass {spell('overwrite', True)} to replace it.")
    _pyplot()


def draws_areas(script: str) -> bool:
    """Whether the map of ``script`` draws each group's area (so it needs group shapes)."""
    return script == "group-spread"


def _colormap():
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list("pairspread_sand_teal", _PALETTE)


def _nice_length(span: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) near a fifth of ``span``."""
    raw = span / 5
    power = 10 ** math.floor(math.log10(raw))
    return max(f for f in (1, 2, 5, 10) if f * power <= raw or f == 1) * power


def _unit_words(units: str) -> tuple[float, str]:
    if units in ("metre", "meter", "metres"):
        return 1.0, "m"
    if units in ("US survey foot", "foot"):
        return 1.0, "ft"
    return 1.0, units or "units"


def _scale_bar(ax, units: str, crs) -> None:
    if crs is not None and getattr(crs, "is_geographic", False):
        return  # degrees have no single length
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    length = _nice_length(x1 - x0)
    _, short = _unit_words(units)
    label = f"{length:g} {short}"
    if short == "m" and length >= 1000:
        label = f"{length / 1000:g} km"
    bx, by = x0 + 0.05 * (x1 - x0), y0 + 0.05 * (y1 - y0)
    ax.plot([bx, bx + length], [by, by], color="#222222", linewidth=3, solid_capstyle="butt")
    ax.text(bx + length / 2, by + 0.015 * (y1 - y0), label, ha="center", va="bottom", fontsize=9)


def _finish_axes(ax) -> None:
    ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_xlabel("")
    ax.set_ylabel("")
    for side in ax.spines.values():
        side.set_color("#bbbbbb")


def _save(fig, path: str, overwrite: bool) -> str:
    """Write the figure beside ``path`` and rename it into place (no half-written PNG)."""
    target = Path(path)
    handle, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".png", dir=target.parent or ".")
    os.close(handle)
    try:
        fig.savefig(tmp, dpi=110)
        if target.exists() and not overwrite:
            raise OutputError(f"The map {path!r} already exists; pass {spell('overwrite', True)} to replace it.")
        os.chmod(tmp, 0o644)
        os.replace(tmp, target)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return str(target)


def _areas(plt, frame, title: str, units: str, labels=()):
    fig, ax = plt.subplots(figsize=(8, 6.4), layout="constrained")
    values = pd.to_numeric(frame["mean_dist"], errors="coerce")
    empty = values.isna().to_numpy() | frame.geometry.isna().to_numpy()
    points = frame.geometry.geom_type.isin(["Point", "MultiPoint"]).to_numpy()
    style: dict = dict(edgecolor="white", linewidth=0.8, markersize=np.where(points, 90, 0))
    if (empty & frame.geometry.notna().to_numpy()).any():
        frame[empty].plot(ax=ax, color=_EMPTY, edgecolor="white", linewidth=0.6, hatch="///")
    # largest first, so that a small group's area is not hidden under a larger one
    order = np.argsort(-frame.geometry.area.to_numpy(), kind="stable")
    frame, values, empty, style["markersize"] = frame.iloc[order], values.iloc[order], empty[order], style["markersize"][order]
    shown = frame[~empty]
    if len(shown):
        shown.plot(
            ax=ax,
            column=values[~empty].to_numpy(),
            cmap=_colormap(),
            legend=True,
            legend_kwds={"label": f"mean straight-line distance between two of its points ({units})", "shrink": 0.7},
            **{k: (v[~empty] if k == "markersize" else v) for k, v in style.items()},
        )
    from matplotlib import patheffects

    names = [c for c in labels if c in frame.columns]
    if names and 0 < len(shown) <= 40:  # name the areas, at a point inside each
        for row, place in zip(shown.itertuples(index=False), shown.geometry.representative_point(), strict=True):
            text = " / ".join(_label(getattr(row, c, None)) for c in names)
            ax.annotate(text, (place.x, place.y), ha="center", va="center", fontsize=7, color="#1a1a1a",
                        path_effects=[patheffects.withStroke(linewidth=2.2, foreground="white")])  # fmt: skip
    _finish_axes(ax)
    _scale_bar(ax, units, frame.crs)
    if empty.any():
        from matplotlib.patches import Patch

        ax.legend(
            handles=[Patch(facecolor=_EMPTY, hatch="///", edgecolor="white", label="no pair of points")],
            loc="upper right",
            frameon=False,
        )
    ax.set_title(title, fontsize=11, loc="left")
    return fig


def _remoteness(plt, frame, units: str):
    fig, ax = plt.subplots(figsize=(8, 6.4), layout="constrained")
    index = pd.to_numeric(frame["remote_idx"], errors="coerce").to_numpy()
    cmap = _colormap()
    high = np.nan_to_num(index, nan=0.0) > REMOTE_THRESHOLD
    kinds = set(frame.geometry.geom_type)
    if kinds <= {"Point", "MultiPoint"}:
        xy = np.array([(g.x, g.y) if g.geom_type == "Point" else g.centroid.coords[0] for g in frame.geometry])
        art = ax.scatter(xy[:, 0], xy[:, 1], c=index, cmap=cmap, s=9, linewidths=0)
        if high.any():
            ax.scatter(
                xy[high, 0], xy[high, 1], s=36, facecolors="none", edgecolors=_OUTLINE, linewidths=1.1
            )
    else:
        frame.plot(ax=ax, column=index, cmap=cmap, edgecolor="white", linewidth=0.4)
        if high.any():
            frame[high].boundary.plot(ax=ax, color=_OUTLINE, linewidth=1.4)
        from matplotlib.cm import ScalarMappable
        from matplotlib.colors import Normalize

        art = ScalarMappable(norm=Normalize(np.nanmin(index), np.nanmax(index)), cmap=cmap)
    bar = fig.colorbar(art, ax=ax, shrink=0.7)
    bar.set_label("remoteness: mean distance to the rest of the group\n÷ the group's mean distance between its members")
    _finish_axes(ax)
    _scale_bar(ax, units, frame.crs)
    ax.set_title(
        f"How far each feature lies from the rest of its group\n(outlined in red: more than "
        f"{REMOTE_THRESHOLD:g} times the group's typical distance, {int(high.sum())} features)",
        fontsize=11,
        loc="left",
    )
    return fig


def _label(value) -> str:
    """A group value as a tick label: a null group as (null), an empty text as ""."""
    from .tables import NULL_TEXT

    return NULL_TEXT if value is None or (not isinstance(value, str) and pd.isna(value)) else (str(value) or '""')


def _heat(plt, table, units: str, values: str = "mean_dist", what: str = ""):
    matrix = table.pivot_table(index="from_group", columns="to_group", values=values, sort=False, dropna=False)
    size = max(4.5, 0.55 * max(matrix.shape) + 2.5)
    fig, ax = plt.subplots(figsize=(size + 1.5, size), layout="constrained")
    art = ax.imshow(matrix.to_numpy(dtype=float), cmap=_colormap(), aspect="auto")
    ax.set_xticks(range(matrix.shape[1]), [_label(c) for c in matrix.columns], rotation=45, ha="right")
    ax.set_yticks(range(matrix.shape[0]), [_label(r) for r in matrix.index])
    if matrix.size <= 225:
        numbers = matrix.to_numpy(dtype=float)
        top = np.nanmax(numbers) if np.isfinite(numbers).any() else 1.0
        for (i, j), v in np.ndenumerate(numbers):
            if np.isfinite(v):
                ax.text(j, i, f"{v:,.0f}", ha="center", va="center", fontsize=8,
                        color="white" if v > 0.6 * top else "#222222")  # fmt: skip
    ax.set_xlabel("to group")
    ax.set_ylabel("from group")
    bar = fig.colorbar(art, ax=ax, shrink=0.8)
    if values == "nearest_avg":
        bar.set_label(f"mean distance from a point of the row's group\nto the nearest point of the column's ({units})")
        ax.set_title("How far each group's points are, on average, from the nearest point of every group",
                     fontsize=11, loc="left")  # fmt: skip
    else:
        bar.set_label(f"mean distance between the two groups' points ({units})")
        ax.set_title("Mean straight-line distance between every pair of groups", fontsize=11, loc="left")
    return fig


def _nearest(plt, table, units: str):
    """One bar per from-group (a single to-group), with its farthest point marked."""
    groups = [_label(g) for g in table["from_group"]]
    values = pd.to_numeric(table["nearest_avg"], errors="coerce").to_numpy()
    top = pd.to_numeric(table["nearest_max"], errors="coerce").to_numpy()
    fig, ax = plt.subplots(figsize=(8, max(3.6, 0.45 * len(groups) + 2.2)), layout="constrained")
    y = np.arange(len(groups))
    ax.barh(y, np.nan_to_num(values), color=_PALETTE[3], edgecolor="#333333", linewidth=0.5,
            label="mean over the group's points")  # fmt: skip
    ax.scatter(top, y, marker="|", s=160, color=_OUTLINE, label="the group's point farthest from any of them")
    for k, v in enumerate(values):
        if np.isfinite(v):
            ax.annotate(f"{v:,.0f}", (v, k), xytext=(4, 0), textcoords="offset points", va="center", fontsize=8)
    ax.set_yticks(y, groups)
    ax.invert_yaxis()
    target = _label(table["to_group"].iloc[0]) if len(table) else ""
    target = "the other layer" if target == "all" else f"group {target!r}"
    ax.set_xlabel(f"straight-line distance to the nearest feature of {target} ({units})")
    ax.legend(loc="lower right", frameon=False, fontsize=8)
    ax.set_title("How far each group's points are from the nearest feature, on average", fontsize=11, loc="left")
    return fig


def _contrast(plt, table):
    """Each test's energy distance with its guaranteed interval, and its p-value beside it."""
    names = [c for c in table.columns if c not in _CONTRAST_COLUMNS] or []
    if names:
        rows = [" / ".join(_label(v) for v in r) for r in table[names].itertuples(index=False)]
    else:
        rows = ["all features"] * len(table)
    energy = pd.to_numeric(table["energy"], errors="coerce").to_numpy()
    lo = pd.to_numeric(table["energy_lo"], errors="coerce").to_numpy()
    hi = pd.to_numeric(table["energy_hi"], errors="coerce").to_numpy()
    p = pd.to_numeric(table.get("p_adjusted", table["p_value"]), errors="coerce").to_numpy()
    fig, ax = plt.subplots(figsize=(8, max(3.0, 0.45 * len(rows) + 2.0)), layout="constrained")
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize

    shade = ScalarMappable(norm=Normalize(0.0, 1.0), cmap=_colormap().reversed())
    y = np.arange(len(rows))
    ax.errorbar(np.nan_to_num(energy), y, xerr=[np.nan_to_num(energy - lo), np.nan_to_num(hi - energy)],
                fmt="none", ecolor="#444444", capsize=3, linewidth=1)  # fmt: skip
    ax.scatter(np.nan_to_num(energy), y, c=shade.to_rgba(np.nan_to_num(p, nan=1.0)), s=70, edgecolors="#222222", zorder=3)
    for k, (e, v) in enumerate(zip(energy, p, strict=True)):
        if np.isfinite(e):
            ax.annotate(f"p = {v:.3g}", (e, k), xytext=(8, 6), textcoords="offset points", fontsize=8)
    ax.set_yticks(y, rows)
    ax.invert_yaxis()
    ax.axvline(0, color="#999999", linewidth=0.8)
    samples = str(table["samples"].iloc[0]) if "samples" in table and len(table) else ""
    units = str(table["units"].iloc[0]) if "units" in table and len(table) else "layer units"
    ax.set_xlabel(f"energy distance between the samples ({units}; 0: laid out alike); bars: guaranteed interval")
    bar = fig.colorbar(shade, ax=ax, shrink=0.8)
    bar.set_label("p-value (adjusted for the number of tests):\nsmall values mean the layouts differ")
    ax.set_title(f"Are the samples {samples} laid out differently?", fontsize=11, loc="left")
    return fig


#: spread-contrast's own columns; the others are the --group-by fields naming each test
_CONTRAST_COLUMNS = {
    "samples", "n_samples", "sizes", "n_points", "within_means", "between_mean", "energy", "energy_lo",
    "energy_hi", "disco_between", "disco_within", "f_ratio", "p_value", "p_adjusted", "adjustment",
    "permutations", "seed", "method", "directions", "units", "note",
}  # fmt: skip


def _features(plt, frame, units: str):
    """The features of a layer, in one colour, with a scale bar (keep-rows)."""
    fig, ax = plt.subplots(figsize=(8, 6.4), layout="constrained")
    if len(frame):
        frame.plot(ax=ax, color=_PALETTE[4], edgecolor="white", linewidth=0.4, markersize=10)
    _finish_axes(ax)
    _scale_bar(ax, units, frame.crs)
    ax.set_title(f"The {len(frame):,} features kept", fontsize=11, loc="left")
    return fig


def _layer_units(frame) -> str:
    crs = getattr(frame, "crs", None)
    if crs is None:
        return "layer units"
    if crs.is_geographic:
        return "degree"
    return crs.axis_info[0].unit_name if crs.axis_info else "layer units"


#: how a map's title says what the coloured shapes are
_SHAPE_WORDS = {
    "hull": "each area is the convex hull of the group's points",
    "centre": "each dot is the group's weighted mean centre",
    "regions": "each area is a region, measured over the points inside it",
}


def draw_map(
    script: str, result, path: str, *, overwrite: bool = False, labels=(), shapes: str = "hull"
) -> str:
    """Draw ``result`` of ``script`` into the PNG file ``path``; returns where it went.

    Parameters
    ----------
    script : str
        The script that made the result: decides the kind of figure.
    result : pandas.DataFrame or geopandas.GeoDataFrame
        The script's result; group-spread's must carry shapes (regions or group hulls).
    path : str
        A ``.png`` file.
    overwrite : bool
        Whether an existing file may be replaced.
    labels : sequence of str
        Fields that name the groups (``--group-by``, the region id): areas are labelled with them.
    shapes : {"hull", "centre", "regions"}
        What the shapes of an area map are, for its title.
    """
    plt = _pyplot()
    if script == "cross-spread" and "from_group" not in result:  # rows put onto the regions
        source = next((c for c in reversed(labels) if c in result), None)
        result = result.assign(from_group=result[source]) if source is not None else result
    units = str(result["units"].dropna().iloc[0]) if "units" in result and result["units"].notna().any() else ""
    if script == "point-remoteness":
        fig = _remoteness(plt, result, units or _layer_units(result))
    elif script == "cross-spread" and "nearest_avg" in result and result["to_group"].nunique(dropna=False) == 1:
        fig = _nearest(plt, result, units)
    elif script == "cross-spread" and "to_group" in result:
        fig = _heat(plt, result, units, "nearest_avg" if "nearest_avg" in result else "mean_dist")
    elif script == "spread-contrast":
        fig = _contrast(plt, result)
    elif script == "keep-rows":
        fig = _features(plt, result, _layer_units(result))
    else:
        if not hasattr(result, "geometry"):
            raise ParameterError(
                f"{spell('map')} needs group shapes: use {spell('group_shape', 'hull')} or the region layer."
            )
        what = "each " + " / ".join(labels) if labels else "each group"
        words = _SHAPE_WORDS.get(shapes, _SHAPE_WORDS["hull"])
        if pd.to_numeric(result["mean_dist"], errors="coerce").isna().any():
            words += "; hatched grey: no pair of points to measure"
        title = f"Mean distance between two points of {what}\n({words})"
        fig = _areas(plt, result.copy(), title, units or _layer_units(result), labels)
    try:
        return _save(fig, path, overwrite)
    finally:
        plt.close(fig)
