"""Cost model of every kernel, in seconds, in one place.

Measured on the project's 2-core machines. The estimator layer uses these to choose, per group,
between exact sums and the projection estimate, and between a local projection and exact
geodesic sums; nothing else retypes them.
"""

from __future__ import annotations

import numpy as np

#: one ordered pair of an exact planar sum with cdist blocks
EXACT_PAIR = 2.5e-9
#: one geodesic distance (pyproj.Geod.inv)
GEODESIC_PAIR = 1.0e-6
#: one local projection: PROJ set-up, forward, ~425 scale-factor samples at ~6 µs each
FRAME = 4.0e-3


def exact(n):
    """Exact planar pair sums of a group of ``n`` points."""
    return EXACT_PAIR * n * n


def projection(n, m, weighted):
    """Projection estimate of a group of ``n`` points with ``m`` directions.

    Per point and direction: projection, row sort (argsort and gathers when weighted), sums.
    """
    per = (25e-9 if weighted else 12e-9) + (2.5e-9 if weighted else 1e-9) * np.log2(n + 1)
    return 2e-5 + m * n * per


def planar(n, m, weighted=True):
    """The cheaper of the two planar routes for a group of ``n`` points."""
    n = np.asarray(n, dtype=np.float64)
    return np.minimum(projection(n, m, weighted), exact(n))


def exact_geodesic(n):
    """Exact geodesic pair sums of a group of ``n`` points."""
    n = np.asarray(n, dtype=np.float64)
    return GEODESIC_PAIR * n * (n - 1) / 2


def cross_block(n_groups: int) -> int:
    """Points per block of the cross-group kernel.

    Cross-block work is 2·(n/β)·G² multiply-adds in BLAS (~0.07 ns each), in-block work n·β/2
    pair terms in numpy (~40 ns each); the sum is smallest near β = 0.08·G.
    """
    return int(np.clip(round(0.08 * n_groups), 1, 1024))


def cross_projection(n, g, m, compiled=True):
    """Projection estimate of all cross-group sums of ``n`` points in ``g`` groups.

    Compiled sweep: per point and direction, the sort and the sweep (~150 ns) and one
    multiply-add per open group (at worst every group, ~0.25 ns each), plus G² settling terms;
    numpy blocks (without numba): see :func:`cross_block`.
    """
    if compiled:
        return m * (n * (150e-9 + 0.25e-9 * g) + 3e-9 * g * g)
    beta = cross_block(g)
    return m * (n * 40e-9 + (n / beta) * g * g * 0.14e-9 + n * beta * 20e-9)


def cross_geodesic_projection(n, m):
    """A local projection of ``n`` points and the planar cross kernel (rough, per point)."""
    return FRAME + m * n * 1e-7
