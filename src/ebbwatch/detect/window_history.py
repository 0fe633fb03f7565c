"""The history behind the window tests: for each window length k, the contrast ``s_k(τ)`` (defined
in :mod:`.contrasts`) of every earlier k-day window of each account, sorted and summarised,
beside the judged (last) window's own contrast, all from one set of cumulative sums a block.
:mod:`.contrasts` turns them into p-values.

Shapes: ``A`` accounts, ``D`` days (the last column is the judged day).
"""

from __future__ import annotations

import numpy as np

from ..series import fast_nanmedian_rows

BASE_WINDOW = 7  # the window every other window's spread is pooled against (a whole week)
OWN_WEEKS_GAP = 14  # an account's own weeks end this many days before the judged week


def _cumulative(matrix, dtype=np.float64, where=None) -> np.ndarray:
    """Row-wise cumulative sums with a leading zero column, (A, D + 1); with ``where`` (A, D)
    bool, of ``matrix`` where it holds and 0 elsewhere."""
    out = np.zeros((matrix.shape[0], matrix.shape[1] + 1), dtype)
    if where is None:
        np.cumsum(matrix, axis=1, out=out[:, 1:])
    else:
        np.copyto(out[:, 1:], matrix, where=where)
        np.cumsum(out[:, 1:], axis=1, out=out[:, 1:])
    return out


def _lagged_difference(cumulative, lag: int) -> np.ndarray:
    """``cumulative`` (A, C) minus itself ``lag`` columns before (the first ``lag`` columns as
    they are): each column's total over the ``lag`` columns before it."""
    out = np.empty_like(cumulative)
    out[:, :lag] = cumulative[:, :lag]
    np.subtract(cumulative[:, lag:], cumulative[:, :cumulative.shape[1] - lag], out=out[:, lag:])
    return out


