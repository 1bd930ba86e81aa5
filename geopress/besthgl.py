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

What an operator can set (:func:`settable`): the levels of a :class:`Dial`
(whole steps of tank level, PRV setting or discharge HGL), within the
source's bounds. The flagged count at each step is exact
(:meth:`FlaggedCount.at`); the steps kept are the longest run at the exact
minimum (whole steps inside the optimum) or, when the optimum is narrower
than a step, the single step that flags fewest; the robust range is the
longest run of steps within a tolerance of the minimum
(:func:`robust_tolerance`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

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



@dataclass(frozen=True)
class FlaggedCount:
    """The number of flagged customers as a function of the high HGL ``H``, ft: piecewise constant, exact.

    Made by :func:`flagged_count` from the intervals of :func:`ok_intervals` that serve a level at all
    (sorted ends, the lower ones split by whether they are closed). ``at`` counts exactly what the
    classifier would, for any levels at once.
    """

    customers: int
    lo: NDArray[np.float64]
    lo_closed: NDArray[np.float64]
    lo_open: NDArray[np.float64]
    hi: NDArray[np.float64]

    def at(self, hgl_ft: ArrayLike) -> NDArray[np.int64]:
        """Flagged customers at each level of ``hgl_ft``, ft."""
        h = np.asarray(hgl_ft, dtype=np.float64)
        # an interval holds h when it has started (lo < h, or lo == h and closed) and not ended (hi >= h);
        # every interval that ended (hi < h) had started, since lo <= hi
        held = (np.searchsorted(self.lo_closed, h, side="right") + np.searchsorted(self.lo_open, h, side="left")
                - np.searchsorted(self.hi, h, side="left"))
        return (self.customers - held).astype(np.int64)

    @property
    def served_ft(self) -> tuple[float, float]:
        """The lowest and highest level that serves any customer, ft (NaN when none does)."""
        if self.hi.size == 0:
            return (np.nan, np.nan)
        return (float(self.lo[0]), float(self.hi[-1]))


def flagged_count(ground_ft: ArrayLike, floors: ArrayLike, range_ft: float, criteria: Criteria) -> FlaggedCount:
    """The flagged count of a zone's customers as a function of its high HGL (NaN ground left out)."""
    g = np.asarray(ground_ft, dtype=np.float64)
    f = np.broadcast_to(np.asarray(floors, dtype=np.float64), g.shape)
    keep = ~np.isnan(g)
    g, f = g[keep], f[keep]
    lo, hi, closed = ok_intervals(g, f, range_ft, criteria)
    feasible = (lo < hi) | ((lo == hi) & closed)
    lo, hi, closed = lo[feasible], hi[feasible], closed[feasible]
    return FlaggedCount(customers=int(g.size), lo=np.sort(lo), lo_closed=np.sort(lo[closed]),
                        lo_open=np.sort(lo[~closed]), hi=np.sort(hi))


def _runs(mask: NDArray[np.bool_]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """First and last index of each maximal run of True in ``mask``."""
    hit = np.r_[False, mask, False]
    return np.flatnonzero(hit[1:-1] & ~hit[:-2]), np.flatnonzero(hit[1:-1] & ~hit[2:])


def best_range(ground_ft: ArrayLike, floors: ArrayLike, range_ft: float, criteria: Criteria, *,
               lower_ft: float = -np.inf, upper_ft: float = np.inf) -> BestRange:
    """The high-HGL range that leaves the fewest customers flagged (tie rule in the module docstring).

    ``lower_ft`` and ``upper_ft`` bound the levels considered (what the source can do); the range and
    its count are then the best within them. NaN ends when no level within them serves any customer.
    """
    return best_ranges(flagged_count(ground_ft, floors, range_ft, criteria), [(lower_ft, upper_ft)])[0]


def best_ranges(fc: FlaggedCount, bounds: Sequence[tuple[float, float]]) -> list[BestRange]:
    """:func:`best_range` of the customers of ``fc`` within each ``(lower_ft, upper_ft)`` of ``bounds``, from one
    sweep of the breakpoints.

    The sweep holds every pair's finite bounds as breakpoints too: a level that is no interval's end splits a
    gap into a gap, a point and a gap that all hold the same intervals, so it changes no other pair's range.
    """
    n = fc.customers
    if fc.hi.size == 0:
        return [BestRange(np.nan, np.nan, n, n) for _ in bounds]
    ends = [b for pair in bounds for b in pair if np.isfinite(b)]
    xs = np.unique(np.concatenate([fc.lo, fc.hi, ends]))
    at_point = n - fc.at(xs)
    # intervals holding the open gap (x_j, x_j+1): lo <= x_j and hi >= x_j+1, i.e. hi > x_j
    in_gap = (np.searchsorted(fc.lo, xs[:-1], side="right")
              - np.searchsorted(fc.hi, xs[:-1], side="right"))
    return [_best_within(xs, at_point, in_gap, n, lower_ft, upper_ft) for lower_ft, upper_ft in bounds]


def _best_within(xs: NDArray[np.float64], at_point: NDArray[np.int64], in_gap: NDArray[np.int64], n: int,
                 lower_ft: float, upper_ft: float) -> BestRange:
    """The best range within the bounds, from the intervals holding each breakpoint ``xs`` and each gap."""
    # the sequence point, gap, point, ..., point along H; -1 outside the bounds
    cover = np.empty(2 * xs.size - 1, dtype=np.int64)
    cover[0::2] = np.where((xs >= lower_ft) & (xs <= upper_ft), at_point, -1)
    cover[1::2] = np.where((xs[:-1] >= lower_ft) & (xs[1:] <= upper_ft), in_gap, -1)
    best = int(cover.max())
    if best <= 0:
        return BestRange(np.nan, np.nan, n, n)
    starts, ends = _runs(cover == best)

    def coord(i: int, side: str) -> float:
        # element i: even = point xs[i//2]; odd = gap between xs[i//2] and xs[i//2 + 1]
        if i % 2 == 0:
            return float(xs[i // 2])
        return float(xs[i // 2] if side == "start" else xs[i // 2 + 1])

    runs = [(coord(s, "start"), coord(e, "end"), s % 2 == 0) for s, e in zip(starts, ends)]
    widest = max(r[1] - r[0] for r in runs)
    start, end, inclusive = min((r for r in runs if r[1] - r[0] == widest), key=lambda r: r[0])
    return BestRange(start, end, n - best, n, from_inclusive=inclusive)


# --------------------------------------------------------------------------------------------------
# settings an operator can set


@dataclass(frozen=True)
class Dial:
    """The levels an operator can set: whole steps ``n``, at the high HGL ``h0_ft + n * h_step_ft`` (ft),
    where the control reads ``c0 + n * c_step`` in its own unit (ft of tank level, psi of PRV setting,
    ft of discharge HGL)."""

    h0_ft: float
    h_step_ft: float
    c0: float
    c_step: float

    def hgl(self, n: ArrayLike) -> NDArray[np.float64]:
        """High HGL, ft, at steps ``n``."""
        return self.h0_ft + np.asarray(n, dtype=np.float64) * self.h_step_ft

    def control(self, n: int) -> float:
        """The control's value at step ``n``, rounded to 1e-6 of its unit (no float noise from the sum)."""
        return round(self.c0 + n * self.c_step, 6)


def robust_tolerance(customers: int, percent: float, minimum: int) -> int:
    """Flagged customers a robust range may have above the minimum: ``percent`` % of the zone's
    ``customers`` (rounded down) or ``minimum``, whichever is larger."""
    return max(int(np.floor(percent * customers / 100.0 + 1e-9)), int(minimum))


@dataclass(frozen=True)
class Settable:
    """What an operator can dial in, in the control's unit (NaN where nothing can be).

    ``step_from``/``step_to``: the longest run of whole steps at the exact minimum (within the bounds),
    when ``inside_optimum``; otherwise the exact optimum is narrower than one step and both are the single
    step that flags fewest (ties: nearest the middle of the exact optimum, then the lowest).
    ``flagged_at_step`` is what those steps flag. ``robust_from``/``robust_to``: the longest run of whole
    steps that each flag at most ``minimum + tolerance`` (ties: the lowest); ``flagged_robust`` is the
    most any of them flags.
    """

    step_from: float
    step_to: float
    flagged_at_step: int | None
    inside_optimum: bool
    robust_from: float
    robust_to: float
    flagged_robust: int | None
    minimum: int
    tolerance: int


def _longest(mask: NDArray[np.bool_]) -> tuple[int, int] | None:
    """The longest run of True (the first of equally long ones), as first and last index."""
    starts, ends = _runs(mask)
    if starts.size == 0:
        return None
    i = int(np.argmax(ends - starts))  # argmax: the first of the longest
    return int(starts[i]), int(ends[i])


def settable(fc: FlaggedCount, best: BestRange, dial: Dial, *, tolerance: int,
             lower_ft: float = -np.inf, upper_ft: float = np.inf) -> Settable:
    """Round ``best`` (from :func:`best_range` with the same bounds) to the steps of ``dial``.

    Only steps within the bounds, from the lowest to the highest step that serves any customer, are
    considered (beyond those every customer is flagged). The counts are exact: :meth:`FlaggedCount.at`.
    """
    nothing = Settable(np.nan, np.nan, None, False, np.nan, np.nan, None, best.flagged, tolerance)
    served_lo, served_hi = fc.served_ft
    a, b = max(lower_ft, served_lo), min(upper_ft, served_hi)
    if np.isnan(best.from_ft) or not a <= b:
        return nothing
    first = int(np.ceil((a - dial.h0_ft) / dial.h_step_ft))
    last = int(np.floor((b - dial.h0_ft) / dial.h_step_ft))
    ns = np.arange(first - 1, last + 2)  # one more each side: the division may round across a step
    h = dial.hgl(ns)
    ns = ns[(h >= a) & (h <= b)]
    counts = fc.at(dial.hgl(ns))
    served = np.flatnonzero(counts < fc.customers)  # an open lower end may leave the first step serving none
    if served.size == 0:
        return nothing
    ns, counts = ns[served[0]:served[-1] + 1], counts[served[0]:served[-1] + 1]
    h = dial.hgl(ns)
    run = _longest(counts == best.flagged)
    inside = run is not None
    if run is None:
        fewest = np.flatnonzero(counts == counts.min())
        middle = (best.from_ft + best.to_ft) / 2.0
        i = int(fewest[np.argmin(np.abs(h[fewest] - middle))])
        run = (i, i)
    robust = _longest(counts <= best.flagged + tolerance)
    if robust is None:
        r_from = r_to = np.nan
        r_flagged = None
    else:
        r_from, r_to = dial.control(int(ns[robust[0]])), dial.control(int(ns[robust[1]]))
        r_flagged = int(counts[robust[0]:robust[1] + 1].max())
    return Settable(dial.control(int(ns[run[0]])), dial.control(int(ns[run[1]])),
                    int(counts[run[0]:run[1] + 1].max()), inside, r_from, r_to, r_flagged, best.flagged, tolerance)
