"""Per-group count, weight, extent and weighted coordinate sums of a batch of points, in one pass.

The first pass over a layer read in batches needs these for every batch; numpy's grouped
reductions (``bincount``, ``minimum.at``) take one pass over the points per value, a compiled
loop one pass for all of them. Without numba the numpy path gives the same numbers (sums may
differ in the last bits: a different order of additions).
"""

from __future__ import annotations

import functools

import numpy as np

__all__ = ["SUMMARY_FIELDS", "group_summary"]

#: the columns of :func:`group_summary`, in order
SUMMARY_FIELDS = ("n_points", "weight_sum", "xmin", "xmax", "ymin", "ymax", "wx", "wy")


@functools.cache
def _compiled():
    try:
        from numba import njit
    except ImportError:
        return None

    @njit(cache=True, nogil=True)
    def summary(codes, n_groups, x, y, w, weighted):
        out = np.zeros((n_groups, 8))
        out[:, 2] = np.inf
        out[:, 3] = -np.inf
        out[:, 4] = np.inf
        out[:, 5] = -np.inf
        for i in range(codes.size):
            row = out[codes[i]]
            wi = w[i] if weighted else 1.0
            row[0] += 1.0
            row[1] += wi
            row[2] = min(row[2], x[i])
            row[3] = max(row[3], x[i])
            row[4] = min(row[4], y[i])
            row[5] = max(row[5], y[i])
            row[6] += wi * x[i]
            row[7] += wi * y[i]
        return out

    return summary


def group_summary(codes, n_groups: int, x, y, weights=None) -> dict[str, np.ndarray]:
    """Per group: number of points, weight sum, extent and weighted sums of x and y.

    Parameters
    ----------
    codes : ndarray of int
        Group of every point, in ``[0, n_groups)``.
    n_groups : int
        Number of groups (groups without points get 0 sums and infinite extents).
    x, y : ndarray
        Coordinates.
    weights : ndarray, optional
        Weights (all ones when None).

    Returns
    -------
    dict of str to ndarray
        One array per name in ``SUMMARY_FIELDS``.

    Examples
    --------
    >>> s = group_summary(np.array([0, 1, 0]), 2, np.array([0.0, 5, 2]), np.array([1.0, 1, 3]))
    >>> s["n_points"].tolist(), s["xmax"].tolist(), s["wy"].tolist()
    ([2.0, 1.0], [2.0, 5.0], [4.0, 1.0])
    """
    codes = np.ascontiguousarray(codes, dtype=np.int64)
    x = np.ascontiguousarray(x, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    weighted = weights is not None
    w = np.ascontiguousarray(weights, dtype=np.float64) if weighted else np.zeros(1)
    compiled = _compiled()
    if compiled is not None:
        table = compiled(codes, int(n_groups), x, y, w, weighted)
        return {name: table[:, k].copy() for k, name in enumerate(SUMMARY_FIELDS)}
    wv = w if weighted else np.ones(x.size)
    out = {
        "n_points": np.bincount(codes, minlength=n_groups).astype(np.float64),
        "weight_sum": np.bincount(codes, wv, minlength=n_groups),
    }
    for name, values, ufunc, start in (
        ("xmin", x, np.minimum, np.inf),
        ("xmax", x, np.maximum, -np.inf),
        ("ymin", y, np.minimum, np.inf),
        ("ymax", y, np.maximum, -np.inf),
    ):
        out[name] = np.full(n_groups, start)
        ufunc.at(out[name], codes, values)
    out["wx"] = np.bincount(codes, wv * x, minlength=n_groups)
    out["wy"] = np.bincount(codes, wv * y, minlength=n_groups)
    return out
