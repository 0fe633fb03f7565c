"""Has an account's weekday shape changed?  The best split of its recent weeks' weekday shares.

A ratio of each day to its week's mean (a *share*) is unmoved by level changes between weeks, so a
change in the shares is a change in how the account spreads its week (a team that starts working
weekends, a shop that closes on Mondays), not in how much it does.  For every split of the weeks
into an earlier and a later run, the statistic is Hotelling-like with a diagonal covariance:
``T = Σ_d (mean_after_d − mean_before_d)² / ((s²_d + floor) · (1/n_before + 1/n_after))``, with
``s²_d`` the pooled within-run variance of weekday ``d``'s shares; the split with the largest T
wins.  Shapes: ``A`` accounts, ``W`` weeks.
"""

from __future__ import annotations

import numpy as np


def _zeroed(share, usable) -> np.ndarray:
    """``share`` (A, 7, W) with unusable weeks and missing days as 0, ready to be summed."""
    return np.where(usable[:, None, :] & np.isfinite(share), share, 0.0)


def _split_statistic(before, after, within, nb, na, variance_floor: float) -> np.ndarray:
    """T of two runs of weeks, (A,): their mean shares ``before`` and ``after`` (A, 7), the sum of
    squares ``within`` both runs (A, 7) and their numbers of weeks ``nb``, ``na`` (A, 1)."""
    variance = np.maximum(within, 0.0) / np.maximum(nb + na - 2, 1)
    return ((after - before) ** 2 / ((variance + variance_floor) * (1 / nb + 1 / na))).sum(axis=1)


def weekday_shape_split(share, usable, *, min_weeks: int = 3, variance_floor: float = 0.01):
    """The best split of each account's weeks into two weekday shapes.

    ``share`` (A, 7, W): each day's share of its week (NaN where unusable), weeks oldest first;
    ``usable`` (A, W) bool.  Each run keeps at least ``min_weeks`` usable weeks.  Returns
    ``(statistic, split, shift)``, each (A,): the largest T, the index of the first week of the
    later run (-1 where no split is possible) and the largest absolute change of a weekday's
    mean share at that split.
    """
    share = np.asarray(share, float)
    usable = np.asarray(usable, bool)
    n_accounts, _, n_weeks = share.shape
    x = _zeroed(share, usable)
    zero = np.zeros((n_accounts, 7, 1))
    total = np.concatenate([zero, np.cumsum(x, axis=2)], axis=2)
    squares = np.concatenate([zero, np.cumsum(x * x, axis=2)], axis=2)
    weeks = np.concatenate([np.zeros((n_accounts, 1)), np.cumsum(usable, axis=1)], axis=1)
    best = np.zeros(n_accounts)
    split = np.full(n_accounts, -1)
    for c in range(min_weeks, n_weeks - min_weeks + 1):
        n_before, n_after = weeks[:, c], weeks[:, n_weeks] - weeks[:, c]
        possible = (n_before >= min_weeks) & (n_after >= min_weeks)
        nb, na = np.maximum(n_before, 1)[:, None], np.maximum(n_after, 1)[:, None]
        before = total[:, :, c] / nb
        after = (total[:, :, n_weeks] - total[:, :, c]) / na
        within = (squares[:, :, c] - nb * before**2 + (squares[:, :, n_weeks] - squares[:, :, c]) - na * after**2)
        statistic = _split_statistic(before, after, within, nb, na, variance_floor)
        better = possible & (statistic > best)
        best = np.where(better, statistic, best)
        split = np.where(better, c, split)
    # The shift at each account's best split only, not at every split tried.
    at = np.maximum(split, 0)[:, None, None]
    rows_total = np.take_along_axis(total, at, axis=2)[:, :, 0]
    n_before = np.maximum(np.take_along_axis(weeks, at[:, 0], axis=1), 1)
    before = rows_total / n_before
    after = (total[:, :, n_weeks] - rows_total) / np.maximum(weeks[:, n_weeks:] - n_before, 1)
    shift = np.where(split >= 0, np.abs(after - before).max(axis=1), 0.0)
    return best, split, shift


