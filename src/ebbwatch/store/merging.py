"""Merging prepared events into the store: id dedupe, per-user and per-account daily counts."""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa

from .sql import _USER_HASH, _arrow, _register


class Merging:
    """Dedupe and the daily tables' updates from events."""

    def merge_staged(self, dedupe_window_days: int = 0, accept_beyond_window: bool = False,
                     known_accounts_only: bool = False, file_no: int | None = None,
                     keep_contributions: bool = True) -> dict:
        """Attribute, dedupe and aggregate the staged events into the daily tables.

        Dedupe: the first delivery of an id wins, within this file (:meth:`prepare_staged`) and
        against ids already seen (:meth:`_fresh_events`).  Returns counts: ``ingested``,
        ``duplicates``, ``held_back`` (events whose id is older than a bounded window),
        ``unattributed`` (by reason), first and last day touched.
        """
        con = self.con
        prepared = self.prepare_staged(known_accounts_only)
        fresh, fresh_count, held_back = self._fresh_events(
            "prepared", prepared["candidates"] - prepared["repeats"], dedupe_window_days, accept_beyond_window,
            file_no)
        newest_us = con.execute(f"SELECT max(ts_us) FROM {fresh}").fetchall()[0][0]
        if prepared["unattributed"]:
            self.keep_unattributed(file_no)
        grouped = f"SELECT account, day, event, {_USER_HASH} AS user_hash, count(*) AS events FROM {fresh} GROUP BY ALL"
        self.add_users(fresh)
        keep_contributions = keep_contributions and file_no is not None
        if self._user_daily_is_empty():
            # A first load (a backfill) has nothing to merge with: group straight into the table,
            # which then holds exactly what this file adds.
            con.execute(f"INSERT INTO user_daily {grouped}")
            if keep_contributions:
                self.add_contributions(file_no, "user_daily")
            con.execute("INSERT INTO daily SELECT account, day, event, sum(events), count(*) FROM user_daily GROUP BY ALL")
            first_day, last_day = con.execute("SELECT min(day), max(day) FROM user_daily").fetchone()
            self.drop_prepared()
            con.execute("DROP TABLE IF EXISTS fresh")
        else:
            con.execute(f"CREATE OR REPLACE TEMP TABLE new_user_daily AS {grouped}")
            self.drop_prepared()
            con.execute("DROP TABLE IF EXISTS fresh")
            if keep_contributions:
                self.add_contributions(file_no)
            first_day, last_day = self._merge_new_user_daily()
        return {
            "ingested": fresh_count,
            "duplicates": prepared["candidates"] - fresh_count - held_back,
            "held_back": held_back,
            "unattributed": prepared["unattributed"],
            "first_day": first_day,
            "last_day": last_day,
            "newest_us": newest_us,
        }

    def _window_cutoff(self, source: str, dedupe_window_days: int):
        """The oldest event time whose id a bounded window still remembers (TIMESTAMPTZ), from
        the newest id time seen or in ``source``; ``None`` without a window."""
        if not dedupe_window_days:
            return None
        return self.con.execute(
            f"""SELECT max(ts) - to_days(CAST(? AS INTEGER)) FROM (
                SELECT max(ts) AS ts FROM seen_ids
                UNION ALL SELECT make_timestamptz(max(ts_us)) FROM {source} WHERE id_hash IS NOT NULL)""",
            [int(dedupe_window_days)],
        ).fetchone()[0]

    def _fresh_events(self, source: str, candidates: int, dedupe_window_days: int, accept_beyond_window: bool,
                      file_no: int | None = None):
        """The events of ``source`` (id_hash, ts_us, ...) whose id was not seen before, and
        record their ids.  Returns ``(table, count, held_back)``.

        Without a window every id is remembered.  The check joins the file's ids with
        ``seen_ids`` and DuckDB builds its hash table on the smaller side (the file), so a
        check costs one scan of the remembered hashes, not memory in proportion to them.  With
        a window, ids older than it are forgotten, and an event with such an id cannot be
        checked: it is held back (``held_back``) unless ``accept_beyond_window``.
        """
        con = self.con
        cutoff = self._window_cutoff(source, dedupe_window_days)
        if cutoff is None and not self._has_rows("seen_ids"):
            fresh, fresh_count, held_back = source, candidates, 0
        else:
            con.execute(
                f"""CREATE OR REPLACE TEMP TABLE seen_before AS
                SELECT p.id_hash FROM {source} p SEMI JOIN seen_ids s ON s.id_hash = p.id_hash""")
            beyond = "false" if cutoff is None or accept_beyond_window else "make_timestamptz(ts_us) < ?"
            params = [] if beyond == "false" else [cutoff]
            con.execute(
                f"""CREATE OR REPLACE TEMP TABLE fresh_marked AS
                SELECT *, id_hash IS NOT NULL AND {beyond} AS beyond_window FROM {source} p
                WHERE p.id_hash IS NULL OR p.id_hash NOT IN (SELECT id_hash FROM seen_before)""", params)
            held_back = con.execute("SELECT COALESCE(count_if(beyond_window), 0) FROM fresh_marked").fetchone()[0]
            con.execute("CREATE OR REPLACE TEMP TABLE fresh AS SELECT * EXCLUDE (beyond_window) FROM fresh_marked "
                        "WHERE NOT beyond_window")
            con.execute("DROP TABLE fresh_marked")
            con.execute("DROP TABLE seen_before")
            fresh = "fresh"
            fresh_count = con.execute("SELECT count(*) FROM fresh").fetchall()[0][0]
        # Only ids the window keeps are written (a backfill longer than the window would
        # otherwise write ids only to delete them again).
        keep = "" if cutoff is None else "AND make_timestamptz(ts_us) >= ?"
        con.execute(f"INSERT INTO seen_ids SELECT id_hash, make_timestamptz(ts_us), ? FROM {fresh} "
                    f"WHERE id_hash IS NOT NULL {keep}", [file_no] + ([] if cutoff is None else [cutoff]))
        self.forget_old_ids(dedupe_window_days)
        return fresh, fresh_count, held_back

    def note_newest_event(self, ts_us):
        """Keep the newest event time ingested (epoch microseconds): which days are complete in
        every account's time zone depends on it.  None (daily aggregates) changes nothing."""
        if ts_us is None:
            return
        current = self.newest_event_us()
        if current is None or int(ts_us) > current:
            self.con.execute("INSERT OR REPLACE INTO meta VALUES ('newest_event_us', ?)", [str(int(ts_us))])

    def newest_event_us(self) -> int | None:
        row = self.con.execute("SELECT value FROM meta WHERE key = 'newest_event_us'").fetchone()
        return None if row is None else int(row[0])

    def first_day(self):
        return self.con.execute("SELECT min(day) FROM daily").fetchall()[0][0]

    def first_active_days(self, event_weights: dict[str, float]) -> dict:
        """Each account's first day with weighted activity (``event_weights`` > 0), as days since
        1970-01-01: ``{account: day}``, accounts without such activity left out.  The weighted
        names are a list the scan of ``daily`` filters on, not a table it joins (65M rows of the
        scan benchmark: 0.17 against 0.28 s, before the scan's first chunk can be read)."""
        weighted = [name for name, weight in event_weights.items() if weight > 0]
        if not weighted:
            return {}
        rows = _arrow(self.con, """SELECT account, CAST(min(day) - DATE '1970-01-01' AS INTEGER) AS day
            FROM daily WHERE list_contains(?, event) AND events > 0 GROUP BY account""", [weighted])
        return dict(zip(rows.column("account").to_pylist(), rows.column("day").to_pylist()))

    def account_timezones(self) -> list[str]:
        """The time zones of accounts with activity ('UTC' for those without one)."""
        return [r[0] for r in self.con.execute(
            """SELECT DISTINCT COALESCE(a.timezone, 'UTC') FROM (SELECT DISTINCT account FROM daily) d
            LEFT JOIN accounts a USING (account) ORDER BY 1""").fetchall()]

    def forget_old_ids(self, dedupe_window_days: int):
        """Forget ids older than the dedupe window, measured back from the newest event time
        seen; with no window (0) every id is kept."""
        if not dedupe_window_days:
            return
        self.con.execute(
            """DELETE FROM seen_ids WHERE ts < (SELECT max(ts) FROM seen_ids) - to_days(CAST(? AS INTEGER))""",
            [int(dedupe_window_days)],
        )

    def claim_ids(self, id_hash: np.ndarray, ts_us: np.ndarray, dedupe_window_days: int = 0,
                  accept_beyond_window: bool = False, file_no: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """One file's event ids (first deliveries within it) against the ids already seen.

        Returns ``(seen, held_back)``: the hashes already seen (those events are duplicates) and
        those older than a bounded window (held back, see :meth:`_fresh_events`); records the
        others with their event times as :meth:`merge_staged` does for a file, so files claimed
        one after another dedupe exactly as if ingested in turn.
        """
        con = self.con
        ids = pa.table({"id_hash": pa.array(id_hash, pa.uint64()), "ts_us": pa.array(ts_us, pa.int64())})
        _register(con, "claimed_ids", ids)
        try:
            seen = con.execute(
                "SELECT c.id_hash FROM claimed_ids c SEMI JOIN seen_ids s ON s.id_hash = c.id_hash"
            ).fetchnumpy()["id_hash"]
            fresh, _, held = self._fresh_events("claimed_ids", len(id_hash) - len(seen), dedupe_window_days,
                                                accept_beyond_window, file_no)
            held_hashes = np.zeros(0, dtype=np.uint64)
            if held:
                kept = con.execute(f"SELECT id_hash FROM {fresh}").fetchnumpy()["id_hash"]
                held_hashes = np.setdiff1d(np.asarray(id_hash, np.uint64), np.concatenate([seen, kept]).astype(np.uint64))
            con.execute("DROP TABLE IF EXISTS fresh")
        finally:
            con.unregister("claimed_ids")
        return np.asarray(seen, dtype=np.uint64), np.asarray(held_hashes, dtype=np.uint64)

    def merge_user_daily(self, tables: list[pa.Table]) -> tuple:
        """Add per-user daily counts (``account, day, event, user, events``; several tables may
        hold the same key) to ``user_daily`` and ``daily``.  Returns the first and last day."""
        if not tables:
            return None, None
        incoming = pa.concat_tables(tables)
        _register(self.con, "incoming_user_daily", incoming)
        try:
            self.add_users("incoming_user_daily")
            self.con.execute(
                f"""CREATE OR REPLACE TEMP TABLE new_user_daily AS
                SELECT account, day, event, {_USER_HASH} AS user_hash, CAST(sum(events) AS BIGINT) AS events
                FROM incoming_user_daily GROUP BY ALL"""
            )
        finally:
            self.con.unregister("incoming_user_daily")
        return self._merge_new_user_daily()

    def add_users(self, source: str):
        """Record the names of the users in ``source`` (a table or view with a ``user`` column)
        that ``users`` does not hold yet, under their hash."""
        # The names made distinct before they are hashed: each is hashed once (the ingest
        # benchmark's 2M events of 79k users: 0.053 against 0.069 s).
        distinct = f'SELECT {_USER_HASH} AS user_hash, "user" FROM (SELECT DISTINCT "user" FROM {source})'
        if not self._has_rows("users"):
            self.con.execute(f"INSERT INTO users {distinct}")
            return
        self.con.execute(f"""INSERT INTO users SELECT n.user_hash, n."user" FROM ({distinct}) n
            ANTI JOIN users u ON u.user_hash = n.user_hash""")

    def _user_daily_is_empty(self) -> bool:
        return not self._has_rows("user_daily")

    def _merge_new_user_daily(self) -> tuple:
        """Fold the temp table ``new_user_daily`` into ``user_daily`` and ``daily`` (the touched
        account-days are recomputed whole).  Returns the first and last day touched."""
        con = self.con
        touched_any = self._has_rows("new_user_daily")
        store_empty = self._user_daily_is_empty()
        first_day, last_day = con.execute("SELECT min(day), max(day) FROM new_user_daily").fetchone()
        if touched_any and store_empty:
            con.execute("INSERT INTO user_daily SELECT * FROM new_user_daily")
            con.execute(
                """INSERT INTO daily SELECT account, day, event, sum(events), count(*)
                FROM new_user_daily GROUP BY ALL"""
            )
        elif touched_any:
            con.execute(
                "CREATE OR REPLACE TEMP TABLE touched AS SELECT DISTINCT account, day FROM new_user_daily"
            )
            con.execute(
                """CREATE OR REPLACE TEMP TABLE merged_user_daily AS
                SELECT account, day, event, user_hash, sum(events) AS events FROM (
                    SELECT u.* FROM user_daily u SEMI JOIN touched t ON u.account = t.account AND u.day = t.day
                    UNION ALL SELECT * FROM new_user_daily) GROUP BY ALL"""
            )
            con.execute(
                "DELETE FROM user_daily USING touched t WHERE user_daily.account = t.account AND user_daily.day = t.day"
            )
            con.execute("INSERT INTO user_daily SELECT * FROM merged_user_daily")
            con.execute(
                """DELETE FROM daily USING (SELECT DISTINCT account, day, event FROM merged_user_daily) t
                WHERE daily.account = t.account AND daily.day = t.day AND daily.event = t.event"""
            )
            con.execute(
                """INSERT INTO daily SELECT account, day, event, sum(events), count(*)
                FROM merged_user_daily GROUP BY ALL"""
            )
            con.execute("DROP TABLE merged_user_daily")
        con.execute("DROP TABLE IF EXISTS new_user_daily")
        con.execute("DROP TABLE IF EXISTS touched")
        return first_day, last_day


def aggregate_events(events: pa.Table, duplicate_hashes: np.ndarray) -> tuple[pa.Table, int, object, object, object]:
    """Per-user daily counts of prepared events (``Store.prepared_table``) without the ids in
    ``duplicate_hashes``.  Returns ``(account, day, event, user, events)`` rows, the number of
    events counted, the first and last day, and the newest event time (epoch microseconds)."""
    con = duckdb.connect()
    try:
        _register(con, "events", events)
        _register(con, "duplicates", pa.table({"id_hash": pa.array(duplicate_hashes, pa.uint64())}))
        con.execute(
            """CREATE TEMP TABLE fresh AS SELECT * FROM events e
            WHERE e.id_hash IS NULL OR e.id_hash NOT IN (SELECT id_hash FROM duplicates)"""
        )
        counted, first_day, last_day, newest_us = con.execute(
            "SELECT count(*), min(day), max(day), max(ts_us) FROM fresh").fetchall()[0]
        table = _arrow(con, 'SELECT account, day, event, "user", count(*) AS events FROM fresh GROUP BY ALL')
    finally:
        con.close()
    return table, int(counted), first_day, last_day, newest_us

