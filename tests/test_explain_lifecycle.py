"""Drivers, the alert lifecycle, snoozes and the JSON-lines schema."""

import json
from datetime import date, timedelta

import pandas as pd
import pytest
from click.testing import CliRunner

import ebbwatch
from ebbwatch.alerts import advance_lifecycle
from ebbwatch.cli import main
from ebbwatch.datasets import make_fleet
from ebbwatch.explain import event_drivers, user_drivers

D0 = date(2026, 3, 1)
BASE = [D0 + timedelta(days=i) for i in range(28)]
WINDOW = [D0 + timedelta(days=28 + i) for i in range(7)]


def frame(rows, columns):
    return pd.DataFrame(rows, columns=columns)


def test_one_event_carries_the_drop_and_is_named_first_shares_add_up():
    rows = []
    for d in BASE:
        rows += [(d, "booking.create", 40), (d, "booking.view", 20), (d, "invite.send", 5)]
    for d in WINDOW:
        rows += [(d, "booking.create", 4), (d, "booking.view", 20), (d, "invite.send", 5)]
    drivers = event_drivers(frame(rows, ["day", "event", "events"]), {}, BASE, WINDOW)
    assert drivers[0]["event"] == "booking.create"
    assert drivers[0]["expected"] == 280 and drivers[0]["observed"] == 28 and drivers[0]["change_pct"] == -90.0
    assert sum(d["share"] for d in drivers) == pytest.approx(1.0)
    assert drivers[0]["share"] == pytest.approx(1.0)


def test_weights_apply_to_drivers():
    rows = [(d, "a", 10) for d in BASE] + [(d, "b", 10) for d in BASE] + [(d, "a", 5) for d in WINDOW] + [(d, "b", 10) for d in WINDOW]
    drivers = event_drivers(frame(rows, ["day", "event", "events"]), {"a": 2.0}, BASE, WINDOW)
    assert drivers[0] == {"type": "event", "event": "a", "expected": 140.0, "observed": 70.0, "change_pct": -50.0, "share": 1.0}


def test_two_regular_users_who_stop_are_named():
    rows = []
    for d in BASE:
        rows += [(d, "u-ann", "x", 10), (d, "u-bo", "x", 6), (d, "u-cy", "x", 4)]
    for d in WINDOW:
        rows += [(d, "u-cy", "x", 4)]
    drivers = user_drivers(frame(rows, ["day", "user", "event", "events"]), {}, BASE, WINDOW, "down")
    assert [d["user"] for d in drivers] == ["u-ann", "u-bo"]
    assert all(d["change"] == "went quiet" for d in drivers)
    assert drivers[0]["baseline_share"] == pytest.approx(0.5)
    assert sum(d["share"] for d in drivers) == pytest.approx(1.0)  # they are the whole change


def test_newly_active_users_on_a_surge():
    rows = [(d, "u-ann", "x", 5) for d in BASE] + [(d, "u-ann", "x", 5) for d in WINDOW] + [(d, "u-new", "x", 10) for d in WINDOW]
    drivers = user_drivers(frame(rows, ["day", "user", "event", "events"]), {}, BASE, WINDOW, "up")
    assert drivers == [{"type": "user", "user": "u-new", "change": "newly active", "baseline_share": 0.0, "share": 1.0}]


def alert_rows(*triples):
    return pd.DataFrame([{"account": a, "direction": d, "kind": "drop", "severity": s, "message": "m"} for a, d, s in triples])


def test_lifecycle_new_ongoing_escalated_clearing_resolved():
    day = date(2026, 3, 1)
    log = advance_lifecycle(pd.DataFrame(), alert_rows(("a", "down", 5.0)), day)
    assert log.set_index("account")["state"]["a"] == "new"
    log = advance_lifecycle(log, alert_rows(("a", "down", 6.0)), day + timedelta(1))
    assert log["state"].tolist() == ["ongoing"]
    log = advance_lifecycle(log, alert_rows(("a", "down", 9.5)), day + timedelta(2))
    assert log["state"].tolist() == ["escalated"] and log["peak_severity"].tolist() == [9.5]
    states = []
    for k in range(3, 6):
        log = advance_lifecycle(log, alert_rows(), day + timedelta(k), resolve_days=3)
        states.append(log["state"].tolist()[0])
    assert states == ["clearing", "clearing", "resolved"]
    log = advance_lifecycle(log, alert_rows(("a", "down", 5.0)), day + timedelta(7))
    assert log["state"].tolist() == ["new"]


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("life")
    fleet = make_fleet(100, 240, seed=31, share_changed=0.25)
    fleet.daily_frame().to_parquet(tmp / "daily.parquet")
    accounts = fleet.accounts.copy()
    accounts.loc[0, "name"] = '<b onclick="x()">@here Evil\nCorp</b> =cmd()'
    accounts.to_csv(tmp / "accounts.csv", index=False)
    db = str(tmp / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp / "daily.parquet"), accounts=str(tmp / "accounts.csv"))
    return fleet, db


