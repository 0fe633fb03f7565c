"""The Dask engine gives exactly the local engine's results, also when a worker dies mid-scan."""

import pandas as pd
import pytest

import ebbwatch
from ebbwatch.datasets import make_fleet

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("dask")
    fleet = make_fleet(400, 240, seed=51, share_changed=0.2)
    fleet.daily_frame().to_parquet(tmp / "d.parquet")
    db = str(tmp / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp / "d.parquet"))
    return fleet, db


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        yield c


def same(a, b):
    pd.testing.assert_frame_equal(a.drop(columns=["drivers"]), b.drop(columns=["drivers"]))
    pd.testing.assert_frame_equal(a.attrs["scores"].drop(columns=["weekday_factors"]),
                                  b.attrs["scores"].drop(columns=["weekday_factors"]))


def test_dask_scan_equals_local_scan(store, cluster):
    fleet, db = store
    local = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=50)
    remote = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=50, engine="dask",
                           scheduler=cluster.scheduler_address)
    assert len(local) > 0
    same(local, remote)


def test_worker_killed_mid_scan_still_gives_the_same_results(store, cluster, tmp_path, monkeypatch):
    """The first block's task kills its own worker process (SIGKILL, so the nanny starts a new
    one) from inside the scan, whatever the machine's speed; the scan still returns exactly
    the local result."""
    import os
    import signal

    from ebbwatch import tasks

    fleet, db = store
    local = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=4)
    marker = tmp_path / "killed"
    real_score_part = tasks.score_part

    def score_part_that_dies_once(part_and_accounts, **kw):
        # Shipped to the workers by value (a local function); the marker file, on the disk they
        # share with this process, makes the kill happen exactly once.
        if part_and_accounts[0] == 0 and not marker.exists():
            marker.write_text(str(os.getpid()))
            os.kill(os.getpid(), signal.SIGKILL)
        return real_score_part(part_and_accounts, **kw)

    monkeypatch.setattr(tasks, "score_part", score_part_that_dies_once)
    remote = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=4, engine="dask",
                           scheduler=cluster.scheduler_address)
    assert marker.exists(), "no task killed its worker"
    same(local, remote)


def test_unknown_engine_and_unreachable_scheduler(store):
    fleet, db = store
    from ebbwatch.errors import EbbwatchError, UsageError

    with pytest.raises(UsageError):
        ebbwatch.scan(db=db, engine="spark")
    with pytest.raises(EbbwatchError, match="cannot reach the Dask scheduler"):
        ebbwatch.scan(db=db, engine="dask", scheduler="tcp://127.0.0.1:1")


# -- ingest ------------------------------------------------------------------------------------

