"""Backtest: metric definitions, point-in-time honesty, and agreement with the daily scan."""

from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest

import ebbwatch
from ebbwatch.backtest import evaluate, replay
from ebbwatch.datasets import make_fleet
from ebbwatch.series import build_panel

START = date(2026, 1, 1)


def alerts(rows):
    return pd.DataFrame(rows, columns=["as_of", "account", "direction", "kind", "severity"])


def outcomes(rows):
    return pd.DataFrame(rows, columns=["account", "date", "outcome"])


EXPOSURE = pd.DataFrame({"as_of": [START + timedelta(days=i) for i in range(100)], "judged": [10] * 100})


def test_hand_computed_confusion_table():
    """Accounts a, b alerted down before churning; c alerted down, never churned; d churned with
    no alert; e alerted up 50 days before expanding.  By hand: churned recall 2/3, precision
    2/3 (a, b of a, b, c), expanded recall 1/1 and precision 1/1; one false episode (c) over
    10 accounts x 100 days = 32.85 account-months."""
    d = lambda k: START + timedelta(days=k)  # noqa: E731
    a = alerts([(d(10), "a", "down", "drop", 5), (d(11), "a", "down", "drop", 6), (d(20), "b", "down", "slide", 4),
                (d(30), "c", "down", "drop", 3), (d(5), "e", "up", "surge", 8)])
    o = outcomes([("a", d(60), "churned"), ("b", d(70), "churned"), ("d", d(80), "churned"), ("e", d(55), "expanded")])
    m = evaluate(a, o, EXPOSURE, lead_days=30, horizon_days=90)
    assert m["outcomes"]["churned"]["recall_at_lead"] == pytest.approx(2 / 3)
    assert m["outcomes"]["churned"]["precision"] == pytest.approx(2 / 3)
    assert m["outcomes"]["churned"]["median_lead_days"] == 50  # leads 50 (a) and 50 (b)
    assert m["outcomes"]["expanded"]["recall_at_lead"] == 1.0 and m["outcomes"]["expanded"]["precision"] == 1.0
    assert m["alert_episodes"] == 4 and m["false_alert_episodes"] == 1
    assert m["false_alerts_per_100_account_months"] == pytest.approx(100 / (1000 / 30.44))
    assert m["alerts_per_day"] == pytest.approx(4 / 100)
    late = evaluate(a, o, EXPOSURE, lead_days=55, horizon_days=90)
    assert late["outcomes"]["churned"]["recall_at_lead"] == 0.0  # 50 days of lead is not 55


def test_outcomes_the_replay_cannot_see_are_not_counted_in_recall():
    """Replayed days 0-99.  A churn on day 10 (its span 90-30 days before: days -80..-20) and one
    on day 200 (110..170) had no replayed day to be caught on; the churn on day 60 is caught.
    Recall 1/1, not 1/3, and the two are reported apart.  With c's churn on day 120 too (seen,
    alerted only 25 days ahead) recall is 1/2; precision counts an alert followed by any churn."""
    d = lambda k: START + timedelta(days=k)  # noqa: E731
    a = alerts([(d(20), "a", "down", "drop", 5), (d(95), "c", "down", "drop", 5)])
    o = outcomes([("a", d(60), "churned"), ("b", d(10), "churned"), ("c", d(200), "churned"), ("c", d(120), "churned")])
    m = evaluate(a, o, EXPOSURE, lead_days=30, horizon_days=90)["outcomes"]["churned"]
    assert (m["count"], m["outside_replay"], m["recall_at_lead"]) == (2, 2, 0.5)
    assert m["precision"] == 1.0 and m["caught_within_horizon"] == 2
    seen = evaluate(a, outcomes([("a", d(60), "churned"), ("b", d(10), "churned")]), EXPOSURE)["outcomes"]["churned"]
    assert (seen["count"], seen["outside_replay"], seen["recall_at_lead"]) == (1, 1, 1.0)


def test_an_episode_lasts_until_the_lifecycle_resolves_it():
    """An alert that stops for two replayed days and comes back is one episode (the daily scan
    shows it as clearing, then ongoing); absent three days, it resolved, and the next is new."""
    d = lambda k: START + timedelta(days=k)  # noqa: E731
    flicker = alerts([(d(10), "c", "down", "drop", 3), (d(13), "c", "down", "drop", 3)])
    assert evaluate(flicker, outcomes([]), EXPOSURE)["alert_episodes"] == 1
    resolved = alerts([(d(10), "c", "down", "drop", 3), (d(14), "c", "down", "drop", 3)])
    assert evaluate(resolved, outcomes([]), EXPOSURE)["alert_episodes"] == 2


