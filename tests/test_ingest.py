import gzip
import io
import json
from collections import Counter
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import duckdb
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import ebbwatch
from ebbwatch.errors import InputError

from .conftest import write_jsonl

NOW = datetime(2026, 6, 1, tzinfo=timezone.utc)


def ev(ts, event="doc.edit", user="u-1", account="a-1", id=None):
    row = {"ts": ts, "event": event, "user": user}
    if account is not None:
        row["account"] = account
    if id is not None:
        row["id"] = id
    return row


def daily(db):
    con = duckdb.connect(db, read_only=True)
    try:
        return {(a, d.isoformat(), e): (n, u) for a, d, e, n, u in
                con.execute("SELECT account, day, event, events, users FROM daily").fetchall()}
    finally:
        con.close()


def ingest(db, files, **kw):
    return ebbwatch.ingest_files([str(f) for f in files], db=db, now=NOW, **kw)


def ingest_precisely(db, files, **kw):
    """The reference: every line through the precise parser (the native reader switched off)."""
    from unittest import mock

    with mock.patch("ebbwatch.store.Store.stage_jsonl_fast", lambda *a, **k: None):
        summary = ingest(db, files, **kw)
    assert summary["paths"]["fast"] == 0
    return summary


def test_counts_distinct_users_and_summary(tmp_path, db):
    f = write_jsonl(tmp_path / "a.jsonl", [
        ev("2026-03-02T10:00:00Z", user="u-1"), ev("2026-03-02T11:00:00Z", user="u-1"),
        ev("2026-03-02T12:00:00Z", user="u-2"), ev("2026-03-03T12:00:00Z", event="doc.view"),
    ])
    s = ingest(db, [f])
    assert (s["files"], s["lines"], s["ingested"], s["duplicates"]) == (1, 4, 4, 0)
    assert s["paths"] == {"fast": 1, "precise": 0}
    assert daily(db) == {("a-1", "2026-03-02", "doc.edit"): (3, 2), ("a-1", "2026-03-03", "doc.view"): (1, 1)}


def test_identity_attribution_follows_a_move(tmp_path, db):
    ids = tmp_path / "identities.csv"
    ids.write_text("user,account,valid_from,valid_to\nu-9,a-old,,2026-03-10\nu-9,a-new,2026-03-10,\n")
    f = write_jsonl(tmp_path / "e.jsonl", [
        ev("2026-03-09T23:59:59Z", user="u-9", account=None),
        ev("2026-03-10T00:00:00Z", user="u-9", account=None),
        ev("2026-03-10T00:00:01Z", user="u-unknown", account=None),
    ])
    s = ingest(db, [f], identities=str(ids))
    assert s["unattributed"] == {"unknown_user": 1}
    assert daily(db) == {("a-old", "2026-03-09", "doc.edit"): (1, 1), ("a-new", "2026-03-10", "doc.edit"): (1, 1)}


def test_user_with_no_identity_at_event_time(tmp_path, db):
    ids = tmp_path / "identities.csv"
    ids.write_text("user,account,valid_from,valid_to\nu-9,a-1,2026-03-10,2026-03-20\n")
    f = write_jsonl(tmp_path / "e.jsonl", [ev("2026-03-25T00:00:00Z", user="u-9", account=None)])
    assert ingest(db, [f], identities=str(ids))["unattributed"] == {"no_identity_at_time": 1}


def test_overlapping_identities_are_refused_naming_the_line(tmp_path, db):
    ids = tmp_path / "identities.csv"
    ids.write_text("user,account,valid_from,valid_to\nu-9,a-1,,2026-03-20\nu-9,a-2,2026-03-10,\n")
    with pytest.raises(InputError, match="line 3.*overlapping"):
        ingest(db, [], identities=str(ids))


