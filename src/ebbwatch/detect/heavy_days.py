"""Heavy days: single days far above an account's typical day (a batch import, a burst of one
user's work), capped when the falling tail of the longer window tests takes its second look
(``detect.ScanParams``).

A heavy day says nothing about whether an account is falling, but it widens the history of window
totals the falling tail is calibrated on, and every drop is then judged against that width.  With
heavy days capped, in the history, the reference and the judged window alike, the falling tail of
the 7-, 14- and 28-day windows is calibrated on the account's ordinary days; the rising tail keeps
every day as it came (a surge is made of heavy days).  This is winsorising (Tukey 1962; Dixon
1960; both cited from memory), at a multiple of the median rather than at a quantile, so that an
account without heavy days is left exactly as it is.

Shapes: ``A`` accounts, ``D`` days.
"""

from __future__ import annotations

import numpy as np

from ..series import fast_nanmedian_rows


def typical_day(values, factors, hist_end: int, column_step: int = 3) -> np.ndarray:
    """Each account's median active day before column ``hist_end``, weekday-adjusted (``values /
    factors`` over the days with activity), (A,); NaN without one.  Every ``column_step``-th day
    is enough for a median level (a step prime to 7 visits every weekday alike) at a fraction of
    the work."""
    with np.errstate(invalid="ignore", divide="ignore"):
        z = values[:, :hist_end:column_step] / factors[:, :hist_end:column_step]
        z[~(z > 0)] = np.nan
    return fast_nanmedian_rows(z, overwrite_input=True)


def cap_heavy_days(values, factors, hist_end: int, multiple: float) -> np.ndarray:
    """``values`` (A, D) with each day above ``multiple`` × the account's typical day
    (:func:`typical_day` before column ``hist_end``, times the day's weekday factor) set to that
    cap; unchanged where ``multiple`` is 0.  NaN stays NaN."""
    if not multiple:
        return values
    typical = typical_day(values, factors, hist_end)
    cap = multiple * np.where(np.isfinite(typical), typical, np.inf)[:, None] * factors
    with np.errstate(invalid="ignore"):
        return np.where(values > cap, cap, values)