def test_a_sampled_day_tells_new_from_running_alerts_by_the_days_before_it():
    """Issue 20 item 15: with every 7th day sampled (and the 3 days before each replayed), an
    alert is new on a sampled day when none of the 3 days before had it, as in the daily scan;
    rates are per sampled day, so they do not grow with the step."""
    d = lambda k: START + timedelta(days=k)  # noqa: E731
    exposure = EXPOSURE.assign(sampled=[i % 7 == 0 for i in range(100)])
    weekly = alerts([(d(6), "c", "down", "drop", 3), (d(7), "c", "down", "drop", 3),   # running on day 7
                     (d(14), "c", "down", "drop", 3),                                   # new: 11-13 quiet
                     (d(48), "e", "up", "surge", 3),                                    # not a sampled day
                     (d(49), "c", "down", "drop", 3)])                                  # new
    m = evaluate(weekly, outcomes([]), exposure)
    assert m["alert_episodes"] == 2 and m["days_replayed"] == 15
    assert m["alerts_per_day"] == pytest.approx(2 / 15)
    assert m["false_alerts_per_100_account_months"] == pytest.approx(100 * 2 / (15 * 10 / 30.44))


def test_precision_and_recall_match_scikit_learn():
    """Reference: sklearn.metrics precision_score / recall_score over accounts, with a horizon
    wide enough that every alert-outcome pair counts and a lead of 0."""
    from sklearn.metrics import precision_score, recall_score

    rng = np.random.default_rng(3)
    accounts = [f"a{i}" for i in range(60)]
    churned = rng.random(60) < 0.3
    alerted = np.where(churned, rng.random(60) < 0.7, rng.random(60) < 0.2)
    a = alerts([(START + timedelta(days=5), acc, "down", "drop", 5.0) for acc, x in zip(accounts, alerted) if x])
    o = outcomes([(acc, START + timedelta(days=50), "churned") for acc, x in zip(accounts, churned) if x])
    m = evaluate(a, o, EXPOSURE, lead_days=0, horizon_days=365)["outcomes"]["churned"]
    assert m["precision"] == pytest.approx(precision_score(churned, alerted))
    assert m["recall_at_lead"] == pytest.approx(recall_score(churned, alerted))


def steady_panel(n_accounts=20, n_days=200, stop_account=None, stop_day=None):
    values = np.full((n_accounts, n_days), 100.0)
    if stop_account is not None:
        values[stop_account, stop_day:] = 0.0
    start = (START - date(1970, 1, 1)).days
    a, d = np.nonzero(values)
    return build_panel(a, start + d, values[a, d], values[a, d], values[a, d], accounts=[f"a{i}" for i in range(n_accounts)],
                       start_day=start, end_day=start + n_days - 1)


def test_known_lead_time_is_recovered_exactly_on_noise_free_data():
    """Constant activity; one account stops on day 150 and cancels on day 190.  Nothing else
    changes, so the only alerts are that account's, starting within days of the stop (how many
    days depends on how the fleet-wide BH budget meets the silence's probability), and the lead
    reported is exactly 190 minus the first alert day."""
    panel = steady_panel(stop_account=3, stop_day=150)
    cancel = START + timedelta(days=190)
    days = list(range(panel.start_day + 100, panel.start_day + 200))
    found, exposure = replay(panel, days, outcomes=outcomes([("a3", cancel, "churned")]))
    assert set(found["account"]) == {"a3"}
    first = min(found["as_of"])
    assert START + timedelta(days=150) <= first <= START + timedelta(days=153)
    assert set(found["kind"]) <= {"drop", "stop"} and found.sort_values("as_of")["kind"].iloc[-1] == "stop"
    assert len(found) == (cancel - first).days  # every day from the first alert until the account leaves
    m = evaluate(found, outcomes([("a3", cancel, "churned")]), exposure, lead_days=30, horizon_days=90)
    assert m["outcomes"]["churned"]["median_lead_days"] == (cancel - first).days
    assert m["outcomes"]["churned"]["recall_at_lead"] == 1.0
    assert m["false_alert_episodes"] == 0 and m["outcomes"]["churned"]["precision"] == 1.0
    assert found["as_of"].max() < cancel  # churned accounts leave the replay


def test_adding_later_data_never_changes_a_days_alerts():
    fleet = make_fleet(80, 200, seed=5, share_changed=0.3)
    totals = fleet.counts.sum(axis=2).astype(float)
    start = (fleet.start - date(1970, 1, 1)).days
    def panel_upto(n):
        a, d = np.nonzero(totals[:, :n])
        return build_panel(a, start + d, totals[a, d], totals[a, d], totals[a, d], accounts=fleet.account_ids,
                           start_day=start, end_day=start + n - 1)
    day = start + 170
    short, _ = replay(panel_upto(171), [day])
    full, _ = replay(panel_upto(200), [day])
    assert len(short) > 0
    pd.testing.assert_frame_equal(short.reset_index(drop=True), full.reset_index(drop=True))


