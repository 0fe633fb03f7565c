"""The activity store: one DuckDB file.  The only module that speaks SQL.

Tables (schema version ``SCHEMA_VERSION``; ``MIGRATIONS`` brings older stores forward):

- ``daily``: account × local day × event → events, distinct users.
- ``user_daily``: account × local day × event × user (its 64-bit hash) → events (drivers, active
  users, and exact distinct-user counts when late events arrive for a day already stored);
  ``users``: each user's name under its hash.
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

import pyarrow as pa

from .alert_state import ALERT_LOG_COLUMNS, AlertState
from .attribution import Attribution
from .connection import LOCK_WAIT_SECONDS, MEMORY_LIMIT, StoreConnection, connect, resolve_path
from .daily_files import DailyFiles
from .merging import Merging, aggregate_events
from .outcome_rates import OutcomeRates
from .reads import ActivityReads
from .reference import ReferenceTables
from .schema import MIGRATIONS, SCHEMA_VERSION
from .sql import FAST_TS_PATTERN, _register, quote_ident, quote_literal
from .staging import Staging


class Store(ReferenceTables, Staging, Attribution, Merging, DailyFiles, ActivityReads, AlertState, OutcomeRates,
            StoreConnection):
    """An open activity store.  Use :func:`open_store` (or ``with open_store(...) as store``).

    Each concern's SQL lives in its own module (one mixin each); this class only puts them on
    one connection so callers hold one object."""


def open_store(path: str | None = None, *, read_only: bool = False, wait_seconds: float | None = None,
               must_exist: bool = False) -> Store:
    """Open (creating and migrating if needed) the store at ``path``.

    DuckDB lets one process write a file and no other process open it meanwhile, so a scan or a
    second ingest started during an ingest waits for it, up to ``wait_seconds`` (default
    ``LOCK_WAIT_SECONDS``), then fails with a message saying so.
    """
    con, path = connect(path, read_only=read_only, wait_seconds=wait_seconds, must_exist=must_exist)
    return Store(con, path)


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


__all__ = ["ALERT_LOG_COLUMNS", "FAST_TS_PATTERN", "LOCK_WAIT_SECONDS", "MEMORY_LIMIT", "MIGRATIONS", "SCHEMA_VERSION",
           "Store", "aggregate_events", "open_store", "quote_ident", "quote_literal", "resolve_path", "scratch_store"]