def recent_weeks_departure(share, usable, *, recent_weeks=(1, 2), min_weeks_before: int = 3,
                           variance_floor: float = 0.01):
    """How far the last weeks' weekday shape departs from the weeks before them.

    The statistic of :func:`weekday_shape_split` at the fixed splits that leave the last
    ``recent_weeks`` usable weeks in the later run: a new shape one or two weeks old, too young
    for the split search's ``min_weeks`` on both sides.  ``share`` (A, 7, W) and ``usable``
    (A, W) as there.  Returns ``(statistic, shift, before, change)``: (A,) the larger statistic
    over the ``recent_weeks`` (0 where fewer than ``min_weeks_before`` usable weeks come before)
    and its largest absolute change of a weekday's mean share; (A, 7) the earlier run's mean
    shares and the later run's change from them, by position in the week.
    """
    share = np.asarray(share, float)
    usable = np.asarray(usable, bool)
    n_accounts, _, n_weeks = share.shape
    x = _zeroed(share, usable)
    total, squares_total, n_total = x.sum(axis=2), (x * x).sum(axis=2), usable.sum(axis=1)
    # Usable weeks counted from the newest: the later run of r weeks is the last r usable weeks,
    # wherever unusable ones fall between them; each step adds the next one back (one week's
    # column an account, not a pass over all weeks).
    from_newest = np.cumsum(usable[:, ::-1], axis=1)[:, ::-1]
    later_sum = np.zeros((n_accounts, 7))
    best = np.zeros(n_accounts)
    shift = np.zeros(n_accounts)
    best_before = np.ones((n_accounts, 7))
    best_change = np.zeros((n_accounts, 7))
    for r in range(1, max(recent_weeks) + 1):
        is_rth = usable & (from_newest == r)
        column = np.take_along_axis(x, is_rth.argmax(axis=1)[:, None, None], axis=2)[:, :, 0]
        column *= is_rth.any(axis=1)[:, None]
        later_sum += column
        if r not in recent_weeks:
            continue
        na, nb = np.minimum(n_total, r), n_total - np.minimum(n_total, r)
        possible = (na == r) & (nb >= min_weeks_before)
        na_, nb_ = np.maximum(na, 1)[:, None], np.maximum(nb, 1)[:, None]
        after = later_sum / na_
        before = (total - later_sum) / nb_
        within = squares_total - nb_ * before**2 - na_ * after**2
        statistic = _split_statistic(before, after, within, nb_, na_, variance_floor)
        better = possible & (statistic > best)
        best = np.where(better, statistic, best)
        shift = np.where(better, np.abs(after - before).max(axis=1), shift)
        best_before = np.where(better[:, None], before, best_before)
        best_change = np.where(better[:, None], after - before, best_change)
    return best, shift, best_before, best_change


def carried_on(before, change, week) -> np.ndarray:
    """How much of a recent change of weekday shape the next week carries on, (A,).

    ``before`` and ``change`` (A, 7) from :func:`recent_weeks_departure`; ``week`` (A, 7) the
    next week's days in the same positions (NaN where missing).  The least-squares coefficient
    of the week's departure from ``before`` on ``change``: about 1 where the new shape goes on,
    about 0 where the departure was a level that moved inside the last week (a drop on its
    Thursday leaves the next week's shares as they were, only lower).  NaN where the week has
    under six days or no activity.
    """
    week = np.asarray(week, float)
    valid = np.isfinite(week)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(valid, week, 0.0).sum(axis=1) / valid.sum(axis=1)
        departure = np.where(valid, week / mean[:, None] - before, 0.0)
        change = np.where(valid, change, 0.0)
        coefficient = (departure * change).sum(axis=1) / (change * change).sum(axis=1)
    return np.where((valid.sum(axis=1) >= 6) & (mean > 0), coefficient, np.nan)
