"""Rolling window means and totals (weekday-weighted), for the trend's weekly levels and the report's band."""

from __future__ import annotations

import numpy as np


def _rolling_sum(matrix, window, *, in_place: bool = False):
    """Sums of every ``window`` consecutive columns, (A, D − window + 1), from one cumulative sum.

    ``in_place``: ``matrix`` is a scratch array the cumulative sum may overwrite (one
    (A, D) temporary fewer).
    """
    csum = np.cumsum(matrix, axis=1, out=matrix if in_place else None)
    out = np.empty((csum.shape[0], csum.shape[1] - window + 1), csum.dtype)
    out[:, 0] = csum[:, window - 1]
    np.subtract(csum[:, window:], csum[:, :-window], out=out[:, 1:])
    return out


def rolling_window(values, window: int, expected=None, min_valid: int | None = None, period: int | None = None):
    """Levels and totals of every ``window``-day window, (A, D − window + 1).

    Column ``j`` covers days ``j … j + window − 1``.  The level is the ratio estimator
    ``Σ values / Σ expected`` over the window's valid days, where ``expected`` (A, D) is each
    day's weekday factor (default 1): a quiet weekend day weighs as little as it usually counts,
    and a masked day drops out of both sums.  The total is the level times the window's usual
    volume (``Σ expected`` over all its days).  A window with fewer than ``min_valid`` valid days
    (default half the window, rounded up) is NaN.  ``period``: ``expected`` repeats every
    ``period`` columns (weekday factors: 7), so the windows' usual volume is summed over one
    period's windows and repeated.  Returns ``(levels, totals)``.
    """
    values = np.asarray(values, float)
    expected = np.ones_like(values) if expected is None else np.broadcast_to(expected, values.shape)
    min_valid = (window + 1) // 2 if min_valid is None else min_valid
    valid = np.isfinite(values)
    # Scratch arrays are summed in place, the level divided into the sums' array, and valid days
    # counted in int32: the same numbers with about half the (A, D) temporaries, each of which
    # costs the kernel fresh zeroed pages on a 10,000-account chunk.
    sums = _rolling_sum(np.where(valid, values, 0.0), window, in_place=True)
    weights = _rolling_sum(np.where(valid, expected, 0.0), window, in_place=True)
    n_windows = values.shape[1] - window + 1
    if period and n_windows > period:
        one_period = _rolling_sum(np.asarray(expected[:, :period + window - 1], float), window)
        full_weights = np.tile(one_period, (1, -(-n_windows // period)))[:, :n_windows]
    else:
        full_weights = _rolling_sum(np.asarray(expected, float), window)
    counts = _rolling_sum(valid.astype(np.int32), window, in_place=True)
    keep = counts >= min_valid
    keep &= weights > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        levels = np.divide(sums, weights, out=sums)
    levels[~keep] = np.nan
    return levels, levels * full_weights


def weekly_levels(values, expected) -> np.ndarray:
    """The levels of consecutive whole weeks, (A, W) from (A, 7·W) ``values`` and their weekday
    factors ``expected``: the ratio estimator of :func:`rolling_window` over each week's valid
    days, NaN where under four are valid.  The same as ``rolling_window(values, 7, expected)``
    at every seventh column, summed week by week instead of from running sums."""
    values = np.asarray(values, float)
    n_accounts, n_days = values.shape
    by_week = values.reshape(n_accounts, n_days // 7, 7)
    valid = np.isfinite(by_week)
    sums = np.where(valid, by_week, 0.0).sum(axis=2)
    weights = np.where(valid, np.asarray(expected, float).reshape(by_week.shape), 0.0).sum(axis=2)
    keep = (valid.sum(axis=2) >= 4) & (weights > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(keep, sums / weights, np.nan)


def trailing_levels(values, weekday_factors, weekdays, window: int = 7) -> np.ndarray:
    """Each day's weekday-adjusted level over the ``window`` days ending on it, (A, D), NaN for
    the first ``window - 1`` days and where under half the window's days are valid.

    ``values`` (A, D) activity a day, NaN where missing; ``weekday_factors`` (A, 7) Monday first,
    each weekday's usual share times seven; ``weekdays`` (D,) 0 = Monday.  A level is in the
    values' units a day, so it can be drawn with the usual band of 7-day levels on one scale."""
    values = np.asarray(values, float)
    expected = np.asarray(weekday_factors, float)[:, np.asarray(weekdays)]
    out = np.full(values.shape, np.nan)
    if values.shape[1] >= window:
        out[:, window - 1:], _ = rolling_window(values, window, expected=expected)
    return out