def history_stride(window: int) -> int:
    """Every how many days a window's history is sampled: neighbouring windows of k days share
    k - 1 of them, so every third of a window's length keeps nearly all the information."""
    return max(1, window // 3)


class _Sums:
    """Cumulative sums behind every window and the reference series, computed once a block."""

    def __init__(self, values, factors, first_seen, reference_days: int):
        valid = np.isfinite(values)
        self.X = _cumulative(values, where=valid)
        self.F = _cumulative(factors, where=valid)
        # Valid-day counts fit 16 bits for any history under 89 years (half the memory traffic of
        # the windows' day counts).
        self.N = _cumulative(valid, np.int16 if values.shape[1] < np.iinfo(np.int16).max else np.int32)
        # The histories are computed in single precision (half the memory traffic; a window's
        # count is still exact to well under an event); the judged window in double.
        self.X32, self.F32 = self.X.astype(np.float32), self.F.astype(np.float32)
        self.factors = factors
        n_days = values.shape[1]
        # The reference ending before column j is columns max(j - R, first activity) .. j - 1.
        # The sums are zero before the first activity, so a plain lag of R columns gives the same
        # totals; only the calendar span needs the first activity.
        lag = min(reference_days, n_days + 1)
        reference_sum = _lagged_difference(self.X32, lag)
        with np.errstate(invalid="ignore", divide="ignore"):
            self.reference_level = np.divide(reference_sum, _lagged_difference(self.F32, lag), out=reference_sum)
        self.reference_days = _lagged_difference(self.N, lag).astype(np.int16, copy=False)
        self.first_seen = np.asarray(first_seen)
        span = np.arange(n_days + 1, dtype=np.int16)[None, :] - self.first_seen.astype(np.int16)[:, None]
        np.clip(span, 0, reference_days, out=span)
        self.reference_span = span  # calendar days, masked ones included

    def median_reference(self, columns, weeks: int, min_weeks: int = 4):
        """The median of the weekly levels (weekday-adjusted) of the ``weeks`` whole weeks before
        each of ``columns``, (A, C) float32; NaN with fewer than ``min_weeks`` weeks of at least
        four valid days.  A slide that has run into the reference moves its mean, not this."""
        columns = np.atleast_1d(np.asarray(columns))
        ends = columns[:, None] - 7 * np.arange(weeks)[None, :]  # (C, W): the column after each week
        inside = ends >= 7
        ends = np.where(inside, ends, 7)
        days = self.N[:, ends] - self.N[:, ends - 7]
        usual = self.F32[:, ends] - self.F32[:, ends - 7]
        with np.errstate(invalid="ignore", divide="ignore"):
            level = np.where((days >= 4) & inside[None] & (usual > 0),
                             (self.X32[:, ends] - self.X32[:, ends - 7]) / usual, np.nan).astype(np.float64)
        n_accounts, n_columns, _ = level.shape
        enough = np.isfinite(level).sum(axis=2) >= min_weeks
        median = fast_nanmedian_rows(level.reshape(n_accounts * n_columns, weeks), overwrite_input=True)
        return np.where(enough, median.reshape(n_accounts, n_columns), np.nan).astype(np.float32)

    def own_weeks(self, last_end: int, reference_days: int, half_event):
        """Each account's own week-to-week variation, from the whole weeks of its life ending by
        column ``last_end`` and starting within ``reference_days`` of it: the variance of their
        log levels beyond count noise (log scale², (A,); below 0 where they vary less than their
        counts would) and its degrees of freedom (weeks - 1; both 0 with fewer than three weeks of
        at least four valid days, none starting before the account's first full day)."""
        ends = last_end - 7 * np.arange(reference_days // 7)
        ends = ends[ends >= 7]
        n_accounts = self.X.shape[0]
        if ends.size < 3:
            return np.zeros(n_accounts), np.zeros(n_accounts)
        half = np.asarray(half_event, float)[:, None]
        days = self.N[:, ends] - self.N[:, ends - 7]
        observed = self.X[:, ends] - self.X[:, ends - 7]
        usual = self.F[:, ends] - self.F[:, ends - 7]
        good = (days >= 4) & (usual > 0) & ((ends - 7)[None, :] >= self.first_seen[:, None])
        weeks = good.sum(axis=1)
        enough = weeks >= 3
        with np.errstate(invalid="ignore", divide="ignore"):
            level = np.where(good, np.log((observed + half) / usual), np.nan)
            count_var = np.where(good, 1.0 / (observed / (2.0 * half) + 0.5), np.nan)
            mean = np.nansum(level, axis=1) / np.maximum(weeks, 1)
            var = np.nansum((level - mean[:, None]) ** 2, axis=1) / np.maximum(weeks - 1, 1)
            excess = var - np.nansum(count_var, axis=1) / np.maximum(weeks, 1)
        return np.where(enough, excess, 0.0), np.where(enough, weeks - 1.0, 0.0)

    @staticmethod
    def lag(span, k: int):
        """Days between the centres of a k-day window and its reference of ``span`` days."""
        return 0.5 * (k + span)

    def history(self, k: int, last_end: int, half_event, min_reference_days: int, stride: int = 1,
                median_weeks: int = 0):
        """The contrasts of the whole k-day windows ending by column ``last_end - 1``, every
        ``stride``-th one back from the last, (A, W) float32 with NaN where one cannot be told,
        and the calendar span of each one's reference, (A, W).  ``median_weeks``: the reference
        level is the median of that many weeks' levels (:meth:`median_reference`), not their mean."""
        width = max(last_end - k + 1, 0)
        first = (width - 1) % stride if width else 0
        ends, starts = slice(k + first, k + width, stride), slice(first, width, stride)
        half = half_event.astype(np.float32)[:, None]
        contrast = self.X32[:, ends] - self.X32[:, starts]
        expected = self.F32[:, ends] - self.F32[:, starts]
        expected *= (self.median_reference(np.arange(first, width, stride), median_weeks) if median_weeks
                     else self.reference_level[:, starts])
        contrast += half
        expected += half
        with np.errstate(invalid="ignore", divide="ignore"):
            np.divide(contrast, expected, out=contrast)
            np.log(contrast, out=contrast)
        # (A window before the first activity has no reference days, so it is caught here too.)
        unusable = (self.N[:, ends] - self.N[:, starts]) < (k + 1) // 2
        unusable |= self.reference_days[:, starts] < min_reference_days
        contrast[unusable] = np.nan
        return contrast, self.reference_span[:, starts]

    def last_window(self, k: int, half_event, min_reference_days: int, median_weeks: int = 0):
        """The judged window (the last k days): its contrast (``current``) and what it is made of,
        (A,)."""
        start = self.X.shape[1] - 1 - k
        weight = self.F[:, -1] - self.F[:, start]
        whole = self.factors[:, start:].sum(axis=1)
        reference_level = (self.median_reference([start], median_weeks)[:, 0] if median_weeks
                           else self.reference_level[:, start]).astype(np.float64)
        observed, expected = self.X[:, -1] - self.X[:, start], reference_level * weight
        with np.errstate(invalid="ignore", divide="ignore"):
            contrast = np.log((observed + half_event) / (expected + half_event))
        usable = ((self.N[:, -1] - self.N[:, start]) >= (k + 1) // 2) & (start >= self.first_seen) \
            & (self.reference_days[:, start] >= min_reference_days)
        return {"observed": observed, "weight": weight, "expected": expected, "reference_level": reference_level,
                "reference_days": self.reference_days[:, start].astype(np.float64),
                "complete": np.clip(weight / np.maximum(whole, 1e-9), 0.05, 1.0),
                "current": np.where(usable, contrast, np.nan)}


def _sorted_history(history):
    """Each row sorted with its NaN last, and the count of valid values: (sorted, n)."""
    filled = np.where(np.isnan(history), np.float32(np.inf), history)
    filled.sort(axis=1)
    return filled, np.isfinite(filled).sum(axis=1)


def _order_statistic(ordered, n, q):
    """The q-quantile (linear between order statistics) of each row's n valid sorted values; 0
    for an empty row."""
    if ordered.shape[1] == 0:
        return np.zeros(len(ordered))
    rows = np.arange(len(ordered))
    position = q * np.maximum(n - 1, 0)
    below = np.floor(position).astype(np.int64)
    above = np.minimum(below + 1, np.maximum(n - 1, 0))
    low = ordered[rows, np.minimum(below, ordered.shape[1] - 1)].astype(np.float64)
    high = ordered[rows, np.minimum(above, ordered.shape[1] - 1)].astype(np.float64)
    with np.errstate(invalid="ignore"):
        return np.where(n > 0, low + (high - low) * (position - below), 0.0)


def window_statistics(values, factors, first_seen, half_event, p):
    """Per window: the judged contrast, its sorted history and their summary, for
    :class:`.contrasts.WindowTests` and :func:`.contrasts.window_priors`, and each account's steady
    growth rate (log per day).  ``p`` holds the tests' settings (windows, reference_days,
    min_reference_days, history_gap_days, prior_windows, and optionally median_reference_from).
    Windows are done one at a time, so a block holds one window's (A, D) arrays at once."""
    sums = _Sums(values, factors, first_seen, p["reference_days"])
    cut = max(values.shape[1] - p["history_gap_days"], 0)
    half_event = np.asarray(half_event, float)
    # Steady growth or decline, as a rate per day from the weekly window's history: reported, not
    # taken out.  A steady drift moves every contrast of the history as it moves the judged one,
    # so the history's median already carries it.  Subtracting the rate added its own noise to
    # every window (on the development fleet's steady accounts it spreads from -15% to +7% a year
    # between quartiles, far wider on seasonal ones), and quiet accounts had about 3x too many
    # p-values below 0.001.
    weekly = sums.history(BASE_WINDOW, cut, half_event, p["min_reference_days"], history_stride(BASE_WINDOW))
    contrast, span = weekly
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = fast_nanmedian_rows(contrast / sums.lag(span, BASE_WINDOW)) if contrast.shape[1] else np.zeros(len(values))
    points = np.isfinite(contrast).sum(axis=1) * history_stride(BASE_WINDOW) / BASE_WINDOW
    growth = np.nan_to_num(rate) * points / (points + p["prior_windows"])
    del contrast, span
    out = {}
    median_from = p.get("median_reference_from") or 0
    for k in p["windows"]:
        stride = history_stride(k)
        median_weeks = p["reference_days"] // 7 if median_from and k >= median_from else 0
        contrast = weekly[0] if k == BASE_WINDOW and not median_weeks else \
            sums.history(k, cut, half_event, p["min_reference_days"], stride, median_weeks)[0]
        ordered, n = _sorted_history(contrast)
        del contrast
        q125, q25, q375, centre, q625, q75, q875 = (_order_statistic(ordered, n, q)
                                                    for q in (0.125, 0.25, 0.375, 0.5, 0.625, 0.75, 0.875))
        last = sums.last_window(k, half_event, p["min_reference_days"], median_weeks)
        events = np.nan_to_num(last["expected"] / (2.0 * half_event))  # half_event is half of one event
        count_var = (1.0 / (events + 0.5)) * (1.0 + k / np.maximum(last["reference_days"], 1.0))
        spread = (q75 - q25) / 1.349
        # Each half's own spread, in units of the whole's: a two-peaked history is wide as a
        # whole but each tail beyond its outer peak is as narrow as that peak.
        # (0.8313 = Φ⁻¹(0.375) − Φ⁻¹(0.125): the spread of a normal's half between those points.)
        with np.errstate(invalid="ignore", divide="ignore"):
            half_low = np.where(spread > 0, (q375 - q125) / 0.8313 / spread, 1.0)
            half_high = np.where(spread > 0, (q875 - q625) / 0.8313 / spread, 1.0)
        out[k] = {**last, "ordered": ordered, "n": n, "centre": centre, "stride": stride,
                  "spread": spread, "half_low": half_low, "half_high": half_high,
                  "points": n * stride / k, "count_var": count_var, "events": events}
        if k == BASE_WINDOW:
            out[k]["own_excess"], out[k]["own_points"] = sums.own_weeks(
                values.shape[1] - BASE_WINDOW - OWN_WEEKS_GAP, p["reference_days"], half_event)
        if k < BASE_WINDOW:
            out[k]["same_weekday"] = _same_weekday_summary(sums, k, cut, half_event, p["min_reference_days"])
    return out, growth


def _same_weekday_summary(sums, k: int, cut: int, half_event, min_reference_days: int):
    """Median, spread (IQR / 1.349) and count of the history's k-day windows that end on the same
    weekday as the judged one (one a week), (A,)."""
    n_days = sums.X.shape[1] - 1
    contrast, _ = sums.history(k, cut - (cut - n_days) % 7, half_event, min_reference_days, 7)
    ordered, n = _sorted_history(contrast)
    quartile = (_order_statistic(ordered, n, 0.75) - _order_statistic(ordered, n, 0.25)) / 1.349
    return _order_statistic(ordered, n, 0.5), quartile, n
