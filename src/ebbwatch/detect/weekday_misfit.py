"""A window shorter than a week against its own weekday's windows, where the weekday profile
does not fit that weekday.

The window tests judge a 2- or 4-day window against such windows ending on every weekday.  That
pools well when the weekday profile fits; where it does not — a nearly empty weekend that the
profile's pull toward flat expects a fifth of a weekday of, say — every weekend reads far below
expectation, and the latest, expected most, as the lowest ever.  The windows ending on the same
weekday then sit apart from the rest, and the judged window must also be unusual against them
alone: the larger of the two p-values, an intersection-union test (Berger 1982), valid at the
level of each.

Shapes: ``A`` accounts.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..baseline.counts import nbinom_mid_p


def same_weekday_too(window, p_low, p_high, half_event, count_dispersion, *, misfit: float,
                     count_floor_events: float, min_points: int = 8):
    """``(p_low, p_high)`` (A,) of a sub-week window, each raised to the same-weekday test's where
    the history's windows ending on the judged weekday have their median ``misfit`` or more (log)
    from the pooled median.

    ``window``: the window's statistics from the contrast history (``same_weekday`` = median,
    spread and count of the same-weekday history; the pooled ``centre``; ``current``,
    ``complete``, ``expected`` and ``observed``), in index units; ``half_event`` (A,) half an event
    in those units.  The same-weekday test is Student-t from that history's median and spread
    (``n - 1`` degrees of freedom), and where the weekday usually brings under
    ``count_floor_events`` events, never below the negative binomial's mid-p of the count against
    that usual count (``count_dispersion`` at least): a weekend of one or two events has its
    zeros heavy, which no t tail says.
    """
    centre, spread, n = window["same_weekday"]
    sd = np.maximum(spread / np.sqrt(window["complete"]), 0.05)
    with np.errstate(invalid="ignore"):
        z = (window["current"] - centre) / sd
        apart = (n >= min_points) & np.isfinite(z) & (np.abs(centre - window["centre"]) > misfit)
    df = np.maximum(n - 1, 2)
    same_low = stats.t.cdf(z, df)
    rows = np.flatnonzero(apart)
    if rows.size:
        half = half_event[rows]
        usual = ((window["expected"][rows] + half) * np.exp(centre[rows]) - half) / (2 * half)  # events
        few = usual < count_floor_events
        rows, usual, half = rows[few], usual[few], half[few]
        dispersion = np.maximum(sd[rows] ** 2 - 1.0 / (usual + 0.5), count_dispersion)
        floor, _ = nbinom_mid_p(np.round(window["observed"][rows] / (2 * half)), np.maximum(usual, 0.0), dispersion)
        same_low[rows] = np.maximum(same_low[rows], floor)
    return (np.where(apart, np.maximum(p_low, same_low), p_low),
            np.where(apart, np.maximum(p_high, stats.t.sf(z, df)), p_high))
