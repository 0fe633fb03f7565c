"""What ingest does with the files it is given or finds (issue 22, item 4): compressed files are
read, everything else is named with a reason, nothing is skipped without a word."""

import bz2
import json
import os

import pytest

import ebbwatch
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


def test_the_daily_export_loads_back_and_a_failed_load_leaves_no_store(tmp_path, db):
    # Issue 22, item 7: `export daily` writes `events`; `ingest --daily` takes it as the count.
    (tmp_path / "daily.csv").write_text("account,day,event,count,users\na-1,2026-03-02,doc.edit,5,2\n"
                                        "a-2,2026-03-03,doc.view,7,\n")
    ingest(db, [], daily=str(tmp_path / "daily.csv"))
    out = tmp_path / "export.csv"
    result = CliRunner().invoke(main, ["export", "daily", "--db", db, "-o", str(out)])
    assert result.exit_code == 0, result.output
    copy = str(tmp_path / "copy.duckdb")
    ingest(copy, [], daily=str(out))
    assert daily(copy) == daily(db)
    bad = tmp_path / "bad.csv"
    bad.write_text("account,day,event,count\na-1,yesterday,doc.edit,5\n")
    fresh = tmp_path / "fresh.duckdb"
    with pytest.raises(InputError, match="line 2"):
        ingest(str(fresh), [], daily=str(bad))
    assert not fresh.exists() and not (tmp_path / "fresh.duckdb.wal").exists()


def test_events_for_accounts_the_accounts_file_does_not_know_are_reported_or_refused(tmp_path):
    # Issue 22, item 5: a misspelt account id in the events creates no account unnoticed.
    from ebbwatch.config import config_from_dict

    (tmp_path / "accounts.csv").write_text("account,name\na-alpha,Alpha\na-beta,Beta\n")
    rows = [ev("2026-03-02T10:00:00Z", account=a, user=f"u-{i}") for i, a in
            enumerate(["a-alpha"] * 5 + ["A-ALPHA"] * 3 + ["a-alpah"] * 2 + ["a-beta"])]
    path = tmp_path / "e.jsonl"
    path.write_bytes(jsonl(rows))
    db = str(tmp_path / "keep.duckdb")
    s = ingest(db, [path], accounts=str(tmp_path / "accounts.csv"))
    assert s["ingested"] == 11
    assert s["unknown_accounts"] == {"accounts": 2, "events": 5, "top": [{"account": "A-ALPHA", "events": 3},
                                                                       {"account": "a-alpah", "events": 2}]}
    page = CliRunner().invoke(main, ["status", "--db", db])
    assert "2 not in accounts.csv, 5 events: A-ALPHA (3), a-alpah (2)" in page.output
    strict = config_from_dict({"ingest": {"unknown_accounts": "reject"}})
    s = ingest(str(tmp_path / "strict.duckdb"), [path], accounts=str(tmp_path / "accounts.csv"), config=strict)
    assert s["ingested"] == 6 and s["unattributed"] == {"unknown_account": 5}
    assert s["unknown_accounts"]["accounts"] == 0


def test_status_is_the_page_to_read_first(tmp_path):
    # Issue 22, item 6.
    (tmp_path / "accounts.csv").write_text("account,name\n" + "".join(f"a-{i},A{i}\n" for i in range(5)))
    ingest(str(tmp_path / "new.duckdb"), [], accounts=str(tmp_path / "accounts.csv"))  # accounts, no events
    empty = CliRunner().invoke(main, ["status", "--db", str(tmp_path / "new.duckdb")])
    assert "no data yet" in empty.output and "None" not in empty.output
    path = tmp_path / "e.jsonl"
    path.write_bytes(jsonl([ev("2026-03-02T10:00:00Z", account="a-1"), ev("2026-03-02T10:00:00Z", account="a-2")])
                     + b"not json\n")
    db = str(tmp_path / "s.duckdb")
    ingest(db, [path], accounts=str(tmp_path / "accounts.csv"))
    page = CliRunner().invoke(main, ["status", "--db", db]).output
    assert "2 with activity; 5 in accounts.csv" in page
    assert "rejected 1" in page and "last scan      -" in page
    stamp = page.split("last ingest    ")[1].split()[0]
    assert len(stamp) == len("2026-12-04T10:00:00+00:00")  # to the second, no microseconds


def test_an_unknown_account_suggests_the_nearest_ids(tmp_path, db):
    # Issue 22, item 8 (the suggestion part).
    path = tmp_path / "e.jsonl"
    path.write_bytes(jsonl([ev("2026-03-02T10:00:00Z", account=a) for a in ("a-alpha", "a-beta", "z-other")]))
    ingest(db, [path])
    result = CliRunner().invoke(main, ["snooze", "A-ALPA", "--db", db, "--until", "2026-12-20", "--force"])
    assert result.exit_code == 3 and "did you mean a-alpha?" in result.output, result.output


def test_accounts_whose_zone_changes_after_their_days_are_stored_are_refused(tmp_path, db):
    # Issue 22, item 2: never keep UTC days silently for an account that has a time zone.
    path = tmp_path / "e.jsonl"
    path.write_bytes(jsonl([ev(f"2026-03-0{d}T23:30:00Z", account="a-gym") for d in range(1, 6)]))
    ingest(db, [path])
    (tmp_path / "accounts.csv").write_text("account,name,timezone\na-gym,Gym,Australia/Sydney\na-new,New,Europe/Paris\n")
    with pytest.raises(InputError, match="a-gym the time zone Australia/Sydney, but 5 day.*already stored by UTC"):
        ingest(db, [], accounts=str(tmp_path / "accounts.csv"))
    result = CliRunner().invoke(main, ["ingest", "--db", db, "--accounts", str(tmp_path / "accounts.csv")])
    assert result.exit_code == 3 and "--keep-stored-days" in result.output
    s = ingest(db, [], accounts=str(tmp_path / "accounts.csv"), keep_stored_days=True)
    assert s["accounts_loaded"] == 2
    # Loaded before their events, accounts with a zone are fine.
    fresh = str(tmp_path / "fresh.duckdb")
    ingest(fresh, [], accounts=str(tmp_path / "accounts.csv"))
    ingest(fresh, [path])
    assert sorted({d for _, d, _ in daily(fresh)}) == [f"2026-03-0{d}" for d in range(2, 7)]  # Sydney days