def _events_scenario(tmp):
    """Files that exercise every ingest rule: attribution through identities across a move,
    unknown users, ids repeated within and across files and across the dedupe window, a bad
    line, a copy of an earlier file, a gzip file, a truncated (unreadable) gzip file, and
    account time zones."""
    import gzip
    import json
    import random

    from .conftest import write_jsonl

    rng = random.Random(5)
    (tmp / "identities.csv").write_text(
        "user,account,valid_from,valid_to\nu-move,a-old,,2026-03-10\nu-move,a-new,2026-03-10,\n"
        "u-1,a-1,,\nu-2,a-2,,\n")
    (tmp / "accounts.csv").write_text("account,name,seats,timezone\na-1,One,5,America/New_York\na-2,Two,3,\n")

    def event(i, day, user=None, account=None, id_=None):
        row = {"ts": f"2026-03-{day:02d}T{rng.randrange(24):02d}:{rng.randrange(60):02d}:00Z",
               "event": rng.choice(["doc.edit", "doc.view"]), "user": user or rng.choice(["u-1", "u-2", "u-move", "u-x"])}
        if account:
            row["account"] = account
        if id_ is not None:
            row["id"] = id_
        return row

    files = []
    for k in range(6):
        rows = [event(i, 1 + (i + 5 * k) % 28, id_=f"e{(i * 7 + k) % 900}") for i in range(300)]
        rows += [event(i, 5 + k, account="a-3") for i in range(20)]  # no id, account given
        files.append(write_jsonl(tmp / "events" / f"day{k}.jsonl", rows,
                                 raw_lines=[b'{"ts": "not a time", "event": "x", "user": "u"}'] if k == 2 else ()))
    files.append(write_jsonl(tmp / "events" / "day9.jsonl.gz", [event(i, 20, id_=f"g{i}") for i in range(50)], gz=True))
    (tmp / "events" / "day3-copy.jsonl").write_bytes(files[3].read_bytes())
    whole = gzip.compress(b"".join(json.dumps(event(i, 3)).encode() + b"\n" for i in range(3000)))
    (tmp / "events" / "day8-cut.jsonl.gz").write_bytes(whole[: len(whole) // 2])
    return tmp / "events"


def _store_tables(db):
    import duckdb

    con = duckdb.connect(db, read_only=True)
    try:
        return {name: con.execute(f"SELECT * EXCLUDE ({skip}) FROM {name} ORDER BY ALL").fetchall() if skip
                else con.execute(f"SELECT * FROM {name} ORDER BY ALL").fetchall()
                for name, skip in (("daily", ""), ("user_daily", ""), ("seen_ids", ""), ("unattributed_events", ""),
                                   ("file_contributions", ""),
                                   ("ingest_log", "ingested_at"))}
    finally:
        con.close()


@pytest.mark.parametrize("window_days", [0, 10])
def test_dask_ingest_equals_local_ingest(tmp_path, cluster, window_days):
    from datetime import datetime, timezone

    from ebbwatch.config import config_from_dict

    events = _events_scenario(tmp_path)
    now = datetime(2026, 6, 1, tzinfo=timezone.utc)
    config = config_from_dict({"ingest": {"dedupe_window_days": window_days}})
    kw = dict(identities=str(tmp_path / "identities.csv"), accounts=str(tmp_path / "accounts.csv"), now=now,
              config=config)
    local_db, remote_db = str(tmp_path / "local.duckdb"), str(tmp_path / "remote.duckdb")
    local = ebbwatch.ingest_files([str(events)], db=local_db, rejects_path=str(tmp_path / "l.rejects"), **kw)
    remote = ebbwatch.ingest_files([str(events)], db=remote_db, rejects_path=str(tmp_path / "r.rejects"),
                                   engine="dask", scheduler=cluster.scheduler_address, **kw)
    # The scenario does what it is meant to: every rule is exercised.
    assert local["duplicates"] > 0 and local["unattributed"] and local["rejected"] and local["errors"]
    assert any("same content" in s["reason"] for s in local["skipped_files"])
    assert bool(local["held_back"]) == bool(window_days)  # ids older than a 10-day window are held back
    for s in (local, remote):
        s.pop("seconds"), s.pop("rejects_file")
    assert remote == local
    assert _store_tables(remote_db) == _store_tables(local_db)
    assert (tmp_path / "r.rejects").read_text() == (tmp_path / "l.rejects").read_text()
    # A second run over the same directory: everything is already ingested, on both engines.
    again = ebbwatch.ingest_files([str(events)], db=remote_db, engine="dask", scheduler=cluster.scheduler_address,
                                  now=now, config=config)
    assert again["files"] == 0 and again["ingested"] == 0
    assert _store_tables(remote_db)["daily"] == _store_tables(local_db)["daily"]


def test_dask_ingest_refuses_stdin(tmp_path):
    from ebbwatch.errors import UsageError

    with pytest.raises(UsageError, match="stdin"):
        ebbwatch.ingest_files(["-"], db=str(tmp_path / "s.duckdb"), engine="dask")


# -- backtest and export -------------------------------------------------------------------------

def test_dask_backtest_equals_local_backtest_and_one_block(store, cluster, tmp_path):
    fleet, db = store
    outcomes = tmp_path / "outcomes.csv"
    changed = fleet.truth[fleet.truth["onset"].notna()]
    with open(outcomes, "w") as handle:  # each planted change ends in an outcome two weeks on
        handle.write("account,date,outcome\n")
        for row in changed.itertuples():
            when = min(pd.Timestamp(row.onset) + pd.Timedelta(days=14), pd.Timestamp(fleet.as_of)).date()
            handle.write(f"{row.account},{when},{'expanded' if row.kind == 'surge' else 'churned'}\n")
    kw = dict(db=db, step=7, today=fleet.as_of)
    whole = ebbwatch.backtest(str(outcomes), chunk_size=10_000, **kw)
    blocks = ebbwatch.backtest(str(outcomes), chunk_size=37, **kw)
    remote = ebbwatch.backtest(str(outcomes), chunk_size=37, engine="dask", scheduler=cluster.scheduler_address, **kw)
    frames = []
    for r in (whole, blocks, remote):
        r.pop("seconds")
        frames.append((r.pop("_alerts").reset_index(drop=True), r.pop("_exposure")))
    assert whole["outcomes"]["churned"]["recall_at_lead"] is not None
    assert blocks == whole
    assert remote == whole
    for alerts, exposure in frames[1:]:
        pd.testing.assert_frame_equal(alerts, frames[0][0])
        pd.testing.assert_frame_equal(exposure, frames[0][1])


def test_export_index_blocks_hold_every_account_once(store, tmp_path):
    import pyarrow.parquet as pq

    fleet, db = store
    info = ebbwatch.api.export_index(str(tmp_path / "index"), db=db, accounts_per_part=64, today=fleet.as_of)
    blocks = pq.read_table(tmp_path / "index" / "accounts.parquet").to_pandas()
    assert info["accounts"] == len(blocks) == 400 and info["parts"] == 7  # ceil(400 / 64)
    assert blocks["account"].is_monotonic_increasing and blocks["account"].is_unique
    assert (blocks.groupby("part").size().iloc[:-1] == 64).all()
    rows = pq.read_table(tmp_path / "index" / "rows").to_pandas()
    assert len(rows) == info["rows"]
    merged = rows.merge(blocks, on="account", suffixes=("", "_listed"))
    assert (merged["part"].astype(int) == merged["part_listed"]).all()


def test_cli_runs_ingest_scan_and_backtest_on_dask(tmp_path, cluster, store):
    import json

    from click.testing import CliRunner

    from ebbwatch.cli import main

    events = _events_scenario(tmp_path)
    db = str(tmp_path / "cli.duckdb")
    runner = CliRunner()
    ingest = runner.invoke(main, ["ingest", str(events), "--db", db, "--format", "json", "--engine", "dask",
                                  "--scheduler", cluster.scheduler_address], catch_exceptions=False)
    assert ingest.exit_code == 3  # the truncated gzip file is an unreadable input; the rest is in
    summary = json.loads(ingest.stdout)
    assert summary["files"] == 7 and summary["ingested"] > 0 and len(summary["errors"]) == 1
    scan = runner.invoke(main, ["scan", "--db", db, "--format", "json", "--engine", "dask",
                                "--scheduler", cluster.scheduler_address, "--shared-dir", str(tmp_path)],
                         catch_exceptions=False)
    assert scan.exit_code == 0, scan.stderr
    assert not [p for p in tmp_path.iterdir() if p.name.startswith("ebbwatch-exchange-")]  # cleaned up
    fleet, fleet_db = store
    outcomes = tmp_path / "outcomes.csv"
    outcomes.write_text(f"account,date,outcome\n{fleet.account_ids[0]},{fleet.as_of},churned\n")
    backtest = runner.invoke(main, ["backtest", "--db", fleet_db, "--outcomes", str(outcomes), "--format", "json",
                                    "--step", "14", "--to", str(fleet.as_of), "--chunk-size", "150",
                                    "--engine", "dask", "--scheduler", cluster.scheduler_address],
                             catch_exceptions=False)
    assert backtest.exit_code == 0, backtest.stderr
    assert json.loads(backtest.stdout)["outcomes"]["churned"]["count"] == 1
