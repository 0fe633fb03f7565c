"""The fleet's own null (detect.fleet_null): left alone on an ordinary day; a day the typical
account itself falls is told in the scan's summary, and with ``[scan] read_against_fleet`` each
account is read against the fleet's spread that day (Efron 2004, JASA 99:96-104, the empirical
null).  Fleets and probits here are invented for these tests."""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from click.testing import CliRunner

import ebbwatch
from ebbwatch.cli import main
from ebbwatch.config import Config, ScanConfig
from ebbwatch.datasets import make_fleet
from ebbwatch.detect.fleet_null import N_BINS, FleetNull, against_fleet, probit_tally, tally_quantiles

AS_OF = date(2026, 3, 29)


def test_tally_quantiles_are_the_probits_quantiles_within_a_bin():
    z = np.random.default_rng(0).normal(-0.4, 1.7, 20_000)
    levels = [0.05, 0.25, 0.5, 0.75, 0.95]
    got = tally_quantiles(probit_tally(stats.norm.cdf(z)), levels)
    np.testing.assert_allclose(got, np.quantile(z, levels), atol=0.02)  # bins are 0.02 wide
    # Blocks scored apart add their tallies: the sum is the whole fleet's.
    np.testing.assert_array_equal(probit_tally(stats.norm.cdf(z[:7000])) + probit_tally(stats.norm.cdf(z[7000:])),
                                  probit_tally(stats.norm.cdf(z)))


def test_calibrated_p_values_are_left_exactly_as_they_are():
    p = np.random.default_rng(1).uniform(size=3000)
    null = FleetNull().fit(probit_tally(p))
    assert not null.moved_ and abs(null.median_z_) < 0.1
    np.testing.assert_array_equal(null.transform(p), p)


def test_a_fleet_whose_typical_account_falls_is_read_against_its_own_spread():
    rng = np.random.default_rng(2)
    # Every quiet account lower by its own amount (a season each feels differently): probits
    # N(-1.8, 3); 150 accounts with a change far beyond that.
    quiet = stats.norm.cdf(rng.normal(-1.8, 3.0, 3000))
    changed = stats.norm.cdf(rng.normal(-14.0, 1.0, 150))
    null = FleetNull().fit(probit_tally(np.concatenate([quiet, changed])))
    assert null.moved_
    assert null.shift_ == pytest.approx(-1.8, abs=0.3) and null.scale_ == pytest.approx(3.0, abs=0.3)
    assert np.mean(quiet < 0.01) > 0.25
    assert np.mean(null.transform(quiet) < 0.01) < 0.02  # 1% expected; 2 standard errors ~0.004
    assert np.mean(null.transform(changed) < 0.01) > 0.95
    # It never makes a p-value smaller, and leaves missing ones missing.
    p = np.concatenate([quiet, changed, [np.nan, 0.0, 1.0]])
    moved = null.transform(p)
    assert np.all(moved[np.isfinite(p)] >= p[np.isfinite(p)]) and np.isnan(moved[-3])


def test_too_few_accounts_leave_the_fleet_alone():
    low = stats.norm.cdf(np.random.default_rng(3).normal(-2.0, 1.0, 40))
    assert not FleetNull().fit(probit_tally(low)).moved_  # 40 < min_accounts
    assert FleetNull(min_accounts=20).fit(probit_tally(low)).moved_
    assert not FleetNull(trigger=-2.5, min_accounts=20).fit(probit_tally(low)).moved_


def test_bad_settings_and_unfitted_use_are_refused():
    with pytest.raises(ValueError, match="quantiles"):
        FleetNull(quantiles=(0.5,)).fit(np.zeros(N_BINS))
    with pytest.raises(ValueError, match="bins"):
        FleetNull().fit(np.zeros(10))
    with pytest.raises(RuntimeError, match="not fitted"):
        FleetNull().transform([0.5])


