"""The scan end to end: daily input → store → scan, through the API and the CLI."""

import json
from datetime import date, timedelta
import re

import pandas as pd
import pytest
from click.testing import CliRunner

import ebbwatch
from ebbwatch.cli import main
from ebbwatch.datasets import make_fleet
from ebbwatch.frames import ALERT_COLUMNS

REQUIRED = ("account", "name", "kind", "direction", "as_of", "severity", "p_value", "percentile",
            "change_pct", "onset", "baseline", "message")


@pytest.fixture(scope="module")
def fleet_store(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("scan")
    fleet = make_fleet(120, 240, seed=21, share_changed=0.25)
    daily = tmp / "daily.parquet"
    fleet.daily_frame().to_parquet(daily)
    accounts = tmp / "accounts.csv"
    fleet.accounts.to_csv(accounts, index=False)
    db = str(tmp / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(daily), accounts=str(accounts))
    return fleet, db


def test_api_scan_returns_ranked_dataframe(fleet_store):
    fleet, db = fleet_store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    assert isinstance(alerts, pd.DataFrame)
    assert list(alerts.columns[: len(ALERT_COLUMNS)]) == list(ALERT_COLUMNS)
    assert alerts["severity"].is_monotonic_decreasing
    truth = fleet.truth.set_index("account")
    changed = set(truth.index[truth["kind"] != "quiet"])
    found = set(alerts["account"])
    assert len(found & changed) >= 0.8 * len(changed)
    assert len(found - changed) <= 3
    summary = alerts.attrs["summary"]
    assert summary["as_of"] == fleet.as_of.isoformat() and summary["accounts"] == 120
    assert summary["masked_days"] == [fleet.gap_day.isoformat()]


def test_chunk_size_never_changes_a_score(fleet_store):
    """Fleet-wide quantities are measured once, so chunks of 7 scored three at a time in threads
    give exactly what one pass does (the batched EM and the count model's pooling once depended
    on the chunk's other accounts)."""
    fleet, db = fleet_store
    whole = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=10_000, threads=1)
    pieces = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=7, threads=3)
    assert whole.attrs["scores"]["low_volume"].any()  # the count floor (pooled dispersion) is exercised
    assert (whole.attrs["scores"]["model"] == "prior").any()  # and the fleet-wide window priors
    pd.testing.assert_frame_equal(whole.attrs["scores"].drop(columns="weekday_factors"),
                                  pieces.attrs["scores"].drop(columns="weekday_factors"))
    pd.testing.assert_frame_equal(whole.drop(columns="drivers"), pieces.drop(columns="drivers"))


def test_fleet_fit_beside_the_first_reads_scores_as_a_fit_before_them(fleet_store):
    """The scan reads its first chunks while the fleet fit runs on a cursor of its own; every
    score must equal the plain order: fit the fleet, then read and score."""
    from datetime import date

    from ebbwatch import api, store
    from ebbwatch.detect import score_panel

    fleet, db = fleet_store
    scanned = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=50, threads=2)
    cfg = api._config(None)
    with store.open_store(db, read_only=True) as st:
        accounts = st.account_ids()
        loader = api.PanelLoader(st, cfg, date.fromisoformat(str(fleet.as_of)), cfg.scan.history_days)
        loader.fit_fleet(accounts)
        plain = score_panel(loader(accounts), api._fleet_params(cfg, loader))
    pd.testing.assert_frame_equal(scanned.attrs["scores"].drop(columns="weekday_factors"),
                                  plain.drop(columns="weekday_factors"))
    assert scanned.attrs["masked"].any()  # the gap day is masked on both routes


def test_default_as_of_is_the_last_complete_day(fleet_store):
    fleet, db = fleet_store
    alerts = ebbwatch.scan(db=db, max_alerts=5)
    assert alerts.attrs["summary"]["as_of"] == fleet.as_of.isoformat()


