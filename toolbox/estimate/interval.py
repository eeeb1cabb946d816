"""The one place where sums become intervals: Crofton factors, bin allowance, rounding,
centring and projection distortion, for every sum kind and both distance kinds.

A kernel reports what it measured as a :class:`~toolbox.kernels.Raw` record: exact sums, or the
summed projections ``F`` over ``m`` directions, with the in-bin uncertainty it left and the
rounding allowance of its own arithmetic. :func:`interval` turns that into the estimate, the
guaranteed interval and the relative bound; :func:`fold_distortion` carries a planar interval
measured in a local projection over to geodesic distances.

Facts used (see docs/method.md): with ``x = π/(2m)`` every pair's summed projections lie in
``[cot x, csc x]`` times its distance, so ``F·sin x ≤ D ≤ F·tan x``, and ``2·tan(x/2)·F`` errs by
at most ``tan²(x/2)``.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError
from ..kernels import UNIT_ROUNDOFF, Raw

__all__ = [
    "METHODS",
    "RESERVE",
    "projection_error",
    "directions_for_tolerance",
    "projection_directions",
    "projection_factors",
    "bin_budget",
    "check_method",
    "interval",
    "crofton_interval",
    "distortion_error",
    "planar_tolerance",
    "fold_distortion",
    "forward_slack",
    "widen",
]

METHODS = ("auto", "exact", "projection")
#: share of the tolerance the directions leave unused for in-bin uncertainty and rounding
RESERVE = 0.01
#: WGS 84 semi-major axis (metres): allowances quoted for the Earth scale with a / this
EARTH_A = 6378137.0
#: error of one projected coordinate (metres, for an Earth-sized ellipsoid): PROJ's AEQD takes
#: the geodesic distance and azimuth from the centre (Karney 2013: 15 nm) and rounds x and y
FORWARD_ALLOWANCE = 5e-8


def projection_error(directions: int) -> float:
    """Guaranteed relative error of the projection estimate with ``directions`` directions.

    Parameters
    ----------
    directions : int
        Number of equally spaced directions ``m`` (at least 1).

    Returns
    -------
    float
        ``tan²(π / (4m))``.

    Examples
    --------
    >>> round(projection_error(8), 5)
    0.0097
    """
    if directions < 1:
        raise ParameterError(f"directions must be at least 1. Got {directions} instead.")
    return math.tan(math.pi / (4 * directions)) ** 2


def directions_for_tolerance(tolerance: float) -> int:
    """Fewest directions whose guaranteed relative error does not exceed ``tolerance``.

    Parameters
    ----------
    tolerance : float
        Relative error bound, in (0, 0.5].

    Returns
    -------
    int
        The smallest ``m`` with ``tan²(π/(4m)) ≤ tolerance``, i.e. ``ceil(π / (4·arctan √ε))``.
        A margin of one part in a million is kept for the rounding terms the kernels add.

    Examples
    --------
    >>> directions_for_tolerance(0.01), directions_for_tolerance(1e-6)
    (8, 786)
    """
    if not (0 < tolerance <= 0.5) or math.isnan(tolerance):
        raise ParameterError(
            f"The tolerance must be in (0, 0.5] for the projection estimate. Got {tolerance!r} "
            "instead; use 0 with the exact method."
        )
    target = tolerance * (1 - 1e-6)
    m = max(2, math.ceil(math.pi / (4 * math.atan(math.sqrt(target)))))
    while projection_error(m) > target:
        m += 1
    while m > 2 and projection_error(m - 1) <= target:
        m -= 1
    return m


def projection_directions(tolerance: float) -> int:
    """Directions the binned estimate uses for ``tolerance``.

    The fewest that meet the tolerance (:func:`directions_for_tolerance`), unless they leave
    less than 1 % of it unused; then the fewest that meet 99 % of it, so that the binned sums
    have room for their in-bin uncertainty (1e-6 takes 790, not 786).

    Examples
    --------
    >>> projection_directions(0.01), projection_directions(1e-4), projection_directions(1e-6)
    (8, 79, 790)
    """
    m = directions_for_tolerance(tolerance)
    if tolerance - projection_error(m) < RESERVE * tolerance:
        m = directions_for_tolerance(tolerance * (1 - RESERVE))
    return m


def projection_factors(directions: int) -> tuple[float, float, float]:
    """Factors turning the summed projections ``F`` into bounds and the estimate.

    Parameters
    ----------
    directions : int
        Number of equally spaced directions ``m``.

    Returns
    -------
    lower, upper, estimate : float
        ``sin x``, ``tan x`` and ``2 tan(x/2)`` with ``x = π/(2m)``: the true total lies in
        ``[lower·F, upper·F]`` and ``estimate·F`` is the estimate.

    Examples
    --------
    >>> [round(f, 6) for f in projection_factors(2)]
    [0.707107, 1.0, 0.828427]
    """
    x = math.pi / (2 * directions)
    return math.sin(x), math.tan(x), 2 * math.tan(x / 2)


def bin_budget(tolerance: float, directions: int) -> float:
    """In-bin uncertainty allowed per direction, relative to the exact part.

    The directions leave ``tolerance − tan²(π/4m)`` unused (at least 1 % of it, see
    :func:`projection_directions`); an uncertainty U beside an exact part F moves the estimate
    by U/2, so U/F up to twice that margin keeps rel_bound within the tolerance. Half of it is
    kept back for the rounding allowances.

    Examples
    --------
    >>> round(bin_budget(0.01, 8), 6)
    0.000296
    """
    return 0.5 * 2 * (tolerance - projection_error(directions)) / (1 + tolerance)


def check_method(method: str, tolerance: float) -> int:
    """Validate ``method`` and ``tolerance``; returns the directions needed (0 when exact)."""
    if method not in METHODS:
        raise ParameterError(f"method must be one of {', '.join(METHODS)}. Got {method!r} instead.")
    if not (0 <= tolerance <= 0.5) or math.isnan(tolerance):
        raise ParameterError(f"The tolerance must be in [0, 0.5]. Got {tolerance!r} instead.")
    if method == "projection" and tolerance == 0:
        raise ParameterError(
            "The projection method needs a tolerance above 0; use method 'exact' for exact sums."
        )
    return 0 if tolerance == 0 or method == "exact" else directions_for_tolerance(tolerance)


def _relative_bound(est, lo, hi):
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = np.maximum(np.where(lo > 0, est / lo - 1, np.inf), 1 - est / hi)
    return np.where(hi > 0, bound, 0.0)


def interval(raw: Raw):
    """Estimate, guaranteed bounds and relative bound of a kernel's sums.

    Exact sums (``raw.directions == 0``): ``[v(1 − rel) − abs, v(1 + rel) + abs]``. Projected
    sums: the true summed projections lie in ``[v − abs, v + U + abs]``, to which the Crofton
    factors apply; ``(m + 4)·u·F`` more covers adding up the directions and the final products.
    Both widen by the centring allowance: each pair's distance may be off by
    ``√2·u·(r_i + r_j)`` per direction, ``raw.radius_mass`` bounding ``Σ w_i w_j (r_i + r_j)``.

    Returns
    -------
    estimate, lower, upper, rel_bound : numpy.ndarray

    Examples
    --------
    >>> from toolbox.kernels import Raw
    >>> [float(v) for v in interval(Raw(value=12.0, directions=0))]
    [12.0, 12.0, 12.0, 0.0]
    """
    m = int(raw.directions)
    value = np.asarray(raw.value, dtype=np.float64)
    centring = math.sqrt(2) * UNIT_ROUNDOFF * max(m, 1) * np.asarray(raw.radius_mass, dtype=np.float64)
    absolute = raw.absolute + centring
    if m == 0:
        est = value
        lo = np.maximum(value * (1 - raw.relative) - absolute, 0.0)
        hi = value * (1 + raw.relative) + absolute
        return est, lo, hi, _relative_bound(est, lo, hi)
    uncertain = np.asarray(raw.uncertain, dtype=np.float64)
    return crofton_interval(value + uncertain / 2, uncertain / 2 + absolute, m)


def crofton_interval(summed, slack, m):
    """Estimate, bounds and relative bound from summed projections ``F ± slack`` on m directions.

    The slack grows by (m + 4)·u·F for adding up the m directions and the final products.

    Examples
    --------
    >>> [round(float(v), 6) for v in crofton_interval(1.0, 0.0, 2)]
    [0.828427, 0.707107, 1.0, 0.171573]
    """
    lo_f, hi_f, est_f = projection_factors(m)
    # projected sums are sums of non-negative terms: rounding noise below 0 is 0
    summed = np.maximum(np.asarray(summed, dtype=np.float64), 0.0)
    slack = slack + (m + 4) * UNIT_ROUNDOFF * summed
    est = est_f * summed
    lo = lo_f * np.maximum(summed - slack, 0.0)
    hi = hi_f * (summed + slack)
    return est, lo, hi, _relative_bound(est, lo, hi)


def distortion_error(k_min: float, k_max: float) -> float:
    """Relative error left by the distortion alone, with the best estimate: ``(K−1)/(K+1)``."""
    ratio = k_max / k_min
    return (ratio - 1) / (ratio + 1)


def planar_tolerance(tolerance: float, k_min: float, k_max: float) -> float:
    """Tolerance for the planar estimate so that, with the distortion, the total meets ``tolerance``.

    With a planar estimate of symmetric relative error e and ``K = k_max/k_min``, the folded
    interval gives a relative bound ``((1+e)K − (1−e)) / ((1+e)K + (1−e))``; it equals
    ``tolerance`` for ``e = (Q − 1)/(Q + 1)`` with ``Q = (1 + tolerance) / (K (1 − tolerance))``.
    A result ≤ 0 means the distortion alone exceeds the tolerance.

    Examples
    --------
    >>> round(planar_tolerance(0.01, 1.0, 1.0), 12)
    0.01
    >>> planar_tolerance(0.01, 1.0, 1.03) < 0
    True
    """
    q = (1 + tolerance) / ((k_max / k_min) * (1 - tolerance))
    return (q - 1) / (q + 1)


def fold_distortion(estimate, lower, upper, k_min, k_max, slack=0.0):
    """Interval and estimate of geodesic totals from those of projected totals.

    Every pair's projected length lies in ``[k_min, k_max]`` times its geodesic length, so a
    projected total in ``[lower, upper]`` puts the geodesic one in
    ``[lower / k_max, upper / k_min]``; ``slack`` (metres, ≥ 0) first widens the projected
    interval on both sides, for the rounding of the projected coordinates. The estimate is the
    point that minimises the worst relative error over the interval, ``2·lo·hi / (lo + hi)``,
    and the relative bound is ``max(est/lo − 1, 1 − est/hi)``. Returns
    ``(estimate, lower, upper, rel_bound)``.

    Examples
    --------
    >>> [round(float(v), 6) for v in fold_distortion(1.0, 0.99, 1.01, 1.0, 1.001)]
    [0.999395, 0.989011, 1.01, 0.0105]
    """
    estimate = np.asarray(estimate, dtype=np.float64)
    lower = np.maximum(np.asarray(lower, dtype=np.float64) - slack, 0.0)
    upper = np.asarray(upper, dtype=np.float64) + slack
    # each operation rounds by at most half an ulp; stepping outwards by 2u keeps the interval
    lo = lower / k_max * (1 - 2 * UNIT_ROUNDOFF)
    hi = upper / k_min * (1 + 2 * UNIT_ROUNDOFF)
    with np.errstate(divide="ignore", invalid="ignore"):
        est = np.where(lo > 0, 2 * lo * hi / (lo + hi), estimate * 2 / (k_min + k_max))
        est = np.clip(est, lo, hi)
        bound = np.maximum(np.where(lo > 0, est / lo - 1, np.inf), 1 - est / hi)
        bound = np.where(hi > 0, bound + 4 * UNIT_ROUNDOFF, 0.0)
    return est, lo, hi, bound


def forward_slack(a: float, pair_weight):
    """Allowance for PROJ's rounding of the projected coordinates, ``2δ`` per pair distance."""
    return FORWARD_ALLOWANCE * 2 * (a / EARTH_A) * np.asarray(pair_weight, dtype=np.float64)


def widen(estimate, lower, upper, below, above):
    """Estimate, bounds and relative bound once the true value may lie ``below``/``above`` further.

    For allowances that come from outside the sums (the pieces of ``--as-points fill``, see
    :mod:`toolbox.estimate.pieces`): the interval grows to ``[lower − below, upper + above]``
    (never below 0), the estimate stays unless it falls outside, and the relative bound is taken
    anew. The allowances are sums of non-negative terms whose rounding is far under 1e-9 of them
    for any layer that fits in memory; they grow by that much.

    Examples
    --------
    >>> [round(float(v), 6) for v in widen(10.0, 9.0, 11.0, 0.0, 1.0)]
    [10.0, 9.0, 12.0, 0.166667]
    """
    grow = 1 + 1e-9
    lo = np.maximum(np.asarray(lower, dtype=np.float64) - grow * np.asarray(below, dtype=np.float64), 0.0)
    hi = np.asarray(upper, dtype=np.float64) + grow * np.asarray(above, dtype=np.float64)
    est = np.clip(np.asarray(estimate, dtype=np.float64), lo, hi)
    return est, lo, hi, _relative_bound(est, lo, hi)
