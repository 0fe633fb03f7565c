"""The by-hand benchmark tools that have logic of their own: ``missed.py``'s table of misses,
``ingest.py``'s statement timings and ``young.py``'s young accounts."""

from __future__ import annotations

from datetime import date
from types import SimpleNamespace

import pandas as pd

from .benchmarks.missed import missed


def _fleet():
    truth = pd.DataFrame({
        "account": ["d-big", "d-small", "s-big", "u-young", "q-1"],
        "kind": ["drop", "drop", "slide", "surge", "quiet"],
        "onset": [date(2026, 1, 1)] * 4 + [None],
        "age_days": [10, 10, 40, 3, 0],
        "factor": [0.4, 0.4, 0.5, 2.5, 1.0],
        "usual": [20.0, 2.0, 30.0, 8.0, 10.0],
        "shape": ["", "", "linear", "", ""],
        "traits": ["plain"] * 5,
        "first_day": [date(2025, 1, 1)] * 5,
    })
    return SimpleNamespace(truth=truth)


def _scores(accounts):
    return pd.DataFrame({"account": accounts, "status": "judged", "p_down": 0.2, "p_up": 0.9, "window_down": 7,
                         "change_down_pct": -30.0, "window_up": 2, "change_up_pct": 5.0, "down_kind": "drop",
                         "p_trend_down": 0.5, "growth_pct_year": 0.0})


def test_a_miss_is_a_change_not_alerted_in_its_direction():
    fleet = _fleet()
    accounts = list(fleet.truth["account"])
    # The big drop is caught; the slide is alerted the wrong way; the young surge is not alerted.
    flags = {"d-big": -1, "s-big": 1, "q-1": -1}
    table = missed(fleet, flags, _scores(accounts), {"drop", "slide", "onset"})
    assert sorted(table["account"]) == ["s-big", "u-young"]
    assert dict(zip(table["account"], table["reported as"])) == {"s-big": "slide", "u-young": "onset"}
    assert (table["p_down"] == 0.2).all()
    # Smaller accounts are their own table; kinds not asked for are left out.
    small = missed(fleet, flags, _scores(accounts), {"drop"}, small=True)
    assert list(small["account"]) == ["d-small"]
    assert missed(fleet, flags, _scores(accounts), {"stop"}).empty


def test_the_ingest_benchmark_times_each_store_statement_and_restores_the_connection(tmp_path):
    """``ingest.py --statements``: one ingest with each of the store's statements timed."""
    from ebbwatch.store import connection

    from .benchmarks.ingest import timed_statements

    events = tmp_path / "e.jsonl"
    events.write_text("".join(f'{{"ts": "2026-03-0{d}T10:00:00Z", "event": "x", "user": "u{d}", "account": "a"}}\n'
                              for d in range(1, 4)))
    before = connection.StoreConnection.__init__
    timings = timed_statements(str(events), str(tmp_path / "s.duckdb"))
    assert connection.StoreConnection.__init__ is before
    assert [s for s in timings if s[1].startswith("CREATE OR REPLACE TEMP TABLE staged AS")]
    assert all(seconds >= 0 for seconds, _ in timings)
    assert [t for t, _ in timings] == sorted((t for t, _ in timings), reverse=True)


def test_the_young_accounts_benchmark_cuts_quiet_histories_and_plants_changes_in_them():
    """``young.py``: long quiet accounts cut to 42-119 days, a third of them made to slide and a
    third to drop, and every other account left as generated."""
    from .benchmarks.fleets import generate
    from .benchmarks.young import make_young

    fleet = generate("A", 90, 3, share_changed=0.2)
    made, young = make_young(fleet, 7)
    truth = made.truth.set_index("account")
    assert len(young) >= 9
    assert set(truth.loc[young, "kind"]) == {"quiet", "slide", "drop"}
    for account in made.accounts:
        row = made.accounts.index(account)
        if account not in young:
            assert (made.counts[row] == fleet.counts[row]).all()
            continue
        t = truth.loc[account]
        start = (t["first_day"] - made.start).days
        assert 42 <= made.n_days - start <= 119 and not made.counts[row, :start].any()
        assert t["traits"].endswith("young") and "seasonal" not in t["traits"] and t["usual"] > 0
        if t["kind"] == "quiet":
            assert (made.counts[row, start:] == fleet.counts[row, start:]).all()
        else:
            onset = (t["onset"] - made.start).days
            assert start + 14 <= onset and made.n_days - onset == t["age_days"]
            # Thinned from the generated counts: never more, and clearly fewer since the onset.
            assert (made.counts[row] <= fleet.counts[row]).all()
            assert made.counts[row, onset:].sum() < 0.9 * fleet.counts[row, onset:].sum()


def test_the_lead_ceiling_cuts_each_detector_at_the_same_share_of_quiet_days():
    """``lead_ceiling.py``: each detector is cut where the given share of the quiet rows is
    flagged, and the share of target rows past that cut is its recall (NaN statistics left out
    of the cut)."""
    import numpy as np

    from .benchmarks.lead_ceiling import recall_at_quiet_share

    quiet_p = np.linspace(0.001, 1.0, 1000)
    frame = pd.DataFrame({
        "role": ["quiet"] * 1000 + ["churn30"] * 4,
        # the falling p-value: small is unusual; the told statistic: large is unusual
        "p_down": np.concatenate([quiet_p, [0.0001, 0.005, 0.5, 0.9]]),
        "told": np.concatenate([-quiet_p, [0.0, -0.001, -0.5, -0.0005]]),
    })
    frame.loc[3, "told"] = np.nan  # one quiet statistic unknown
    at_one = recall_at_quiet_share(frame, "churn30", 0.01)
    # Cut at the 1% quantile: p_down <= 0.01099 takes 2 of 4; told >= about -0.0109 takes 3 of 4.
    assert at_one == {"ebbwatch": 0.5, "onset-told": 0.75, "n": 4}
    assert recall_at_quiet_share(frame, "churn30", 0.6)["ebbwatch"] == 0.75


def test_every_benchmark_script_answers_help_without_running():
    """``python tests/benchmarks/X.py --help`` prints its usage and exits: a help text with a '%'
    once crashed argparse, and a script without options ran its whole benchmark."""
    import subprocess
    import sys
    from pathlib import Path

    scripts = sorted(p for p in (Path(__file__).parent / "benchmarks").glob("*.py")
                     if "__main__" in p.read_text())
    assert len(scripts) >= 8
    for script in scripts:
        out = subprocess.run([sys.executable, str(script), "--help"], capture_output=True, text=True, timeout=120)
        assert out.returncode == 0 and out.stdout.startswith("usage:"), (script.name, out.stderr[-500:])
