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
    x = np.where(usable[:, None, :] & np.isfinite(share), share, 0.0)
    zero = np.zeros((n_accounts, 7, 1))
    total = np.concatenate([zero, np.cumsum(x, axis=2)], axis=2)
    squares = np.concatenate([zero, np.cumsum(x * x, axis=2)], axis=2)
    weeks = np.concatenate([np.zeros((n_accounts, 1)), np.cumsum(usable, axis=1)], axis=1)
    best = np.zeros(n_accounts)
    split = np.full(n_accounts, -1)
    shift = np.zeros(n_accounts)
    for c in range(min_weeks, n_weeks - min_weeks + 1):
        n_before, n_after = weeks[:, c], weeks[:, n_weeks] - weeks[:, c]
        possible = (n_before >= min_weeks) & (n_after >= min_weeks)
        nb, na = np.maximum(n_before, 1)[:, None], np.maximum(n_after, 1)[:, None]
        before = total[:, :, c] / nb
        after = (total[:, :, n_weeks] - total[:, :, c]) / na
        within = (squares[:, :, c] - nb * before**2 + (squares[:, :, n_weeks] - squares[:, :, c]) - na * after**2)
        variance = np.maximum(within, 0.0) / np.maximum(nb + na - 2, 1)
        statistic = ((after - before) ** 2 / ((variance + variance_floor) * (1 / nb + 1 / na))).sum(axis=1)
        better = possible & (statistic > best)
        best = np.where(better, statistic, best)
        split = np.where(better, c, split)
        shift = np.where(better, np.abs(after - before).max(axis=1), shift)
    return best, split, shift