def test_cli_jsonl_has_the_documented_keys_and_one_line_messages(fleet_store):
    fleet, db = fleet_store
    result = CliRunner().invoke(main, ["scan", "--db", db, "--format", "jsonl", "--max-alerts", "7"])
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.splitlines()
    assert len(lines) == 7
    for line in lines:
        record = json.loads(line)
        assert all(k in record for k in REQUIRED) and record["schema"] == 2
        assert "\n" not in record["message"] and record["message"].endswith(".")
    # No terminal: no progress; only the one summary line (in every format, for cron logs).
    assert len(result.stderr.splitlines()) == 1 and "accounts judged" in result.stderr


def test_messages_with_drivers_never_show_a_missing_value(fleet_store):
    """An alert without an onset or a change says nothing of it: pandas keeps a missing value in
    a text column as NaN, which once reached the chat message as 'since nan'."""
    from ebbwatch.alerts import alert_message

    fleet, db = fleet_store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    assert alerts["onset"].notna().any()
    for message, onset in zip(alerts["message"], alerts["onset"]):
        assert not re.search(r"\bnan\b", message, re.IGNORECASE), message
        assert ("since" in message) == isinstance(onset, str)
    record = alerts.iloc[0].to_dict() | {"onset": float("nan"), "change_pct": float("nan")}
    message = alert_message(record, 7)
    assert "since" not in message and not re.search(r"\bnan\b", message, re.IGNORECASE), message


def test_a_stops_drivers_are_its_silent_days(fleet_store):
    """Drivers explain the change the alert states, over the alert's own window: for a stop the
    silent days, where every event fell to nothing (over the scan's 7-day window they read as
    a partial fall, and a message said "no activity for 3 days ...; mostly edit (-25%)")."""
    fleet, db = fleet_store
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000)
    stopped = alerts[alerts["kind"] == "stop"]
    # The same stops a few days after they began: silent for fewer days than a week.
    back = int(stopped["window_days"].min()) - 4
    earlier = ebbwatch.scan(db=db, as_of=fleet.as_of - timedelta(days=back), max_alerts=1000)
    stops = earlier[(earlier["kind"] == "stop") & (earlier["window_days"] < 7)]
    assert len(stops)
    for drivers, message in zip(stops["drivers"], stops["message"]):
        events = [d for d in drivers if d["type"] == "event"]
        assert events and all(d["observed"] == 0 and d["change_pct"] == -100 for d in events), drivers
        assert "(-100%)" in message or "mostly" not in message, message


def test_cli_table_kind_filter_and_fail_on_alert(fleet_store):
    fleet, db = fleet_store
    runner = CliRunner()
    table = runner.invoke(main, ["scan", "--db", db, "--kind", "surge"])
    assert table.exit_code == 0
    body = table.stdout.splitlines()
    # Words, not field names; MRR and segment from accounts.csv (issue 24).
    assert body[0].split()[:6] == ["Account", "Name", "Segment", "MRR", "State", "Kind"]
    first = body[2].split()
    account = fleet.accounts.set_index("account").loc[first[0]]
    assert first[-7:-5] == [account["segment"], f"{account['mrr']:,.0f}"]
    assert all(" surge " in line for line in body[2:])
    assert "Baseline model" not in table.stdout and "log-normal" not in table.stdout
    wide = runner.invoke(main, ["scan", "--db", db, "--kind", "surge", "--wide"]).stdout
    assert "Percentile" in wide.splitlines()[0] and "Baseline model" in wide.splitlines()[0]
    assert "accounts judged" in table.stderr
    assert runner.invoke(main, ["scan", "--db", db, "--fail-on-alert"]).exit_code == 1
    assert runner.invoke(main, ["scan", "--db", db, "--fail-on-alert", "--max-alerts", "0"]).exit_code == 0


