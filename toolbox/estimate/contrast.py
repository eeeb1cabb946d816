"""Energy statistics with guaranteed intervals: the estimator side of ``spread-contrast``.

The kernel (:func:`toolbox.kernels.energy.energy_sums`) returns raw sums: the summed projections
(or exact sums) of all pairs and of each sample's pairs, their rounding allowances, and the
permutation p-value of the statistic it computed. Here they become the energy distance and
DISCO's components with their guaranteed intervals, with the estimator's interval arithmetic
(:func:`~toolbox.estimate.interval.interval`) and, for geodesic points, the local map projection
of :func:`~toolbox.estimate.local_frame` with its distortion folded in
(:func:`~toolbox.estimate.interval.fold_distortion`). See docs/method.md, section 8.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..errors import InputError, ParameterError, spell
from ..kernels import UNIT_ROUNDOFF, Raw
from ..kernels.energy import EXACT_MAX_POINTS, energy_sums
from .frames import local_frame
from .interval import check_method, fold_distortion, forward_slack, interval
from .points import Points

__all__ = ["EnergyTest", "energy_test"]


@dataclass(frozen=True)
class EnergyTest:
    """Result of :func:`energy_test`: the statistics with their guaranteed interval and p-value.

    Per-sample arrays have one entry per sample label. Totals are over unordered pairs
    ``Σ_{i<j} w_i w_j d_ij``. ``energy`` is the energy distance for two samples and, for k
    samples, DISCO's between component divided by ``Σ_{a<b} W_a W_b / (2N)`` (the pair-size
    weighted mean of the pairwise energy distances); ``energy_lo``/``energy_hi`` bound the exact
    value. The permutation statistic is ``disco_between``.
    """

    n_points: np.ndarray
    weight_sum: np.ndarray
    within_total: np.ndarray
    within_pair_weight: np.ndarray
    between_total: float
    between_pair_weight: float
    energy: float
    energy_lo: float
    energy_hi: float
    disco_between: float
    disco_within: float
    f_ratio: float
    p_value: float
    permutations: int
    method: str
    directions: int

    @property
    def within_mean(self) -> np.ndarray:
        """Mean distance over pairs of distinct points of each sample (as group-spread reports)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.within_pair_weight > 0, self.within_total / self.within_pair_weight, np.nan)

    @property
    def between_mean(self) -> float:
        """Mean distance over pairs of points from different samples."""
        return self.between_total / self.between_pair_weight if self.between_pair_weight > 0 else math.nan


def _cost_exact(n, k):
    # seconds per relabelling: a (n × n)·(n × k) product (measured: ~0.4 ns per multiply-add)
    return 0.4e-9 * n * n * k


def _cost_projection(n, m):
    # seconds per relabelling: one pass per direction (measured: ~2 ns per point and direction)
    return 2e-9 * n * m


def energy_test(
    points: Points,
    labels,
    *,
    units=None,
    n_samples: int | None = None,
    tolerance: float = 0.01,
    method: str = "auto",
    permutations: int = 999,
    seed=None,
    orders=None,
    progress: Callable[[int, int], None] | None = None,
) -> EnergyTest:
    """Energy distance (two samples) or DISCO (k samples) with a permutation p-value.

    Parameters
    ----------
    points : Points
        All points of all samples, with their weights (frequencies: a point of weight 3 counts
        as three at the same place) and distance kind; their groups are not used. Geodesic
        points are projected to a local azimuthal equidistant frame whose distortion is folded
        into the interval.
    labels : array_like of int
        Sample code of every unit, in ``[0, n_samples)``; the units are what permutations
        shuffle.
    units : array_like of int, optional
        Unit (index into ``labels``) of every point; default: every point is its own unit.
    n_samples : int, optional
        Number of samples (default ``labels.max() + 1``).
    tolerance : float
        Guaranteed relative error of each pair sum, in [0, 0.5]; 0 means exact sums (planar
        points only).
    method : {"auto", "exact", "projection"}
        ``auto``: exact sums when they are cheaper than the projection (tiny samples only).
    permutations : int
        Number of random relabellings for the p-value, in [1, 1,000,000].
    seed : int or numpy.random.SeedSequence, optional
        Seed of the relabellings; the same seed gives the same p-value in either mode.
    orders : array_like of int, optional
        Explicit relabellings instead of random ones: each row a permutation ``π`` of the units,
        read as a reordered distance matrix is: unit ``π[i]`` takes the label of unit ``i``
        (lets a test replay another program's permutations).
    progress : callable, optional
        Called as ``progress(done, total)`` in relabellings.

    Returns
    -------
    EnergyTest

    Examples
    --------
    >>> x = [0.0, 1.0, 10.0, 11.0]
    >>> r = energy_test(Points.build(x, [0.0] * 4), [0, 0, 1, 1], tolerance=0, permutations=99, seed=1)
    >>> round(r.energy, 6), r.method  # 2·10 − 0.5 − 0.5
    (19.0, 'exact')
    """
    m = check_method(method, tolerance)
    x, y, frame = points.x, points.y, None
    if points.distance.kind == "geodesic":
        if m == 0:
            raise ParameterError(
                "Exact sums (tolerance 0, method exact) are planar only; for geodesic distances use "
                f"a tolerance above 0 (the interval then includes the local projection), or {spell('crs')}."
            )
        frame = local_frame(x, y, points.distance.a, points.distance.f)
        if not frame.usable:
            raise InputError(f"The points {frame.reason}: too wide for one local projection; pass {spell('crs')}.")
        x, y, method = frame.x, frame.y, "projection"
    n, k = np.size(x), int(n_samples if n_samples is not None else np.max(labels) + 1)
    exact = m == 0 or (method == "auto" and _cost_exact(n, k) <= _cost_projection(n, m))
    if exact and n > EXACT_MAX_POINTS:
        raise ParameterError(
            f"Exact sums keep the {n:,} × {n:,} distance matrix in memory and are limited to "
            f"{EXACT_MAX_POINTS:,} points per test; use a tolerance above 0 (e.g. 0.001) for the "
            "projection estimate, whose interval is reported."
        )
    raw = energy_sums(
        x, y, labels, points.weights, units=units, n_samples=n_samples, directions=0 if exact else m,
        permutations=permutations, seed=seed, orders=orders, progress=progress,
    )  # fmt: skip
    return _summarise(raw, frame, points.distance.a)


