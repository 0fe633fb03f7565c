"""Reading activity for the scan, the report, export, status and the drivers."""

from __future__ import annotations

from datetime import timezone
from pathlib import Path

import numpy as np
import pandas as pd

from .sql import _arrow, _register, quote_literal


class ActivityReads:
    """Reads of the daily tables."""

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
        # Through Arrow: building 100,000 one-value tuples first cost 0.02 s more.
        return _arrow(self.con, "SELECT DISTINCT account FROM daily ORDER BY 1").column(0).to_pylist()

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
                               CAST(count(DISTINCT u.user_hash) AS DOUBLE) AS users
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

    def index_cells(self, event_weights: dict[str, float], accounts: list[str], start_day, end_day,
                    account_ranges: list[tuple[str, str]] | None = None):
        """Weighted event counts of ``accounts`` in days [start, end], one row per account, day and
        event name: ``(cell, value)`` numpy arrays, ``cell`` the account-day's place in an
        (accounts, days) matrix, ``account_index * n_days + (day - start)``, with ``account_index``
        into ``accounts``.  An account-day appears once per weighted event name; the caller sums
        (``series.cells_matrix``).  Summing in numpy rather than a ``GROUP BY`` here is about 4x
        faster: the grouping's hash table over millions of account-days costs more than reading the
        rows; and the place computed here, in DuckDB's threads, spares numpy three passes over them
        (a 5,000-account chunk of tests/benchmarks/scan.py: 0.053 -> 0.038 s with the summing).
        ``account_ranges``: ``(first, last)`` id ranges that hold all of ``accounts`` (default:
        smallest to largest); the filter lets DuckDB skip row groups of a table in account order.
        """
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        if account_ranges is None:
            account_ranges = [(min(accounts), max(accounts)) if accounts else ("", "")]
        in_ranges = " OR ".join(["d.account BETWEEN ? AND ?"] * len(account_ranges))
        wanted = pd.DataFrame({"account": accounts, "account_index": np.arange(len(accounts), dtype=np.int64)})
        n_days = (end_day - start_day).days + 1
        _register(self.con, "event_weights", weights)
        _register(self.con, "wanted_accounts", wanted)
        try:
            # Read as Arrow, then numpy: fetchnumpy takes the GIL back again and again while it
            # converts, and beside a scoring thread waited out the switch interval each time (a
            # 10,000-account chunk: 0.11 s alone, 0.95 s beside a busy Python thread; through
            # Arrow 0.07 and 0.35 s).
            rows = _arrow(
                self.con,
                f"""SELECT w.account_index * {int(n_days)} + (d.day - CAST(? AS DATE)) AS cell,
                          d.events * e.weight AS value
                FROM daily d JOIN wanted_accounts w ON w.account = d.account
                JOIN event_weights e ON e.event = d.event
                WHERE d.day BETWEEN ? AND ? AND e.weight > 0 AND ({in_ranges})""",
                [start_day, start_day, end_day, *[bound for pair in account_ranges for bound in pair]],
            )
        finally:
            self.con.unregister("event_weights")
            self.con.unregister("wanted_accounts")
        # np.asarray converts only what is not already of the type (astype would copy).
        return tuple(np.asarray(rows.column(name).to_numpy(), dtype=dtype)
                     for name, dtype in (("cell", np.int64), ("value", np.float64)))

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
                          count(DISTINCT u.user_hash) AS users
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


    def event_period_sums(self, event_weights: dict[str, float], targets: pd.DataFrame, excluded_days) -> pd.DataFrame:
        """Weighted event totals per target and event name over its two periods, summed here so
        that only the totals leave the store (the scan's drivers: 0.6 s to read ~0.7M rows for
        ~5,000 alerts, against one grouped pass).

        ``targets``: ``place, account, first, last, window_first, window_last`` (the baseline's
        and the window's first and last days, in days since 1970-01-01); ``excluded_days``: day
        numbers left out of both.  Returns rows ``place, event, baseline, observed`` (see
        ``explain.event_period_sums``) for the events with weight above 0.
        """
        columns = ["place", "event", "baseline", "observed"]
        if not len(targets):
            return pd.DataFrame(columns=columns)
        weights = pd.DataFrame({"event": list(event_weights), "weight": list(event_weights.values())})
        targets = targets[["place", "account", "first", "last", "window_first", "window_last"]].astype(
            {"place": "int64", "first": "int32", "last": "int32", "window_first": "int32", "window_last": "int32"})
        first_day = int(min(targets["first"].min(), targets["window_first"].min()))
        last_day = int(max(targets["last"].max(), targets["window_last"].max()))
        lo, hi = min(targets["account"]), max(targets["account"])
        _register(self.con, "event_weights", weights)
        _register(self.con, "driver_targets", targets)
        try:
            return self.con.execute(
                """WITH rows AS (
                    SELECT t.place, d.event, CAST(d.day - DATE '1970-01-01' AS INTEGER) AS day_number,
                           d.events * e.weight AS value, t."first", t."last", t.window_first, t.window_last
                    FROM daily d JOIN driver_targets t ON t.account = d.account
                    JOIN event_weights e ON e.event = d.event
                    WHERE e.weight > 0 AND d.account BETWEEN ? AND ?
                      AND d.day BETWEEN DATE '1970-01-01' + CAST(? AS INTEGER) AND DATE '1970-01-01' + CAST(? AS INTEGER))
                SELECT place, event,
                       COALESCE(sum(value) FILTER (WHERE day_number BETWEEN "first" AND "last"), 0) AS baseline,
                       COALESCE(sum(value) FILTER (WHERE day_number BETWEEN window_first AND window_last), 0) AS observed
                FROM rows WHERE NOT list_contains(CAST(? AS INTEGER[]), day_number)
                GROUP BY ALL
                HAVING count(*) FILTER (WHERE day_number BETWEEN "first" AND "last"
                                        OR day_number BETWEEN window_first AND window_last) > 0
                ORDER BY place, event""",
                [lo, hi, first_day, last_day, [int(d) for d in excluded_days]],
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
                """SELECT u.account, CAST(u.day - DATE '1970-01-01' AS INTEGER) AS day, n."user", u.event, u.events
                FROM user_daily u SEMI JOIN driver_accounts w ON w.account = u.account
                JOIN users n ON n.user_hash = u.user_hash
                WHERE u.day BETWEEN ? AND ? AND u.account BETWEEN ? AND ?""", [start_day, end_day, lo, hi]).df()
        finally:
            self.con.unregister("driver_accounts")

    def has_account(self, account: str) -> bool:
        return self._has_rows("daily", "WHERE account = ?", [account])