def test_dedupe_within_and_across_files_and_reingest(tmp_path, db):
    a = write_jsonl(tmp_path / "a.jsonl", [ev("2026-03-02T10:00:00Z", id="e1"), ev("2026-03-02T10:00:00Z", id="e1"),
                                          ev("2026-03-02T10:00:01Z", id="e2")])
    b = write_jsonl(tmp_path / "b.jsonl", [ev("2026-03-02T10:00:01Z", id="e2"), ev("2026-03-02T10:00:02Z", id="e3")])
    s = ingest(db, [a, b])
    assert (s["ingested"], s["duplicates"]) == (3, 2)
    again = ingest(db, [a])
    assert again["files"] == 0 and "already ingested" in again["skipped_files"][0]["reason"]
    assert daily(db)[("a-1", "2026-03-02", "doc.edit")] == (3, 1)


def window(days, accept=False):
    from ebbwatch.config import config_from_dict

    return config_from_dict({"ingest": {"dedupe_window_days": days, "accept_beyond_dedupe_window": accept}})


def test_an_id_counts_once_however_late_it_is_redelivered(tmp_path, db):
    a = write_jsonl(tmp_path / "a.jsonl", [ev("2025-01-01T10:00:00Z", id="old")])
    b = write_jsonl(tmp_path / "b.jsonl", [ev("2026-03-01T10:00:00Z", id="new")])
    c = write_jsonl(tmp_path / "c.jsonl", [ev("2025-01-01T10:00:00Z", id="old"), ev("2026-03-01T10:00:00Z", id="new")])
    ingest(db, [a, b])
    s = ingest(db, [c])
    # "old" is 424 days before the newest event: still recognised (no window by default).
    assert (s["ingested"], s["duplicates"], s["held_back"]) == (0, 2, {})


def test_a_bounded_window_holds_back_ids_older_than_it(tmp_path, db):
    a = write_jsonl(tmp_path / "a.jsonl", [ev("2026-01-01T10:00:00Z", id="old")])
    b = write_jsonl(tmp_path / "b.jsonl", [ev("2026-03-01T10:00:00Z", id="new")])
    c = write_jsonl(tmp_path / "c.jsonl", [ev("2026-01-01T10:00:00Z", id="old"), ev("2026-03-01T10:00:00Z", id="new"),
                                          ev("2026-01-02T10:00:00Z", id="older-but-new"), ev("2026-01-02T11:00:00Z")])
    ingest(db, [a, b], config=window(30))
    s = ingest(db, [c], config=window(30))
    # "old" and "older-but-new" are 59 days before the newest event seen: the window forgot ids
    # that old, so neither can be checked; both are held back.  An event without an id is added.
    assert (s["ingested"], s["duplicates"], s["held_back"]) == (1, 1, {"beyond_dedupe_window": 2})
    assert ebbwatch.status(db=db, config=window(30))["held_back"] == 2
    c2 = write_jsonl(tmp_path / "c2.jsonl", [ev("2026-01-02T10:00:00Z", id="older-but-new"), ev("2026-03-01T10:00:00Z", id="new")])
    s = ingest(db, [c2], config=window(30), accept_beyond_window=True)
    assert (s["ingested"], s["duplicates"], s["held_back"]) == (1, 1, {})


def test_dedupe_window_edge_within_one_file(tmp_path, db):
    # One file spanning more than the window: ids exactly 30 days before its newest id are
    # checked and kept, one second older are held back, as if the window applied line by line.
    a = write_jsonl(tmp_path / "a.jsonl", [ev("2026-01-30T09:59:59Z", id="past"), ev("2026-01-30T10:00:00Z", id="edge"),
                                          ev("2026-03-01T10:00:00Z", id="newest"), ev("2026-03-01T11:00:00Z")])
    b = write_jsonl(tmp_path / "b.jsonl", [ev("2026-01-30T09:59:59Z", id="past"), ev("2026-01-30T10:00:00Z", id="edge"),
                                          ev("2026-03-01T10:00:00Z", id="newest")])
    s = ingest(db, [a], config=window(30))
    assert (s["ingested"], s["held_back"]) == (3, {"beyond_dedupe_window": 1})
    s = ingest(db, [b], config=window(30))
    assert (s["ingested"], s["duplicates"], s["held_back"]) == (0, 2, {"beyond_dedupe_window": 1})


