"""The HGL that leaves the fewest customers of a zone flagged: exact, pure numpy.

Let ``H`` be the zone's high HGL and ``R >= 0`` its operating range (tank:
high minus low water; PRV and pump: 0), so the low HGL is ``H - R``. With
``k = psi_per_ft`` and the statuses of :mod:`geopress.classify`, a customer
with ground ``g`` and top floor at ``t`` (``t = g`` for one story) is *not*
flagged exactly when

* ``H > g + R``                          (not ``above_hgl``: low HGL above the ground),
* ``H >= g + R + min_static_psi / k``    (not ``low``),
* ``H >= t + R + min_static_psi / k``    (not ``low_upper_floors``),
* ``H <= g + max_static_psi / k``        (not ``high``),

which is one interval of ``H`` per customer, closed at the top and closed at
the bottom except where ``min_static_psi = 0`` and the customer has one
story (then ``H = g + R`` is still ``above_hgl``). The number of flagged
customers is therefore piecewise constant in ``H`` with breakpoints at those
interval ends; :func:`best_range` sweeps the sorted breakpoints and counts,
at each breakpoint and on each gap between two, how many intervals hold it.
No step size, no search: the answer is exact for the data.

Tie rule: among the connected ranges of ``H`` that reach the minimum, the
widest wins; among equally wide ones, the lowest. A range may be a single
level (``from == to``).

Customers without ground elevation (``no_terrain``) are left out: no level
changes their status.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .classify import Criteria


@dataclass(frozen=True)
class BestRange:
    """The range of high HGL, ft, that minimises the flagged count.

    ``flagged`` customers stay flagged at every level in the range, out of
    ``customers`` counted. ``from_ft``/``to_ft`` are NaN when there are no
    customers or no level serves any of them (then every level ties).
    ``from_inclusive`` is False only in the ``min_static_psi = 0`` case
    described in the module docstring.
    """

    from_ft: float
    to_ft: float
    flagged: int
    customers: int
    from_inclusive: bool = True

    def contains(self, hgl_ft: float) -> bool:
        """Whether ``hgl_ft`` lies in the range (respecting an exclusive lower end)."""
        above = hgl_ft >= self.from_ft if self.from_inclusive else hgl_ft > self.from_ft
        return bool(above and hgl_ft <= self.to_ft)


def ok_intervals(ground_ft: ArrayLike, floors: ArrayLike, range_ft: float,
                 criteria: Criteria) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
    """Per customer, the interval ``[lo, hi]`` of high HGL that leaves it unflagged.

    Returns ``(lo, hi, lo_closed)``; ``lo > hi`` means no level serves the
    customer. ``floors`` NaN or <= 1 means one story. NaN ground is dropped
    by the caller (:func:`best_range`).
    """
    g = np.asarray(ground_ft, dtype=np.float64)
    f = np.asarray(floors, dtype=np.float64)
    k = criteria.psi_per_ft
    multi = f > 1  # NaN compares False
    top = g + (np.where(multi, f, 1.0) - 1.0) * criteria.floor_height_ft
    min_head = criteria.min_static_psi / k
    low_bound = np.maximum(g + range_ft + min_head, np.where(multi, top + range_ft + min_head, -np.inf))
    hi = g + criteria.max_static_psi / k
    above_bound = g + range_ft
    # H must also exceed g + R strictly; that binds only when it is not below the low-pressure bound.
    lo = np.maximum(low_bound, above_bound)
    lo_closed = low_bound > above_bound
    return lo, hi, lo_closed


def best_range(ground_ft: ArrayLike, floors: ArrayLike, range_ft: float, criteria: Criteria) -> BestRange:
    """The high-HGL range that leaves the fewest customers flagged (tie rule in the module docstring)."""
    g = np.asarray(ground_ft, dtype=np.float64)
    f = np.broadcast_to(np.asarray(floors, dtype=np.float64), g.shape)
    keep = ~np.isnan(g)
    g, f = g[keep], f[keep]
    n = int(g.size)
    lo, hi, closed = ok_intervals(g, f, range_ft, criteria)
    feasible = (lo < hi) | ((lo == hi) & closed)
    lo, hi, closed = lo[feasible], hi[feasible], closed[feasible]
    if lo.size == 0:
        return BestRange(np.nan, np.nan, n, n)
    xs = np.unique(np.concatenate([lo, hi]))
    lo_sorted = np.sort(lo)
    lo_closed_sorted = np.sort(lo[closed])
    lo_open_sorted = np.sort(lo[~closed])
    hi_sorted = np.sort(hi)
    # intervals holding the breakpoint x: started (lo < x, or lo == x and closed) minus ended (hi < x)
    started_at = (np.searchsorted(lo_closed_sorted, xs, side="right")
                  + np.searchsorted(lo_open_sorted, xs, side="left"))
    at_point = started_at - np.searchsorted(hi_sorted, xs, side="left")
    # intervals holding the open gap (x_j, x_j+1): lo <= x_j and hi >= x_j+1, i.e. hi > x_j
    in_gap = (np.searchsorted(lo_sorted, xs[:-1], side="right")
              - np.searchsorted(hi_sorted, xs[:-1], side="right"))
    # the sequence point, gap, point, ..., point along H
    cover = np.empty(2 * xs.size - 1, dtype=np.int64)
    cover[0::2] = at_point
    cover[1::2] = in_gap
    best = int(cover.max())
    hit = np.r_[False, cover == best, False]
    starts = np.flatnonzero(hit[1:-1] & ~hit[:-2])
    ends = np.flatnonzero(hit[1:-1] & ~hit[2:])

    def coord(i: int, side: str) -> float:
        # element i: even = point xs[i//2]; odd = gap between xs[i//2] and xs[i//2 + 1]
        if i % 2 == 0:
            return float(xs[i // 2])
        return float(xs[i // 2] if side == "start" else xs[i // 2 + 1])

    runs = [(coord(s, "start"), coord(e, "end"), s % 2 == 0) for s, e in zip(starts, ends)]
    widest = max(r[1] - r[0] for r in runs)
    start, end, inclusive = min((r for r in runs if r[1] - r[0] == widest), key=lambda r: r[0])
    return BestRange(start, end, n - best, n, from_inclusive=inclusive)
