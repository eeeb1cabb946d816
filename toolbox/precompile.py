"""Compile the numba kernels once and keep the machine code in numba's on-disk cache.

numba compiles a kernel the first time it runs, which costs far more than the run itself (tens
of seconds on a small shared machine). ``make`` runs this module right after installing, and
again whenever a kernel source changes, so the first ``pairspread`` run after an install finds
the compiled code in the cache (``toolbox/kernels/__pycache__``) instead of compiling::

    python -m toolbox.precompile

Every compiled path runs here on a few hundred invented points, through the public kernel
functions, so whatever those call into is compiled with the argument types real runs use.
Without numba it does nothing (the kernels then use numpy) and says so.
"""

from __future__ import annotations

import pickle
import sys
import time

__all__ = ["precompile"]


def precompile() -> float | None:
    """Run every compiled kernel path once so that numba caches it; returns the seconds taken.

    Returns None when numba is not installed (nothing to compile).

    Examples
    --------
    >>> seconds = precompile()  # a fraction of a second once the cache holds everything
    >>> seconds is None or seconds >= 0
    True
    """
    try:
        import numba  # noqa: F401
    except ImportError:
        return None
    import numpy as np

    from . import estimate, kernels
    from .estimate.single_pass import OnePass
    from .kernels import energy

    start = time.perf_counter()
    rng = np.random.default_rng(20260601)
    n = 600
    x = 500_000.0 + rng.normal(0.0, 800.0, n)  # UTM-like metres, as layers hold them
    y = 6_120_000.0 + rng.normal(0.0, 500.0, n)
    codes = np.repeat(np.arange(3), n // 3)
    weights = rng.gamma(2.0, 1.5, n)
    bx, by, bw = rng.normal(0.0, 800.0, 9000), rng.normal(0.0, 500.0, 9000), rng.gamma(2.0, 1.5, 9000)
    for w in (None, weights):
        for tolerance in (0.01, 1e-6):  # the tight one also takes the spatially ordered route
            for threads in (1, None):
                estimate.grouped_pair_sums(
                    x, y, codes, 3, w, tolerance=tolerance, method="projection", threads=threads
                )
        # tight budgets on large groups take the narrow-bin kernel: weighted ones from 8,192
        # points on (unweighted from 131,072 run the same compiled code); two directions
        big = kernels.GroupLayout.build(bx, by, np.zeros(bx.size, dtype=np.int64), 1, None if w is None else bw)
        for threads in (1, None):
            kernels.projected_pair_raw(big, np.array([0]), 2, 1e-8, kernels.Ticker(None, 0), threads)
        estimate.grouped_point_sums(x, y, codes, 3, w, method="projection")
        streamed = OnePass(tolerance=0.01, method="projection")  # one-pass streaming windows
        streamed.add(x, y, w, codes, 3)
        streamed.finish()
        other = OnePass(tolerance=0.01, method="projection")  # a cluster task's state, merged
        other.add(x[::-1] + 2000.0, y[::-1], None if w is None else w[::-1], codes, 3)
        streamed.merge(pickle.loads(pickle.dumps(other)), np.array([2, 0, 1]), 3).finish()
        # group codes out of order (the layout's counting sort), and read-only arrays (from
        # Arrow buffers, say), which numba compiles apart
        shuffled = np.ascontiguousarray(codes[::-1])
        frozen = [None if a is None else a.copy() for a in (x, y, w, shuffled)]
        for a in frozen:
            if a is not None:
                a.setflags(write=False)
        for order in (codes, shuffled):
            estimate.grouped_pair_sums(x, y, order, 3, w, method="projection")
        # per-point sums put points back in input order: the layout's order, made on demand
        estimate.grouped_point_sums(x, y, shuffled, 3, w, method="projection")
        for order in (codes, frozen[3]):
            estimate.grouped_pair_sums(*frozen[:2], order, 3, frozen[2], method="projection")
        estimate.cross_pair_sums(x, y, codes, 3, w, method="projection")
        for samples in (2, 3):  # spread-contrast: energy distance (two samples) and DISCO
            energy.energy_sums(x, y, codes % samples, w, directions=8, permutations=9, seed=1)
    return time.perf_counter() - start


def main() -> int:
    seconds = precompile()
    if seconds is None:
        print("pairspread: numba is not installed; the kernels use numpy, nothing to compile")
    else:
        print(f"pairspread: compiled kernels are cached ({seconds:.1f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