def test_bad_lines_go_to_rejects_with_line_and_reason(tmp_path, db):
    good = ev("2026-03-02T10:00:00Z")
    f = write_jsonl(tmp_path / "mixed.jsonl", [good], raw_lines=[
        b"not json", b"[1, 2]", b'{"ts": "2026-03-02T10:00:00Z", "user": "u"}',
        b'{"ts": "soon", "event": "x", "user": "u"}', b'{"ts": "2031-01-01T00:00:00Z", "event": "x", "user": "u"}',
        b'{"ts": "2026-03-02T10:00:00Z", "event": 5, "user": "u"}', b'{"ts": "2026-03-02T10:00:00Z", "event": "\xff", "user": "u"}',
        b'{"ts": NaN, "event": "x", "user": "u"}', b"", json.dumps(good).encode(),
    ])
    rejects = tmp_path / "rejects.jsonl"
    s = ingest(db, [f], rejects_path=str(rejects))
    # The good lines stay on the native reader; the eight it doubts are decided line by line.
    assert s["paths"] == {"fast": 1, "precise": 0} and s["lines_rechecked"] == 8
    assert s["ingested"] == 2 and s["lines"] == 10
    # NaN is a token DuckDB's reader takes (so both paths take it): a time that is not finite.
    assert s["rejected"] == {"not_json": 1, "not_object": 1, "missing_field": 1, "bad_time": 2,
                             "future_time": 1, "wrong_type": 1, "not_utf8": 1}
    lines = [json.loads(l) for l in rejects.read_text().splitlines()]
    assert [(r["line"], r["reason"]) for r in lines] == [
        (2, "not_json"), (3, "not_object"), (4, "missing_field"), (5, "bad_time"), (6, "future_time"),
        (7, "wrong_type"), (8, "not_utf8"), (9, "bad_time")]
    assert all(r["file"].endswith("mixed.jsonl") for r in lines)


def test_line_over_size_limit(tmp_path, db):
    from ebbwatch.config import Config, IngestConfig

    cfg = Config(ingest=IngestConfig(max_line_bytes=200))
    f = write_jsonl(tmp_path / "big.jsonl", [ev("2026-03-02T10:00:00Z"), {**ev("2026-03-02T10:00:00Z"), "attrs": "x" * 500}])
    s = ebbwatch.ingest_files([str(f)], db=db, now=NOW, config=cfg)
    assert s["rejected"] == {"too_long": 1} and s["ingested"] == 1


def test_jsonlines_conventions_crlf_and_utf8(tmp_path, db):
    # jsonlines.org: UTF-8, one JSON value per line, lines end in \n (\r\n is allowed too).
    path = tmp_path / "crlf.jsonl"
    lines = [json.dumps(ev("2026-03-02T10:00:00Z", user="ünï-ø"), ensure_ascii=False), json.dumps(ev("2026-03-02T11:00:00Z"))]
    path.write_bytes(("\r\n".join(lines) + "\r\n").encode("utf-8"))
    s = ingest(db, [path])
    assert s["ingested"] == 2 and not s["rejected"]
    assert daily(db)[("a-1", "2026-03-02", "doc.edit")] == (2, 2)


def test_dst_day_boundaries_follow_the_account_zone(tmp_path, db):
    """Local days across the 2026-03-08 US spring-forward (IANA tz database via zoneinfo)."""
    zone = ZoneInfo("America/New_York")
    acc = tmp_path / "accounts.csv"
    acc.write_text("account,name,timezone\na-ny,NY,America/New_York\n")
    instants = [datetime(2026, 3, 8, 4, 59, tzinfo=timezone.utc), datetime(2026, 3, 8, 5, 0, tzinfo=timezone.utc),
                datetime(2026, 3, 9, 3, 59, tzinfo=timezone.utc), datetime(2026, 3, 9, 4, 0, tzinfo=timezone.utc)]
    f = write_jsonl(tmp_path / "dst.jsonl", [ev(t.isoformat().replace("+00:00", "Z"), account="a-ny") for t in instants])
    ingest(db, [f], accounts=str(acc))
    expected = Counter(t.astimezone(zone).date().isoformat() for t in instants)
    got = {d: n for (a, d, e), (n, u) in daily(db).items()}
    assert got == dict(expected) == {"2026-03-07": 1, "2026-03-08": 2, "2026-03-09": 1}


