"""Opening a store: locks, memory, migration; the connection, transactions and cursors."""

from __future__ import annotations

import os
import time
from contextlib import contextmanager
from pathlib import Path

import duckdb

from ..errors import StoreError
from .schema import SCHEMA_VERSION, _migrate

DEFAULT_PATH = "ebbwatch.duckdb"
LOCK_WAIT_SECONDS = 30.0
MEMORY_LIMIT = "4GB"


def resolve_path(path: str | None) -> str:
    """The store path: the argument, else ``$EBBWATCH_DB``, else ``./ebbwatch.duckdb``."""
    return str(path or os.environ.get("EBBWATCH_DB") or DEFAULT_PATH)


class StoreConnection:
    """The open DuckDB connection behind a store."""

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

    def cursor(self):
        """Another handle on the same open database, for one other thread: a DuckDB connection
        must not be used by two threads at once, its cursors may (each is a connection of its own
        to the same database).  Close it before the store."""
        con = self.con.cursor()
        con.execute("SET TimeZone = 'UTC'")
        return type(self)(con, self.path)

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


def connect(path: str | None = None, *, read_only: bool = False, wait_seconds: float | None = None,
            must_exist: bool = False) -> tuple[duckdb.DuckDBPyConnection, str]:
    """A DuckDB connection to the store at ``path`` (created and migrated if needed), and the
    resolved path; :func:`ebbwatch.store.open_store` wraps it in a ``Store``."""
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
                connect(path, wait_seconds=wait_seconds)[0].close()
                return connect(path, read_only=True, wait_seconds=wait_seconds)
            if version != SCHEMA_VERSION:
                raise StoreError(
                    f"{path} has schema version {version}; this ebbwatch uses {SCHEMA_VERSION}. "
                    "Open it once for writing (e.g. ebbwatch ingest) to migrate, or upgrade ebbwatch."
                )
    except BaseException:
        con.close()
        raise
    return con, path

