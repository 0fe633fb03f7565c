"""The activity store: one DuckDB file.  The only module that speaks SQL.

Tables (schema version ``SCHEMA_VERSION``; ``MIGRATIONS`` brings older stores forward):

- ``daily``: account × local day × event → events, distinct users.
- ``user_daily``: account × local day × event × user → events (drivers, active users, and exact
  distinct-user counts when late events arrive for a day already stored).
- ``accounts``, ``identities`` (user → account over ``[valid_from, valid_to)``).
- ``unattributed_events``: valid events no account was found for (time, event, user, id hash),
  attributed when identities are loaded later.
- ``file_contributions``: what each ingested file (``ingest_log.file_no``) added to ``user_daily``,
  so it can be taken back out (:meth:`Store.take_back`).
- ``seen_ids``: event ids (every id, or those within a configured dedupe window) with their
  event times; ``ingest_log``: one row per file ingested.
- ``alert_log``: one row per recorded scan day and open alert (the lifecycle); ``snoozes``.

Every file is ingested inside one transaction: if the process dies part-way, DuckDB's write-ahead
log rolls the file back on the next open, and the store is as it was before that file.
"""

from __future__ import annotations

import os
import time
from contextlib import contextmanager
from datetime import timezone
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

from .errors import StoreError

SCHEMA_VERSION = 5
DEFAULT_PATH = "ebbwatch.duckdb"

# Schema as a list of migrations: MIGRATIONS[v] takes a store at version v to v + 1.
MIGRATIONS: dict[int, list[str]] = {
    0: [
        "CREATE TABLE meta (key VARCHAR PRIMARY KEY, value VARCHAR)",
        """CREATE TABLE accounts (account VARCHAR PRIMARY KEY, name VARCHAR, seats DOUBLE,
               segment VARCHAR, timezone VARCHAR, mrr DOUBLE)""",
        """CREATE TABLE identities ("user" VARCHAR NOT NULL, account VARCHAR NOT NULL,
               valid_from TIMESTAMPTZ, valid_to TIMESTAMPTZ)""",
        """CREATE TABLE daily (account VARCHAR NOT NULL, day DATE NOT NULL, event VARCHAR NOT NULL,
               events BIGINT NOT NULL, users BIGINT)""",
        """CREATE TABLE user_daily (account VARCHAR NOT NULL, day DATE NOT NULL,
               event VARCHAR NOT NULL, "user" VARCHAR NOT NULL, events BIGINT NOT NULL)""",
        # Event ids within the dedupe window, by 64-bit hash: for 60 million ids in a window the
        # expected number of colliding pairs is about 1e-4 (n^2 / 2^65).
        "CREATE TABLE seen_ids (id_hash UBIGINT NOT NULL, ts TIMESTAMPTZ NOT NULL)",
        """CREATE TABLE ingest_log (file VARCHAR, sha256 VARCHAR, ingested_at TIMESTAMPTZ,
               lines BIGINT, ingested BIGINT, duplicates BIGINT, rejected BIGINT,
               unattributed BIGINT, path_taken VARCHAR, first_day DATE, last_day DATE)""",
        """CREATE TABLE alert_state (account VARCHAR, kind VARCHAR, direction VARCHAR,
               state VARCHAR, opened DATE, last_seen DATE, severity DOUBLE, snoozed_until DATE,
               reason VARCHAR)""",
    ],
    # v2: the alert lifecycle as a log of recorded scan days, and snoozes.
    1: [
        "DROP TABLE alert_state",
        """CREATE TABLE alert_log (as_of DATE NOT NULL, account VARCHAR NOT NULL,
               direction VARCHAR NOT NULL, kind VARCHAR, state VARCHAR NOT NULL, severity DOUBLE,
               peak_severity DOUBLE, opened DATE, quiet_days INTEGER, message VARCHAR,
               recorded_at TIMESTAMPTZ)""",
        """CREATE TABLE snoozes (account VARCHAR NOT NULL, until DATE NOT NULL, reason VARCHAR,
               created_at TIMESTAMPTZ)""",
    ],
    # v3: files are logged by a content hash that names its algorithm ("xxh3-128:<hex>"); the
    # SHA-256 digests logged before keep theirs ("sha256:<hex>") and are still matched.
    2: [
        "ALTER TABLE ingest_log ADD COLUMN content_hash VARCHAR",
        "UPDATE ingest_log SET content_hash = 'sha256:' || sha256",
        "ALTER TABLE ingest_log DROP COLUMN sha256",
    ],
    # v4: every event id is remembered by default (ids the old 30-day window forgot stay
    # forgotten); events held back because their id is older than a configured window.
    3: [
        "ALTER TABLE ingest_log ADD COLUMN held_back BIGINT DEFAULT 0",
    ],
    # v5: events no account could be found for are kept (what attribution needs), so identities
    # loaded later attribute them.
    # Each ingested file has a number; what it added (per-user daily counts, ids, kept events)
    # carries it, so a file ingested with the wrong settings can be taken back out.
    4: [
        """CREATE TABLE unattributed_events (ts_us BIGINT NOT NULL, event VARCHAR NOT NULL,
               "user" VARCHAR NOT NULL, id_hash UBIGINT, file_no BIGINT)""",
        "CREATE SEQUENCE ingest_file_no START 1",
        "ALTER TABLE ingest_log ADD COLUMN file_no BIGINT",
        "ALTER TABLE seen_ids ADD COLUMN file_no BIGINT",
        # By the 64-bit hash of (account, day, event, user), as ids are kept: a third of the cost
        # of writing the four columns (0.09 s against 0.28 s for 1.38M rows).
        "CREATE TABLE file_contributions (file_no BIGINT NOT NULL, key_hash UBIGINT NOT NULL, events BIGINT NOT NULL)",
    ],
}

# The fast path's RFC 3339 check: the same pattern as ingest.timestamps.RFC3339_PATTERN but
# without leap seconds (second 60), which only the precise path handles.
FAST_TS_PATTERN = (
    r"\d{4}-\d{2}-\d{2}[Tt ]([01]\d|2[0-3]):[0-5]\d:[0-5]\d(\.\d{1,9})?([Zz]|[+-]([01]\d|2[0-3]):[0-5]\d)"
)

# The same date-time without an offset (a local time, when ``naive_timezone`` is set).
FAST_LOCAL_PATTERN = FAST_TS_PATTERN.removesuffix(r"([Zz]|[+-]([01]\d|2[0-3]):[0-5]\d)")


def _epoch_us(number: str, ts_format: str) -> str:
    """SQL for epoch microseconds from a DOUBLE expression: seconds or milliseconds as
    ``ts_format`` says, or under auto by magnitude (as ``ingest.timestamps.parse_epoch``)."""
    if ts_format == "epoch_s":
        return f"CAST(round({number} * 1e6) AS BIGINT)"
    if ts_format == "epoch_ms":
        return f"CAST(round({number} * 1e3) AS BIGINT)"
    return (f"CASE WHEN abs({number}) < 1e11 THEN CAST(round({number} * 1e6) AS BIGINT) "
            f"WHEN abs({number}) < 1e14 THEN CAST(round({number} * 1e3) AS BIGINT) END")


def _text_time(expr: str, naive_timezone: str | None) -> tuple[str, str]:
    """SQL for whether a text time takes the fast path, and its epoch microseconds.

    A local time (no offset, read in ``naive_timezone``) is converted here only when the zone's
    offset is the same a day before and a day after: on a day the clocks change, a local time
    may occur twice, and DuckDB reads it as the second while the precise path reads the first,
    so such rows are left NULL (doubted) and the precise path decides them."""
    with_offset = f"regexp_full_match({expr}, {quote_literal(FAST_TS_PATTERN)})"
    offset_us = f"epoch_us(TRY_CAST({expr} AS TIMESTAMPTZ))"
    if not naive_timezone:
        return with_offset, offset_us
    zone = quote_literal(naive_timezone)
    local = f"TRY_CAST({expr} AS TIMESTAMP)"

    def offset(x):
        return f"(epoch_us(timezone({zone}, {x})) - epoch_us({x}))"

    local_us = (f"CASE WHEN {offset(local + ' - INTERVAL 1 DAY')} = {offset(local + ' + INTERVAL 1 DAY')} "
                f"THEN epoch_us(timezone({zone}, {local})) END")
    ok = f"({with_offset} OR regexp_full_match({expr}, {quote_literal(FAST_LOCAL_PATTERN)}))"
    return ok, f"CASE WHEN {with_offset} THEN {offset_us} ELSE {local_us} END"



