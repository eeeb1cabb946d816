"""The estimator's input: points with their groups, weights and distance kind."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np

from ..kernels import WGS84_A, WGS84_F, check_groups, check_lonlat, check_points
from .distance import DISTANCES, DistanceSetup

__all__ = ["Points"]


@dataclass(frozen=True)
class Points:
    """Points for the estimator: coordinates, group codes, weights and how distances are measured.

    ``x`` and ``y`` are planar coordinates (``distance.kind == "planar"``) or longitudes and
    latitudes in degrees (``"geodesic"``, on the ellipsoid ``distance.a``, ``distance.f``).
    ``groups`` holds a code in ``[0, n_groups)`` per point; ``weights`` is None (all ones) or
    one non-negative weight per point. ``names(code)`` names a group in notes. ``shift`` is
    None for points that are what they stand for, or, for points that stand for pieces of
    features (``--as-points fill``), one bound per point, in the distance's unit, of the mean
    distance from the point to its piece: the sums then fold that allowance into their intervals
    (see :mod:`toolbox.estimate.pieces`).

    Examples
    --------
    >>> p = Points.build([0, 3, 0], [0, 0, 4])
    >>> p.n_groups, p.distance.kind
    (1, 'planar')
    """

    x: np.ndarray
    y: np.ndarray
    groups: np.ndarray
    n_groups: int
    weights: np.ndarray | None
    distance: DistanceSetup
    names: Callable[[int], str] | None = None
    shift: np.ndarray | None = None

    @classmethod
    def build(
        cls,
        x,
        y,
        groups=None,
        n_groups: int | None = None,
        weights=None,
        *,
        distance: str | DistanceSetup = "planar",
        a: float = WGS84_A,
        f: float = WGS84_F,
        names: Callable[[int], str] | None = None,
        shift=None,
    ) -> Points:
        """Checked points from arrays; ``distance`` is ``"planar"``, ``"geodesic"`` or a setup."""
        if isinstance(distance, str):
            if distance not in DISTANCES:
                from ..errors import ParameterError

                raise ParameterError(
                    f"distance must be one of {', '.join(DISTANCES)}. Got {distance!r} instead."
                )
            units = "metre" if distance == "geodesic" else "unknown"
            distance = DistanceSetup(distance, units, None, a, f)
        check = check_lonlat if distance.kind == "geodesic" else check_points
        x, y, weights = check(x, y, weights)
        if groups is None:
            groups = np.zeros(x.size, dtype=np.int64)
            n_groups = 1 if n_groups is None else n_groups
        groups, n_groups = check_groups(groups, x.size, n_groups)
        if shift is not None:
            shift = np.asarray(shift, dtype=np.float64)
            if shift.shape != x.shape or not (np.isfinite(shift) & (shift >= 0)).all():
                from ..errors import ParameterError

                raise ParameterError("shift must hold one finite, non-negative value per point.")
        return cls(x, y, groups, n_groups, weights, distance, names, shift)

    @classmethod
    def from_layer(
        cls,
        setup: DistanceSetup,
        x,
        y,
        crs,
        label: str,
        groups,
        n_groups: int,
        weights=None,
        *,
        names=None,
        note: bool = False,
        shift=None,
    ) -> Points:
        """Points of a layer whose coordinates are in ``crs``, measured as ``setup`` says.

        With ``note``, a transformation between two different CRSs is reported in a warning.
        ``shift`` (see the class) is given in the units of ``crs`` and turned into the
        distance's unit here.
        """
        if shift is not None:
            from .pieces import shift_in_distance_units

            shift = shift_in_distance_units(setup, crs, shift, label)
        x, y = setup.coordinates(x, y, crs, label, note=note)
        return cls.build(x, y, groups, n_groups, weights, distance=setup, names=names, shift=shift)

    def join(self, other: Points) -> Points:
        """These points and ``other``'s, whose groups follow these (codes shifted by n_groups)."""
        w = shift = None
        if self.weights is not None or other.weights is not None:
            w = np.concatenate([self.weight_array(), other.weight_array()])
        if self.shift is not None or other.shift is not None:
            shift = np.concatenate([self.shift_array(), other.shift_array()])
        mine, n_mine = self.name, self.n_groups

        def names(code: int) -> str:
            return mine(code) if code < n_mine else other.name(code - n_mine)

        return replace(
            self,
            x=np.concatenate([self.x, other.x]),
            y=np.concatenate([self.y, other.y]),
            groups=np.concatenate([self.groups, other.groups + self.n_groups]),
            n_groups=self.n_groups + other.n_groups,
            weights=w,
            names=names,
            shift=shift,
        )

    def weight_array(self) -> np.ndarray:
        """The weights, ones when unweighted."""
        return np.ones(self.x.size) if self.weights is None else self.weights

    def shift_array(self) -> np.ndarray:
        """The shifts, zeros when the points stand for themselves."""
        return np.zeros(self.x.size) if self.shift is None else self.shift

    def name(self, code: int) -> str:
        """How notes name group ``code``."""
        return self.names(int(code)) if self.names is not None else f"group {int(code)}"