def test_scanning_the_same_day_twice_changes_nothing_and_next_day_is_ongoing(store):
    fleet, db = store
    day1 = fleet.as_of - timedelta(days=1)
    first = ebbwatch.scan(db=db, as_of=day1, record=True, max_alerts=1000)
    log1 = ebbwatch.alert_history(db=db)
    again = ebbwatch.scan(db=db, as_of=day1, record=True, max_alerts=1000)
    assert first["account"].tolist() == again["account"].tolist()
    assert ebbwatch.alert_history(db=db).equals(log1)
    assert set(first["state"]) == {"new"}
    second = ebbwatch.scan(db=db, as_of=fleet.as_of, record=True, max_alerts=1000)
    both = set(first["account"]) & set(second["account"])
    assert both and all(s in ("ongoing", "escalated") for s in second.set_index("account").loc[sorted(both), "state"])
    new_only = ebbwatch.scan(db=db, as_of=fleet.as_of, show="new", max_alerts=1000)
    assert set(new_only["state"]) <= {"new", "escalated"} and len(new_only) < len(second)


def test_past_as_of_does_not_change_states_unless_recorded(store):
    fleet, db = store
    before = ebbwatch.alert_history(db=db)
    result = CliRunner().invoke(main, ["scan", "--db", db, "--as-of", (fleet.as_of - timedelta(days=5)).isoformat()])
    assert result.exit_code == 0
    assert ebbwatch.alert_history(db=db).equals(before)


def test_snooze_hides_an_account_until_the_date(store):
    fleet, db = store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    target = alerts["account"].iloc[0]
    runner = CliRunner()
    # The fleet's days are in the past, so the snooze's end is too: --force records it anyway.
    day_before = fleet.as_of - timedelta(days=1)
    assert runner.invoke(main, ["snooze", target, "--db", db, "--until", day_before.isoformat(), "--reason", "migration",
                                "--force"]).exit_code == 0
    hidden = ebbwatch.scan(db=db, as_of=day_before, max_alerts=1000, show="all")
    assert target not in set(hidden["account"]) and hidden.attrs["summary"]["snoozed"] >= 1
    later = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    assert later.attrs["summary"]["snoozed"] == 0 and target in set(later["account"])
    assert runner.invoke(main, ["snooze", "nobody", "--db", db, "--until", "2027-01-01"]).exit_code == 3


def test_jsonl_schema_is_pinned(store):
    fleet, db = store
    result = CliRunner().invoke(main, ["scan", "--db", db, "--as-of", fleet.as_of.isoformat(), "--format", "jsonl", "--all"])
    record = json.loads(result.stdout.splitlines()[0])
    assert list(record) == ["schema", "account", "name", "kind", "direction", "as_of", "severity", "p_value", "q_value",
                            "percentile", "change_pct", "window_days", "level", "baseline_level", "onset", "baseline",
                            "state", "drivers", "message", "silent_days", "trend_change_pct"]
    assert record["schema"] == 2


def test_hostile_account_name_is_inert_in_message_csv_and_markdown(store):
    fleet, db = store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, show="all")
    from ebbwatch.report import render_alerts
    from ebbwatch.alerts import alert_message

    sample = alerts.iloc[0].to_dict()
    sample["name"] = '<b onclick="x()">@here Evil\nCorp</b> =cmd()'
    message = alert_message(sample, 7)
    assert "\n" not in message and "<b" not in message and "@here" not in message
    frame = alerts.head(1).copy()
    frame["name"] = ["=cmd()|1"]
    assert "'=cmd()" in render_alerts(frame, "csv")
    assert "\\|1" in render_alerts(frame, "markdown")


def test_explain_command_text_json_and_plot(store, tmp_path):
    fleet, db = store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    drops = set(fleet.truth.loc[fleet.truth["kind"] == "drop", "account"])
    target = next(a for a in alerts["account"] if a in drops)
    runner = CliRunner()
    text = runner.invoke(main, ["explain", target, "--db", db, "--as-of", fleet.as_of.isoformat()])
    assert text.exit_code == 0 and "baseline" in text.stdout and "changepoint" in text.stdout
    doc = json.loads(runner.invoke(main, ["explain", target, "--db", db, "--format", "json"]).stdout)
    assert doc["baseline"]["model"] in ("history", "prior") and len(doc["weekday_factors"]) == 7
    assert doc["p_down"] < 1e-4 and doc["changepoint"]["onset"] is not None
    # The whole history in segments: back to back, ending on the judged day, the last one the
    # planted drop's lower level.
    segments = doc["segments"]
    assert segments and segments[-1]["end"] == fleet.as_of.isoformat()
    assert all(date.fromisoformat(b["start"]) == date.fromisoformat(a["end"]) + timedelta(days=1)
               for a, b in zip(segments, segments[1:]))
    assert len(segments) >= 2 and segments[-1]["level"] < segments[-2]["level"]
    pytest.importorskip("matplotlib")
    plot = tmp_path / "chart.svg"
    assert runner.invoke(main, ["explain", target, "--db", db, "--plot", str(plot)]).exit_code == 0
    assert plot.read_text().lstrip().startswith("<?xml")
    assert runner.invoke(main, ["explain", "nobody", "--db", db]).exit_code == 3


