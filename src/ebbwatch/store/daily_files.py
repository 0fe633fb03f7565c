"""Pre-aggregated daily files (CSV or Parquet of account, day, event, count[, users]): checked
and loaded by DuckDB as streams, never through Python rows."""

from __future__ import annotations

from pathlib import Path

import duckdb

from .sql import _daily_count_column, quote_literal


class DailyFiles:
    """Checking and loading daily-aggregate files into ``daily``."""

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