def _id_hash(column: str) -> str:
    """SQL for an event id's 64-bit hash (NULL without an id), the same on both staging paths."""
    return f"CASE WHEN {column} <> '' THEN hash({column}) END"


# A per-user daily row's key as one 64-bit hash (``file_contributions``).
_USER_DAY_KEY = 'hash(account, day, event, "user")'


def _daily_count_column(columns: list[str]) -> str:
    """The daily-aggregate file's count column: ``count``, or ``events`` as the export writes it."""
    return '"count"' if "count" in columns else "events"


def _arrow(con, query: str, params=None) -> pa.Table:
    """A query's rows as one Arrow table (``params`` bound to its ``?``).

    DuckDB 2 refuses a relation query while an earlier ``execute`` result is not drained (a
    ``fetchone`` leaves it open), and ``arrow()`` became a batch reader in 1.4; draining with a
    trivial query first and picking the table method that exists works across versions.
    """
    con.execute("SELECT 1").fetchall()
    relation = con.sql(query) if params is None else con.sql(query, params=params)
    to_table = getattr(relation, "to_arrow_table", None)
    return to_table() if to_table is not None else relation.arrow()


def _register(con, name: str, data) -> None:
    """``con.register`` after draining any pending result, which DuckDB 2 would refuse it over
    (a ``fetchone`` leaves one open; see :func:`_arrow`)."""
    con.execute("SELECT 1").fetchall()
    con.register(name, data)


def quote_ident(name: str) -> str:
    """A SQL identifier, double-quoted with embedded quotes doubled."""
    return '"' + name.replace('"', '""') + '"'


def quote_literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


