"""An account's own weeks beside a short window history (``window_history._Sums.own_weeks``):
the variance of its weekly log levels beyond count noise, and how the window tests use it."""

import numpy as np
import pandas as pd

from ebbwatch.detect.contrasts import WindowTests
from ebbwatch.detect.window_history import _Sums

WEEK = np.array([1.15, 1.1, 1.1, 1.05, 1.0, 0.3, 0.3])


def _weekday_factors(n_days):
    return np.tile(WEEK / WEEK.mean(), n_days // 7 + 1)[:n_days]


def test_own_weeks_is_the_sample_variance_of_weekly_levels_less_their_count_noise():
    """Reference: numpy's ``var(ddof=1)`` of the weekly log levels, each week's level its
    events over its weekday factors (pandas' grouping by week), less the mean of 1 / (events +
    0.5), the delta-method variance of a log count (common practice)."""
    rng = np.random.default_rng(3)
    n_days, first = 84, [0, 20, 70]
    factors = np.tile(_weekday_factors(n_days), (3, 1))
    values = rng.poisson(8.0 * factors).astype(float)
    for row, start in enumerate(first):
        values[row, :start] = np.nan
    sums = _Sums(values, factors, np.array(first), 182)
    excess, df = sums.own_weeks(last_end=n_days - 7, reference_days=182, half_event=np.full(3, 0.5))
    for row, start in enumerate(first):
        # Whole weeks back from the judged one's start, none before the account's first day.
        keep = [end for end in range(n_days - 7, 6, -7) if end - 7 >= start]
        days = pd.DataFrame({"x": values[row], "f": factors[row], "week": np.arange(n_days) // 7})
        weekly = days.groupby("week").sum().loc[[end // 7 - 1 for end in keep]]
        x, f = weekly["x"].to_numpy(), weekly["f"].to_numpy()
        if len(keep) < 3:
            assert df[row] == 0 and excess[row] == 0, row
            continue
        expected = np.var(np.log((x + 0.5) / f), ddof=1) - np.mean(1.0 / (x + 0.5))
        assert df[row] == len(keep) - 1
        assert np.isclose(excess[row], expected), (row, excess[row], expected)


def test_own_weeks_find_no_excess_in_counts_and_the_planted_one_in_a_wandering_level():
    """Planted truth: Poisson weeks vary by their counts alone (excess 0); weeks whose level is
    log-normal with sd 0.25 add 0.0625.  Over 2,000 accounts of 12 weeks the mean estimate is
    within 3 standard errors of each."""
    rng = np.random.default_rng(11)
    n_accounts, n_days = 2000, 12 * 7 + 7
    factors = np.tile(_weekday_factors(n_days), (n_accounts, 1))
    first = np.zeros(n_accounts, int)
    half = np.full(n_accounts, 0.5)
    steady = rng.poisson(10.0 * factors).astype(float)
    level = np.repeat(np.exp(rng.normal(0.0, 0.25, (n_accounts, n_days // 7 + 1))), 7, axis=1)[:, :n_days]
    wandering = rng.poisson(10.0 * factors * level).astype(float)
    for values, truth in ((steady, 0.0), (wandering, 0.0625)):
        excess, df = _Sums(values, factors, first, 182).own_weeks(n_days - 7, 182, half)
        assert (df == 11).all()
        se = excess.std(ddof=1) / np.sqrt(n_accounts)
        assert abs(excess.mean() - truth) <= 3 * se, (truth, excess.mean(), se)


def test_a_young_accounts_steady_weeks_narrow_its_window_tests():
    """Two young accounts (56 days) fall to 45% in their last week.  The one whose earlier weeks
    were steady is judged against a narrower spread (its own weeks count) than the one whose
    weeks swung; an account with a long history counts no own weeks."""
    rng = np.random.default_rng(5)
    n_days = 400
    factors = np.tile(_weekday_factors(n_days), (3, 1))
    swing = np.repeat(np.exp(rng.normal(0.0, 0.35, n_days // 7 + 1)), 7)[:n_days]
    values = np.vstack([rng.poisson(12.0 * factors[0]), rng.poisson(12.0 * factors[1] * swing),
                        rng.poisson(12.0 * factors[2])]).astype(float)
    values[:2, :n_days - 56] = np.nan
    values[:, -7:] = rng.poisson(12.0 * 0.45 * factors[:, -7:])
    first = np.array([n_days - 56, n_days - 56, 0])
    tests = WindowTests(windows=(7, 14)).fit(values, factors, first, np.full(3, 0.5))
    steady, swinging, long = tests.own_weeks_
    assert steady >= 4 and swinging >= 4 and long == 0, tests.own_weeks_
    assert tests.z_[0, 0] < tests.z_[1, 0] and tests.p_low_[0, 0] < tests.p_low_[1, 0], (tests.z_, tests.p_low_)
