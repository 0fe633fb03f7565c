"""The store's schema as a list of migrations, and bringing an older store forward."""

from __future__ import annotations

from ..errors import StoreError

SCHEMA_VERSION = 7

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
    # v6: what past alerts led to, saved by a backtest (the counts behind the outcome rates, and
    # the replay they came from).
    5: [
        """CREATE TABLE outcome_counts (segment VARCHAR NOT NULL, kind VARCHAR NOT NULL, band INTEGER NOT NULL,
               outcome VARCHAR NOT NULL, k BIGINT NOT NULL, n BIGINT NOT NULL)""",
        """CREATE TABLE outcome_replay (saved_at TIMESTAMPTZ, replay_from DATE, replay_to DATE, step_days INTEGER,
               horizon_days INTEGER, known_until DATE, settings VARCHAR)""",
    ],
    # v7: per-user daily rows name their user by its 64-bit hash (as ids are kept), the names
    # once each in ``users``: a per-user row is a third cheaper to write (1.38M rows: 0.30 ->
    # 0.19 s) and to group.  A file's contributions are keyed by the same hash of the user.
    6: [
        'CREATE TABLE users (user_hash UBIGINT NOT NULL, "user" VARCHAR NOT NULL)',
        'INSERT INTO users SELECT DISTINCT hash("user"), "user" FROM user_daily',
        """CREATE TABLE user_daily_by_hash (account VARCHAR NOT NULL, day DATE NOT NULL, event VARCHAR NOT NULL,
               user_hash UBIGINT NOT NULL, events BIGINT NOT NULL)""",
        'INSERT INTO user_daily_by_hash SELECT account, day, event, hash("user"), events FROM user_daily',
        """UPDATE file_contributions SET key_hash = rekeyed.new_key FROM (
               SELECT hash(account, day, event, "user") AS old_key, hash(account, day, event, hash("user")) AS new_key
               FROM user_daily) rekeyed
           WHERE file_contributions.key_hash = rekeyed.old_key""",
        "DROP TABLE user_daily",
        "ALTER TABLE user_daily_by_hash RENAME TO user_daily",
    ],
}

# The fast path's RFC 3339 check: the same pattern as ingest.timestamps.RFC3339_PATTERN but


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