class Store:
    """An open activity store.  Use :func:`open_store` (or ``with open_store(...) as store``)."""

    def __init__(self, con: duckdb.DuckDBPyConnection, path: str):
        self.con = con
        self.path = path

    # -- lifecycle -------------------------------------------------------------------------
    def close(self):
        self.con.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def cursor(self) -> "Store":
        """Another handle on the same open database, for one other thread: a DuckDB connection
        must not be used by two threads at once, its cursors may (each is a connection of its own
        to the same database).  Close it before the store."""
        con = self.con.cursor()
        con.execute("SET TimeZone = 'UTC'")
        return Store(con, self.path)

    @contextmanager
    def transaction(self):
        self.con.execute("BEGIN TRANSACTION")
        try:
            yield
        except BaseException:
            self.con.execute("ROLLBACK")
            raise
        else:
            self.con.execute("COMMIT")

    def _has_rows(self, table: str, where: str = "", params=()) -> bool:
        """Whether ``table`` holds a row (matching ``where``), reading at most one."""
        return bool(self.con.execute(
            f"SELECT count(*) FROM (SELECT 1 FROM {table} {where} LIMIT 1)", list(params)).fetchone()[0])

    def schema_version(self) -> int:
        return int(self.con.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchall()[0][0])

    # -- reference tables ------------------------------------------------------------------
    def upsert_accounts(self, frame: pd.DataFrame) -> int:
        """Insert or replace accounts (columns of ``frames.ACCOUNT_COLUMNS``)."""
        _register(self.con, "incoming_accounts", frame)
        try:
            self.con.execute("DELETE FROM accounts WHERE account IN (SELECT account FROM incoming_accounts)")
            self.con.execute(
                "INSERT INTO accounts SELECT account, name, seats, segment, timezone, mrr FROM incoming_accounts"
            )
        finally:
            self.con.unregister("incoming_accounts")
        return len(frame)

    def zone_changes_on_stored_days(self, frame: pd.DataFrame) -> list[tuple]:
        """Accounts in ``frame`` whose time zone differs from the one their stored days were
        assigned in (none = UTC): ``[(account, stored_zone, new_zone, days), ...]``.  Days are
        assigned at ingest, so such a change would leave those days in the old zone."""
        _register(self.con, "incoming_accounts", frame)
        try:
            return self.con.execute(
                """SELECT i.account, COALESCE(a.timezone, 'UTC'), COALESCE(i.timezone, 'UTC'), d.days
                FROM incoming_accounts i LEFT JOIN accounts a USING (account)
                JOIN (SELECT account, count(DISTINCT day) AS days FROM daily GROUP BY account) d USING (account)
                WHERE COALESCE(a.timezone, 'UTC') <> COALESCE(i.timezone, 'UTC')
                ORDER BY d.days DESC, i.account""").fetchall()
        finally:
            self.con.unregister("incoming_accounts")

    def replace_identities(self, frame: pd.DataFrame) -> int:
        """Replace the identity intervals of every user in ``frame``."""
        _register(self.con, "incoming_identities", frame)
        try:
            self.con.execute('DELETE FROM identities WHERE "user" IN (SELECT "user" FROM incoming_identities)')
            self.con.execute(
                'INSERT INTO identities SELECT "user", account, valid_from, valid_to FROM incoming_identities'
            )
        finally:
            self.con.unregister("incoming_identities")
        return len(frame)

    def accounts(self) -> pd.DataFrame:
        return self.con.execute("SELECT * FROM accounts ORDER BY account").df()

    def reference_tables(self) -> tuple[pa.Table, pa.Table]:
        """The accounts and identities tables as Arrow, for :func:`scratch_store` elsewhere."""
        return (_arrow(self.con, "SELECT * FROM accounts"),
                _arrow(self.con, "SELECT * FROM identities"))

    def ingested_digests(self) -> dict[str, str]:
        """Content hash (``"<algorithm>:<hex>"``) → the file first ingested with it."""
        return dict(self.con.execute(
            "SELECT content_hash, min_by(file, ingested_at) FROM ingest_log GROUP BY 1").fetchall())

    # -- ingest log ------------------------------------------------------------------------
    def has_legacy_digests(self) -> bool:
        """Whether files were logged by SHA-256 (before schema 3): new files must then be
        hashed that way too to be recognised as re-deliveries."""
        return self.con.execute(
            "SELECT count(*) FROM (SELECT 1 FROM ingest_log WHERE content_hash LIKE 'sha256:%' LIMIT 1)"
        ).fetchall()[0][0] > 0

    def already_ingested(self, digests: list[str]) -> str | None:
        """The file first ingested with any of ``digests`` (one file's hashes), or None."""
        row = self.con.execute(
            "SELECT file FROM ingest_log WHERE list_contains(?, content_hash) ORDER BY ingested_at LIMIT 1",
            [list(digests)],
        ).fetchone()
        return None if row is None else row[0]

    def next_file_no(self) -> int:
        """A new number for a file about to be merged (what it adds carries it)."""
        return self.con.execute("SELECT nextval('ingest_file_no')").fetchone()[0]

    def log_ingest(self, file: str, digest: str, result, first_day, last_day, file_no: int | None = None):
        self.con.execute(
            """INSERT INTO ingest_log (file, content_hash, ingested_at, lines, ingested, duplicates, rejected,
                                       unattributed, path_taken, first_day, last_day, held_back, file_no)
            VALUES (?, ?, now(), ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
            [
                file,
                digest,
                result.lines,
                result.ingested,
                result.duplicates,
                sum(result.rejected.values()),
                sum(result.unattributed.values()),
                result.path_taken,
                first_day,
                last_day,
                sum(result.held_back.values()),
                file_no,
            ],
        )

    # -- events: fast path -----------------------------------------------------------------
    def stage_jsonl_fast(self, path: str, fields, ts_format: str, ts_text: bool = False,
                         typed: bool = False, naive_timezone: str | None = None) -> int | None:
        """Parse a JSON-lines file with DuckDB's native reader into the temp table ``staged``,
        one row per non-blank line in file order (``rowid`` is the line's ordinal among the
        non-blank lines).

        A row the fast path is not sure of keeps a NULL ``ts_us``: a line that is not a JSON
        object, a wrong or doubtful type, an unusual timestamp.  The caller finds them with
        :meth:`doubtful_staged_rows` and has the precise parser decide those lines alone.

        Two ways to read the text fields (event, user, account, id).  By default as VARCHAR,
        which DuckDB unescapes itself and which costs about half as much as reading them as JSON
        (2M lines: 0.47 s against 0.90 s).  VARCHAR hides whether a value was a string, so a
        text that a number, boolean, object or array could also print as is doubted
        (``may_be_non_string``): rare in real ids (a hex id such as "00000000000e1234").
        With ``typed`` the fields are read as JSON and DuckDB's ``json_type`` decides, so no
        string content is doubted: the caller reads a file that way when many rows were doubted
        for their types.  Times in RFC 3339 (``ts_format`` rfc3339, or auto with ``ts_text``:
        the caller saw a string time on the first line, and not ``typed``) are read as text
        too; a time that is not such a string is doubted.  Returns the number of rows staged,
        or ``None`` when DuckDB cannot read the file (the caller then parses it line by line).
        Lines over the size limit are caught by the caller (DuckDB's reader does not enforce it).
        """
        names = [fields.ts, fields.event, fields.user, fields.account, fields.id]
        if len(set(names)) < len(names):
            return None  # one key for two fields: leave the file to the precise path
        # Text times skip a JSON value and two extractions per line (the ingest benchmark's 2M
        # lines: staging 1.22-1.26 -> 1.06-1.23 s, beside the hashing pass).
        ts_text = ts_format == "rfc3339" or (ts_format == "auto" and ts_text and not typed)
        ts_type = "VARCHAR" if ts_text else "JSON"
        field_type = "JSON" if typed else "VARCHAR"
        spec = ", ".join(f"{quote_literal(n)}: '{ts_type if n == fields.ts else field_type}'" for n in names)
        ts, ev, us, ac, idc = (quote_ident(n) for n in names)

        def text(col):
            return f"CAST({col} AS VARCHAR)"

        def unquote(col):
            return f"({col} ->> '$')"

        def is_string(col):
            return f"prefix({text(col)}, '\"')"

        number_text = "'-?[0-9]+(\\.[0-9]+)?([eE][-+]?[0-9]+)?'"

        def is_number(col):
            return f"regexp_full_match({text(col)}, {number_text})"

        # What the VARCHAR text of a non-string JSON value can look like; one regex per value
        # (cheaper here than a chain of prefix tests).
        non_string_text = quote_literal("(?s)(true|false|[[{].*|-?[0-9]+(\\.[0-9]+)?([eE][-+]?[0-9]+)?|-?(?i:nan|inf|infinity))")

        def may_be_non_string(col, integers_too: bool):
            """Whether ``col``'s text could have been a number, boolean, object, array or one of the
            non-finite literals DuckDB's parser takes and keeps the text of (nan, inf, infinity in
            any case, with a minus).
            Integers are accepted as ids either way, with the same text, so only events flag them.
            Only a text starting with t, f, n, i (either case), [, {, - or a digit can be one, so the regular
            expressions run on those alone (ids and names mostly start with a letter).  The first
            byte is tested by comparing the whole text with one-character strings (bytewise:
            ``col < ':'`` holds exactly when the first byte is below ':', which takes in '-', the
            digits and some punctuation the regex then clears): on the ingest benchmark's four
            text columns 0.02 s against 0.11-0.13 s for ``ascii()``, which decodes a code point."""
            flagged = f"regexp_full_match({col}, {non_string_text})"
            if not integers_too:
                flagged = f"({flagged} AND NOT regexp_full_match({col}, '-?[0-9]{{1,19}}'))"
            first_byte_may_start_non_string = " OR ".join(
                [f"{col} < ':'"] + [f"({col} >= '{c}' AND {col} < '{chr(ord(c) + 1)}')" for c in "[{tfnNiI"])
            return f"(CASE WHEN {first_byte_may_start_non_string} THEN {flagged} ELSE false END)"

        if typed:
            # Ids may be JSON strings or integers (as the precise path takes them); an integer
            # too large for 64 bits reads as DOUBLE here and is left to the precise path.
            def value(col):
                return unquote(col)

            def id_ok(col):
                return f"json_type({col}) IN ('VARCHAR', 'BIGINT', 'UBIGINT')"

            event_ok = f"json_type({ev}) = 'VARCHAR' AND {value(ev)} <> ''"
        else:
            def value(col):
                return col

            def id_ok(col):
                return f"NOT {may_be_non_string(col, integers_too=False)}"

            event_ok = f"{ev} <> '' AND NOT {may_be_non_string(ev, integers_too=True)}"
        text_ok, text_us = _text_time(ts if ts_text else unquote(ts), naive_timezone)
        if ts_text:
            ts_ok = text_ok
        elif ts_format in ("epoch_s", "epoch_ms"):
            ts_ok = is_number(ts)
        else:
            ts_ok = f"(CASE WHEN {is_string(ts)} THEN {text_ok} ELSE {is_number(ts)} END)"
        numeric_us = _epoch_us(f"TRY_CAST({text(ts)} AS DOUBLE)", ts_format)
        ok = (f"{ts} IS NOT NULL AND {ts_ok} AND {event_ok} "
              f"AND {us} IS NOT NULL AND {value(us)} <> '' AND {id_ok(us)} "
              f"AND ({ac} IS NULL OR {id_ok(ac)}) AND ({idc} IS NULL OR {id_ok(idc)})")
        if ts_text:
            time_us = f"CASE WHEN COALESCE({ok}, false) THEN {text_us} END"
        else:
            time_us = (f"CASE WHEN NOT COALESCE({ok}, false) THEN NULL "
                       f"WHEN {is_string(ts)} THEN {text_us} "
                       f"ELSE {numeric_us} END")
        try:
            # records=true: a line that is not an object is a doubtful row, not a reason to
            # read the whole file another way; ignore_errors: a line that is not JSON is one
            # all-NULL row (still one row per non-blank line, so ordinals stay line ordinals).
            self.con.execute(
                f"""CREATE OR REPLACE TEMP TABLE staged AS
                SELECT {time_us} AS ts_us,
                       {value(ev)} AS event, {value(us)} AS "user", nullif({value(ac)}, '') AS account,
                       {_id_hash(value(idc))} AS id_hash
                FROM read_json(?, format='newline_delimited', records=true, ignore_errors=true,
                               columns={{{spec}}})""",
                [path],
            )
        except duckdb.Error:
            self.con.execute("DROP TABLE IF EXISTS staged")
            return None
        return self.con.execute("SELECT count(*) FROM staged").fetchone()[0]

    def stage_parquet_fast(self, path: str, fields, ts_format: str, naive_timezone: str | None = None) -> int | None:
        """Read a Parquet file of events into the temp table ``staged``, one row per file row in
        order (``rowid`` is the row's number), as :meth:`stage_jsonl_fast` does for JSON lines.

        Column types decide, once per file: a TIMESTAMP WITH TIME ZONE time is used as it is, a
        TIMESTAMP without one is read as UTC, a text time must be RFC 3339 (as in JSON lines), a
        number is epoch seconds or milliseconds; text and integer ids are kept as their text.
        Any other type leaves the rows doubted (NULL ``ts_us``) and the precise parser gives
        them their reasons (:meth:`parquet_rows`).  Returns the rows staged, or ``None`` when
        DuckDB cannot read the file.
        """
        try:
            kinds = dict(self.con.execute(
                f"SELECT column_name, column_type FROM (DESCRIBE SELECT * FROM read_parquet({quote_literal(path)}))").fetchall())
        except duckdb.Error:
            return None
        text_types = ("VARCHAR",)
        integer_types = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT")

        def text(name, required):
            kind = kinds.get(name)
            col = quote_ident(name)
            if kind is None:
                return "NULL", "false" if required else "true"
            if kind in text_types:
                return col, (f"{col} <> ''" if required else "true")
            if kind in integer_types and name != fields.event:
                return f"CAST({col} AS VARCHAR)", "true"
            return "NULL", f"{col} IS NULL" if not required else "false"

        event, event_ok = text(fields.event, True)
        user, user_ok = text(fields.user, True)
        account, account_ok = text(fields.account, False)
        ident, id_ok = text(fields.id, False)
        kind, ts = kinds.get(fields.ts), quote_ident(fields.ts)
        if kind == "TIMESTAMP WITH TIME ZONE" and ts_format in ("auto", "rfc3339"):
            time_us = f"epoch_us({ts})"
        elif kind in ("TIMESTAMP", "TIMESTAMP_NS", "TIMESTAMP_MS", "TIMESTAMP_S") and ts_format in ("auto", "rfc3339"):
            time_us = f"epoch_us(CAST({ts} AS TIMESTAMP))"
        elif kind in text_types and ts_format in ("auto", "rfc3339"):
            text_ok, text_us = _text_time(ts, naive_timezone)
            time_us = f"CASE WHEN {text_ok} THEN {text_us} END"
        elif kind in integer_types + ("DOUBLE", "FLOAT") and ts_format != "rfc3339":
            time_us = _epoch_us(f"CAST({ts} AS DOUBLE)", ts_format)
        else:
            time_us = "NULL"
        ok = f"{event} IS NOT NULL AND {event_ok} AND {user} IS NOT NULL AND {user_ok} AND {account_ok} AND {id_ok}"
        try:
            self.con.execute(
                f"""CREATE OR REPLACE TEMP TABLE staged AS
                SELECT CASE WHEN COALESCE({ok}, false) THEN {time_us} END AS ts_us,
                       {event} AS event, {user} AS "user", nullif({account}, '') AS account,
                       {_id_hash(ident)} AS id_hash
                FROM read_parquet(?)""", [path])
        except duckdb.Error:
            self.con.execute("DROP TABLE IF EXISTS staged")
            return None
        return self.con.execute("SELECT count(*) FROM staged").fetchone()[0]

    def parquet_rows(self, path: str, row_numbers: np.ndarray, fields) -> list[dict]:
        """The rows ``row_numbers`` (0-based, ascending) of a Parquet file as Python values,
        only the five event fields (those present)."""
        present = [r[0] for r in self.con.execute(
            f"SELECT column_name FROM (DESCRIBE SELECT * FROM read_parquet({quote_literal(path)}))").fetchall()]
        wanted = [n for n in dict.fromkeys([fields.ts, fields.event, fields.user, fields.account, fields.id]) if n in present]
        _register(self.con, "wanted_rows", pa.table({"n": pa.array(row_numbers, pa.int64())}))
        try:
            table = _arrow(self.con, f"""SELECT {", ".join(quote_ident(n) for n in wanted) or "NULL AS none"}
                FROM read_parquet(?, file_row_number = true)
                WHERE file_row_number IN (SELECT n FROM wanted_rows) ORDER BY file_row_number""", [path])
        finally:
            self.con.unregister("wanted_rows")
        return table.select(wanted).to_pylist() if wanted else [{} for _ in row_numbers]

    def doubtful_staged_rows(self, earliest_us: int, latest_us: int) -> np.ndarray:
        """Ordinals (``rowid``, 0-based among non-blank lines) of the staged rows the fast path
        was not sure of: no time, or a time outside ``[earliest_us, latest_us]`` (the precise
        path gives those their reasons)."""
        return self.con.execute(
            "SELECT rowid FROM staged WHERE ts_us IS NULL OR ts_us < ? OR ts_us > ? ORDER BY rowid",
            [int(earliest_us), int(latest_us)],
        ).fetchnumpy()["rowid"].astype(np.int64)

    def settle_doubtful_staged(self, ordinals: np.ndarray, recovered: pa.Table):
        """Remove the doubtful rows at ``ordinals`` from ``staged`` and add ``recovered``: the
        precise path's events from those lines (columns ts_us, event, user, account, id and
        ``ordinal``), keeping the file's line order wherever it matters (an id delivered twice
        in the file: the first delivery wins)."""
        con = self.con
        _register(con, "doubtful_ordinals", pa.table({"ordinal": pa.array(ordinals, pa.int64())}))
        _register(con, "recovered_records", recovered)
        try:
            con.execute(
                f"""CREATE OR REPLACE TEMP TABLE recovered AS
                SELECT ts_us, event, "user", account, {_id_hash("id")} AS id_hash, ordinal
                FROM recovered_records ORDER BY ordinal"""
            )
            collide = recovered.num_rows and con.execute(
                """SELECT count(*) FROM recovered r JOIN (
                     SELECT id_hash FROM staged WHERE rowid NOT IN (SELECT ordinal FROM doubtful_ordinals)) s
                   USING (id_hash)""").fetchone()[0]
            if collide:
                # Rebuild in line order so "first delivery wins" sees the right first delivery.
                con.execute(
                    """CREATE OR REPLACE TEMP TABLE staged_ordered AS
                    SELECT ts_us, event, "user", account, id_hash FROM (
                      SELECT ts_us, event, "user", account, id_hash, rowid AS ordinal FROM staged
                      WHERE rowid NOT IN (SELECT ordinal FROM doubtful_ordinals)
                      UNION ALL SELECT ts_us, event, "user", account, id_hash, ordinal FROM recovered)
                    ORDER BY ordinal""")
                con.execute("DROP TABLE staged")
                con.execute("ALTER TABLE staged_ordered RENAME TO staged")
            else:
                con.execute("DELETE FROM staged WHERE rowid IN (SELECT ordinal FROM doubtful_ordinals)")
                con.execute('INSERT INTO staged SELECT ts_us, event, "user", account, id_hash FROM recovered')
            con.execute("DROP TABLE recovered")
        finally:
            con.unregister("doubtful_ordinals")
            con.unregister("recovered_records")

    def drop_staged(self):
        self.con.execute("DROP TABLE IF EXISTS staged")

    # -- events: precise path ----------------------------------------------------------------
    def stage_records(self, table: pa.Table) -> int:
        """Stage events parsed by the precise path (columns ts_us, event, user, account, id);
        ids are kept as their 64-bit hash, as the fast path keeps them."""
        _register(self.con, "incoming_records", table)
        try:
            self.con.execute(
                f"""CREATE OR REPLACE TEMP TABLE staged AS
                SELECT ts_us, event, "user", account, {_id_hash("id")} AS id_hash FROM incoming_records"""
            )
        finally:
            self.con.unregister("incoming_records")
        return table.num_rows

    # -- events: merge (both paths) ----------------------------------------------------------
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
        without_account, repeated = con.execute(
            "SELECT count_if(account IS NULL), count(id_hash) - count(DISTINCT id_hash) FROM staged"
        ).fetchone()
        if repeated:
            # Only now is the line order needed ("first delivery wins").
            con.execute("CREATE OR REPLACE TEMP TABLE staged_n AS SELECT *, row_number() OVER () AS line_order FROM staged")
            con.execute("DROP TABLE staged")
            base = "staged_n"
        else:
            base = "staged"
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
            con.execute(f"DROP TABLE {base}")
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
        """Record what file ``file_no`` adds: the rows (account, day, event, user, events) of the
        temp table named ``source``, or of an Arrow table (from a worker)."""
        if file_no is None:
            return
        key = _USER_DAY_KEY
        if isinstance(source, str):
            self.con.execute(f"INSERT INTO file_contributions SELECT ?, {key}, events FROM {source}", [file_no])
            return
        _register(self.con, "incoming_contributions", source)
        try:
            self.con.execute(f"INSERT INTO file_contributions SELECT ?, {key}, events FROM incoming_contributions",
                             [file_no])
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
            SELECT u.account, u.day, u.event, u."user", u.events - t.events AS events
            FROM (SELECT *, {_USER_DAY_KEY} AS key_hash FROM user_daily) u JOIN taken t USING (key_hash)""")
        con.execute("""DELETE FROM user_daily USING remaining r WHERE user_daily.account = r.account
            AND user_daily.day = r.day AND user_daily.event = r.event AND user_daily."user" = r."user\"""")
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
        grouped = f'SELECT account, day, event, "user", count(*) AS events FROM {fresh} GROUP BY ALL'
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
        1970-01-01: ``{account: day}``, accounts without such activity left out."""
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        _register(self.con, "event_weights", weights)
        try:
            rows = _arrow(self.con, """SELECT d.account, CAST(min(d.day) - DATE '1970-01-01' AS INTEGER) AS day
                FROM daily d JOIN event_weights e ON e.event = d.event
                WHERE e.weight > 0 AND d.events > 0 GROUP BY d.account""")
        finally:
            self.con.unregister("event_weights")
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
            self.con.execute(
                """CREATE OR REPLACE TEMP TABLE new_user_daily AS
                SELECT account, day, event, "user", CAST(sum(events) AS BIGINT) AS events
                FROM incoming_user_daily GROUP BY ALL"""
            )
        finally:
            self.con.unregister("incoming_user_daily")
        return self._merge_new_user_daily()

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
                SELECT account, day, event, "user", sum(events) AS events FROM (
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

    # -- daily input -----------------------------------------------------------------------
    def _daily_source(self, path: str) -> str:
        if Path(path).suffix.lower() in (".parquet", ".pq"):
            return f"read_parquet({quote_literal(path)})"
        return (f"read_csv({quote_literal(path)}, header=true, all_varchar=true)")

    def check_daily_file(self, path: str) -> str | None:
        """Problems with a daily-aggregate file (CSV or Parquet), read by DuckDB as a stream:
        ``None`` when it is fine, else a message naming the first bad line (1 = the header)."""
        source = self._daily_source(path)
        try:
            columns = [r[0] for r in self.con.execute(f"DESCRIBE SELECT * FROM {source}").fetchall()]
        except duckdb.Error as exc:
            return f"cannot read {path}: {str(exc).splitlines()[0]}"
        missing = [c for c in ("account", "day", "event", "count") if c not in columns
                   and not (c == "count" and "events" in columns)]
        if missing:
            return (f"{path}: missing column(s) {', '.join(missing)}; expected account,day,event,count[,users] "
                    "(or events for count, as `ebbwatch export daily` writes it)")
        count = _daily_count_column(columns)
        users = "users" if "users" in columns else "NULL"
        try:
            bad = self.con.execute(
                f"""SELECT line, problem, value FROM (
                    SELECT row_number() OVER () + 1 AS line,
                      CASE WHEN account IS NULL OR CAST(account AS VARCHAR) = '' THEN 'account must not be empty'
                           WHEN TRY_CAST(day AS DATE) IS NULL THEN 'day must be a date (YYYY-MM-DD)'
                           WHEN event IS NULL THEN 'event must not be empty'
                           WHEN TRY_CAST({count} AS DOUBLE) IS NULL OR TRY_CAST({count} AS DOUBLE) < 0
                                OR TRY_CAST({count} AS DOUBLE) <> floor(TRY_CAST({count} AS DOUBLE))
                                THEN 'count must be a whole number >= 0'
                           WHEN {users} IS NOT NULL AND CAST({users} AS VARCHAR) <> '' AND TRY_CAST({users} AS BIGINT) IS NULL
                                THEN 'users must be a whole number' END AS problem,
                      CAST(day AS VARCHAR) || ' / ' || CAST({count} AS VARCHAR) AS value
                    FROM {source}) WHERE problem IS NOT NULL ORDER BY line LIMIT 1"""
            ).fetchone()
        except duckdb.Error as exc:
            return f"cannot read {path}: {str(exc).splitlines()[0]}"
        if bad:
            return f"{path} line {bad[0]}: {bad[1]} (day / count: {bad[2]!r})"
        return None

    def load_daily_file(self, path: str) -> int:
        """Insert or replace the rows of a checked daily-aggregate file (see ``check_daily_file``),
        streamed by DuckDB rather than loaded into Python."""
        source = self._daily_source(path)
        columns = [r[0] for r in self.con.execute(f"DESCRIBE SELECT * FROM {source}").fetchall()]
        users = "NULLIF(CAST(users AS VARCHAR), '')" if "users" in columns else "NULL"
        count = _daily_count_column(columns)
        self.con.execute(
            f"""CREATE OR REPLACE TEMP TABLE daily_in AS
            SELECT CAST(account AS VARCHAR) AS account, CAST(day AS DATE) AS day, CAST(event AS VARCHAR) AS event,
                   sum(CAST(CAST({count} AS DOUBLE) AS BIGINT)) AS events, max(CAST({users} AS BIGINT)) AS users
            FROM {source} GROUP BY ALL"""
        )
        empty = not self._has_rows("daily")
        if not empty:
            self.con.execute(
                """DELETE FROM daily USING daily_in t
                WHERE daily.account = t.account AND daily.day = t.day AND daily.event = t.event"""
            )
        self.con.execute("INSERT INTO daily SELECT * FROM daily_in ORDER BY account, day")
        n = self.con.execute("SELECT count(*) FROM daily_in").fetchall()[0][0]
        self.con.execute("DROP TABLE daily_in")
        return n

    # -- reading -----------------------------------------------------------------------------
    def status(self) -> dict:
        """What a person checks first: what the store holds, what ingest lost or held back, when
        it was last fed and last judged.  Times are UTC to the second."""
        con = self.con
        accounts, events, first_day, last_day = con.execute(
            "SELECT count(DISTINCT account), COALESCE(sum(events), 0), min(day), max(day) FROM daily"
        ).fetchone()
        last = con.execute(
            "SELECT file, ingested_at, ingested FROM ingest_log ORDER BY ingested_at DESC LIMIT 1"
        ).fetchone()
        lines, rejected, unattributed, duplicates, held_back = (int(v or 0) for v in con.execute(
            "SELECT sum(lines), sum(rejected), sum(unattributed), sum(duplicates), sum(held_back) FROM ingest_log"
        ).fetchone())
        scanned = con.execute("SELECT max(as_of), max(recorded_at) FROM alert_log").fetchone()

        def stamp(value):
            return None if value is None else value.astimezone(timezone.utc).replace(microsecond=0).isoformat()

        return {
            "store": self.path,
            "schema_version": self.schema_version(),
            "accounts": int(accounts),
            "accounts_loaded": con.execute("SELECT count(*) FROM accounts").fetchone()[0],
            "events": int(events),
            "first_day": first_day,
            "last_day": last_day,
            "files_ingested": con.execute("SELECT count(*) FROM ingest_log").fetchall()[0][0],
            "lines_read": lines,
            "rejected": rejected,
            "unattributed": unattributed,
            "unattributed_waiting": con.execute("SELECT count(*) FROM unattributed_events").fetchone()[0],
            "duplicates": duplicates,
            "ids_remembered": con.execute("SELECT count(*) FROM seen_ids").fetchall()[0][0],
            "held_back": held_back,
            "unknown_accounts": self.unknown_accounts(),
            "last_ingest": None
            if last is None
            else {"file": last[0], "at": stamp(last[1]), "events": int(last[2])},
            "last_scan": None if scanned[0] is None else {"as_of": scanned[0].isoformat(), "at": stamp(scanned[1])},
        }

    def unknown_accounts(self, top: int = 5) -> dict | None:
        """Accounts with events that the accounts table does not know (``None`` while no
        accounts are loaded): ``{"accounts", "events", "top": [{"account", "events"}, ...]}``."""
        if not self._has_rows("accounts"):
            return None
        rows = self.con.execute(
            """SELECT d.account, sum(d.events) AS events FROM daily d ANTI JOIN accounts a USING (account)
            GROUP BY d.account ORDER BY events DESC, d.account""").fetchall()
        return {"accounts": len(rows), "events": int(sum(n for _, n in rows)),
                "top": [{"account": a, "events": int(n)} for a, n in rows[:top]]}

    def fleet_daily_totals(self) -> pd.DataFrame:
        return self.con.execute(
            "SELECT day, sum(events) AS events, count(DISTINCT account) AS accounts FROM daily GROUP BY day ORDER BY day"
        ).df()

    def export_daily(self, path: str, fmt: str) -> int:
        query = "SELECT account, day, event, events, users FROM daily ORDER BY account, day, event"
        options = "FORMAT parquet" if fmt == "parquet" else "FORMAT csv, HEADER true"
        self.con.execute(f"COPY ({query}) TO {quote_literal(path)} ({options})").fetchall()
        return self.con.execute("SELECT count(*) FROM daily").fetchall()[0][0]

    def export_daily_rows(self) -> pd.DataFrame:
        return self.con.execute(
            "SELECT account, day, event, events, users FROM daily ORDER BY account, day, event"
        ).df()

    def event_names(self) -> list[str]:
        return [r[0] for r in self.con.execute("SELECT DISTINCT event FROM daily ORDER BY 1").fetchall()]

    def account_ids(self) -> list[str]:
        return [r[0] for r in self.con.execute("SELECT DISTINCT account FROM daily ORDER BY 1").fetchall()]

    def last_day(self):
        return self.con.execute("SELECT max(day) FROM daily").fetchall()[0][0]

    def export_index_parts(self, directory: str, event_weights: dict[str, float], start_day, end_day,
                           accounts_per_part: int) -> dict:
        """Write the weighted daily rows the scan reads as a Parquet dataset of account blocks.

        ``directory/accounts.parquet`` lists every account (``account``, ``part``) in
        :meth:`account_ids` order, ``accounts_per_part`` to a block; ``directory/rows/part=K/`` holds
        block K's rows (``account``, ``day`` as days since 1970-01-01, ``value``, ``events``,
        ``users``) sorted by account and day.  A block whose accounts had no activity in the
        window has no folder.  Engines and notebooks read a block without the store.
        Returns ``{"accounts": n, "parts": n, "rows": n}``.
        """
        if accounts_per_part < 1:
            raise ValueError(f"accounts_per_part must be >= 1, got {accounts_per_part}")
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        Path(directory).mkdir(parents=True, exist_ok=True)
        blocks = f"""SELECT account, CAST((row_number() OVER (ORDER BY account) - 1) // {int(accounts_per_part)}
                            AS INTEGER) AS part
                     FROM (SELECT DISTINCT account FROM daily)"""
        _register(self.con, "event_weights", weights)
        try:
            self.con.execute(f"CREATE OR REPLACE TEMP TABLE account_blocks AS {blocks}")
            self.con.execute(
                f"COPY (SELECT account, part FROM account_blocks ORDER BY account) "
                f"TO {quote_literal(str(Path(directory) / 'accounts.parquet'))} (FORMAT parquet)"
            ).fetchall()
            rows = self.con.execute(
                # users as weighted_daily gives them: distinct users where user_daily has the
                # account-day, else the largest per-event count (daily input only).
                f"""COPY (WITH totals AS (
                        SELECT b.part, d.account, CAST(d.day - DATE '1970-01-01' AS INTEGER) AS day,
                               sum(d.events * e.weight) AS value, CAST(sum(d.events) AS DOUBLE) AS events,
                               CAST(COALESCE(max(d.users), 0) AS DOUBLE) AS users
                        FROM daily d JOIN event_weights e ON e.event = d.event
                        JOIN account_blocks b ON b.account = d.account
                        WHERE d.day BETWEEN $1 AND $2 AND e.weight > 0 GROUP BY ALL),
                      distinct_users AS (
                        SELECT u.account, CAST(u.day - DATE '1970-01-01' AS INTEGER) AS day,
                               CAST(count(DISTINCT u."user") AS DOUBLE) AS users
                        FROM user_daily u JOIN event_weights e ON e.event = u.event
                        WHERE u.day BETWEEN $1 AND $2 AND e.weight > 0 GROUP BY ALL)
                     SELECT t.part, t.account, t.day, t.value, t.events, COALESCE(du.users, t.users) AS users
                     FROM totals t LEFT JOIN distinct_users du ON du.account = t.account AND du.day = t.day
                     ORDER BY t.account, t.day)
                TO {quote_literal(str(Path(directory) / "rows"))} (FORMAT parquet, PARTITION_BY (part), OVERWRITE_OR_IGNORE,
                                               ROW_GROUP_SIZE 100000)""",
                [start_day, end_day],
            ).fetchall()[0][0]
            n_accounts, n_parts = self.con.execute(
                "SELECT count(*), COALESCE(max(part) + 1, 0) FROM account_blocks").fetchall()[0]
        finally:
            self.con.unregister("event_weights")
            self.con.execute("DROP TABLE IF EXISTS account_blocks")
        return {"accounts": int(n_accounts), "parts": int(n_parts), "rows": int(rows)}

    def index_rows(self, event_weights: dict[str, float], accounts: list[str], start_day, end_day,
                   account_ranges: list[tuple[str, str]] | None = None):
        """Weighted event counts of ``accounts`` in days [start, end], one row per account, day and
        event name: ``(account_index, day, value)`` numpy arrays, ``account_index`` into
        ``accounts``, ``day`` in days since 1970-01-01.  An account-day appears once per weighted
        event name; the caller sums (``series.dense_matrix``).  Summing in numpy rather than a
        ``GROUP BY`` here is about 4x faster: the grouping's hash table over millions of
        account-days costs more than reading the rows (tests/benchmarks/scan.py).
        ``account_ranges``: ``(first, last)`` id ranges that hold all of ``accounts`` (default:
        smallest to largest); the filter lets DuckDB skip row groups of a table in account order.
        """
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        if account_ranges is None:
            account_ranges = [(min(accounts), max(accounts)) if accounts else ("", "")]
        in_ranges = " OR ".join(["d.account BETWEEN ? AND ?"] * len(account_ranges))
        wanted = pd.DataFrame({"account": accounts, "account_index": np.arange(len(accounts), dtype=np.int64)})
        _register(self.con, "event_weights", weights)
        _register(self.con, "wanted_accounts", wanted)
        try:
            # Read as Arrow, then numpy: fetchnumpy takes the GIL back again and again while it
            # converts, and beside a scoring thread waited out the switch interval each time (a
            # 10,000-account chunk: 0.11 s alone, 0.95 s beside a busy Python thread; through
            # Arrow 0.07 and 0.35 s).
            rows = _arrow(
                self.con,
                f"""SELECT w.account_index, CAST(d.day - DATE '1970-01-01' AS INTEGER) AS day,
                          d.events * e.weight AS value
                FROM daily d JOIN wanted_accounts w ON w.account = d.account
                JOIN event_weights e ON e.event = d.event
                WHERE d.day BETWEEN ? AND ? AND e.weight > 0 AND ({in_ranges})""",
                [start_day, end_day, *[bound for pair in account_ranges for bound in pair]],
            )
        finally:
            self.con.unregister("event_weights")
            self.con.unregister("wanted_accounts")
        # np.asarray converts only what is not already of the type (astype would copy ~30 MB
        # arrays on a 10,000-account chunk).
        return tuple(np.asarray(rows.column(name).to_numpy(), dtype=dtype)
                     for name, dtype in (("account_index", np.int64), ("day", np.int64), ("value", np.float64)))

    def weighted_daily(self, event_weights: dict[str, float], accounts: list[str], start_day, end_day):
        """Weighted event totals per account and day, for ``accounts`` and days in [start, end].

        Returns numpy arrays ``(account_index, day, value, events, users)`` where ``account_index``
        indexes into ``accounts``, ``day`` is days since 1970-01-01, ``value`` the weighted sum,
        ``events`` the unweighted count of weighted (non-excluded) events and ``users`` the
        account-day's distinct users (the largest per-event count where only daily input exists).
        """
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        # The account range lets DuckDB skip row groups when a chunk is a sorted slice of accounts.
        lo, hi = (min(accounts), max(accounts)) if accounts else ("", "")
        wanted = pd.DataFrame({"account": accounts, "account_index": np.arange(len(accounts), dtype=np.int64)})
        _register(self.con, "event_weights", weights)
        _register(self.con, "wanted_accounts", wanted)
        try:
            table = self.con.sql(
                """SELECT w.account_index, CAST(d.day - DATE '1970-01-01' AS INTEGER) AS day,
                          sum(d.events * e.weight) AS value, CAST(sum(d.events) AS DOUBLE) AS events,
                          CAST(COALESCE(max(d.users), 0) AS DOUBLE) AS users
                FROM daily d JOIN wanted_accounts w ON w.account = d.account
                JOIN event_weights e ON e.event = d.event
                WHERE d.day BETWEEN ? AND ? AND e.weight > 0 AND d.account BETWEEN ? AND ?
                GROUP BY ALL""",
                params=[start_day, end_day, lo, hi],
            ).fetchnumpy()
            distinct_users = self.con.sql(
                """SELECT w.account_index, CAST(u.day - DATE '1970-01-01' AS INTEGER) AS day,
                          count(DISTINCT u."user") AS users
                FROM user_daily u JOIN wanted_accounts w ON w.account = u.account
                JOIN event_weights e ON e.event = u.event
                WHERE u.day BETWEEN ? AND ? AND e.weight > 0 AND u.account BETWEEN ? AND ? GROUP BY ALL""",
                params=[start_day, end_day, lo, hi],
            ).fetchnumpy()
        finally:
            self.con.unregister("event_weights")
            self.con.unregister("wanted_accounts")
        cols = {name: np.asarray(values) for name, values in table.items()}
        users = cols["users"].astype(np.float64)
        if len(distinct_users["users"]):
            key = cols["account_index"].astype(np.int64) * 1_000_000 + cols["day"]
            ukey = np.asarray(distinct_users["account_index"]).astype(np.int64) * 1_000_000 + np.asarray(distinct_users["day"])
            order = np.argsort(key)
            pos = np.searchsorted(key[order], ukey)
            ok = pos < len(key)
            pos = pos[ok]
            match = key[order][pos] == ukey[ok]
            users[order[pos[match]]] = np.asarray(distinct_users["users"])[ok][match]
        return (
            cols["account_index"].astype(np.int64),
            cols["day"].astype(np.int64),
            cols["value"].astype(np.float64),
            cols["events"].astype(np.float64),
            users,
        )


    # -- alert lifecycle ---------------------------------------------------------------------
    def alert_states_before(self, as_of) -> pd.DataFrame:
        """Each account-direction's latest logged row from a scan day before ``as_of``."""
        rows = self.con.execute(
            """SELECT as_of, account, direction, kind, state, severity, peak_severity, opened, quiet_days, message
            FROM alert_log WHERE as_of < ?
            QUALIFY row_number() OVER (PARTITION BY account, direction ORDER BY as_of DESC) = 1""",
            [as_of],
        ).fetchall()
        return pd.DataFrame(rows, columns=ALERT_LOG_COLUMNS)

    def record_alert_day(self, as_of, rows: pd.DataFrame):
        """Replace the log rows of ``as_of`` (so recording the same day twice changes nothing)."""
        self.con.execute("DELETE FROM alert_log WHERE as_of = ?", [as_of])
        if len(rows):
            _register(self.con, "incoming_alert_rows", rows)
            try:
                self.con.execute(
                    """INSERT INTO alert_log SELECT CAST(as_of AS DATE), account, direction, kind, state,
                           severity, peak_severity, CAST(opened AS DATE), quiet_days, message, now()
                    FROM incoming_alert_rows"""
                )
            finally:
                self.con.unregister("incoming_alert_rows")

    def alert_log(self, states=None, accounts=None, start=None, end=None) -> pd.DataFrame:
        """The recorded rows, newest first; ``states``/``accounts`` (lists) and ``start``/``end``
        (dates, inclusive) narrow them."""
        query = ("SELECT CAST(as_of AS VARCHAR) AS as_of, account, direction, kind, state, severity, "
                 "peak_severity, CAST(opened AS VARCHAR) AS opened, quiet_days, message FROM alert_log")
        where, params = [], []
        if states:
            where.append("state IN (SELECT unnest(?))")
            params.append(list(states))
        if accounts:
            where.append("account IN (SELECT unnest(?))")
            params.append(list(accounts))
        if start is not None:
            where.append("as_of >= ?")
            params.append(start)
        if end is not None:
            where.append("as_of <= ?")
            params.append(end)
        if where:
            query += " WHERE " + " AND ".join(where)
        rows = self.con.execute(query + " ORDER BY as_of DESC, severity DESC NULLS LAST, account", params).fetchall()
        return pd.DataFrame(rows, columns=ALERT_LOG_COLUMNS)

    def history_changes_since_last_record(self) -> list[dict]:
        """Files ingested after the last recorded scan that touched days up to that scan's day:
        the history behind earlier judgements changed."""
        last = self.con.execute("SELECT max(recorded_at), max(as_of) FROM alert_log").fetchone()
        if last[0] is None:
            return []
        rows = self.con.execute(
            """SELECT file, CAST(first_day AS VARCHAR), CAST(least(last_day, ?) AS VARCHAR), ingested
            FROM ingest_log WHERE ingested_at > ? AND first_day <= ? ORDER BY ingested_at""",
            [last[1], last[0], last[1]],
        ).fetchall()
        return [{"file": f, "first_day": a, "last_day": b, "events": int(n)} for f, a, b, n in rows]

    def add_snooze(self, account: str, until, reason: str | None):
        self.con.execute("INSERT INTO snoozes VALUES (?, ?, ?, now())", [account, until, reason])

    def lift_snooze(self, account: str) -> int:
        """Remove the account's snoozes; returns how many rows went."""
        return len(self.con.execute("DELETE FROM snoozes WHERE account = ? RETURNING 1", [account]).fetchall())

    def snoozed_accounts(self, as_of) -> dict:
        """account -> (until, reason, set_at) for snoozes in force on ``as_of``: each account's
        latest snooze command wins (a shorter one after a longer one shortens it)."""
        rows = self.con.execute(
            """SELECT account, until, reason, created_at FROM snoozes
            QUALIFY row_number() OVER (PARTITION BY account ORDER BY created_at DESC, until DESC) = 1""",
        ).fetchall()
        return {a: (u, r, c) for a, u, r, c in rows if u >= as_of}

    # -- drivers ---------------------------------------------------------------------------
    def event_period_sums(self, event_weights: dict[str, float], targets: pd.DataFrame, window_days,
                          excluded_days) -> pd.DataFrame:
        """Weighted event totals per target and event name over two periods, summed here so that
        only the totals leave the store (the scan's drivers: 0.6 s to read ~0.7M rows for ~5,000
        alerts, against one grouped pass).

        ``targets``: ``place, account, first, last`` (baseline days, in days since 1970-01-01);
        ``window_days``: ``(first, last)`` shared by all; ``excluded_days``: day numbers left
        out of both.  Returns rows ``place, event, baseline, observed`` (see
        ``explain.event_period_sums``) for the events with weight above 0.
        """
        columns = ["place", "event", "baseline", "observed"]
        if not len(targets):
            return pd.DataFrame(columns=columns)
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        targets = targets[["place", "account", "first", "last"]].astype({"place": "int64", "first": "int32", "last": "int32"})
        first_day = int(min(targets["first"].min(), window_days[0]))
        last_day = int(max(targets["last"].max(), window_days[1]))
        lo, hi = min(targets["account"]), max(targets["account"])
        _register(self.con, "event_weights", weights)
        _register(self.con, "driver_targets", targets)
        try:
            return self.con.execute(
                """WITH rows AS (
                    SELECT t.place, d.event, CAST(d.day - DATE '1970-01-01' AS INTEGER) AS day_number,
                           d.events * e.weight AS value, t."first", t."last"
                    FROM daily d JOIN driver_targets t ON t.account = d.account
                    JOIN event_weights e ON e.event = d.event
                    WHERE e.weight > 0 AND d.account BETWEEN ? AND ?
                      AND d.day BETWEEN DATE '1970-01-01' + CAST(? AS INTEGER) AND DATE '1970-01-01' + CAST(? AS INTEGER))
                SELECT place, event,
                       COALESCE(sum(value) FILTER (WHERE day_number BETWEEN "first" AND "last"), 0) AS baseline,
                       COALESCE(sum(value) FILTER (WHERE day_number BETWEEN ? AND ?), 0) AS observed
                FROM rows WHERE NOT list_contains(CAST(? AS INTEGER[]), day_number)
                GROUP BY ALL
                HAVING count(*) FILTER (WHERE day_number BETWEEN "first" AND "last" OR day_number BETWEEN ? AND ?) > 0
                ORDER BY place, event""",
                [lo, hi, first_day, last_day, int(window_days[0]), int(window_days[1]),
                 [int(d) for d in excluded_days], int(window_days[0]), int(window_days[1])],
            ).df()[columns]
        finally:
            self.con.unregister("event_weights")
            self.con.unregister("driver_targets")

    def accounts_user_activity(self, accounts: list[str], start_day, end_day) -> pd.DataFrame:
        """Rows ``account, day, user, event, events`` of ``accounts`` in [start_day, end_day]
        (datetime.date); ``day`` in the frame is days since 1970-01-01."""
        wanted = pd.DataFrame({"account": list(dict.fromkeys(accounts))})
        lo, hi = (min(accounts), max(accounts)) if accounts else ("", "")
        _register(self.con, "driver_accounts", wanted)
        try:
            return self.con.execute(
                """SELECT u.account, CAST(u.day - DATE '1970-01-01' AS INTEGER) AS day, u."user", u.event, u.events
                FROM user_daily u SEMI JOIN driver_accounts w ON w.account = u.account
                WHERE u.day BETWEEN ? AND ? AND u.account BETWEEN ? AND ?""", [start_day, end_day, lo, hi]).df()
        finally:
            self.con.unregister("driver_accounts")

    def has_account(self, account: str) -> bool:
        return self._has_rows("daily", "WHERE account = ?", [account])


