"""A change of weekday shape is not a drop: the profile and the silence test follow the shape an
account has had since the change (planted-truth data, invented for these tests)."""

from datetime import date, timedelta

import numpy as np

from ebbwatch.baseline import WeekdayProfile
from ebbwatch.baseline.shape_change import recent_weeks_departure, weekday_shape_split

from ebbwatch.datasets import make_fleet

from .test_behaviour import judge

SUNDAY = date(2026, 3, 29)
FLAT = np.ones(7)
WEEKDAYS_ONLY = np.array([1.4, 1.4, 1.4, 1.4, 1.3, 0.05, 0.05])
WEEKEND_HEAVY = np.array([0.8, 0.8, 0.8, 0.8, 0.9, 1.5, 1.4])


def _counts(rng, shapes_by_week, rate, noise_shape=5.0):
    """Daily counts, Poisson around ``rate`` times the week's shape times a gamma day effect
    (over-dispersed, as activity is); ``shapes_by_week`` oldest first, Monday first."""
    shape = np.concatenate([s / s.mean() for s in shapes_by_week])
    expected = np.asarray(rate, float)[:, None] * shape[None, :]
    return rng.poisson(expected * rng.gamma(noise_shape, 1.0 / noise_shape, expected.shape)).astype(float)


def _fleet_and_a_changed_week(seed, fleet_seed, old, new, *, weeks_since, rate=40.0):
    """A quiet fleet's daily totals (80 accounts, a year to ``SUNDAY``) and one more account of
    ``rate`` events a day whose weeks (from the first Monday) have the shape ``old`` and, for the
    last ``weeks_since``, ``new``."""
    rng = np.random.default_rng(seed)
    totals = make_fleet(80, 365, as_of=SUNDAY, seed=fleet_seed, share_changed=0.0).counts.sum(axis=2)
    n_days = totals.shape[1]
    first_monday = (7 - (SUNDAY - timedelta(days=n_days - 1)).weekday()) % 7
    weeks = (n_days - first_monday) // 7
    series = np.zeros(n_days)
    series[first_monday:] = _counts(rng, [old] * (weeks - weeks_since) + [new] * weeks_since, np.array([rate]))[0]
    series[:first_monday] = rng.poisson(rate, first_monday)
    return totals, series


def test_stable_weeks_rarely_split_and_a_new_shape_is_found_where_it_began():
    rng = np.random.default_rng(3)
    profile = WeekdayProfile(change_statistic=40.0)
    false = []
    for shape in (FLAT, WEEKDAYS_ONLY, WEEKEND_HEAVY):
        for rate in (3.0, 10.0, 50.0):
            counts = _counts(rng, [shape] * 16, np.full(1500, rate))
            false.append(float((profile.fit(counts, 0).change_start_ >= 0).mean()))
    # The threshold is set at about one stable account in 200 (3+ events a day); allow 2%.
    assert max(false) <= 0.02, false
    for old, new in ((FLAT, WEEKDAYS_ONLY), (WEEKDAYS_ONLY, WEEKEND_HEAVY)):
        counts = _counts(rng, [old] * 10 + [new] * 6, np.full(500, 10.0))
        fitted = profile.fit(counts, 0)
        found = fitted.change_start_ >= 0
        assert found.mean() >= 0.8
        assert np.mean(np.abs(fitted.change_start_[found] - 70) <= 7) >= 0.9  # week 10 starts at column 70
        # The factors are the new shape's, not a blend with the old one.
        off_new = np.abs(fitted.factors_[found] - new / new.mean()).mean(axis=1)
        off_old = np.abs(fitted.factors_[found] - old / old.mean()).mean(axis=1)
        assert np.median(off_new) < 0.4 * np.median(off_old), (np.median(off_new), np.median(off_old))


def test_the_split_statistic_grows_with_the_change():
    rng = np.random.default_rng(5)
    counts = _counts(rng, [FLAT] * 10 + [WEEKDAYS_ONLY] * 6, np.full(200, 20.0))
    weeks = counts.reshape(200, 16, 7)
    share = (weeks / weeks.mean(axis=2, keepdims=True)).transpose(0, 2, 1)
    big, split, shift = weekday_shape_split(share, np.ones((200, 16), bool))
    assert np.median(split) == 10 and np.median(shift) > 0.8
    mild = _counts(rng, [FLAT] * 10 + [0.5 * FLAT + 0.5 * WEEKDAYS_ONLY] * 6, np.full(200, 20.0)).reshape(200, 16, 7)
    small, _, _ = weekday_shape_split((mild / mild.mean(axis=2, keepdims=True)).transpose(0, 2, 1),
                                      np.ones((200, 16), bool))
    assert np.median(small) < np.median(big)


