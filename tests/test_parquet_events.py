"""Events from Parquet: the same field mapping, attribution, dedupe and reasons as JSON lines."""

import json
from datetime import datetime, timedelta, timezone

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from .conftest import write_jsonl
from .test_ingest import daily, ingest

T0 = datetime(2026, 3, 2, 10, tzinfo=timezone.utc)


def rows(n=300):
    out = []
    for i in range(n):
        out.append({"ts": T0 + timedelta(hours=i), "event": ["doc.edit", "doc.view"][i % 2], "user": f"u-{i % 9}",
                    "account": f"a-{i % 4}" if i % 10 else None, "id": f"e-{i % 250}"})
    return out


def as_jsonl(records):
    return [{k: (v.isoformat().replace("+00:00", "Z") if isinstance(v, datetime) else v)
             for k, v in r.items() if v is not None} for r in records]


@pytest.mark.parametrize("ts_type", [pa.timestamp("us", tz="UTC"), pa.timestamp("ms"), pa.string(), pa.int64()])
def test_a_parquet_file_gives_the_same_store_as_its_json_lines(tmp_path, ts_type):
    records = rows()
    if ts_type == pa.string():
        ts = [r["ts"].isoformat().replace("+00:00", "Z") for r in records]
    elif ts_type == pa.int64():
        ts = [int(r["ts"].timestamp() * 1000) for r in records]
    else:
        ts = [r["ts"] if ts_type.tz else r["ts"].replace(tzinfo=None) for r in records]
    table = pa.table({"ts": pa.array(ts, ts_type), "event": [r["event"] for r in records],
                      "user": [r["user"] for r in records], "account": [r["account"] for r in records],
                      "id": [r["id"] for r in records]})
    pq.write_table(table, tmp_path / "events.parquet")
    ids = tmp_path / "ids.csv"
    ids.write_text("user,account,valid_from,valid_to\n" + "".join(f"u-{i},a-9,,\n" for i in range(9)))
    s1 = ingest(str(tmp_path / "p.duckdb"), [tmp_path / "events.parquet"], identities=str(ids))
    s2 = ingest(str(tmp_path / "j.duckdb"), [write_jsonl(tmp_path / "events.jsonl", as_jsonl(records))], identities=str(ids))
    assert (s1["ingested"], s1["duplicates"], s1["rejected"]) == (s2["ingested"], s2["duplicates"], s2["rejected"]) == (250, 50, {})
    assert s1["lines_rechecked"] == 0
    assert daily(str(tmp_path / "p.duckdb")) == daily(str(tmp_path / "j.duckdb"))


def test_bad_parquet_rows_get_their_reasons_and_row_numbers(tmp_path, db):
    table = pa.table({
        "ts": ["2026-03-02T10:00:00Z", "yesterday", "2031-01-01T00:00:00Z", "2026-03-02T11:00:00Z", "2026-03-02T12:00:00Z"],
        "event": ["doc.edit", "doc.edit", "doc.edit", None, "doc.view"],
        "user": ["u-1", "u-1", "u-1", "u-1", "u-2"], "account": ["a-1"] * 5,
    })
    path = tmp_path / "events.parquet"
    pq.write_table(table, path)
    rejects = tmp_path / "rejects.jsonl"
    s = ingest(db, [path], rejects_path=str(rejects))
    assert (s["ingested"], s["rejected"]) == (2, {"bad_time": 1, "future_time": 1, "missing_field": 1})
    logged = [(r["line"], r["reason"]) for r in map(json.loads, rejects.read_text().splitlines())]
    assert logged == [(2, "bad_time"), (3, "future_time"), (4, "missing_field")]


def test_a_wrong_column_type_rejects_its_rows_with_a_reason(tmp_path, db):
    pq.write_table(pa.table({"ts": ["2026-03-02T10:00:00Z"] * 3, "event": [1.5, 2.5, 3.5], "user": ["u"] * 3}),
                   tmp_path / "events.parquet")
    s = ingest(db, [tmp_path / "events.parquet"])
    assert (s["ingested"], s["rejected"]) == (0, {"wrong_type": 3})


def test_directories_mix_parquet_and_json_lines_and_a_copy_is_skipped(tmp_path, db):
    folder = tmp_path / "events"
    folder.mkdir()
    records = rows(40)
    pq.write_table(pa.table({"ts": [r["ts"] for r in records[:20]], "event": [r["event"] for r in records[:20]],
                             "user": [r["user"] for r in records[:20]], "account": ["a-1"] * 20,
                             "id": [r["id"] for r in records[:20]]}), folder / "a.parquet")
    write_jsonl(folder / "b.jsonl", [{**r, "account": "a-1"} for r in as_jsonl(records[20:])])
    (folder / "c.parquet").write_bytes((folder / "a.parquet").read_bytes())
    s = ingest(db, [folder])
    assert (s["files"], s["ingested"]) == (2, 40)
    assert "already ingested" in s["skipped_files"][0]["reason"]


def test_a_file_that_only_claims_to_be_parquet_is_an_error_not_a_crash(tmp_path, db):
    bad = tmp_path / "broken.parquet"
    bad.write_bytes(b"PAR1 not really")
    s = ingest(db, [bad])
    assert s["errors"] and "Parquet" in s["errors"][0]["error"] and s["ingested"] == 0