def _migrate(con, path: str):
    has_meta = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_name = 'meta' AND table_schema = 'main'"
    ).fetchall()[0][0]
    if has_meta:
        version = int(con.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchall()[0][0])
    else:
        other = con.execute(
            "SELECT count(*) FROM information_schema.tables WHERE table_schema = 'main'"
        ).fetchall()[0][0]
        if other:
            raise StoreError(
                f"{path} is a DuckDB database but not an ebbwatch store (it has tables and no "
                "'meta' table); refusing to change it. Point --db at a new or ebbwatch file."
            )
        version = 0
    if version > SCHEMA_VERSION:
        raise StoreError(
            f"{path} has schema version {version}, newer than this ebbwatch understands "
            f"({SCHEMA_VERSION}); upgrade ebbwatch to open it. The store was not changed."
        )
    while version < SCHEMA_VERSION:
        con.execute("BEGIN TRANSACTION")
        for statement in MIGRATIONS[version]:
            con.execute(statement)
        version += 1
        con.execute(
            "INSERT OR REPLACE INTO meta VALUES ('schema_version', ?)", [str(version)]
        )
        con.execute("COMMIT")


def scratch_store(accounts: pa.Table, identities: pa.Table) -> Store:
    """An in-memory store holding only the given accounts and identities: where a worker
    stages, attributes and dates one file exactly as the real store would."""
    st = open_store(":memory:")
    for name, table in (("accounts", accounts), ("identities", identities)):
        _register(st.con, "incoming_reference", table)
        try:
            st.con.execute(f"INSERT INTO {name} SELECT * FROM incoming_reference")
        finally:
            st.con.unregister("incoming_reference")
    return st


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


