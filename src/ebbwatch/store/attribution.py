"""Attributing staged events to accounts and days; events kept until identities arrive; what each
file contributed, so it can be taken back."""

from __future__ import annotations

import pyarrow as pa

from ..errors import StoreError
from .sql import _USER_DAY_KEY, _USER_HASH, _arrow, _register


class Attribution:
    """From staged events to prepared (attributed, dated) rows, and the file contributions."""

    def prepare_staged(self, known_accounts_only: bool = False) -> dict:
        """Attribute the staged events and set aside repeats within the file.

        With ``known_accounts_only`` (and accounts loaded), an event for an account the accounts
        table does not know is not attributed (reason ``unknown_account``): a misspelt id in the
        events then creates no account.

        Leaves the view ``prepared`` (``id_hash``, ``ts_us``, ``account``, ``day`` in the
        account's time zone, ``event``, ``user``): the attributed events, each id's first
        delivery only.  The staged table's row order is the file's line order (DuckDB preserves
        insertion order), so "first delivery wins" means the lowest row number.  Ids are
        compared by their 64-bit hash (staged as ``id_hash``), as across files (``seen_ids``):
        two different ids in one file collide with probability about n² / 2⁶⁵.  Steps with
        nothing to do (no event without an account, no repeated id, no account time zone) are
        skipped: they are the common case and the costly part.  Returns ``candidates`` (attributed
        events), ``repeats`` (later deliveries of an id within the file) and ``unattributed``
        (by reason).
        """
        con = self.con
        # Rows without a time are lines the precise parser took over (``settle_doubtful_staged``).
        events = "(SELECT * FROM staged WHERE ts_us IS NOT NULL)"
        without_account, repeated = con.execute(
            f"SELECT count_if(account IS NULL), count(id_hash) - count(DISTINCT id_hash) FROM {events}"
        ).fetchone()
        if repeated:
            # Only now is the line order needed ("first delivery wins").
            con.execute(f"CREATE OR REPLACE TEMP TABLE staged_n AS SELECT *, row_number() OVER () AS line_order FROM {events}")
            con.execute("DROP TABLE staged")
            base = base_table = "staged_n"
        else:
            base, base_table = events, "staged"
        unattributed = {}
        source = base
        if without_account:
            con.execute(
                f"""CREATE OR REPLACE TEMP TABLE attributed AS
                SELECT s.ts_us, s.event, s."user", s.id_hash,{" s.line_order," if repeated else ""}
                       COALESCE(s.account, i.account) AS account,
                       CASE WHEN s.account IS NULL AND i.account IS NULL THEN
                            CASE WHEN k."user" IS NULL THEN 'unknown_user' ELSE 'no_identity_at_time' END
                       END AS unattributed
                FROM {base} s
                LEFT JOIN identities i
                  ON s.account IS NULL AND i."user" = s."user"
                 AND (i.valid_from IS NULL OR s.ts_us >= epoch_us(i.valid_from))
                 AND (i.valid_to IS NULL OR s.ts_us < epoch_us(i.valid_to))
                LEFT JOIN (SELECT DISTINCT "user" FROM identities) k
                  ON s.account IS NULL AND i.account IS NULL AND k."user" = s."user"
                """
            )
            con.execute(f"DROP TABLE {base_table}")
            unattributed = dict(con.execute(
                "SELECT unattributed, count(*) FROM attributed WHERE unattributed IS NOT NULL GROUP BY 1"
            ).fetchall())
            source = "attributed"
        if known_accounts_only and self._has_rows("accounts"):
            earlier = "s.unattributed" if without_account else "NULL"
            con.execute(
                f"""CREATE OR REPLACE TEMP TABLE known_checked AS
                SELECT s.* {"EXCLUDE (unattributed)" if without_account else ""},
                       COALESCE({earlier}, CASE WHEN a.account IS NULL THEN 'unknown_account' END) AS unattributed
                FROM {source} s LEFT JOIN accounts a ON a.account = s.account""")
            if source != base:
                con.execute(f"DROP TABLE {source}")
            source, without_account = "known_checked", True
            unattributed = dict(con.execute(
                "SELECT unattributed, count(*) FROM known_checked WHERE unattributed IS NOT NULL GROUP BY 1"
            ).fetchall())
        conditions = ["s.unattributed IS NULL"] if without_account else []
        repeats = 0
        if repeated:
            con.execute(
                f"""CREATE OR REPLACE TEMP TABLE repeat_losers AS
                SELECT line_order FROM {source} WHERE id_hash IS NOT NULL
                QUALIFY row_number() OVER (PARTITION BY id_hash ORDER BY line_order) > 1"""
            )
            conditions.append("s.line_order NOT IN (SELECT line_order FROM repeat_losers)")
        candidates = con.execute(
            f"SELECT count(*) FROM {source}" + (" WHERE unattributed IS NULL" if without_account else "")
        ).fetchall()[0][0]
        if repeated:
            repeats = con.execute(
                f"SELECT count(*) FROM {source} s JOIN repeat_losers r ON r.line_order = s.line_order"
                + (" WHERE s.unattributed IS NULL" if without_account else "")
            ).fetchall()[0][0]
        if con.execute("SELECT count(*) FROM accounts WHERE timezone IS NOT NULL").fetchall()[0][0]:
            day = "CAST(timezone(COALESCE(a.timezone, 'UTC'), make_timestamptz(s.ts_us)) AS DATE)"
            join = "LEFT JOIN accounts a ON a.account = s.account"
        else:
            day, join = "CAST(make_timestamp(s.ts_us) AS DATE)", ""
        con.execute(
            f"""CREATE OR REPLACE TEMP VIEW prepared AS
            SELECT s.id_hash, s.ts_us, s.account, {day} AS day, s.event, s."user"
            FROM {source} s {join} WHERE {" AND ".join(conditions) or "true"}"""
        )
        # Events no account was found for, each id's first delivery: kept for identities to come.
        waiting = ["s.unattributed IN ('unknown_user', 'no_identity_at_time')" if without_account else "false"]
        if repeated:
            waiting.append("s.line_order NOT IN (SELECT line_order FROM repeat_losers)")
        con.execute(
            f"""CREATE OR REPLACE TEMP VIEW unattributed_kept AS
            SELECT s.ts_us, s.event, s."user", s.id_hash FROM {source} s WHERE {" AND ".join(waiting)}""")
        return {"candidates": candidates, "repeats": repeats, "unattributed": unattributed}

    def prepared_table(self) -> pa.Table:
        """The ``prepared`` view as an Arrow table (what a Dask worker keeps for a file)."""
        return _arrow(self.con, "SELECT * FROM prepared")

    def unattributed_table(self) -> pa.Table:
        """The ``unattributed_kept`` view as an Arrow table (what a Dask worker keeps for a file)."""
        return _arrow(self.con, "SELECT * FROM unattributed_kept")

    def keep_unattributed(self, file_no: int | None, table: pa.Table | None = None):
        """Keep a file's unattributed events: ``table`` (from a worker) or the ``unattributed_kept``
        view of :meth:`prepare_staged`."""
        if table is None:
            self.con.execute("INSERT INTO unattributed_events SELECT *, ? FROM unattributed_kept", [file_no])
            return
        _register(self.con, "incoming_unattributed", table)
        try:
            self.con.execute('INSERT INTO unattributed_events SELECT ts_us, event, "user", id_hash, ? '
                             "FROM incoming_unattributed", [file_no])
        finally:
            self.con.unregister("incoming_unattributed")

    def unattributed_files(self) -> list:
        """The file numbers (``None`` included) of the kept unattributed events."""
        return [r[0] for r in self.con.execute(
            "SELECT DISTINCT file_no FROM unattributed_events ORDER BY file_no NULLS FIRST").fetchall()]

    def stage_unattributed(self, file_no) -> int:
        """Move the kept unattributed events of file ``file_no`` back into ``staged`` (to be
        attributed again by :meth:`merge_staged`, which keeps those still without an account).
        Returns how many."""
        where = "file_no IS NULL" if file_no is None else f"file_no = {int(file_no)}"
        self.con.execute(
            f"""CREATE OR REPLACE TEMP TABLE staged AS
            SELECT ts_us, event, "user", CAST(NULL AS VARCHAR) AS account, id_hash FROM unattributed_events
            WHERE {where}""")
        self.con.execute(f"DELETE FROM unattributed_events WHERE {where}")
        return self.con.execute("SELECT count(*) FROM staged").fetchone()[0]

    def add_contributions(self, file_no: int | None, source: str | pa.Table = "new_user_daily"):
        """Record what file ``file_no`` adds: the rows (account, day, event, user_hash, events) of
        the temp table named ``source``, or of an Arrow table from a worker (account, day, event,
        user, events)."""
        if file_no is None:
            return
        key = _USER_DAY_KEY
        if isinstance(source, str):
            self.con.execute(f"INSERT INTO file_contributions SELECT ?, {key}, events FROM {source}", [file_no])
            return
        _register(self.con, "incoming_contributions", source)
        try:
            self.con.execute(f"""INSERT INTO file_contributions SELECT ?, {key}, events
                FROM (SELECT *, {_USER_HASH} AS user_hash FROM incoming_contributions)""", [file_no])
        finally:
            self.con.unregister("incoming_contributions")

    def files_with_content(self, digests: list[str]) -> list[int]:
        """Numbers of the logged files with one of these content hashes (files logged before
        schema 5 have none and cannot be taken back)."""
        return [r[0] for r in self.con.execute(
            "SELECT file_no FROM ingest_log WHERE content_hash IN (SELECT unnest(?)) AND file_no IS NOT NULL",
            [list(digests)]).fetchall()]

    def take_back(self, file_no: int):
        """Take file ``file_no``'s contribution back out: its per-user counts from ``user_daily``
        (``daily`` recomputed for the keys it touched), its ids, its kept events, its log row.
        Events other files delivered with the same ids were counted as duplicates then and
        stay uncounted; ingesting the file again (``ingest --again``) brings its ids back."""
        con = self.con
        added = con.execute("SELECT sum(ingested) FROM ingest_log WHERE file_no = ?", [file_no]).fetchone()[0]
        if added and not self._has_rows("file_contributions", "WHERE file_no = ?", [file_no]):
            file = con.execute("SELECT file FROM ingest_log WHERE file_no = ?", [file_no]).fetchone()[0]
            raise StoreError(f"{file} was ingested with [ingest] keep_file_contributions = false: what it "
                             "added was not recorded, so it cannot be taken back out")
        con.execute("""CREATE OR REPLACE TEMP TABLE taken AS
            SELECT key_hash, sum(events) AS events FROM file_contributions WHERE file_no = ? GROUP BY ALL""",
                    [file_no])
        con.execute(f"""CREATE OR REPLACE TEMP TABLE remaining AS
            SELECT u.account, u.day, u.event, u.user_hash, u.events - t.events AS events
            FROM (SELECT *, {_USER_DAY_KEY} AS key_hash FROM user_daily) u JOIN taken t USING (key_hash)""")
        con.execute("""DELETE FROM user_daily USING remaining r WHERE user_daily.account = r.account
            AND user_daily.day = r.day AND user_daily.event = r.event AND user_daily.user_hash = r.user_hash""")
        con.execute("INSERT INTO user_daily SELECT * FROM remaining WHERE events > 0")
        con.execute("CREATE OR REPLACE TEMP TABLE taken_keys AS SELECT DISTINCT account, day, event FROM remaining")
        con.execute("""DELETE FROM daily USING taken_keys t
            WHERE daily.account = t.account AND daily.day = t.day AND daily.event = t.event""")
        con.execute("""INSERT INTO daily SELECT u.account, u.day, u.event, sum(u.events), count(*)
            FROM user_daily u SEMI JOIN taken_keys t ON u.account = t.account AND u.day = t.day AND u.event = t.event
            GROUP BY ALL""")
        for table in ("seen_ids", "unattributed_events", "file_contributions", "ingest_log"):
            con.execute(f"DELETE FROM {table} WHERE file_no = ?", [file_no])
        for table in ("taken", "remaining", "taken_keys"):
            con.execute(f"DROP TABLE {table}")

    def drop_prepared(self):
        self.con.execute("DROP VIEW IF EXISTS unattributed_kept")
        self.con.execute("DROP VIEW IF EXISTS prepared")
        for table in ("staged", "staged_n", "attributed", "known_checked", "repeat_losers"):
            self.con.execute(f"DROP TABLE IF EXISTS {table}")