def test_a_silence_keeps_its_own_evidence():
    scores = pd.DataFrame({"status": ["judged"] * 200, "p_level_low": 0.004, "p_level_high": 0.9,
                           "p_stop": 1.0, "silent_days": 0, "p_down": 0.004, "p_up": 0.9})
    scores.loc[0, ["p_stop", "silent_days", "p_level_low"]] = [1e-9, 10, 0.004]
    tallies = np.vstack([probit_tally(scores["p_level_low"]), probit_tally(scores["p_level_high"])])
    same, told = against_fleet(scores, tallies)
    assert told["down"]["moved"] and not told["down"]["applied"] and same is scores
    same, told = against_fleet(scores, tallies, apply=False)
    assert told["down"]["moved"] and not told["down"]["applied"] and same is scores
    moved, summary = against_fleet(scores, tallies, apply=True)
    assert summary["down"]["applied"] and not summary["up"]["moved"]
    assert (moved["p_level_low"] > 0.004).all() and (moved["p_up"] == 0.9).all()
    assert moved.loc[0, "p_down"] < 1e-6  # the silent account: the window tests moved, its silence did not
    assert scores.loc[1, "p_down"] == 0.004  # the frame given is not changed


def _store(tmp_path, *, away: bool, seed: int = 0, n: int = 300) -> str:
    """A quiet fleet's daily totals (a year to AS_OF); three accounts silent for the last ten days;
    with ``away``, every account's last three weeks thinned to its own 30-100% (people away)."""
    rng = np.random.default_rng(seed)
    counts = make_fleet(n, 365, as_of=AS_OF, seed=seed, share_changed=0.0).counts.sum(axis=2).astype(np.int64)
    if away:
        counts[:, -21:] = rng.binomial(counts[:, -21:], rng.uniform(0.3, 1.0, n)[:, None])
    counts[:3, -10:] = 0
    a, d = np.nonzero(counts)
    days = [AS_OF - timedelta(days=364 - i) for i in range(365)]
    path = tmp_path / f"daily-{away}.parquet"
    pd.DataFrame({"account": [f"a{i:03d}" for i in a], "day": [days[j] for j in d], "event": "app.use",
                  "count": counts[a, d]}).to_parquet(path)
    db = str(tmp_path / f"store-{away}.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(path))
    return db


def test_a_day_the_whole_fleet_is_lower_is_told_and_on_request_raises_the_stops_not_the_fleet(tmp_path):
    ordinary = ebbwatch.scan(db=_store(tmp_path, away=False), as_of=AS_OF, max_alerts=1000, drivers=False)
    assert not ordinary.attrs["summary"]["fleet_null"]["down"]["moved"]
    db = _store(tmp_path, away=True)
    told = ebbwatch.scan(db=db, as_of=AS_OF, max_alerts=1000, drivers=False)
    summary = told.attrs["summary"]["fleet_null"]["down"]
    assert summary["moved"] and not summary["applied"] and summary["median_z"] < -1.0
    assert (told["direction"] == "down").sum() > 50  # by default each account is judged on its own
    line = CliRunner().invoke(main, ["scan", "--db", db, "--as-of", AS_OF.isoformat()]).stderr
    assert "typical account is falling today" in line and "read_against_fleet = true" in line
    page = tmp_path / "report.html"
    assert CliRunner().invoke(main, ["report", "--db", db, "--as-of", AS_OF.isoformat(), "--html", str(page)]).exit_code == 0
    assert "typical account is falling today" in page.read_text()
    asked = Config(scan=ScanConfig(read_against_fleet=True))
    away = ebbwatch.scan(db=db, as_of=AS_OF, max_alerts=1000, drivers=False, config=asked)
    assert away.attrs["summary"]["fleet_null"]["down"]["applied"]
    assert {"a000", "a001", "a002"} <= set(away.loc[away["kind"] == "stop", "account"])
    assert (away["direction"] == "down").sum() <= 6  # 2% of 300


def test_the_backtest_reads_every_block_against_the_same_fleet(tmp_path):
    db = _store(tmp_path, away=True)
    outcomes = tmp_path / "outcomes.csv"
    pd.DataFrame({"account": ["a000"], "date": [AS_OF.isoformat()], "outcome": ["churned"]}).to_csv(outcomes, index=False)
    asked = Config(scan=ScanConfig(read_against_fleet=True))
    runs = [ebbwatch.backtest(str(outcomes), start=AS_OF - timedelta(days=2), end=AS_OF, db=db, config=asked,
                              chunk_size=size) for size in (40, 1000)]
    for r in runs:
        assert r["read_against_fleet"] and r["fleet_null_days"]["down"] == 3
    pd.testing.assert_frame_equal(runs[0]["_alerts"].reset_index(drop=True), runs[1]["_alerts"].reset_index(drop=True))
    assert (runs[0]["_alerts"]["as_of"] == AS_OF).sum() <= 6
