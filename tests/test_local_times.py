"""Producers that write local times, and files that lose most of their lines (issue 22, item 3)."""

import json
from datetime import datetime, timedelta

import pytest
from click.testing import CliRunner

from ebbwatch.cli import main
from ebbwatch.config import config_from_dict
from ebbwatch.errors import ConfigError

from .conftest import write_jsonl
from .test_ingest import daily, ev, ingest, ingest_precisely

NEW_YORK = config_from_dict({"ingest": {"naive_timezone": "America/New_York"}})


def local_rows():
    """Every 37 minutes through 2025, local time without an offset: both clock changes included."""
    start, out = datetime(2025, 1, 1), []
    for i in range(0, 365 * 24 * 60, 37):
        t = start + timedelta(minutes=i)
        out.append(ev(t.strftime("%Y-%m-%dT%H:%M:%S"), user=f"u-{i % 7}", id=f"e-{i}"))
    return out


def test_local_times_without_a_zone_are_rejected_saying_why_and_the_run_exits_4(tmp_path):
    path = write_jsonl(tmp_path / "e.jsonl", local_rows()[:300] + [ev("2026-03-02T10:00:00Z")])
    db = str(tmp_path / "s.duckdb")
    result = CliRunner().invoke(main, ["ingest", str(path), "--db", db, "--rejects", str(tmp_path / "r.jsonl")])
    assert result.exit_code == 4, result.output
    assert "300 of 301 lines rejected" in result.output
    first = json.loads((tmp_path / "r.jsonl").read_text().splitlines()[0])
    assert first["reason"] == "bad_time" and "no UTC offset" in first["detail"]


def test_a_few_rejected_lines_do_not_change_the_exit_code(tmp_path):
    path = write_jsonl(tmp_path / "e.jsonl", [ev("2026-03-02T10:00:00Z", user=f"u-{i}") for i in range(30)]
                       + [ev("2026-03-02T10:00:00")])
    result = CliRunner().invoke(main, ["ingest", str(path), "--db", str(tmp_path / "s.duckdb")])
    assert result.exit_code == 0, result.output


def test_local_times_in_a_configured_zone_agree_on_both_paths(tmp_path):
    path = write_jsonl(tmp_path / "e.jsonl", local_rows())
    fast = ingest(str(tmp_path / "1.duckdb"), [path], config=NEW_YORK)
    ref = ingest_precisely(str(tmp_path / "2.duckdb"), [path], config=NEW_YORK)
    assert fast["paths"] == {"fast": 1, "precise": 0} and fast["rejected"] == ref["rejected"] == {}
    assert fast["ingested"] == ref["ingested"] == len(local_rows())
    # Only rows within a day of a clock change were left to the precise parser.
    assert 0 < fast["lines_rechecked"] < 4 * 24 * 60 // 37 + 4
    assert daily(str(tmp_path / "1.duckdb")) == daily(str(tmp_path / "2.duckdb"))


def test_the_configured_zone_is_checked():
    with pytest.raises(ConfigError, match="naive_timezone.*Mars/Olympus"):
        config_from_dict({"ingest": {"naive_timezone": "Mars/Olympus"}})
