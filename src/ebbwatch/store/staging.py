"""Staging a file's events: the fast path's SQL over DuckDB's readers (JSON lines, Parquet), the
recheck of doubted rows, and the precise path's parsed records."""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa

from .sql import _arrow, _epoch_us, _id_hash, _register, _text_time, quote_ident, quote_literal


class Staging:
    """Events of one file staged in a temporary table, before attribution."""

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

        # A JSON time's text and its number are computed once per row, in a subquery, rather than
        # in each branch that needs them (2M epoch-ms lines: staging 0.84 -> 0.78 s).  Their
        # names are longer than any field's, so they cannot take one's place.
        padding = "_" * max(len(n) for n in names)
        ts_as_text, ts_as_number = quote_ident(f"ts_text{padding}"), quote_ident(f"ts_number{padding}")

        ts_is_string = f"prefix({ts_as_text}, '\"')"
        # A JSON value that is not a string, object, array, boolean or null prints as a number
        # DuckDB casts (or NaN / ±Infinity, which are not finite): a cast instead of a pattern
        # (2M epoch-ms lines: staging 0.92 -> 0.86 s).
        ts_is_number = f"isfinite({ts_as_number})"

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
                # A text of at most 19 bytes that starts with a digit and holds no '.', 'e' or 'E'
                # can match the pattern only as an integer, which ids take either way: no regex
                # runs on decimal ids such as "0000000000000001" (2M of them: 0.18 s of staging).
                plain_digits = (f"{col} >= '0' AND {col} < ':' AND strlen({col}) <= 19 AND NOT contains({col}, '.') "
                                f"AND NOT contains({col}, 'e') AND NOT contains({col}, 'E')")
                flagged = f"(CASE WHEN {plain_digits} THEN false ELSE {flagged} END)"
            first_byte_may_start_non_string = " OR ".join(
                [f"{col} < ':'"] + [f"({col} >= '{c}' AND {col} < '{chr(ord(c) + 1)}')" for c in "[{tfnNiI"])
            # Past 25 bytes the only non-string texts are objects, arrays (a bracket first) and
            # integers (digits after an optional minus): DuckDB prints a double in at most 24
            # bytes.  So a long text with a '-' after its first byte, and no bracket first, is a
            # string, and no regex runs on it: UUIDs, two in three of which start with a digit
            # or 'f' (the ingest benchmark's 2M ids: 0.11 s of regex).
            long_dashed_text = (f"(strlen({col}) > 25 AND strpos({col}, '-') > 1 "
                                f"AND NOT prefix({col}, '[') AND NOT prefix({col}, '{{'))")
            return (f"(CASE WHEN {first_byte_may_start_non_string} THEN "
                    f"(CASE WHEN {long_dashed_text} THEN false ELSE {flagged} END) ELSE false END)")

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
            ts_ok = ts_is_number
        else:
            ts_ok = f"(CASE WHEN {ts_is_string} THEN {text_ok} ELSE {ts_is_number} END)"
        numeric_us = _epoch_us(ts_as_number, ts_format)
        ok = (f"{ts} IS NOT NULL AND {ts_ok} AND {event_ok} "
              f"AND {us} IS NOT NULL AND {value(us)} <> '' AND {id_ok(us)} "
              f"AND ({ac} IS NULL OR {id_ok(ac)}) AND ({idc} IS NULL OR {id_ok(idc)})")
        if ts_text:
            time_us = f"CASE WHEN COALESCE({ok}, false) THEN {text_us} END"
        else:
            time_us = (f"CASE WHEN NOT COALESCE({ok}, false) THEN NULL "
                       f"WHEN {ts_is_string} THEN {text_us} "
                       f"ELSE {numeric_us} END")
        # records=true: a line that is not an object is a doubtful row, not a reason to read the
        # whole file another way; ignore_errors: a line that is not JSON is one all-NULL row
        # (still one row per non-blank line, so ordinals stay line ordinals).
        source = f"read_json(?, format='newline_delimited', records=true, ignore_errors=true, columns={{{spec}}})"
        if not ts_text:
            source = (f"(SELECT *, {text(ts)} AS {ts_as_text}, TRY_CAST({text(ts)} AS DOUBLE) AS {ts_as_number} "
                      f"FROM {source})")
        try:
            self.con.execute(
                f"""CREATE OR REPLACE TEMP TABLE staged AS
                SELECT {time_us} AS ts_us,
                       {value(ev)} AS event, {value(us)} AS "user", nullif({value(ac)}, '') AS account,
                       {_id_hash(value(idc))} AS id_hash
                FROM {source}""",
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
        """Set aside the doubtful rows at ``ordinals`` of ``staged`` (their time is cleared: a row
        without a time is no event) and add ``recovered``: the precise path's events from those
        lines (columns ts_us, event, user, account, id and ``ordinal``), keeping the file's line
        order wherever it matters (an id delivered twice in the file: the first delivery wins)."""
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
                # The doubted rows stay, without a time, which ``prepare_staged`` leaves out:
                # deleting them from the table made every later scan of it slower (the ingest
                # benchmark's hex ids, 1,491 rows of 2M: 0.10 s more over three statements).
                con.execute("""UPDATE staged SET ts_us = NULL
                    WHERE ts_us IS NOT NULL AND rowid IN (SELECT ordinal FROM doubtful_ordinals)""")
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