@pytest.mark.parametrize("fmt", ["csv", "markdown", "json"])
def test_cli_other_formats(fleet_store, fmt):
    fleet, db = fleet_store
    result = CliRunner().invoke(main, ["scan", "--db", db, "--format", fmt, "--max-alerts", "3"])
    assert result.exit_code == 0
    if fmt == "csv":
        assert result.stdout.splitlines()[0].startswith("schema,account,name,kind")
        assert len(result.stdout.splitlines()) == 4
    elif fmt == "json":
        doc = json.loads(result.stdout)
        assert len(doc["alerts"]) == 3 and doc["summary"]["judged"] > 0
    else:
        assert result.stdout.startswith("| Account | Name | Segment | MRR | State | Kind")


def test_cli_errors_map_to_exit_codes(tmp_path, fleet_store):
    fleet, db = fleet_store
    runner = CliRunner()
    assert runner.invoke(main, ["scan", "--db", db, "--as-of", "last tuesday"]).exit_code == 2
    assert runner.invoke(main, ["scan", "--db", db, "--kind", "wobble"]).exit_code == 2
    missing = runner.invoke(main, ["scan", "--db", str(tmp_path / "none.duckdb")])
    assert missing.exit_code == 3 and "no store" in missing.stderr


def test_every_public_name_stays_a_function_after_a_scan(fleet_store):
    """``ebbwatch.explain`` once became the ``ebbwatch.explain`` module as soon as a scan had
    imported it (a submodule's first import sets the package attribute)."""
    import inspect

    fleet, db = fleet_store
    ebbwatch.scan(db=db, as_of=fleet.as_of)
    ebbwatch.explain(fleet.account_ids[0], db=db, as_of=fleet.as_of)
    for name in ebbwatch.__all__:
        if name != "__version__":
            assert inspect.isfunction(getattr(ebbwatch, name)), name
    assert ebbwatch.explain(fleet.account_ids[0], db=db, as_of=fleet.as_of)["account"] == fleet.account_ids[0]


@pytest.mark.parametrize("fmt", ["table", "jsonl", "csv", "markdown", "json"])
def test_the_summary_line_reaches_stderr_in_every_format(fleet_store, fmt):
    """A cron job that keeps the JSON lines still records what the run did."""
    fleet, db = fleet_store
    result = CliRunner().invoke(main, ["scan", "--db", db, "--as-of", fleet.as_of.isoformat(), "--format", fmt])
    assert result.exit_code == 0
    assert "accounts judged" in result.stderr and "accounts judged" not in result.stdout


def test_plot_without_matplotlib_fails_before_the_work(fleet_store, monkeypatch, tmp_path):
    """``--plot`` needs matplotlib: say so at once, before a replay or an explanation runs."""
    import builtins

    from ebbwatch import api

    fleet, db = fleet_store
    real_import = builtins.__import__

    def no_matplotlib(name, *args, **kwargs):
        if name.split(".")[0] == "matplotlib":
            raise ImportError("no matplotlib here")
        return real_import(name, *args, **kwargs)

    def must_not_run(*args, **kwargs):
        raise AssertionError("the work ran before the plot's requirement was checked")

    monkeypatch.setattr(builtins, "__import__", no_matplotlib)
    monkeypatch.setattr(api, "backtest", must_not_run)
    monkeypatch.setattr(api, "explain", must_not_run)
    outcomes = tmp_path / "o.csv"
    outcomes.write_text("account,date,outcome\n")
    for args in (["backtest", "--outcomes", str(outcomes)], ["explain", fleet.account_ids[0]]):
        result = CliRunner().invoke(main, [*args, "--db", db, "--plot", str(tmp_path / "x.svg")])
        assert result.exit_code == 2, result.output
        assert "--plot needs matplotlib: pip install 'ebbwatch[plot]'" in result.stderr


