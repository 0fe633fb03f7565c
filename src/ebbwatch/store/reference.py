"""Reference tables (accounts, identities) and the ingest log."""

from __future__ import annotations

import pandas as pd
import pyarrow as pa

from .sql import _arrow, registered


class ReferenceTables:
    """Accounts, identities and the log of ingested files."""

    def _replace_rows(self, table: str, key: str, columns: str, frame: pd.DataFrame) -> int:
        """Replace every row of ``table`` whose ``key`` appears in ``frame`` by ``frame``'s rows."""
        with registered(self.con, "incoming_rows", frame):
            self.con.execute(f"DELETE FROM {table} WHERE {key} IN (SELECT {key} FROM incoming_rows)")
            self.con.execute(f"INSERT INTO {table} SELECT {columns} FROM incoming_rows")
        return len(frame)

    def upsert_accounts(self, frame: pd.DataFrame) -> int:
        """Insert or replace accounts (columns of ``frames.ACCOUNT_COLUMNS``)."""
        return self._replace_rows("accounts", "account", "account, name, seats, segment, timezone, mrr", frame)

    def zone_changes_on_stored_days(self, frame: pd.DataFrame) -> list[tuple]:
        """Accounts in ``frame`` whose time zone differs from the one their stored days were
        assigned in (none = UTC): ``[(account, stored_zone, new_zone, days), ...]``.  Days are
        assigned at ingest, so such a change would leave those days in the old zone."""
        with registered(self.con, "incoming_accounts", frame):
            return self.con.execute(
                """SELECT i.account, COALESCE(a.timezone, 'UTC'), COALESCE(i.timezone, 'UTC'), d.days
                FROM incoming_accounts i LEFT JOIN accounts a USING (account)
                JOIN (SELECT account, count(DISTINCT day) AS days FROM daily GROUP BY account) d USING (account)
                WHERE COALESCE(a.timezone, 'UTC') <> COALESCE(i.timezone, 'UTC')
                ORDER BY d.days DESC, i.account""").fetchall()

    def replace_identities(self, frame: pd.DataFrame) -> int:
        """Replace the identity intervals of every user in ``frame``."""
        return self._replace_rows("identities", '"user"', '"user", account, valid_from, valid_to', frame)

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
