"""Weekday profile: robust multiplicative day-of-week factors per account."""

from __future__ import annotations

import numpy as np

from ..series import fast_nanmedian_rows
from ._base import Estimator, check_matrix
from .shape_change import carried_on, recent_weeks_departure, weekday_shape_split

SHARE_NOISE_WEEKS = 2.0  # weeks the assumed share noise counts for beside an account's own weeks


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
    change_statistic : float or None
        Where the weeks split into two weekday shapes with a statistic above this
        (:func:`~ebbwatch.baseline.shape_change.weekday_shape_split`) and some weekday's mean
        share moved by more than ``change_shift``, only the weeks since the split vote, pulled
        toward 1 by a quarter of ``shrink_weeks`` (the split is itself evidence of the new
        shape).  None: every week votes.
    change_shift : float
        Least change of a weekday's mean share (in units of the week's mean) that counts.
    recent_statistic : float or None
        Where the last one or two weeks depart from the voting weeks before them with a statistic
        above this (:func:`~ebbwatch.baseline.shape_change.recent_weeks_departure`) and a shift
        above ``change_shift``, and the week after the fitted days (``following`` in :meth:`fit`)
        carries the new shape on (by half or more,
        :func:`~ebbwatch.baseline.shape_change.carried_on`), ``recent_change_`` is set: a new shape
        is starting that is too young to vote alone.  The factors are unchanged.  None: not
        tested.
    factor_spread : float or None
        Where an account has fewer usable weeks than the fitted days hold (it is young, a week of
        it is missing, or its weekday shape changed among them), each weekday's factor is pulled toward 1 by its own
        noise instead of by the number of weeks: with weight ``factor_spread² / (factor_spread² +
        se²)``, ``se²`` the variance of the median of its weekly shares (π/2 times their variance
        over the weeks, that variance from their MAD pooled with ``share_noise²`` worth
        ``SHARE_NOISE_WEEKS`` weeks).
        A shape seen clearly over a few weeks (a weekday-only account's empty weekends) is then
        kept as seen, where the count-based pull made those weekends read as falls.  None: the
        count-based pull everywhere.
    share_noise : float
        The week-to-week standard deviation of a weekday's share assumed before an account's own
        weeks tell it (in units of the week's mean).
    """

    _parameters = ("shrink_weeks", "floor", "min_days_per_week", "change_statistic", "change_shift",
                   "recent_statistic", "factor_spread", "share_noise")

    def __init__(self, shrink_weeks: float = 4.0, floor: float = 0.1, min_days_per_week: int = 6,
                 change_statistic: float | None = None, change_shift: float = 0.4,
                 recent_statistic: float | None = None, factor_spread: float | None = None,
                 share_noise: float = 0.35):
        self.shrink_weeks = shrink_weeks
        self.floor = floor
        self.min_days_per_week = min_days_per_week
        self.change_statistic = change_statistic
        self.change_shift = change_shift
        self.recent_statistic = recent_statistic
        self.factor_spread = factor_spread
        self.share_noise = share_noise

    def fit(self, values, first_weekday: int, following=None):
        """``values`` (A, D) with NaN for missing days; ``first_weekday`` of column 0 (Monday 0);
        ``following`` (A, 7): the seven days after ``values`` (the week being judged), which do
        not vote but tell a young change of shape from a level that moved (None: no young change
        is looked for).

        Sets ``factors_`` (A, 7) indexed by weekday, ``weeks_`` (A,) weeks that voted,
        ``change_start_`` (A,): the column of ``values`` where a changed weekday shape began, -1
        where none was found, and ``recent_change_`` (A,) bool (see ``recent_statistic``).
        """
        if self.shrink_weeks < 0 or not 0 < self.floor < 1:
            raise ValueError("shrink_weeks must be >= 0 and floor in (0, 1)")
        if (self.factor_spread is not None and self.factor_spread <= 0) or self.share_noise < 0:
            raise ValueError("factor_spread must be None or > 0, and share_noise >= 0")
        if any(s is not None and s < 0 for s in (self.change_statistic, self.recent_statistic)) or self.change_shift < 0:
            raise ValueError("change_statistic and recent_statistic must be None or >= 0, and change_shift >= 0")
        values = check_matrix(values, "values")
        n_accounts, n_days = values.shape
        n_weeks = n_days // 7
        factors = np.ones((n_accounts, 7))
        weeks_used = np.zeros(n_accounts, dtype=int)
        changed = np.zeros(n_accounts, bool)
        change_start = np.full(n_accounts, -1)
        recent = np.zeros(n_accounts, bool)
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
            if self.change_statistic is not None:
                statistic, split, shift = weekday_shape_split(share, usable)
                changed = (statistic > self.change_statistic) & (shift > self.change_shift)
                # The weeks before a change of shape no longer vote.
                before = np.arange(n_weeks)[None, :] < np.where(changed, split, 0)[:, None]
                usable &= ~before
                share[np.broadcast_to(before[:, None, :], share.shape)] = np.nan
                change_start = np.where(changed, offset + 7 * split, -1)
            if self.recent_statistic is not None and following is not None:
                statistic, shift, before_shares, change = recent_weeks_departure(share, usable)
                # The weeks end at the last column, so the following week's days keep their positions.
                carried = carried_on(before_shares, change, check_matrix(following, "following")[:, :7])
                with np.errstate(invalid="ignore"):
                    recent = (statistic > self.recent_statistic) & (shift > self.change_shift) & (carried >= 0.5)
            weeks_used = usable.sum(axis=1)
            by_noise = np.flatnonzero(weeks_used < n_weeks) if self.factor_spread is not None else np.array([], int)
            shares_by_noise = share[by_noise]  # a copy: the medians below overwrite ``share``
            by_day = share.reshape(n_accounts * 7, n_weeks)
            raw = fast_nanmedian_rows(by_day, overwrite_input=True).reshape(n_accounts, 7)  # by column position
            raw = np.where(np.isfinite(raw), raw, 1.0)
            weight = weeks_used / (weeks_used + self.shrink_weeks) if self.shrink_weeks else (weeks_used > 0) * 1.0
            weight = np.where(changed, weeks_used / np.maximum(weeks_used + 0.25 * self.shrink_weeks, 1e-9), weight)
            weight = np.repeat(weight[:, None], 7, axis=1)
            if by_noise.size:
                weight[by_noise] = self._noise_weights(shares_by_noise, raw[by_noise], weeks_used[by_noise])
            mean = raw.mean(axis=1, keepdims=True)
            raw = np.where(mean > 0, raw / np.where(mean > 0, mean, 1.0), 1.0)
            shrunk = 1.0 + (raw - 1.0) * weight
            shrunk = np.maximum(shrunk, self.floor)
            shrunk /= shrunk.mean(axis=1, keepdims=True)
            position_weekday = (first_weekday + offset + np.arange(7)) % 7
            factors[:, position_weekday] = shrunk
        self.factors_ = factors
        self.weeks_ = weeks_used
        self.change_start_ = change_start
        self.recent_change_ = recent
        return self

    def _noise_weights(self, shares, medians, weeks) -> np.ndarray:
        """Per row and weekday, the pull of the median share ``medians`` (R, 7) away from 1:
        ``factor_spread² / (factor_spread² + se²)`` (see the class), from the weekly shares
        ``shares`` (R, 7, W; NaN in weeks that do not vote) and the weeks that voted (R,)."""
        deviation = np.abs(shares - medians[:, :, None]).reshape(-1, shares.shape[2])
        spread = 1.4826 * fast_nanmedian_rows(deviation, overwrite_input=True).reshape(medians.shape)
        spread = np.where(np.isfinite(spread), spread, 0.0)
        n = weeks[:, None].astype(float)
        pooled = (n * spread ** 2 + SHARE_NOISE_WEEKS * self.share_noise ** 2) / (n + SHARE_NOISE_WEEKS)
        with np.errstate(divide="ignore"):
            se2 = np.where(n > 0, (np.pi / 2) * pooled / np.maximum(n, 1.0), np.inf)
        return self.factor_spread ** 2 / (self.factor_spread ** 2 + se2)

    def expected(self, weekdays) -> np.ndarray:
        """Factors for each column, (A, D), given the weekday of each column."""
        self._check_fitted("factors_")
        return self.factors_[:, np.asarray(weekdays)]

    def transform(self, values, weekdays) -> np.ndarray:
        """Values divided by their weekday factor (deseasonalised), (A, D)."""
        return check_matrix(values, "values") / self.expected(weekdays)