def test_gzip_directory_and_stdin(tmp_path, db):
    write_jsonl(tmp_path / "in" / "b" / "2.jsonl.gz", [ev("2026-03-02T10:00:00Z", id="x2")], gz=True)
    write_jsonl(tmp_path / "in" / "a" / "1.jsonl", [ev("2026-03-02T10:00:00Z", id="x1")])
    (tmp_path / "in" / "notes.txt").write_text("ignored")
    s = ebbwatch.ingest_files([str(tmp_path / "in")], db=db, now=NOW)
    assert s["files"] == 2 and s["ingested"] == 2
    stream = io.BytesIO(json.dumps(ev("2026-03-02T10:00:00Z", id="x3")).encode() + b"\n")
    s = ebbwatch.ingest_files(["-"], db=db, now=NOW, stdin=stream)
    assert s["ingested"] == 1
    assert daily(db)[("a-1", "2026-03-02", "doc.edit")] == (3, 1)


def test_truncated_gzip_is_an_error_and_writes_nothing(tmp_path, db):
    good = write_jsonl(tmp_path / "good.jsonl", [ev("2026-03-02T10:00:00Z")])
    cut = tmp_path / "cut.jsonl.gz"
    whole = gzip.compress(b"".join(json.dumps(ev("2026-03-03T10:00:00Z", id=f"c{i}")).encode() + b"\n" for i in range(2000)))
    cut.write_bytes(whole[: len(whole) // 2])
    s = ingest(db, [good, cut])
    assert [e["file"] for e in s["errors"]] == [str(cut)]
    assert set(d for (_, d, _) in daily(db)) == {"2026-03-02"}


def test_missing_input_is_an_input_error(tmp_path, db):
    with pytest.raises(InputError, match="no such file"):
        ingest(db, [tmp_path / "absent.jsonl"])


def test_crash_mid_file_leaves_store_as_before(tmp_path, db, monkeypatch):
    first = write_jsonl(tmp_path / "1.jsonl", [ev("2026-03-02T10:00:00Z")])
    second = write_jsonl(tmp_path / "2.jsonl", [ev("2026-03-03T10:00:00Z"), ev("2026-03-04T10:00:00Z")])
    ingest(db, [first])
    before = daily(db)
    from ebbwatch import store as store_mod

    original = store_mod.Store.log_ingest

    def boom(self, *args, **kwargs):
        original(self, *args, **kwargs)
        raise RuntimeError("simulated crash after the merge, before commit")

    monkeypatch.setattr(store_mod.Store, "log_ingest", boom)
    with pytest.raises(RuntimeError):
        ingest(db, [second])
    monkeypatch.setattr(store_mod.Store, "log_ingest", original)
    assert daily(db) == before
    assert ingest(db, [second])["ingested"] == 2  # not marked as ingested by the failed attempt


def test_daily_input_csv_and_export_round_trip(tmp_path, db):
    src = tmp_path / "daily.csv"
    src.write_text("account,day,event,count,users\na-1,2026-03-01,doc.edit,5,2\na-1,2026-03-02,doc.edit,7,3\n")
    s = ebbwatch.ingest_files([], db=db, daily=str(src))
    assert s["daily_rows_loaded"] == 2
    out = tmp_path / "export.csv"
    assert ebbwatch.export_daily(str(out), db=db) == 2
    assert out.read_text().splitlines() == ["account,day,event,events,users", "a-1,2026-03-01,doc.edit,5,2",
                                            "a-1,2026-03-02,doc.edit,7,3"]


def test_daily_input_errors_name_the_line(tmp_path, db):
    src = tmp_path / "daily.csv"
    src.write_text("account,day,event,count\na-1,2026-03-01,doc.edit,5\na-1,yesterday,doc.edit,7\n")
    with pytest.raises(InputError, match="line 3"):
        ebbwatch.ingest_files([], db=db, daily=str(src))


def test_fast_and_precise_paths_agree(tmp_path):
    rows = [ev(f"2026-03-0{1 + i % 5}T1{i % 10}:00:00.{i:03d}+0{i % 3}:00", user=f"u-{i % 7}", account=f"a-{i % 3}", id=f"e{i % 40}")
            for i in range(60)] + [ev(1_772_500_000 + i, user=i, account=None if i % 2 else "a-1") for i in range(10)]
    clean = write_jsonl(tmp_path / "clean.jsonl", rows)
    dirty = write_jsonl(tmp_path / "dirty.jsonl", rows, raw_lines=[b"{broken"])
    ids = tmp_path / "ids.csv"
    ids.write_text("user,account,valid_from,valid_to\n" + "".join(f"{i},a-2,,\n" for i in range(10)))
    db1, db2 = str(tmp_path / "1.duckdb"), str(tmp_path / "2.duckdb")
    db3 = str(tmp_path / "3.duckdb")
    s1 = ingest(db1, [clean], identities=str(ids))
    s2 = ingest(db2, [dirty], identities=str(ids))
    s3 = ingest_precisely(db3, [clean], identities=str(ids))
    assert s1["paths"]["fast"] == 1 and s2["paths"]["fast"] == 1 and s2["lines_rechecked"] == s1["lines_rechecked"] + 1
    assert daily(db1) == daily(db2) == daily(db3)
    assert s1["ingested"] == s2["ingested"] == s3["ingested"] and s1["duplicates"] == s2["duplicates"] == s3["duplicates"]


# Values whose JSON type matters: strings that read like numbers, booleans, objects or arrays,
# and the non-string values themselves.  The fast path reads these fields as text, so it must
# either agree with the precise path or leave the file to it.
tricky_value = st.sampled_from([
    "doc.edit", "5", "-3", "1.5", "1e5", "true", "false", "null", "{x}", "[a]", "", "a\"b", "é", "-x", "0",
    "12345678901234567890", 5, -3, 0, 1.5, 1e5, True, False, None, {"a": 1}, [1], 12345678901234567890,
    # json.dumps writes these as the literals NaN, Infinity, -Infinity, which DuckDB's reader takes.
    "NaN", "Infinity", "nan", "0000000000000e10", float("nan"), float("inf"), float("-inf"),
    # Past 25 bytes a text with a '-' after its first byte is taken as a string unchecked: long
    # strings and long non-strings (integers, arrays, objects) that carry minus signs.
    "0f8c2a4e-6b1d-4c3a-9e2f-7a5b3c1d0e9f", "-123456789012345678901234567890", "1-2-3-4-5-6-7-8-9-10-11-12",
    -123456789012345678901234567890, [-1, -2, -3, -4, -5, -6, -7, -8, -9], {"a-b": "c-d-e-f-g-h-i-j-k-l"},
])


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(values=st.lists(st.tuples(tricky_value, tricky_value, tricky_value, tricky_value), min_size=1, max_size=8))
def test_property_fast_path_agrees_with_precise_path_on_typed_values(tmp_path_factory, values):
    """Each line's event, user, account and id drawn from typed look-alikes: the native reader
    (with its doubted lines rechecked) gives the same store as the precise parser alone, and so
    does the same file with a broken line added."""
    tmp = tmp_path_factory.mktemp("typed")
    rows = [{"ts": f"2026-03-02T10:00:0{i % 10}Z", "event": e, "user": u, "account": a, "id": i_}
            for i, (e, u, a, i_) in enumerate(values)]
    clean = write_jsonl(tmp / "clean.jsonl", rows)
    dirty = write_jsonl(tmp / "dirty.jsonl", rows, raw_lines=[b"{broken"])
    s1 = ingest(str(tmp / "1.duckdb"), [clean])
    s2 = ingest(str(tmp / "2.duckdb"), [dirty])
    s3 = ingest_precisely(str(tmp / "3.duckdb"), [clean])
    assert s1["paths"]["fast"] == 1 and s2["paths"]["fast"] == 1
    assert daily(str(tmp / "1.duckdb")) == daily(str(tmp / "2.duckdb")) == daily(str(tmp / "3.duckdb"))
    rejected = dict(s2["rejected"])
    rejected["not_json"] = rejected.get("not_json", 0) - 1
    assert {k: v for k, v in s1["rejected"].items() if v} == {k: v for k, v in rejected.items() if v} \
        == {k: v for k, v in s3["rejected"].items() if v}
    assert (s1["ingested"], s1["duplicates"], s1["unattributed"]) == (s2["ingested"], s2["duplicates"], s2["unattributed"]) \
        == (s3["ingested"], s3["duplicates"], s3["unattributed"])


# Every JSON type other than a string, in every text field, whatever its first character
# (t, f, a digit, -, [, {): the fast path must notice it and leave the line to the precise
# parser, which rejects it as a wrong type.  Strings starting with nearby bytes stay on the fast path.
@pytest.mark.parametrize("field", ["event", "user", "account", "id"])
@pytest.mark.parametrize("value", [True, False, 7, -7, 0.5, [1], {"a": 1}])
def test_fast_path_leaves_non_string_values_to_the_precise_path(tmp_path, db, field, value):
    line = ev("2026-03-02T10:00:00Z", id="e-1")
    line[field] = value
    f = write_jsonl(tmp_path / "e.jsonl", [ev("2026-03-02T09:00:00Z"), line])
    s = ingest(db, [f])
    integer_key = field != "event" and isinstance(value, int) and not isinstance(value, bool)
    if integer_key:  # an integer user, account or id is accepted as its text on both paths
        assert s["paths"] == {"fast": 1, "precise": 0} and s["ingested"] == 2
    else:
        assert s["paths"] == {"fast": 1, "precise": 0} and s["lines_rechecked"] == 1
        assert s["rejected"] == {"wrong_type": 1} and s["ingested"] == 1


@pytest.mark.parametrize("text", ["Zeta", "\\x", "]x", "|x", "ux", "gx", "sx", "ex", ":x", "~", "é"])
def test_fast_path_keeps_strings_that_only_start_near_non_string_texts(tmp_path, db, text):
    f = write_jsonl(tmp_path / "e.jsonl", [ev("2026-03-02T10:00:00Z", event=text, user=text, account=text, id=text)])
    s = ingest(db, [f])
    assert s["paths"] == {"fast": 1, "precise": 0} and s["ingested"] == 1
    assert daily(db) == {(text, "2026-03-02", text): (1, 1)}


event_strategy = st.builds(
    lambda day, sec, user, acct, ident: ev(
        (datetime(2026, 3, 1, tzinfo=timezone.utc) + timedelta(days=day, seconds=sec)).isoformat().replace("+00:00", "Z"),
        event=["a", "b"][sec % 2], user=f"u{user}", account=f"acc{acct}", id=None if ident is None else f"id{ident}"),
    st.integers(0, 4), st.integers(0, 86399), st.integers(0, 3), st.integers(0, 2), st.one_of(st.none(), st.integers(0, 30)))


def python_count(rows):
    """Plain-Python reference: dedupe by id (first wins), then count per account, UTC day, event."""
    seen, counts, users = set(), Counter(), {}
    for r in rows:
        if r.get("id") is not None:
            if r["id"] in seen:
                continue
            seen.add(r["id"])
        key = (r["account"], r["ts"][:10], r["event"])
        counts[key] += 1
        users.setdefault(key, set()).add(r["user"])
    return {k: (n, len(users[k])) for k, n in counts.items()}


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(event_strategy, min_size=1, max_size=40), cuts=st.lists(st.integers(0, 40), max_size=3),
       seed=st.randoms(use_true_random=False))
def test_property_any_split_any_order_any_redelivery(tmp_path_factory, rows, cuts, seed):
    """Daily totals equal a plain Python count for any split of a batch into files, whatever the
    order of the files and lines and even when files are delivered twice."""
    tmp = tmp_path_factory.mktemp("prop")
    # Permuting lines changes which duplicate is "first", which must not matter for the counts.
    shuffled = rows[:]
    seed.shuffle(shuffled)
    bounds = sorted({0, len(shuffled), *[c % (len(shuffled) + 1) for c in cuts]})
    parts = [shuffled[a:b] for a, b in zip(bounds, bounds[1:]) if b > a]
    files = [write_jsonl(tmp / f"part{i}.jsonl", part) for i, part in enumerate(parts)]
    store = str(tmp / "s.duckdb")
    ingest(store, files + files[:1])
    # A file whose bytes equal an earlier file's is skipped as already ingested, by design.
    distinct, seen = [], set()
    for f, part in zip(files, parts):
        if f.read_bytes() not in seen:
            seen.add(f.read_bytes())
            distinct.extend(part)
    assert daily(store) == python_count(distinct)


def test_first_value_is_text_reads_only_the_head(tmp_path):
    from ebbwatch.ingest.readers import first_value_is_text

    text = tmp_path / "text.jsonl.gz"
    with gzip.open(text, "wb") as handle:
        handle.write(b"not json\n[1]\n" + json.dumps({"ts": "2026-03-01T00:00:00Z"}).encode() + b"\n")
    number = write_jsonl(tmp_path / "number.jsonl", [{"ts": 1_772_500_000}])
    # One line longer than the head: never read whole, and no object found in it.
    long = tmp_path / "long.jsonl"
    long.write_bytes(b'{"ts": "2026-03-01T00:00:00Z", "pad": "' + b"x" * 200_000 + b'"}\n')
    assert first_value_is_text(str(text), "ts") is True
    assert first_value_is_text(str(number), "ts") is False
    assert first_value_is_text(str(long), "ts") is False
    assert first_value_is_text(str(tmp_path / "missing.jsonl"), "ts") is False


def test_number_times_first_then_text_times_stay_on_the_fast_path(tmp_path):
    rows = [ev(1_772_500_000 + i, user="u", account="a-1", id=f"n{i}") for i in range(5)]
    rows += [ev(f"2026-03-0{1 + i}T10:00:00Z", user="u", account="a-1", id=f"t{i}") for i in range(5)]
    first_text = list(reversed(rows))
    s1 = ingest(str(tmp_path / "1.duckdb"), [write_jsonl(tmp_path / "a.jsonl", rows)])
    s2 = ingest(str(tmp_path / "2.duckdb"), [write_jsonl(tmp_path / "b.jsonl", first_text)])
    assert s1["paths"]["fast"] == 1 and s2["paths"]["fast"] == 1
    assert s1["ingested"] == s2["ingested"] == 10
    assert daily(str(tmp_path / "1.duckdb")) == daily(str(tmp_path / "2.duckdb"))


def test_content_hashes_match_published_values(tmp_path):
    from ebbwatch.ingest.readers import scan_file

    empty = tmp_path / "empty.jsonl"
    empty.write_bytes(b"")
    # XXH3-128 of no bytes, seed 0: 99aa06d3014798d86001c324468d497f (xxHash's xxhsum; value from memory).
    assert scan_file(str(empty))[0] == ["xxh3-128:99aa06d3014798d86001c324468d497f"]
    abc = tmp_path / "abc.jsonl"
    abc.write_bytes(b"abc")
    # SHA-256("abc"): FIPS 180-2, appendix B.1.
    digests, longest, _ = scan_file(str(abc), legacy=True)
    assert digests[1] == "sha256:ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert longest == 3
    # A gzip file is hashed as stored (its compressed bytes), so a re-compressed copy is new.
    gz = tmp_path / "abc.jsonl.gz"
    gz.write_bytes(gzip.compress(b"abc"))
    assert scan_file(str(gz))[0] != scan_file(str(abc))[0] and scan_file(str(gz))[1] == 3