def _summarise(raw, frame, a) -> EnergyTest:
    """Estimates and guaranteed intervals of the observed statistics from the raw sums.

    S = P₊ − P₋ with P₊ the pairs from different samples (weight 1/N) and P₋ the pairs within
    sample a (weight (N − W_a)/(N W_a)): each part is a sum of non-negative terms, so each gets
    the estimator's interval; S's interval is their difference (absolute, not relative).
    """
    m, k = raw.directions, raw.weight_sum.size
    N, weight_sum, f_within = raw.total_weight, raw.weight_sum, raw.within
    f_cross = max(raw.total - f_within.sum(), 0.0)
    coeff = (N - weight_sum) / (N * weight_sum)
    minus = float((f_within * coeff).sum())
    # the parts' own rounding: the kernel's allowances, and the subtraction and scalings here
    slack_plus = (raw.slack_total + raw.slack_within.sum() + 4 * UNIT_ROUNDOFF * (raw.total + f_within.sum())) / N
    slack_minus = float((raw.slack_within * coeff).sum()) + 4 * k * UNIT_ROUNDOFF * minus
    norm = (N * N - float((weight_sum**2).sum())) / (4 * N)  # Σ_{a<b} W_a W_b / (2N)
    parts = []
    for value, slack, pairs in ((f_cross / N, slack_plus, 2 * norm), (minus, slack_minus, (raw.pair_weight * coeff).sum())):
        est, lo, hi, _ = interval(Raw(value=value, directions=m, absolute=slack))
        if frame is not None:  # geodesic: the local projection's distortion and rounding
            est, lo, hi, _ = fold_distortion(est, lo, hi, frame.k_min, frame.k_max, forward_slack(a, pairs))
        parts.append((float(est), float(lo), float(hi)))
    (est_p, lo_p, hi_p), (est_m, lo_m, hi_m) = parts
    # pair sums in the units of the result: the part's estimate over its raw value
    scale = est_p / (f_cross / N) if f_cross > 0 else (est_m / minus if minus > 0 else 1.0)
    between = est_p - est_m
    widen = 4 * UNIT_ROUNDOFF * (hi_p + hi_m)
    lo, hi = lo_p - hi_m - widen, hi_p - lo_m + widen
    disco_within = scale * float((f_within / weight_sum).sum())
    energy, lo, hi = between / norm, max(lo / norm, 0.0), hi / norm
    f_ratio = (between / (k - 1)) / (disco_within / (N - k)) if N > k and disco_within > 0 else math.nan
    return EnergyTest(
        n_points=raw.counts,
        weight_sum=weight_sum,
        within_total=scale * f_within,
        within_pair_weight=raw.pair_weight,
        between_total=scale * f_cross,
        between_pair_weight=2 * norm * N,
        energy=float(min(max(energy, lo), hi)),
        energy_lo=float(lo),
        energy_hi=float(hi),
        disco_between=float(between),
        disco_within=disco_within,
        f_ratio=float(f_ratio),
        p_value=raw.p_value,
        permutations=raw.permutations,
        method="exact" if m == 0 else "projection",
        directions=m,
    )
