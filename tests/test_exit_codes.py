"""One test per row of the README's exit-code table (issue 22, item 8)."""

import gzip
import json

from click.testing import CliRunner

from ebbwatch.cli import main

from .conftest import write_jsonl

GOOD = {"ts": "2026-03-02T10:00:00Z", "event": "doc.edit", "user": "u-1", "account": "a-1"}


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_0_ran(tmp_path):
    path = write_jsonl(tmp_path / "e.jsonl", [GOOD] * 20, raw_lines=[b"not json"])  # 1 of 21 lost
    assert run("ingest", path, "--db", tmp_path / "s.duckdb").exit_code == 0


def test_1_alerts_found_with_fail_on_alert(tmp_path):
    from ebbwatch.datasets import make_fleet

    fleet = make_fleet(40, 200, seed=4, share_changed=0.5)  # invented fleet with planted changes
    daily = tmp_path / "daily.parquet"
    fleet.daily_frame().to_parquet(daily)
    db = tmp_path / "s.duckdb"
    assert run("ingest", "--db", db, "--daily", daily).exit_code == 0
    assert run("scan", "--db", db, "--as-of", fleet.as_of, "--fail-on-alert").exit_code == 1
    assert "last scan      -" in run("status", "--db", db).output  # --as-of scans record only with --record
    assert run("scan", "--db", db).exit_code == 0  # the last complete day: recorded
    assert "last scan      2026-" in run("status", "--db", db).output
    assert run("scan", "--db", db, "--as-of", fleet.as_of, "--fail-on-alert", "--max-alerts", "0").exit_code == 0


def test_2_the_command_line_or_config_is_wrong(tmp_path):
    db = tmp_path / "s.duckdb"
    assert run("ingest", "--db", db).exit_code == 2  # nothing to ingest
    assert run("ingest", "--db", db, "--no-such-option").exit_code == 2
    bad = tmp_path / "bad.toml"
    bad.write_text("[ingest]\nnaive_timezone = 'Mars/Olympus'\n")
    assert run("ingest", write_jsonl(tmp_path / "e.jsonl", [GOOD]), "--db", db, "--config", bad).exit_code == 2
    assert run("snooze", "a-1", "--db", db, "--until", "2001-01-01").exit_code == 2  # in the past


def test_3_an_input_account_or_store_cannot_be_used(tmp_path):
    db = tmp_path / "s.duckdb"
    missing_events = run("ingest", tmp_path / "missing.jsonl", "--db", db)
    missing_identities = run("ingest", write_jsonl(tmp_path / "e.jsonl", [GOOD]), "--db", db,
                             "--identities", tmp_path / "missing.csv")
    assert (missing_events.exit_code, missing_identities.exit_code) == (3, 3)
    assert "no such file" in missing_events.output and "no such file" in missing_identities.output
    run("ingest", tmp_path / "e.jsonl", "--db", db)
    assert run("explain", "a-2", "--db", db).exit_code == 3  # an unknown account
    whole = gzip.compress(b"".join(json.dumps(GOOD).encode() + b"\n" for _ in range(3000)))
    (tmp_path / "cut.jsonl.gz").write_bytes(whole[: len(whole) // 2])
    assert run("ingest", tmp_path / "cut.jsonl.gz", "--db", db).exit_code == 3


def test_4_a_file_lost_more_than_the_share_of_its_lines(tmp_path):
    path = write_jsonl(tmp_path / "e.jsonl", [GOOD] * 5, raw_lines=[b"not json"] * 5)
    result = run("ingest", path, "--db", tmp_path / "s.duckdb")
    assert result.exit_code == 4 and "5 of 10 lines rejected" in result.output
