"""What the estimator returns: sums with their intervals, per group, per point or per pair of groups.

Every result carries, entry by entry, the estimate ``total``, the guaranteed interval
``[lower, upper]``, ``rel_bound``, whether the sum is ``exact``, the ``directions`` used and a
``note``: empty, or why the entry could not be computed as asked and what to do (its sums are
then NaN). One entry that cannot be computed never stops the others.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["GroupPairSums", "PointSums", "CrossPairSums", "PairSum", "raise_for_notes"]


class _Sums:
    total: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    rel_bound: np.ndarray
    exact: np.ndarray
    directions: np.ndarray
    note: np.ndarray

    @property
    def method(self) -> np.ndarray:
        """``"exact"``, ``"projection"`` or None (no pairs, or a note) per entry."""
        has = ~np.isnan(self.total)
        return np.where(has, np.where(self.exact, "exact", "projection"), None)

    def _mean(self, divisor) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(divisor > 0, self.total / divisor, np.nan)


@dataclass(frozen=True)
class GroupPairSums(_Sums):
    """Per-group pair totals ``Σ_{i<j} w_i w_j d_ij``; every array has one entry per group.

    Groups with fewer than two points or zero pair weight have NaN totals and bounds,
    ``exact`` False and 0 directions.
    """

    n_points: np.ndarray
    weight_sum: np.ndarray
    pair_weight: np.ndarray
    total: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    rel_bound: np.ndarray
    exact: np.ndarray
    directions: np.ndarray
    note: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean pair distance per group."""
        return self._mean(self.pair_weight)


@dataclass(frozen=True)
class PointSums(_Sums):
    """Per-point sums ``Σ_j w_j d_ij`` over the rest of the point's group, in input order.

    Points whose group has no other point with positive weight get NaN sums and bounds.
    """

    total: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    rel_bound: np.ndarray
    other_weight: np.ndarray  # Σ_{j≠i} w_j over the point's group
    exact: np.ndarray
    directions: np.ndarray
    note: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean distance from each point to the others of its group."""
        return self._mean(self.other_weight)


@dataclass(frozen=True)
class CrossPairSums(GroupPairSums):
    """G × G cross totals, with the fields of :class:`GroupPairSums` as matrices.

    Off the diagonal, ``total[A, B]`` is ``Σ_{a∈A, b∈B} w_a w_b d_ab`` and ``pair_weight`` is
    ``W_A·W_B``; on the diagonal they are group A's own pair total and pair weight, so ``mean``
    is the group's mean pair distance there. Entries without pairs are NaN.
    """


@dataclass(frozen=True)
class PairSum:
    """Total of pair distances of one set of points, with its guaranteed interval."""

    total: float
    lower: float
    upper: float
    rel_bound: float
    method: str
    directions: int
    pair_weight: float

    @property
    def mean(self) -> float:
        """Weighted mean pair distance ``total / pair_weight`` (NaN without pairs)."""
        return self.total / self.pair_weight if self.pair_weight > 0 else math.nan


def raise_for_notes(sums) -> None:
    """Raise an :class:`~toolbox.errors.InputError` with the first entry's note, if any.

    For callers that want all or nothing (and for ``--strict``).

    Examples
    --------
    >>> import numpy as np
    >>> from toolbox.estimate import Points, pair_sums
    >>> raise_for_notes(pair_sums(Points.build([0, 3], [0, 4])))
    """
    notes = np.asarray(sums.note, dtype=object).ravel()
    bad = [n for n in notes if n]
    if bad:
        raise InputError(bad[0])