def test_an_account_that_stopped_working_weekends_is_not_alerted_on_its_weekend():
    """Five weeks ago the account moved its weekend work to the weekdays (the same weekly total).
    Judged on a Sunday after two empty weekend days, it used to read as a stop (or a drop) every
    weekend until the old shape left the profile's sixteen weeks."""
    totals, series = _fleet_and_a_changed_week(11, 0, FLAT, WEEKDAYS_ONLY, weeks_since=5)
    scores, alerts = judge(np.vstack([totals, series]), as_of=SUNDAY)
    account = f"a{totals.shape[0]}"
    assert account not in set(alerts["account"]), alerts
    row = scores.loc[account]
    assert row["down_kind"] != "stop" and row["p_down"] > 0.01, row[["p_down", "down_kind", "p_stop"]]
    change_day = (SUNDAY - date(1970, 1, 1)).days - 35 + 1
    assert abs(row["weekday_shape_since_day"] - change_day) <= 7


def test_an_ordinary_empty_weekend_of_a_weekday_account_is_not_a_drop():
    """A weekday account whose weekends bring a few events (a twenty-fifth of a weekday each),
    growing steadily: its weekday profile pulls the weekends toward the week's mean, so every
    weekend reads far below what is 'expected', and an empty one, expected most, read as the
    lowest ever (p 0.0002).  Against the account's own earlier weekends it is a little unusual."""
    rng = np.random.default_rng(3)
    totals = make_fleet(80, 365, as_of=SUNDAY, seed=1, share_changed=0.0).counts.sum(axis=2)
    n_days = totals.shape[1]
    weekday = (np.arange(n_days) + (SUNDAY - timedelta(days=n_days - 1)).weekday()) % 7
    shape = np.array([1.4, 1.4, 1.4, 1.4, 1.3, 0.04, 0.04])
    level = 40.0 * np.exp(np.log(1.6) * (np.arange(n_days) - n_days) / 365.0)  # +60% a year
    series = rng.poisson(level * shape[weekday] * rng.gamma(5, 0.2, n_days)).astype(float)
    series[-2:] = 0.0  # this weekend: empty
    scores, alerts = judge(np.vstack([totals, series]), as_of=SUNDAY)
    account = f"a{totals.shape[0]}"
    assert account not in set(alerts["account"]), alerts
    assert scores.loc[account, "p_down"] > 0.01, scores.loc[account, ["p_down", "window_down", "change_down_pct"]]
    # The same account with a weekday gone quiet is still a drop of its short windows.
    series[-3:] = 0.0
    series[-4] = 0.0  # Thursday and Friday empty too: four days where forty events a day were usual
    scores, _ = judge(np.vstack([totals, series]), as_of=SUNDAY)
    assert scores.loc[account, "p_down"] < 0.001


def test_explain_names_the_day_the_present_weekday_shape_began(tmp_path):
    import pandas as pd

    import ebbwatch
    from ebbwatch.report.explain_text import render_explanation

    rng = np.random.default_rng(0)
    totals = make_fleet(30, 200, as_of=SUNDAY, seed=0, share_changed=0.0).counts.sum(axis=2)
    n_days = totals.shape[1]
    weekday = (np.arange(n_days) + (SUNDAY - timedelta(days=n_days - 1)).weekday()) % 7
    changed = n_days - 42  # a Monday, six weeks before as-of
    shape = np.where(np.arange(n_days) < changed, 1.0, (WEEKDAYS_ONLY / WEEKDAYS_ONLY.mean())[weekday])
    totals = np.vstack([totals, rng.poisson(40 * shape)])
    rows = [(f"a{i}", (SUNDAY - timedelta(days=n_days - 1 - d)).isoformat(), "use", int(totals[i, d]))
            for i in range(totals.shape[0]) for d in range(n_days) if totals[i, d]]
    pd.DataFrame(rows, columns=["account", "day", "event", "count"]).to_csv(tmp_path / "daily.csv", index=False)
    db = str(tmp_path / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp_path / "daily.csv"))
    info = ebbwatch.explain("a30", db=db, as_of=SUNDAY)
    assert info["weekday_shape_since"] == (SUNDAY - timedelta(days=41)).isoformat()
    assert f"this shape since {info['weekday_shape_since']}" in render_explanation(info)
    assert ebbwatch.explain("a0", db=db, as_of=SUNDAY)["weekday_shape_since"] is None