def test_snoozes_listed_shortened_lifted_and_their_reason_shown(store):
    """The latest snooze of an account wins (a shorter one shortens it), snoozes can be listed
    and lifted, ``ebbwatch alerts`` shows the reason, and an end date in the past or more than a
    year ahead needs --force."""
    fleet, db = store
    runner = CliRunner()
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, record=True)
    target = alerts["account"].iloc[0]
    today = date.today()
    later = (today + timedelta(days=20)).isoformat()
    assert runner.invoke(main, ["snooze", target, "--db", db, "--until", later, "--reason", "planned migration"]).exit_code == 0
    listed = runner.invoke(main, ["snooze", "--list", "--db", db])
    assert target in listed.stdout and later in listed.stdout and "planned migration" in listed.stdout
    log = runner.invoke(main, ["alerts", "--db", db, "--account", target])
    assert f"until {later}: planned migration" in log.stdout
    # A shorter snooze after a longer one shortens it: the latest command wins.
    sooner = (today + timedelta(days=2)).isoformat()
    assert runner.invoke(main, ["snooze", target, "--db", db, "--until", sooner]).exit_code == 0
    assert ebbwatch.api.snoozes(db=db)["until"].tolist() == [sooner]
    # Past or far-away ends are refused without --force.
    past = (today - timedelta(days=1)).isoformat()
    refused = runner.invoke(main, ["snooze", target, "--db", db, "--until", past])
    assert refused.exit_code == 2 and "in the past" in refused.stderr
    far = (today + timedelta(days=400)).isoformat()
    assert runner.invoke(main, ["snooze", target, "--db", db, "--until", far]).exit_code == 2
    assert runner.invoke(main, ["snooze", target, "--db", db, "--until", far, "--force"]).exit_code == 0
    # Lifted: listed no more, and its alerts show again.
    assert runner.invoke(main, ["snooze", target, "--db", db, "--lift"]).exit_code == 0
    assert "No snoozes in force." in runner.invoke(main, ["snooze", "--list", "--db", db]).stdout
    shown = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, show="all")
    assert target in set(shown["account"])
    assert runner.invoke(main, ["snooze", target, "--db", db, "--lift"]).exit_code == 3  # nothing left to lift


def test_alerts_filter_by_account_and_days(store):
    fleet, db = store
    for back in (2, 1, 0):
        ebbwatch.scan(db=db, as_of=fleet.as_of - timedelta(days=back), max_alerts=1000, record=True)
    log = ebbwatch.alert_history(db=db)
    account = log["account"].iloc[0]
    mine = ebbwatch.alert_history(db=db, accounts=[account])
    assert len(mine) and set(mine["account"]) == {account}
    day = (fleet.as_of - timedelta(days=1)).isoformat()
    one_day = ebbwatch.alert_history(db=db, start=day, end=day)
    assert len(one_day) and set(one_day["as_of"]) == {day}
    text = CliRunner().invoke(main, ["alerts", "--db", db, "--account", account, "--from", day, "--to", day,
                                     "--format", "jsonl"]).stdout
    assert all(json.loads(x)["account"] == account and json.loads(x)["as_of"] == day for x in text.splitlines())


def test_explain_says_whether_the_account_is_alerted_today(store):
    """Issue 20 item 9: kind, severity and state of today's alert in text and JSON, the same as
    the scan's; a quiet account is not alerted."""
    fleet, db = store
    day = fleet.as_of
    alerts = ebbwatch.scan(db=db, as_of=day, max_alerts=1000)
    alerted = alerts.iloc[0]
    quiet = next(a for a in fleet.truth.loc[fleet.truth["kind"] == "quiet", "account"]
                 if a not in set(alerts["account"]))
    runner = CliRunner()
    doc = json.loads(runner.invoke(main, ["explain", alerted["account"], "--db", db, "--as-of", day.isoformat(),
                                          "--format", "json"]).stdout)
    assert doc["today"]["alerted"] is True
    (today,) = [a for a in doc["today"]["alerts"] if a["direction"] == alerted["direction"]]
    assert (today["kind"], today["severity"], today["state"]) == (alerted["kind"], alerted["severity"], alerted["state"])
    text = runner.invoke(main, ["explain", alerted["account"], "--db", db, "--as-of", day.isoformat()]).stdout
    assert f"today          alerted: {alerted['kind']}, severity {alerted['severity']:.1f}, {alerted['state']}" in text
    calm = json.loads(runner.invoke(main, ["explain", quiet, "--db", db, "--as-of", day.isoformat(),
                                           "--format", "json"]).stdout)
    assert calm["today"]["alerted"] is False
    assert "today          not alerted" in runner.invoke(main, ["explain", quiet, "--db", db]).stdout