def _fleet_store(tmp_path, seed):
    """An 80-account planted fleet in a store, and an outcomes file with one cancellation."""
    fleet = make_fleet(80, 200, seed=seed, share_changed=0.3)
    fleet.daily_frame().to_parquet(tmp_path / "d.parquet")
    db = str(tmp_path / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp_path / "d.parquet"))
    o = tmp_path / "outcomes.csv"
    o.write_text("account,date,outcome\nacct-01,2026-06-01,churned\n")
    return fleet, db, o


def test_backtest_uses_the_daily_scans_judgement(tmp_path):
    fleet, db, o = _fleet_store(tmp_path, seed=6)
    day = fleet.as_of - timedelta(days=3)
    result = ebbwatch.backtest(str(o), start=day, end=day, db=db)
    scans = {back: ebbwatch.scan(db=db, as_of=day - timedelta(days=back), max_alerts=10_000) for back in range(4)}
    replayed = result["_alerts"]
    for back, scan in scans.items():
        on_day = replayed[pd.to_datetime(replayed["as_of"]) == pd.Timestamp(day - timedelta(days=back))]
        assert sorted(zip(on_day["account"], on_day["direction"])) == sorted(zip(scan["account"], scan["direction"]))
    before = {(a, d) for back in (1, 2, 3) for a, d in zip(scans[back]["account"], scans[back]["direction"])}
    assert result["days_replayed"] == 1 and result["lookback_days_replayed"] == 3
    assert result["alert_episodes"] == sum((a, d) not in before for a, d in zip(scans[0]["account"], scans[0]["direction"]))
    for key in ("lead_days", "horizon_days", "false_alerts_per_100_account_months", "alerts_per_day", "days_replayed", "seconds"):
        assert key in result
    for key in ("count", "recall_at_lead", "median_lead_days", "precision"):
        assert key in result["outcomes"]["churned"]


def test_outcomes_of_accounts_the_store_does_not_hold_are_left_out_and_named(tmp_path):
    fleet, db, o = _fleet_store(tmp_path, seed=6)
    day = fleet.as_of - timedelta(days=3)
    mine = ebbwatch.backtest(str(o), start=day, end=day, db=db)
    stranger = tmp_path / "o2.csv"
    stranger.write_text(o.read_text() + f"no-such-account,{fleet.as_of},churned\n")
    with_stranger = ebbwatch.backtest(str(stranger), start=day, end=day, db=db)
    assert with_stranger["outcomes"] == mine["outcomes"]
    assert with_stranger["outcomes_for_unknown_accounts"] == {"outcomes": 1, "accounts": 1, "examples": ["no-such-account"]}
    from ebbwatch.report.backtest_text import render_backtest

    assert "store does not hold (no-such-account)" in render_backtest(with_stranger)


def test_unknown_outcome_kind_names_the_line(tmp_path):
    from ebbwatch.errors import InputError
    from ebbwatch.ingest.csvs import read_outcomes

    path = tmp_path / "o.csv"
    path.write_text("account,date,outcome\na,2026-01-01,churned\nb,2026-01-02,exploded\n")
    with pytest.raises(InputError, match="line 3.*exploded"):
        read_outcomes(str(path))


def test_the_rates_are_estimated_alike_whatever_the_step(tmp_path):
    """Issue 20 item 15: steps 1, 7 and 14 picked thresholds 3, 4 and 5 for one budget because
    alerts a day were counted per replayed day.  Now a step-7 backtest gives exactly the rates
    of the every-day replay read on the same sampled days."""
    from ebbwatch.backtest import evaluate

    fleet, db, o = _fleet_store(tmp_path, seed=8)
    start, end = fleet.as_of - timedelta(days=62), fleet.as_of
    daily = ebbwatch.backtest(str(o), start=start, end=end, step=1, db=db)
    weekly = ebbwatch.backtest(str(o), start=start, end=end, step=7, db=db)
    exposure = daily["_exposure"].copy()
    exposure["sampled"] = [(pd.Timestamp(d) - pd.Timestamp(start)).days % 7 == 0 for d in exposure["as_of"]]
    same_days = evaluate(daily["_alerts"], pd.read_csv(o, parse_dates=["date"]), exposure)
    assert weekly["days_replayed"] == 9 and same_days["days_replayed"] == 9
    assert weekly["alert_episodes"] == same_days["alert_episodes"] > 0
    assert weekly["alerts_per_day"] == pytest.approx(same_days["alerts_per_day"])
    assert weekly["false_alerts_per_100_account_months"] == pytest.approx(same_days["false_alerts_per_100_account_months"])
