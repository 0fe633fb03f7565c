"""Outcome rates end to end (issue 23) on a fleet invented for this test, whose rates are known:
40% of the accounts that slide cancel a few weeks later, and a few quiet accounts cancel.

``backtest --save-rates`` must recover the 40% within its interval, ``scan`` must then carry the
rates on its alerts (and leave the field out without saved rates), and the report shows what is
at stake and the segments.
"""

import json
from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

import ebbwatch
from ebbwatch.cli import main
from ebbwatch.outcomes import clopper_pearson

START = date(2025, 1, 6)
N_DAYS = 420
SLIDE_FROM, SLIDE_DAYS, CHURN_AT = 250, 30, 300  # day numbers from START
N_SLIDERS, N_QUIET = 60, 140
CHURN_SHARE = 0.4


def _fleet(rng):
    """Daily counts, accounts.csv and outcomes.csv frames."""
    accounts = [f"pl-{i:03d}" for i in range(N_SLIDERS + N_QUIET)]
    sliders = accounts[:N_SLIDERS]
    churners = set(sliders[: int(CHURN_SHARE * N_SLIDERS)])
    quiet_churners = {accounts[N_SLIDERS + i]: int(d) for i, d in zip(range(0, N_QUIET, 20), rng.integers(150, 330, 7))}
    week = np.array([1.15, 1.1, 1.1, 1.05, 1.0, 0.8, 0.8])
    rows = []
    for account in accounts:
        level = rng.uniform(12, 40)
        days = np.arange(N_DAYS)
        factor = np.ones(N_DAYS)
        if account in sliders:
            factor = np.clip(1 - 0.7 * (days - SLIDE_FROM) / SLIDE_DAYS, 0.3, 1.0)
        end = CHURN_AT if account in churners else quiet_churners.get(account, N_DAYS)
        weekdays = [(START + timedelta(days=int(d))).weekday() for d in days]
        counts = rng.poisson(level * factor * week[weekdays])
        for d in range(end):
            if counts[d]:
                rows.append((account, START + timedelta(days=d), "use", int(counts[d])))
    daily = pd.DataFrame(rows, columns=["account", "day", "event", "count"])
    daily["day"] = pd.to_datetime(daily["day"])
    meta = pd.DataFrame({"account": accounts, "name": accounts, "mrr": [100.0 + 10 * (i % 7) for i in range(len(accounts))],
                         # Quiet accounts in one segment, so its base rate is theirs alone.
                         "segment": ["south" if a in sliders else "<b>north</b>" for a in accounts]})
    outcomes = pd.DataFrame(
        [(a, START + timedelta(days=CHURN_AT), "churned") for a in sorted(churners)]
        + [(a, START + timedelta(days=d), "churned") for a, d in quiet_churners.items()],
        columns=["account", "date", "outcome"])
    return daily, meta, outcomes, churners, quiet_churners


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("planted-outcomes")
    daily, meta, outcomes, churners, _ = _fleet(np.random.default_rng(23))
    daily.to_parquet(tmp / "daily.parquet")
    meta.to_csv(tmp / "accounts.csv", index=False)
    outcomes.to_csv(tmp / "outcomes.csv", index=False)
    db = str(tmp / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp / "daily.parquet"), accounts=str(tmp / "accounts.csv"))
    before = ebbwatch.scan(db=db, max_alerts=500)
    result = CliRunner().invoke(main, ["backtest", "--db", db, "--outcomes", str(tmp / "outcomes.csv"), "--step", "7",
                                       "--save-rates", "--format", "json"])
    assert result.exit_code == 0, result.stderr
    return tmp, db, json.loads(result.stdout), result.stderr, before