def test_the_percentile_is_the_alerts_own_window_and_reads_plainly(store):
    """Issue 20 items 9-10: one definition of the percentile (the alert's window among the same
    window's history, mid-rank), and messages without 'below 100.0% of its history'."""
    fleet, db = store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    scores = alerts.attrs["scores"].set_index("account")
    assert len(alerts) > 3
    for alert in alerts.itertuples():
        expected = scores.loc[alert.account, f"percentile_{alert.direction}"]
        assert alert.percentile == pytest.approx(round(expected, 2)), alert.account
        assert "100.0% of its history" not in alert.message and "-%" not in alert.message
        if alert.percentile in (0.0, 100.0):
            assert ("lowest" if alert.direction == "down" else "highest") + " in its history" in alert.message
        if alert.kind == "stop":
            assert alert.change_pct == -100.0


def test_history_rank_and_driver_shares_in_words():
    from ebbwatch.alerts import history_rank
    from ebbwatch.report.explain_text import _share

    assert history_rank(0.0, "down") == "the lowest in its history"
    assert history_rank(100.0, "up") == "the highest in its history"
    assert history_rank(2.7, "down") == "lower than 97% of its history"
    assert history_rank(0.3, "down") == "lower than 99.7% of its history"
    assert history_rank(None, "down") == ""
    assert _share({"share": 0.35}) == " (35% of the change)"
    assert _share({"share": -0.2}) == " (moved against the change)"
    assert "more than the whole change" in _share({"share": 1.3})


def test_explain_text_never_shows_a_placeholder_for_a_missing_value():
    from ebbwatch.report.explain_text import _recent

    line = _recent({"window_days": 7, "level": 2.0, "usual_level": None, "change_pct": None, "percentile": None,
                    "p_low": 0.5, "p_high": 0.5})
    assert "usual -" not in line and "-%" not in line and "no usual level yet" in line


@pytest.mark.parametrize("name", [
    "acct-054", "22.0", "#1 +2 -3 .4 !5", "*bold* _it_ `code` ~~gone~~", "[link](http://x) ![img](http://y)",
    "a|b", "back\\slash &amp; &copy;", "Zeta <i>GmbH</i> @here",
])
def test_markdown_cells_escape_only_what_markdown_reads(name):
    # Issue 24: rendered by markdown-it-py (a CommonMark reference implementation, with GitHub's
    # table and strikethrough rules on), every cell shows its text as given and no markup; ids and
    # numbers are written as typed, without backslashes.
    import html
    import re

    import pandas as pd
    from markdown_it import MarkdownIt

    from ebbwatch.frames import ALERT_COLUMNS
    from ebbwatch.report import render_alerts
    from ebbwatch.textsafe import plain_text

    frame = pd.DataFrame([{c: None for c in ALERT_COLUMNS} | {
        "account": "acct-054", "name": name, "kind": "drop", "severity": 22.0, "change_pct": -40.0,
        "message": name}])
    text = render_alerts(frame, "markdown")
    assert "acct-054 |" in text and "22.0" in text  # no escaping where none is needed
    rendered = MarkdownIt("commonmark").enable("table").enable("strikethrough").render(text)
    assert not re.search(r"<(em|strong|code|a|img|s|del)\b", rendered)
    cells = re.findall(r"<td>(.*?)</td>", rendered)
    assert html.unescape(cells[1]) == plain_text(name) == html.unescape(cells[-1])


def test_mrr_and_segment_show_only_when_accounts_csv_gives_them():
    import pandas as pd

    from ebbwatch.frames import ALERT_COLUMNS
    from ebbwatch.report import render_alerts

    frame = pd.DataFrame([{c: None for c in ALERT_COLUMNS} | {"account": a, "name": a, "kind": "drop", "severity": 5.0,
                                                              "state": "new", "message": "m"} for a in ("a-1", "a-2")])
    assert "MRR" not in render_alerts(frame, "table") and "Segment" not in render_alerts(frame, "markdown")
    frame.attrs["account_details"] = {"a-1": {"mrr": 1250.0, "segment": None}, "a-2": {"mrr": None, "segment": None}}
    table = render_alerts(frame, "table").splitlines()
    assert table[0].split()[:3] == ["Account", "Name", "MRR"] and "1,250" in table[2] and "-" in table[3].split()
