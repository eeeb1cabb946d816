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

from .errors import OutputError, ParameterError

__all__ = ["REMOTE_THRESHOLD", "check_map", "draw_map"]

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
        raise ParameterError(f"--map needs matplotlib, which is not installed; install it with {INSTALL_HINT}.") from exc
    matplotlib.use("Agg", force=True)  # files only: never open a window
    import matplotlib.pyplot as plt

    return plt


def check_map(path: str, *, overwrite: bool = False) -> None:
    """Refuse, before any work, a --map path that cannot be written (or matplotlib missing).

    Examples
    --------
    >>> check_map("map.jpg")
    Traceback (most recent call last):
    ...
    toolbox.errors.ParameterError: --map must name a .png file. Got 'map.jpg' instead.
    """
    if Path(path).suffix.lower() != ".png":
        raise ParameterError(f"--map must name a .png file. Got {path!r} instead.")
    folder = Path(path).parent if str(Path(path).parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"The folder of --map {str(folder)!r} does not exist; create it first.")
    if Path(path).exists() and not overwrite:
        raise OutputError(f"{path!r} already exists; pass --overwrite to replace it.")
    _pyplot()


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
            raise OutputError(f"{path!r} already exists; pass --overwrite to replace it.")
        os.chmod(tmp, 0o644)
        os.replace(tmp, target)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return str(target)


def _areas(plt, frame, title: str, units: str):
    fig, ax = plt.subplots(figsize=(8, 6.4), layout="constrained")
    values = pd.to_numeric(frame["mean_dist"], errors="coerce")
    empty = values.isna().to_numpy()
    if empty.any():
        frame[empty].plot(ax=ax, color=_EMPTY, edgecolor="white", linewidth=0.6, hatch="///")
    shown = frame[~empty]
    if len(shown):
        shown.plot(
            ax=ax,
            column=values[~empty].to_numpy(),
            cmap=_colormap(),
            edgecolor="white",
            linewidth=0.8,
            legend=True,
            legend_kwds={"label": f"mean distance between two points of the area ({units})", "shrink": 0.7},
        )
    _finish_axes(ax)
    _scale_bar(ax, units, frame.crs)
    if empty.any():
        from matplotlib.patches import Patch

        ax.legend(
            handles=[Patch(facecolor=_EMPTY, hatch="///", edgecolor="white", label="no points")],
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


def _heat(plt, table, units: str):
    matrix = table.pivot_table(index="from_group", columns="to_group", values="mean_dist", sort=False, dropna=False)
    size = max(4.5, 0.55 * max(matrix.shape) + 2.5)
    fig, ax = plt.subplots(figsize=(size + 1.5, size), layout="constrained")
    art = ax.imshow(matrix.to_numpy(dtype=float), cmap=_colormap(), aspect="auto")
    ax.set_xticks(range(matrix.shape[1]), [str(c) for c in matrix.columns], rotation=45, ha="right")
    ax.set_yticks(range(matrix.shape[0]), [str(r) for r in matrix.index])
    if matrix.size <= 225:
        values = matrix.to_numpy(dtype=float)
        top = np.nanmax(values) if np.isfinite(values).any() else 1.0
        for (i, j), v in np.ndenumerate(values):
            if np.isfinite(v):
                ax.text(j, i, f"{v:,.0f}", ha="center", va="center", fontsize=8,
                        color="white" if v > 0.6 * top else "#222222")
    ax.set_xlabel("to group")
    ax.set_ylabel("from group")
    bar = fig.colorbar(art, ax=ax, shrink=0.8)
    bar.set_label(f"mean distance between the two groups' points ({units})")
    ax.set_title("Mean straight-line distance between every pair of groups", fontsize=11, loc="left")
    return fig


def _nearest(plt, table, units: str):
    groups = table["from_group"].astype(str).to_numpy()
    values = pd.to_numeric(table["nearest_avg"], errors="coerce").to_numpy()
    fig, ax = plt.subplots(figsize=(8, max(3.0, 0.4 * len(groups) + 1.5)), layout="constrained")
    colours = _colormap()(np.nan_to_num(values / np.nanmax(values), nan=0.0)) if np.isfinite(values).any() else None
    ax.barh(range(len(groups)), np.nan_to_num(values), color=colours, edgecolor="#555555", linewidth=0.5)
    ax.set_yticks(range(len(groups)), groups)
    ax.invert_yaxis()
    ax.set_xlabel(f"mean distance to the nearest feature of the other layer or group ({units})")
    ax.set_title("How far each group's points are, on average, from their nearest counterpart", fontsize=11, loc="left")
    return fig


def draw_map(script: str, result, path: str, *, overwrite: bool = False, shapes=None, subject: str = "") -> str:
    """Draw ``result`` of ``script`` into the PNG file ``path``; returns where it went.

    Parameters
    ----------
    script : str
        The script that made the result: decides the kind of figure.
    result : pandas.DataFrame or geopandas.GeoDataFrame
        The script's result.
    path : str
        A ``.png`` file.
    overwrite : bool
        Whether an existing file may be replaced.
    shapes : geopandas.GeoDataFrame, optional
        Areas carrying ``mean_dist`` to draw instead of ``result`` (regions or group hulls).
    subject : str
        What the groups are, for the title, e.g. ``"ward"``.
    """
    plt = _pyplot()
    units = str(result["units"].dropna().iloc[0]) if "units" in result and result["units"].notna().any() else ""
    if script == "point-remoteness":
        fig = _remoteness(plt, result, units or "layer units")
    elif script == "cross-spread" and "nearest_avg" in result:
        fig = _nearest(plt, result, units)
    elif script == "cross-spread":
        fig = _heat(plt, result, units)
    else:
        frame = shapes if shapes is not None else result
        if not hasattr(frame, "geometry"):
            raise ParameterError("--map needs group shapes: use --regions, or --group-shape hull or centre.")
        what = f"each {subject}" if subject else "each group"
        fig = _areas(plt, frame.copy(), f"Mean straight-line distance between two points of {what}", units)
    try:
        return _save(fig, path, overwrite)
    finally:
        plt.close(fig)