def test_a_filtered_scan_records_the_whole_days_judgement(tmp_path):
    """``--kind``, ``--max-alerts`` and the format choose what is printed; the day recorded is
    the whole fleet's judgement, the same whatever was printed (two teams filtering differently
    on one store each saw the other's alerts as new every day)."""
    fleet = make_fleet(120, 240, seed=21, share_changed=0.25)
    fleet.daily_frame().to_parquet(tmp_path / "d.parquet")
    db = str(tmp_path / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp_path / "d.parquet"))
    runner = CliRunner()
    day = fleet.as_of.isoformat()

    def recorded():
        log = ebbwatch.alert_history(db=db)
        return sorted(map(tuple, log.loc[log["as_of"] == day, ["account", "direction", "state"]].to_numpy().tolist()))

    assert runner.invoke(main, ["scan", "--db", db, "--as-of", day, "--record"]).exit_code == 0
    whole = recorded()
    assert len(whole) > 2 and {d for _, d, _ in whole} == {"down", "up"}
    for extra in (["--kind", "surge"], ["--max-alerts", "0"], ["--format", "jsonl", "--kind", "stop"]):
        result = runner.invoke(main, ["scan", "--db", db, "--as-of", day, "--record", *extra])
        assert result.exit_code == 0
        assert recorded() == whole, extra
    surges = runner.invoke(main, ["scan", "--db", db, "--as-of", day, "--all", "--kind", "surge", "--format", "jsonl"])
    assert {json.loads(line)["kind"] for line in surges.stdout.splitlines()} == {"surge"}


def test_days_after_the_data_or_before_it_are_refused(fleet_store, tmp_path):
    """A day after the store's last day is not silence, it is missing: judging it flooded a
    chat channel with 'drop -100%'.  A day before the data said 'cannot convert float NaN'."""
    fleet, db = fleet_store
    runner = CliRunner()
    after = (fleet.as_of + timedelta(days=3)).isoformat()
    first = min(fleet.days).isoformat()
    for command in (["scan"], ["report", "--html", str(tmp_path / "r.html")], ["explain", fleet.account_ids[0]]):
        late = runner.invoke(main, [*command, "--db", db, "--as-of", after])
        assert late.exit_code == 3, late.output
        assert f"after the store's last day with data ({fleet.as_of.isoformat()})" in late.stderr
        early = runner.invoke(main, [*command, "--db", db, "--as-of", "2020-01-01"])
        assert early.exit_code == 3 and f"the store holds {first} .. {fleet.as_of.isoformat()}" in early.stderr
    assert not (tmp_path / "r.html").exists()


def test_the_default_day_is_complete_in_every_time_zone(tmp_path):
    """Events up to 2026-11-30T23:36Z with an account in Sydney: there it is already 1 December
    and that day has only begun, in New York 30 November is still open; the default judges the
    last day complete everywhere and says why.  The day after the newest event is never judged."""
    from datetime import datetime, timezone

    accounts = tmp_path / "accounts.csv"
    accounts.write_text("account,timezone\nsyd-1,Australia/Sydney\nny-2,America/New_York\nutc-3,\n")
    rows = []
    end = datetime(2026, 11, 30, 23, 36, tzinfo=timezone.utc)
    for back in range(90 * 24 * 4):
        ts = end - timedelta(minutes=15 * back)
        for account in ("syd-1", "ny-2", "utc-3"):
            rows.append({"ts": ts.isoformat().replace("+00:00", "Z"), "event": "x", "user": "u", "account": account})
    events = tmp_path / "events.jsonl"
    events.write_text("".join(json.dumps(r) + "\n" for r in rows))
    db = str(tmp_path / "s.duckdb")
    ebbwatch.ingest_files([str(events)], db=db, accounts=str(accounts))
    alerts = ebbwatch.scan(db=db, today=date(2026, 12, 4))
    summary = alerts.attrs["summary"]
    assert summary["as_of"] == "2026-11-29"
    assert "still open" in summary["as_of_reason"] and "2026-11-30T23:36" in summary["as_of_reason"]
    result = CliRunner().invoke(main, ["scan", "--db", db])
    assert "judged the last day complete in every account's time zone" in result.stderr
