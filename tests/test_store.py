from datetime import date

import duckdb
import pytest

from ebbwatch import store as store_mod
from ebbwatch.errors import StoreError


def test_new_store_is_at_current_schema(db):
    with store_mod.open_store(db) as st:
        assert st.schema_version() == store_mod.SCHEMA_VERSION
        tables = {r[0] for r in st.con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert {"daily", "user_daily", "accounts", "identities", "ingest_log", "seen_ids", "alert_log", "snoozes"} <= tables


def test_reopen_keeps_data_and_version(db):
    with store_mod.open_store(db) as st:
        st.con.execute("INSERT INTO accounts (account) VALUES ('a-1')")
    with store_mod.open_store(db) as st:
        assert st.con.execute("SELECT count(*) FROM accounts").fetchone()[0] == 1


def test_newer_schema_is_refused_and_left_alone(db):
    with store_mod.open_store(db) as st:
        st.con.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    with pytest.raises(StoreError, match="schema version 99, newer"):
        store_mod.open_store(db)
    con = duckdb.connect(db, read_only=True)
    assert con.execute("SELECT value FROM meta").fetchone()[0] == "99"
    con.close()


def _pin_schema(monkeypatch, version: int):
    """Make this build's schema ``version`` (read where the migration and the open check use it)."""
    monkeypatch.setattr(store_mod.schema, "SCHEMA_VERSION", version)
    monkeypatch.setattr(store_mod.connection, "SCHEMA_VERSION", version)


def test_older_schema_is_migrated(db, monkeypatch):
    # A store at the current version opened by a build one version newer runs the next migration.
    with store_mod.open_store(db):
        pass
    current = store_mod.SCHEMA_VERSION
    _pin_schema(monkeypatch, current + 1)
    monkeypatch.setitem(store_mod.MIGRATIONS, current, ["ALTER TABLE accounts ADD COLUMN region VARCHAR"])
    with store_mod.open_store(db) as st:
        assert st.schema_version() == current + 1
        cols = [r[0] for r in st.con.execute("DESCRIBE accounts").fetchall()]
    assert "region" in cols


def test_file_that_is_not_duckdb_is_refused_not_overwritten(tmp_path):
    path = tmp_path / "notes.duckdb"
    path.write_text("my precious notes\n" * 10)
    with pytest.raises(StoreError, match="not a DuckDB database"):
        store_mod.open_store(str(path))
    assert path.read_text() == "my precious notes\n" * 10


def test_foreign_duckdb_database_is_refused(tmp_path):
    path = str(tmp_path / "other.duckdb")
    con = duckdb.connect(path)
    con.execute("CREATE TABLE sales (x INT)")
    con.close()
    with pytest.raises(StoreError, match="not an ebbwatch store"):
        store_mod.open_store(path)


def test_path_from_environment(monkeypatch, tmp_path):
    monkeypatch.setenv("EBBWATCH_DB", str(tmp_path / "env.duckdb"))
    assert store_mod.resolve_path(None) == str(tmp_path / "env.duckdb")
    assert store_mod.resolve_path("given.duckdb") == "given.duckdb"
    monkeypatch.delenv("EBBWATCH_DB")
    assert store_mod.resolve_path(None) == "ebbwatch.duckdb"


def test_read_only_open_of_missing_store(tmp_path):
    with pytest.raises(StoreError, match="no store"):
        store_mod.open_store(str(tmp_path / "none.duckdb"), read_only=True)


def test_hostile_field_names_stay_quoted(tmp_path, db):
    """Field names from the config reach SQL only as quoted identifiers and literals."""
    import json

    import ebbwatch
    from ebbwatch.config import Config, FieldsConfig

    hostile = {"ts": 'ts"; DROP TABLE daily; --', "event": "ev'ent", "user": "u)", "account": "a-b c", "id": "i\"d"}
    cfg = Config(fields=FieldsConfig(**hostile))
    path = tmp_path / "e.jsonl"
    path.write_text(json.dumps({hostile["ts"]: "2026-03-02T10:00:00Z", hostile["event"]: "x", hostile["user"]: "u1",
                                hostile["account"]: "acc", hostile["id"]: "1"}) + "\n")
    from datetime import datetime, timezone

    s = ebbwatch.ingest_files([str(path)], db=db, config=cfg, now=datetime(2026, 6, 1, tzinfo=timezone.utc))
    assert s["ingested"] == 1 and s["paths"]["fast"] == 1
    with store_mod.open_store(db) as st:
        assert st.con.execute("SELECT account, event, events FROM daily").fetchall() == [("acc", "x", 1)]


def test_version_1_store_migrates_to_2_keeping_its_data(db, monkeypatch):
    """A store written by the first release (schema 1) opens with today's code and keeps its rows."""
    _pin_schema(monkeypatch, 1)
    with store_mod.open_store(db) as st:
        st.con.execute("INSERT INTO accounts (account) VALUES ('a-1')")
        assert st.schema_version() == 1
    monkeypatch.undo()
    with store_mod.open_store(db) as st:
        assert st.schema_version() == store_mod.SCHEMA_VERSION >= 2
        assert st.con.execute("SELECT account FROM accounts").fetchall() == [("a-1",)]
        assert st.con.execute("SELECT count(*) FROM alert_log").fetchone()[0] == 0


def test_event_period_sums_match_the_frame_route(db):
    """The store's grouped totals for the drivers equal explain.event_period_sums on the rows
    (several events, a weight of 0 and of 2, masked days, one account asked for twice with two
    windows of its own)."""
    import numpy as np
    import pandas as pd

    from ebbwatch.explain import drivers_from_sums, event_period_sums

    rng = np.random.default_rng(3)
    rows = pd.DataFrame([(a, d, e, int(rng.integers(1, 9))) for a in ("a-1", "a-2", "a-3")
                         for d in range(20_000, 20_060) for e in ("edit", "view", "noise")
                         if rng.random() < 0.7] + [("a-2", 20_045, "rare", 3)],
                        columns=["account", "day", "event", "events"])
    # "rare" falls inside the days read but outside a-2's periods: no row for it there.
    weights = {"edit": 1.0, "view": 2.0, "noise": 0.0, "rare": 1.0}
    with store_mod.open_store(db) as st:
        st.con.register("rows_in", rows)
        st.con.execute("""INSERT INTO daily SELECT account, DATE '1970-01-01' + CAST(day AS INTEGER), event, events, NULL
                          FROM rows_in""")
        st.con.unregister("rows_in")
        masked = [20_010, 20_055]
        periods = [("a-1", 20_020, 20_050, 20_053), ("a-2", 20_000, 20_030, 20_053), ("a-1", 20_040, 20_052, 20_057),
                   ("a-9", 20_000, 20_050, 20_053)]
        targets = pd.DataFrame({"place": range(len(periods)), "account": [p[0] for p in periods],
                                "first": [p[1] for p in periods], "last": [p[2] for p in periods],
                                "window_first": [p[3] for p in periods], "window_last": 20_059})
        from_store = st.event_period_sums(weights, targets, masked)
    keep = lambda first, last: [d for d in range(first, last + 1) if d not in masked]  # noqa: E731
    baselines = [(a, keep(first, last)) for a, first, last, _ in periods]
    windows = [keep(window_first, 20_059) for *_, window_first in periods]
    from_rows = event_period_sums(rows, weights, baselines, windows)
    from_rows = from_rows[from_rows["event"] != "noise"].reset_index(drop=True)
    pd.testing.assert_frame_equal(from_store.reset_index(drop=True), from_rows, check_dtype=False)
    sizes, window_sizes = [len(days) for _, days in baselines], [len(days) for days in windows]
    assert drivers_from_sums(from_store, weights, sizes, window_sizes) == drivers_from_sums(from_rows, weights, sizes,
                                                                                            window_sizes)
    assert drivers_from_sums(from_store, weights, sizes, window_sizes)[2] != drivers_from_sums(
        from_store, weights, sizes, [6] * len(periods))[2]  # the own window counts


def test_version_2_store_still_recognises_files_logged_by_sha256(tmp_path, db, monkeypatch):
    """Schema 2 logged files by SHA-256; after the move to XXH3-128 a file ingested then must
    still be skipped when it comes again, and new files are logged under the new hash."""
    import hashlib
    from datetime import datetime, timezone

    import ebbwatch

    old = tmp_path / "old.jsonl"
    old.write_text('{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "acc"}\n')
    _pin_schema(monkeypatch, 2)
    with store_mod.open_store(db) as st:
        st.con.execute("INSERT INTO ingest_log (file, sha256, ingested_at, ingested) VALUES (?, ?, now(), 1)",
                       [str(old), hashlib.sha256(old.read_bytes()).hexdigest()])
    monkeypatch.undo()
    now = datetime(2026, 6, 1, tzinfo=timezone.utc)
    again = ebbwatch.ingest_files([str(old)], db=db, now=now)
    assert again["files"] == 0 and again["skipped_files"][0]["reason"] == f"already ingested (same content as {old})"
    new = tmp_path / "new.jsonl"
    new.write_text('{"ts": "2026-03-03T10:00:00Z", "event": "x", "user": "u", "account": "acc"}\n')
    assert ebbwatch.ingest_files([str(new)], db=db, now=now)["files"] == 1
    with store_mod.open_store(db) as st:
        assert st.schema_version() == store_mod.SCHEMA_VERSION >= 3
        hashes = dict(st.con.execute("SELECT file, content_hash FROM ingest_log").fetchall())
    assert hashes[str(old)] == "sha256:" + hashlib.sha256(old.read_bytes()).hexdigest()
    assert hashes[str(new)].startswith("xxh3-128:") and len(hashes[str(new)]) == len("xxh3-128:") + 32


def test_version_6_store_migrates_its_per_user_rows_to_user_hashes(db, monkeypatch):
    """Schema 7 keeps per-user daily rows by the user's hash and the names once in ``users``: a
    store written before (rows under the names, a file's contributions keyed by them) keeps its
    distinct-user counts and user names, and a file ingested then can still be taken back."""
    _pin_schema(monkeypatch, 6)
    rows = [("a-1", "2026-03-02", "edit", "ann", 3, 1), ("a-1", "2026-03-02", "edit", "bob", 1, 2),
            ("a-1", "2026-03-02", "view", "ann", 2, 2), ("a-2", "2026-03-03", "edit", "cy", 5, 1)]
    with store_mod.open_store(db) as st:
        for account, day, event, user, events, file_no in rows:
            st.con.execute("INSERT INTO user_daily VALUES (?, ?, ?, ?, ?)", [account, day, event, user, events])
            st.con.execute("""INSERT INTO file_contributions SELECT ?, hash(CAST(? AS VARCHAR), CAST(? AS DATE),
                              CAST(? AS VARCHAR), CAST(? AS VARCHAR)), ?""", [file_no, account, day, event, user, events])
        st.con.execute("""INSERT INTO daily SELECT account, day, event, sum(events), count(*) FROM user_daily
                          GROUP BY ALL""")
        st.con.execute("INSERT INTO ingest_log (file, file_no, ingested) VALUES ('one.jsonl', 1, 8), ('two.jsonl', 2, 3)")
    monkeypatch.undo()
    with store_mod.open_store(db) as st:
        assert st.schema_version() == store_mod.SCHEMA_VERSION >= 7
        assert sorted(st.con.execute('SELECT "user" FROM users').fetchall()) == [("ann",), ("bob",), ("cy",)]
        activity = st.accounts_user_activity(["a-1"], date(2026, 3, 1), date(2026, 3, 31))
        assert sorted(zip(activity["user"], activity["event"], activity["events"])) == [
            ("ann", "edit", 3), ("ann", "view", 2), ("bob", "edit", 1)]
        st.take_back(2)
        kept = st.con.execute("""SELECT u.account, u.event, n."user", u.events FROM user_daily u
                                 JOIN users n USING (user_hash) ORDER BY ALL""").fetchall()
        assert kept == [("a-1", "edit", "ann", 3), ("a-2", "edit", "cy", 5)]
        assert st.con.execute("SELECT account, event, events, users FROM daily ORDER BY ALL").fetchall() == [
            ("a-1", "edit", 3, 1), ("a-2", "edit", 5, 1)]


def test_first_active_days_count_only_weighted_events_with_activity(db):
    """Each account's first day of weighted activity: an earlier day of an event weighted 0, or
    of a zero count, does not count; a name with a quote in it is matched as it is."""
    rows = [("a", "2026-01-01", "noise", 5), ("a", "2026-01-03", "it's", 2), ("a", "2026-01-02", "it's", 0),
            ("b", "2026-01-05", "use", 1), ("b", "2026-01-04", "noise", 9), ("c", "2026-01-01", "noise", 4)]
    with store_mod.open_store(db) as st:
        st.con.executemany("INSERT INTO daily VALUES (?, CAST(? AS DATE), ?, ?, NULL)", rows)
        first = st.first_active_days({"it's": 1.0, "use": 0.5, "noise": 0.0})
        nothing = st.first_active_days({"noise": 0.0})
    day = lambda text: (date.fromisoformat(text) - date(1970, 1, 1)).days  # noqa: E731
    assert first == {"a": day("2026-01-03"), "b": day("2026-01-05")}
    assert nothing == {}
