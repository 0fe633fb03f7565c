"""Weekday profile: robust multiplicative day-of-week factors per account."""

from __future__ import annotations

import numpy as np

from ..series import fast_nanmedian_rows
from ._base import Estimator, check_matrix


class WeekdayProfile(Estimator):
    """Day-of-week factors, the median over weeks of each day's share of its week's mean.

    A ratio to the week's own mean is unmoved by level changes between weeks; the median over
    weeks is unmoved by a few odd days.  Factors average 1 per account and are shrunk toward 1 as
    ``n_weeks / (n_weeks + shrink_weeks)``, so a short history keeps them near flat.

    Parameters
    ----------
    shrink_weeks : float
        Weeks of pseudo-history pulling the factors toward 1.
    floor : float
        Smallest factor allowed (an always-empty Sunday would otherwise divide by zero).
    min_days_per_week : int
        A week with fewer valid days does not vote.
    """

    _parameters = ("shrink_weeks", "floor", "min_days_per_week")

    def __init__(self, shrink_weeks: float = 4.0, floor: float = 0.1, min_days_per_week: int = 6):
        self.shrink_weeks = shrink_weeks
        self.floor = floor
        self.min_days_per_week = min_days_per_week

    def fit(self, values, first_weekday: int):
        """``values`` (A, D) with NaN for missing days; ``first_weekday`` of column 0 (Monday 0).

        Sets ``factors_`` (A, 7) indexed by weekday and ``weeks_`` (A,) weeks that voted.
        """
        if self.shrink_weeks < 0 or not 0 < self.floor < 1:
            raise ValueError("shrink_weeks must be >= 0 and floor in (0, 1)")
        values = check_matrix(values, "values")
        n_accounts, n_days = values.shape
        n_weeks = n_days // 7
        factors = np.ones((n_accounts, 7))
        weeks_used = np.zeros(n_accounts, dtype=int)
        if n_weeks:
            offset = n_days - 7 * n_weeks  # align weeks to end at the last column
            weeks = values[:, offset:].reshape(n_accounts, n_weeks, 7)
            valid = np.isfinite(weeks)
            valid_days = valid.sum(axis=2)
            with np.errstate(invalid="ignore", divide="ignore"):
                week_mean = np.where(valid, weeks, 0.0).sum(axis=2) / valid_days
            usable = (valid_days >= self.min_days_per_week) & (week_mean > 0)
            # Each day's share of its week, laid out weekday-major (A, 7, W) as it is computed,
            # so the medians over weeks run on contiguous rows without another copy.
            share = np.empty((n_accounts, 7, n_weeks))
            with np.errstate(invalid="ignore", divide="ignore"):
                np.divide(weeks.transpose(0, 2, 1), week_mean[:, None, :], out=share)
            share[np.broadcast_to(~usable[:, None, :], share.shape)] = np.nan
            by_day = share.reshape(n_accounts * 7, n_weeks)
            raw = fast_nanmedian_rows(by_day, overwrite_input=True).reshape(n_accounts, 7)  # by column position
            weeks_used = usable.sum(axis=1)
            raw = np.where(np.isfinite(raw), raw, 1.0)
            mean = raw.mean(axis=1, keepdims=True)
            raw = np.where(mean > 0, raw / np.where(mean > 0, mean, 1.0), 1.0)
            weight = weeks_used / (weeks_used + self.shrink_weeks) if self.shrink_weeks else (weeks_used > 0) * 1.0
            shrunk = 1.0 + (raw - 1.0) * weight[:, None]
            shrunk = np.maximum(shrunk, self.floor)
            shrunk /= shrunk.mean(axis=1, keepdims=True)
            position_weekday = (first_weekday + offset + np.arange(7)) % 7
            factors[:, position_weekday] = shrunk
        self.factors_ = factors
        self.weeks_ = weeks_used
        return self

    def expected(self, weekdays) -> np.ndarray:
        """Factors for each column, (A, D), given the weekday of each column."""
        self._check_fitted("factors_")
        return self.factors_[:, np.asarray(weekdays)]

    def transform(self, values, weekdays) -> np.ndarray:
        """Values divided by their weekday factor (deseasonalised), (A, D)."""
        return check_matrix(values, "values") / self.expected(weekdays)
