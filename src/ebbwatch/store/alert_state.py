"""The alert log (one row per recorded scan day and open alert) and snoozes."""

from __future__ import annotations

import pandas as pd

from .sql import _register


class AlertState:
    """The day-to-day alert lifecycle and snoozes."""

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


ALERT_LOG_COLUMNS = ["as_of", "account", "direction", "kind", "state", "severity", "peak_severity", "opened",
                     "quiet_days", "message"]