def test_a_shape_one_or_two_weeks_old_is_noticed_and_stable_weeks_rarely_are():
    rng = np.random.default_rng(17)
    false = []
    for shape in (FLAT, WEEKDAYS_ONLY, WEEKEND_HEAVY):
        for rate in (3.0, 10.0, 50.0):
            weeks = _counts(rng, [shape] * 16, np.full(1500, rate)).reshape(1500, 16, 7)
            share = (weeks / weeks.mean(axis=2, keepdims=True)).transpose(0, 2, 1)
            statistic, shift, _, _ = recent_weeks_departure(share, np.ones((1500, 16), bool))
            false.append(float(((statistic > 25.0) & (shift > 0.4)).mean()))
    # The scan's threshold (25) flags about 2-3% of stable accounts of 3+ events a day on the
    # development fleets; each costs only the short windows' judgement for a day.  Allow 5%.
    assert max(false) <= 0.05, false
    for recent in (1, 2):
        weeks = _counts(rng, [WEEKDAYS_ONLY] * (16 - recent) + [FLAT] * recent, np.full(500, 10.0)).reshape(500, 16, 7)
        share = (weeks / weeks.mean(axis=2, keepdims=True)).transpose(0, 2, 1)
        statistic, shift, _, _ = recent_weeks_departure(share, np.ones((500, 16), bool))
        assert ((statistic > 25.0) & (shift > 0.4)).mean() >= 0.8, recent


def test_an_account_that_began_working_weekends_two_weeks_ago_is_not_a_weekend_surge():
    """Two weeks ago a weekday account spread its work over the whole week (the same weekly
    total).  On a Sunday its weekend reads as many times its usual weekend, but the new shape is
    too young for the split search (three weeks a side), so its own weekdays' and weekends' past
    cannot judge a two-day window: only whole weeks do, and they have not moved."""
    totals, series = _fleet_and_a_changed_week(23, 2, WEEKDAYS_ONLY, FLAT, weeks_since=2)
    scores, alerts = judge(np.vstack([totals, series]), as_of=SUNDAY)
    account = f"a{totals.shape[0]}"
    assert account not in set(alerts["account"]), alerts
    assert scores.loc[account, "p_up"] > 0.01, scores.loc[account, ["p_up", "window_up", "change_up_pct"]]
    # The same account whose whole week rose (a real surge) is still one.
    series[-14:] *= 3.0
    scores, _ = judge(np.vstack([totals, series]), as_of=SUNDAY)
    assert scores.loc[account, "p_up"] < 0.001


def test_a_young_weekday_accounts_ordinary_weekend_is_not_a_drop():
    """An account eight weeks old that works on weekdays only (a weekend day brings a
    twenty-fifth of a weekday).  With its factors pulled toward flat by its number of weeks, its
    weekend factors sat near 0.4 where its shares were 0.04, and every Sunday its 2-day window
    read as a fall of over 90% (p 1e-10 on the development family's replayed year): a young
    account has no history of its own windows to absorb that.  Pulled by their own noise, the
    factors keep the weekends as seen (p_down 5e-5 -> 0.24 here); an empty working week is still
    a drop."""
    rng = np.random.default_rng(6)
    totals = make_fleet(80, 365, as_of=SUNDAY, seed=3, share_changed=0.0).counts.sum(axis=2)
    series = np.zeros(totals.shape[1])
    series[-56:] = _counts(rng, [WEEKDAYS_ONLY] * 8, np.array([40.0]))[0]
    scores, alerts = judge(np.vstack([totals, series]), as_of=SUNDAY)
    account = f"a{totals.shape[0]}"
    row = scores.loc[account]
    assert row["status"] == "judged" and account not in set(alerts["account"]), alerts
    assert row["p_down"] > 0.01, row[["p_down", "window_down", "change_down_pct", "model"]]
    factors = np.asarray(row["weekday_factors"])
    assert factors[5] < 0.2 and factors[6] < 0.2, factors
    series[-7:-2] = 0.0  # Monday to Friday empty: five days where some forty events were usual
    scores, _ = judge(np.vstack([totals, series]), as_of=SUNDAY)
    assert scores.loc[account, "p_down"] < 0.001
