"""What ingest does with the files it is given or finds (issue 22, item 4): compressed files are
read, everything else is named with a reason, nothing is skipped without a word."""

import bz2
import json
import os

import pytest
import zstandard
from click.testing import CliRunner

from ebbwatch.cli import main
from ebbwatch.errors import InputError

from .test_ingest import daily, ev, ingest


def jsonl(rows):
    return b"".join(json.dumps(r).encode() + b"\n" for r in rows)


def test_a_directory_reads_bz2_and_zstd_and_names_what_it_skips(tmp_path, db):
    folder = tmp_path / "events"
    folder.mkdir()
    (folder / "a.jsonl").write_bytes(jsonl([ev("2026-03-02T10:00:00Z", id="a")]))
    (folder / "b.jsonl.bz2").write_bytes(bz2.compress(jsonl([ev("2026-03-02T11:00:00Z", id="b")])))
    (folder / "c.jsonl.zst").write_bytes(zstandard.ZstdCompressor().compress(jsonl([ev("2026-03-02T12:00:00Z", id="c")])))
    (folder / "accounts.csv").write_text("account,name\na-1,One\n")
    (folder / "notes.txt").write_text("hello\n")
    (folder / ".hidden").write_text("x")
    s = ingest(db, [folder])
    assert (s["files"], s["ingested"]) == (3, 3)
    assert daily(db) == {("a-1", "2026-03-02", "doc.edit"): (3, 1)}
    reasons = {os.path.basename(x["file"]): x["reason"] for x in s["skipped_files"]}
    assert set(reasons) == {"accounts.csv", "notes.txt"}
    assert "--accounts" in reasons["accounts.csv"] and "not an events file" in reasons["notes.txt"]


def test_a_bz2_file_named_directly_is_read_not_rejected_line_by_line(tmp_path, db):
    path = tmp_path / "today.jsonl.bz2"
    path.write_bytes(bz2.compress(jsonl([ev("2026-03-02T10:00:00Z", user=f"u-{i}") for i in range(50)])))
    s = ingest(db, [path])
    assert (s["ingested"], s["rejected"]) == (50, {})
    again = ingest(db, [path])
    assert "already ingested" in again["skipped_files"][0]["reason"]


def test_a_cut_bz2_file_is_an_error_with_nothing_written(tmp_path, db):
    whole = bz2.compress(jsonl([ev("2026-03-02T10:00:00Z", user=f"u-{i}") for i in range(3000)]))
    (tmp_path / "cut.jsonl.bz2").write_bytes(whole[: len(whole) // 2])
    s = ingest(db, [tmp_path / "cut.jsonl.bz2"])
    assert s["errors"] and s["ingested"] == 0


def test_an_empty_directory_or_one_of_csv_files_is_an_error_and_creates_no_store(tmp_path):
    for folder, files in (("empty", {}), ("only-csv", {"daily.csv": "account,day,event,count\n"})):
        (tmp_path / folder).mkdir()
        for name, text in files.items():
            (tmp_path / folder / name).write_text(text)
        db = tmp_path / f"{folder}.duckdb"
        result = CliRunner().invoke(main, ["ingest", str(tmp_path / folder), "--db", str(db)])
        assert result.exit_code == 3 and "no event files" in result.output, result.output
        assert not db.exists()
    with pytest.raises(InputError, match="daily.csv: a CSV file"):
        ingest(str(tmp_path / "x.duckdb"), [tmp_path / "only-csv"])


def test_csv_given_as_events_is_recognised(tmp_path, db):
    path = tmp_path / "events.jsonl"
    path.write_text("account,day,event,count\n" + "".join(f"a-{i},2026-03-02,doc.edit,{i}\n" for i in range(1000)))
    good = tmp_path / "good.jsonl"
    good.write_bytes(jsonl([ev("2026-03-02T10:00:00Z")]))
    s = ingest(db, [path, good])
    assert s["ingested"] == 1 and s["rejected"] == {}
    assert "looks like CSV" in s["errors"][0]["error"] and "--daily" in s["errors"][0]["error"]


def test_two_different_empty_files_are_each_just_empty(tmp_path, db):
    (tmp_path / "empty.jsonl").write_bytes(b"")
    (tmp_path / "also-empty.jsonl").write_bytes(b"")
    s = ingest(db, [tmp_path / "empty.jsonl", tmp_path / "also-empty.jsonl"])
    assert [x["reason"] for x in s["skipped_files"]] == ["empty file: nothing to ingest"] * 2