def test_saved_rates_recover_the_planted_share(planted):
    tmp, db, report, stderr, _ = planted
    assert "Saved outcome rates:" in stderr
    from ebbwatch import store as store_mod

    with store_mod.open_store(db, read_only=True) as st:
        counts, replay = st.saved_outcome_counts()
    assert replay["horizon_days"] == 90 and replay["step_days"] == 7
    down = counts[counts["kind"].isin(["drop", "slide", "stop"]) & (counts["outcome"] == "churned")]
    k, n = int(down["k"].sum()), int(down["n"].sum())
    low, high = clopper_pearson(k, n)
    assert n >= 30, (k, n)
    # status says what was saved, and when.
    saved = ebbwatch.status(db=db)["outcome_rates"]
    assert saved["alert_episodes"] == int(counts.loc[(counts["kind"] != "none") & (counts["outcome"] == "churned"), "n"].sum())
    assert saved["from"] == replay["from"] and saved["horizon_days"] == 90
    assert "alert episodes from the replay" in CliRunner().invoke(main, ["status", "--db", db]).stdout
    assert low <= CHURN_SHARE <= high, (k, n, low, high)
    base = counts[(counts["kind"] == "none") & (counts["outcome"] == "churned")]
    base_low, base_high = clopper_pearson(base["k"].sum(), base["n"].sum())
    assert base_high < low  # far below the alerts' rate
    # The quiet accounts' base rate against a count made here from the planted churn days alone:
    # on the replay's days a horizon apart (every 13th weekly day back from the last whose
    # horizon has passed), the share of living quiet accounts that cancel within 90 days.
    quiet_base = base[base["segment"] == "<b>north</b>"]
    q_low, q_high = clopper_pearson(quiet_base["k"].sum(), quiet_base["n"].sum())
    _, _, _, _, quiet_churners = _fleet(np.random.default_rng(23))
    start, end = date.fromisoformat(replay["from"]), date.fromisoformat(replay["to"])
    known = date.fromisoformat(replay["known_until"])
    sampled = [start + timedelta(days=7 * i) for i in range((end - start).days // 7 + 1)]
    usable = [d for d in sampled if d + timedelta(days=90) <= known]
    hits = total = 0
    for day in usable[::-1][::13]:
        for i in range(N_QUIET):
            churn = quiet_churners.get(f"pl-{N_SLIDERS + i:03d}")
            churn_day = None if churn is None else START + timedelta(days=churn)
            if churn_day is not None and churn_day <= day:
                continue  # gone before this day
            total += 1
            hits += churn_day is not None and (churn_day - day).days <= 90
    assert abs(quiet_base["n"].sum() - total) <= 0.05 * total  # the same windows, less any falsely alerted
    assert q_low <= hits / total <= q_high, (hits, total, q_low, q_high)
    assert counts.loc[counts["outcome"].isin(["expanded", "contracted"]), "k"].sum() == 0


def test_scan_carries_the_rates_and_the_stake(planted):
    tmp, db, _, _, before = planted
    assert "outcome_rates" not in before.columns  # no saved rates, no field
    alerts = ebbwatch.scan(db=db, as_of=str(START + timedelta(days=SLIDE_FROM + 25)), max_alerts=500)
    assert "outcome_rates" in alerts.columns
    down = alerts[alerts["direction"] == "down"]
    assert len(down)
    with_rate = [r for r in down["outcome_rates"] if r.get("churned", {}).get("rate") is not None]
    assert with_rate
    for rates, message in zip(down["outcome_rates"], down["message"]):
        churned = rates.get("churned")
        if churned and churned["rate"] is not None:
            assert churned["low"] <= churned["rate"] <= churned["high"] and churned["k"] <= churned["n"]
            assert f"{churned['k']} of {churned['n']}" in message and "cancellation within 90 days" in message
    # explain says the same for an account with a rate.
    rated = next(a for a, r in zip(down["account"], down["outcome_rates"]) if r.get("churned", {}).get("rate") is not None)
    today = ebbwatch.explain(rated, db=db, as_of=str(START + timedelta(days=SLIDE_FROM + 25)))["today"]
    shown = today["alerts"][0]
    assert shown["outcome_rates"] == dict(zip(alerts["account"], alerts["outcome_rates"]))[rated]
    assert shown["outcome_sentence"].startswith("In past replays, ")
    risk = alerts.attrs["summary"]["at_risk"]
    assert risk["basis"] == "mrr" and risk["down"]["accounts"] > 0
    assert risk["down"]["low"] <= risk["down"]["expected"] <= risk["down"]["high"]
    # JSON lines and CSV carry the field; the terminal says what is at stake.
    result = CliRunner().invoke(main, ["scan", "--db", db, "--as-of", str(START + timedelta(days=SLIDE_FROM + 25)),
                                       "--format", "jsonl", "--all"])
    first = json.loads(result.stdout.splitlines()[0])
    assert set(first["outcome_rates"]) <= {"churned", "contracted", "expanded"}
    assert "at risk: MRR" in result.stderr and "expansion potential" in result.stderr


def test_report_shows_the_stake_and_the_segments(planted):
    tmp, db, _, _, _ = planted
    path = tmp / "report.html"
    result = CliRunner().invoke(main, ["report", "--db", db, "--html", str(path),
                                       "--as-of", str(START + timedelta(days=SLIDE_FROM + 25))])
    assert result.exit_code == 0, result.stderr
    text = path.read_text()
    assert "MRR at risk" in text and "expansion potential" in text.lower()
    assert '<p class="outcome">In past replays, ' in text  # cards say what alerts like theirs led to
    segments = text.split('<table class="segments">')[1].split("</table>")[0]
    assert "&lt;b&gt;north&lt;/b&gt;" in segments and "<b>north</b>" not in segments and "south" in segments


def test_without_mrr_the_stake_is_in_activity(planted, tmp_path):
    import shutil

    tmp, db, _, _, _ = planted
    copy = str(tmp_path / "no-mrr.duckdb")
    shutil.copy(db, copy)
    meta = pd.read_csv(tmp / "accounts.csv").drop(columns="mrr")
    meta.to_csv(tmp_path / "accounts.csv", index=False)
    ebbwatch.ingest_files([], db=copy, accounts=str(tmp_path / "accounts.csv"))
    alerts = ebbwatch.scan(db=copy, as_of=str(START + timedelta(days=SLIDE_FROM + 25)), max_alerts=500)
    risk = alerts.attrs["summary"]["at_risk"]
    assert risk["basis"] == "activity" and risk["down"]["accounts"] > 0
    # Each account's usual monthly activity (its usual level a day times 30.44) weighted by its rate.
    scores = alerts.attrs["scores"].set_index("account")
    expected = 0.0
    for account, kind, rates in zip(alerts["account"], alerts["kind"], alerts["outcome_rates"]):
        churned = rates.get("churned") if kind != "surge" else None
        if churned and churned["rate"] is not None:
            expected += 30.44 * scores.at[account, "baseline_level"] * churned["k"] / churned["n"]
    assert risk["down"]["expected"] == pytest.approx(expected)
    result = CliRunner().invoke(main, ["scan", "--db", copy, "--as-of", str(START + timedelta(days=SLIDE_FROM + 25))])
    assert "events a month expected to cancel" in result.stderr


def test_report_with_the_new_sections_renders_in_chromium(planted, tmp_path):
    from .test_report import CHROMIUM, chromium, console_errors

    if CHROMIUM is None:
        pytest.skip("Chromium is not installed (.ci/run installs Debian's chromium)")
    tmp, db, _, _, _ = planted
    path = tmp_path / "report.html"
    ebbwatch.api.write_report(str(path), db=db, as_of=str(START + timedelta(days=SLIDE_FROM + 25)))
    dom = chromium(path.as_uri(), tmp_path, "--dump-dom")
    assert dom.returncode == 0 and not console_errors(dom.stderr)
    assert '<table class="segments">' in dom.stdout and "MRR at risk" in dom.stdout
    assert "<b>north</b>" not in dom.stdout and "&lt;b&gt;north&lt;/b&gt;" in dom.stdout
