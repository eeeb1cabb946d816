"""Points into the cells of a binned state: which cell a point falls in on each direction, and
adding points to the cells (per cell the weight, weighted position, squared weights, count and
the extreme positions), in place.

One compiled pass over the points updates all six; numpy needs four ``bincount`` calls, each
allocating an array as long as the state, and two slow ``ufunc.at`` calls. Without numba the
numpy path runs (same sums, the same additions in the same order).
"""

from __future__ import annotations

import functools

import numpy as np

__all__ = ["add_to_cells", "cells_and_positions"]


@functools.cache
def _compiled():
    try:
        from numba import njit
    except ImportError:
        return None

    @njit(cache=True, nogil=True)
    def add(cells, bounds, cell, p, w):
        for i in range(cell.size):
            c = cell[i]
            wi = w[i]
            cells[0, c] += wi
            cells[1, c] += wi * p[i]
            cells[2, c] += wi * wi
            cells[3, c] += 1.0
            if p[i] < bounds[0, c]:
                bounds[0, c] = p[i]
            if p[i] > bounds[1, c]:
                bounds[1, c] = p[i]

    @njit(cache=True, nogil=True)
    def locate(x, y, groups, offset, bins, radius, cos_t, sin_t):
        m, n = cos_t.size, x.size
        cell = np.empty((m, n), dtype=np.int64)
        p = np.empty((m, n))
        for k in range(m):
            c, s = cos_t[k], sin_t[k]
            for i in range(n):
                g = groups[i]
                b, r = bins[g], radius[g]
                scale = b / (2 * r) if r > 0 else 0.0
                v = x[i] * c + y[i] * s
                index = int(np.floor((v + r) * scale))
                index = min(max(index, 0), b - 1)
                cell[k, i] = offset[g] + k * b + index
                p[k, i] = v
        return cell, p

    return add, locate


def cells_and_positions(x, y, groups, offset, bins, radius, cos_t, sin_t):
    """Flat cell index and projected position of every point on every direction, (m, n) each.

    Point i of group g projects to ``p = x·cos θ_k + y·sin θ_k`` and falls in bin
    ``floor((p + r_g)·B_g / (2 r_g))`` (clipped to the group's bins) of direction k; its flat
    cell is ``offset_g + k·B_g + bin``. Every pass of a computation must locate points with
    this one function, so that a point lands in the same cell each time.

    Examples
    --------
    >>> cell, p = cells_and_positions(np.array([1.0]), np.array([0.0]), np.array([0]), np.array([0]),
    ...                               np.array([4]), np.array([2.0]), np.array([1.0, 0.0]), np.array([0.0, 1.0]))
    >>> cell.ravel().tolist(), p.ravel().tolist()
    ([3, 6], [1.0, 0.0])
    """
    args = [
        np.ascontiguousarray(x, dtype=np.float64),
        np.ascontiguousarray(y, dtype=np.float64),
        np.ascontiguousarray(groups, dtype=np.int64),
        np.ascontiguousarray(offset, dtype=np.int64),
        np.ascontiguousarray(bins, dtype=np.int64),
        np.ascontiguousarray(radius, dtype=np.float64),
        np.ascontiguousarray(cos_t, dtype=np.float64),
        np.ascontiguousarray(sin_t, dtype=np.float64),
    ]
    compiled = _compiled()
    if compiled is not None:
        return compiled[1](*args)
    x, y, groups, offset, bins, radius, cos_t, sin_t = args
    p = x[None, :] * cos_t[:, None] + y[None, :] * sin_t[:, None]
    r, b = radius[groups], bins[groups]
    scale = np.divide(b, 2 * r, out=np.zeros_like(r), where=r > 0)
    index = np.floor((p + r) * scale).astype(np.int64)
    np.clip(index, 0, b - 1, out=index)
    return offset[groups] + np.arange(cos_t.size)[:, None] * b + index, p


def add_to_cells(cells: np.ndarray, bounds: np.ndarray, cell, p, w) -> None:
    """Add points with flat cell index ``cell``, position ``p`` and weight ``w`` to the cells.

    ``cells`` is (4, size): weight, weighted position, squared weights and count; ``bounds``
    (2, size): the smallest and largest position. Both are updated in place.

    Examples
    --------
    >>> cells, bounds = np.zeros((4, 2)), np.array([[np.inf] * 2, [-np.inf] * 2])
    >>> add_to_cells(cells, bounds, np.array([1, 1]), np.array([0.5, 2.0]), np.array([1.0, 3.0]))
    >>> cells[:, 1].tolist(), bounds[:, 1].tolist()
    ([4.0, 6.5, 10.0, 2.0], [0.5, 2.0])
    """
    cell = np.ascontiguousarray(cell, dtype=np.int64)
    p = np.ascontiguousarray(p, dtype=np.float64)
    w = np.ascontiguousarray(w, dtype=np.float64)
    compiled = _compiled()
    if compiled is not None and cells.flags.c_contiguous and bounds.flags.c_contiguous:
        compiled[0](cells, bounds, cell, p, w)
        return
    size = cells.shape[1]
    cells[0] += np.bincount(cell, w, size)
    cells[1] += np.bincount(cell, w * p, size)
    cells[2] += np.bincount(cell, w * w, size)
    cells[3] += np.bincount(cell, minlength=size)
    np.minimum.at(bounds[0], cell, p)
    np.maximum.at(bounds[1], cell, p)
