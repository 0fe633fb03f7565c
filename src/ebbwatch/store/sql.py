"""SQL fragments and small helpers shared by the store's modules: the fast path's time
patterns and casts, the id hash, Arrow in and out, quoting."""

from __future__ import annotations

from contextlib import contextmanager

import pyarrow as pa


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
_USER_DAY_KEY = "hash(account, day, event, user_hash)"
# A user's 64-bit hash, as ``user_daily`` and ``users`` keep it.
_USER_HASH = 'hash("user")'


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


@contextmanager
def registered(con, name: str, data):
    """``data`` (a frame or Arrow table) readable as the view ``name`` for the ``with`` block."""
    _register(con, name, data)
    try:
        yield
    finally:
        con.unregister(name)


def quote_ident(name: str) -> str:
    """A SQL identifier, double-quoted with embedded quotes doubled."""
    return '"' + name.replace('"', '""') + '"'


def quote_literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"