def resolve_path(path: str | None) -> str:
    """The store path: the argument, else ``$EBBWATCH_DB``, else ``./ebbwatch.duckdb``."""
    return str(path or os.environ.get("EBBWATCH_DB") or DEFAULT_PATH)


ALERT_LOG_COLUMNS = ["as_of", "account", "direction", "kind", "state", "severity", "peak_severity", "opened",
                     "quiet_days", "message"]
LOCK_WAIT_SECONDS = 30.0
MEMORY_LIMIT = "4GB"


def open_store(path: str | None = None, *, read_only: bool = False, wait_seconds: float | None = None,
               must_exist: bool = False) -> Store:
    """Open (creating and migrating if needed) the store at ``path``.

    DuckDB lets one process write a file and no other process open it meanwhile, so a scan or a
    second ingest started during an ingest waits for it, up to ``wait_seconds`` (default
    ``LOCK_WAIT_SECONDS``), then fails with a message saying so.
    """
    wait_seconds = LOCK_WAIT_SECONDS if wait_seconds is None else wait_seconds
    path = resolve_path(path)
    p = Path(path)
    if (read_only or must_exist) and not p.exists():
        raise StoreError(f"no store at {path}; ingest something first (ebbwatch ingest ...)")
    if p.exists() and p.is_file() and p.stat().st_size > 0:
        with open(p, "rb") as handle:
            head = handle.read(16)
        if len(head) < 12 or head[8:12] != b"DUCK":
            raise StoreError(f"{path} is not a DuckDB database; refusing to open or overwrite it")
    deadline = time.monotonic() + wait_seconds
    while True:
        try:
            con = duckdb.connect(path, read_only=read_only)
            break
        except duckdb.IOException as exc:
            if "lock" in str(exc).lower():
                if time.monotonic() < deadline:
                    time.sleep(0.2)
                    continue
                raise StoreError(
                    f"the store {path} is in use by another process (an ingest is probably running); "
                    f"waited {wait_seconds:.0f} s. Try again when it finishes."
                ) from exc
            raise StoreError(f"cannot open the store {path}: {exc}") from exc
        except duckdb.Error as exc:
            raise StoreError(f"cannot open the store {path}: {exc}") from exc
    try:
        # Instants are compared and printed in UTC whatever the machine's zone.
        con.execute("SET TimeZone = 'UTC'")
        # Bounded memory: past this DuckDB spills to a temporary directory beside the store.
        con.execute(f"SET memory_limit = '{MEMORY_LIMIT}'")
        if not read_only:
            _migrate(con, path)
        else:
            try:
                version = int(con.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchall()[0][0])
            except duckdb.Error as exc:
                raise StoreError(f"{path} is not an ebbwatch store") from exc
            if version < SCHEMA_VERSION and os.access(path, os.W_OK):
                # An older store: migrate it once with a writable connection, then read.
                con.close()
                open_store(path, wait_seconds=wait_seconds).close()
                return open_store(path, read_only=True, wait_seconds=wait_seconds)
            if version != SCHEMA_VERSION:
                raise StoreError(
                    f"{path} has schema version {version}; this ebbwatch uses {SCHEMA_VERSION}. "
                    "Open it once for writing (e.g. ebbwatch ingest) to migrate, or upgrade ebbwatch."
                )
    except BaseException:
        con.close()
        raise
    return Store(con, path)
