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
                         "segment": ["<b>north</b>" if i % 2 else "south" for i in range(len(accounts))]})
    outcomes = pd.DataFrame(
        [(a, START + timedelta(days=CHURN_AT), "churned") for a in sorted(churners)]
        + [(a, START + timedelta(days=d), "churned") for a, d in quiet_churners.items()],
        columns=["account", "date", "outcome"])
    return daily, meta, outcomes, churners


@pytest.fixture(scope="module")
def planted(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("planted-outcomes")
    daily, meta, outcomes, churners = _fleet(np.random.default_rng(23))
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
    assert low <= CHURN_SHARE <= high, (k, n, low, high)
    base = counts[(counts["kind"] == "none") & (counts["outcome"] == "churned")]
    base_low, base_high = clopper_pearson(base["k"].sum(), base["n"].sum())
    # The base rate is far below the alerts' and its interval holds the planted quiet churn
    # (7 quiet accounts over their lives); and nothing expanded or contracted.
    assert base_high < low
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
    segments = text.split('<table class="segments">')[1].split("</table>")[0]
    assert "&lt;b&gt;north&lt;/b&gt;" in segments and "<b>north</b>" not in segments and "south" in segments