def test_identities_loaded_after_the_events_attribute_the_events_kept(tmp_path):
    # Issue 22, item 1: forgetting --identities on the first ingest can be undone.
    rows = [ev(f"2026-03-0{1 + i % 5}T10:{i % 60:02d}:00Z", user=f"u-{i % 6}", account=None, id=f"e-{i}")
            for i in range(120)] + [ev("2026-03-02T11:00:00Z", user="u-stranger", account=None, id="s-1")]
    path = tmp_path / "e.jsonl"
    path.write_bytes(jsonl(rows))
    ids = tmp_path / "identities.csv"
    ids.write_text("user,account,valid_from,valid_to\n" + "".join(f"u-{i},a-{i % 2},,\n" for i in range(6)))
    forgot = str(tmp_path / "forgot.duckdb")
    first = ingest(forgot, [path])
    assert first["unattributed"] == {"unknown_user": 121} and first["ingested"] == 0
    again = ingest(forgot, [path])
    assert "already ingested" in again["skipped_files"][0]["reason"]
    later = ingest(forgot, [], identities=str(ids))
    assert later["recovered"] == 120
    right = str(tmp_path / "right.duckdb")
    ingest(right, [path], identities=str(ids))
    assert daily(forgot) == daily(right)
    page = CliRunner().invoke(main, ["status", "--db", forgot]).output
    assert "1 still waiting for identities" in page  # u-stranger is in no identities file
    # The same events delivered again count once, whether they were kept or attributed.
    resent = tmp_path / "resent.jsonl"
    resent.write_bytes(jsonl(rows[:10]))
    assert ingest(forgot, [resent])["duplicates"] == 10


def test_a_file_ingested_with_the_wrong_settings_is_taken_back_and_ingested_again(tmp_path):
    # Issue 22, item 1, second half: one transaction, and the store ends as if it had been right.
    from ebbwatch.config import config_from_dict

    right_zone = config_from_dict({"ingest": {"naive_timezone": "America/New_York"}})
    wrong_zone = config_from_dict({"ingest": {"naive_timezone": "Asia/Tokyo"}})
    shared = tmp_path / "a.jsonl"  # times with offsets: read the same under both settings
    shared.write_bytes(jsonl([ev(f"2026-03-0{1 + i % 4}T{i % 24:02d}:00:00Z", user=f"u-{i % 5}", id=f"a-{i}")
                              for i in range(200)]))
    local = tmp_path / "b.jsonl"  # local times: the zone decides their days
    local.write_bytes(jsonl([ev(f"2026-03-0{1 + i % 4}T{i % 24:02d}:30:00", user=f"u-{i % 7}", id=f"b-{i}")
                             for i in range(300)]))
    db, reference = str(tmp_path / "s.duckdb"), str(tmp_path / "ref.duckdb")
    ingest(db, [shared, local], config=wrong_zone)
    before = daily(db)
    s = ingest(db, [local], config=right_zone, again=True)
    assert (s["taken_back"], s["ingested"], s["duplicates"]) == (1, 300, 0)
    ingest(reference, [shared, local], config=right_zone)
    assert daily(db) == daily(reference) != before
    # Its ids are back: the same lines delivered under another name are duplicates.
    copy = tmp_path / "b-copy.jsonl"
    copy.write_bytes(local.read_bytes() + b"\n")
    assert ingest(db, [copy], config=right_zone)["duplicates"] == 300
    assert ebbwatch.status(db=db)["files_ingested"] == 3


def test_again_refuses_the_dask_engine(tmp_path):
    from ebbwatch.errors import UsageError

    with pytest.raises(UsageError, match="--again"):
        ingest(str(tmp_path / "s.duckdb"), [tmp_path], engine="dask", again=True)


def test_a_file_ingested_without_its_contribution_recorded_cannot_be_taken_back(tmp_path):
    from ebbwatch.config import config_from_dict
    from ebbwatch.errors import StoreError

    lean = config_from_dict({"ingest": {"keep_file_contributions": False}})
    path = tmp_path / "e.jsonl"
    path.write_bytes(jsonl([ev("2026-03-02T10:00:00Z", id="x")]))
    db = str(tmp_path / "s.duckdb")
    ingest(db, [path], config=lean)
    with pytest.raises(StoreError, match="keep_file_contributions = false"):
        ingest(db, [path], config=lean, again=True)
    assert daily(db) == {("a-1", "2026-03-02", "doc.edit"): (1, 1)}  # nothing changed


def test_json_lines_with_a_broken_first_line_are_not_taken_for_csv(tmp_path, db):
    # Found by the mutation fuzzer (seed 5): the same fields give JSON lines equal comma counts.
    good = [json.dumps(ev(f"2026-03-02T10:0{i}:00Z", user=f"u-{i}")).encode() for i in range(5)]
    path = tmp_path / "e.jsonl"
    path.write_bytes(b"\n".join([b"\xf4" + good[0][1:]] + good[1:]) + b"\n")
    s = ingest(db, [path])
    assert not s["errors"] and s["ingested"] == 4 and sum(s["rejected"].values()) == 1
