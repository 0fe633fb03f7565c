"""The precise path: one JSON-lines line → an event record or a reject with its reason.

This is the reference for what is accepted; the store's fast path only takes files on which it
agrees with these rules for every line, and sends any other file here.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass

from .timestamps import TimestampError, parse_timestamp

EXCERPT_CHARS = 120


@dataclass(frozen=True)
class LineRules:
    """What a valid line is.  Times are integer microseconds since the epoch (UTC)."""

    ts_field: str = "ts"
    event_field: str = "event"
    user_field: str = "user"
    account_field: str = "account"
    id_field: str = "id"
    ts_format: str = "auto"
    max_line_bytes: int = 1_048_576
    earliest_us: int = 0
    latest_us: int = 2**62
    naive_timezone: str | None = None  # IANA zone for date-times written without an offset


class LineRejected(Exception):
    def __init__(self, reason: str, detail: str = ""):
        super().__init__(reason)
        self.reason = reason
        self.detail = detail


def _reject_constant(name):
    raise ValueError(name)


def _identifier(value, field_name: str, required: bool) -> str | None:
    """Ids may be JSON strings or integers (written as their decimal text)."""
    if value is None or value == "":
        if required:
            raise LineRejected("missing_field", field_name)
        return None
    if isinstance(value, str):
        return value
    if isinstance(value, int) and not isinstance(value, bool):
        return str(value)
    raise LineRejected("wrong_type", f"{field_name} is {type(value).__name__}")


# Whitespace around a line, as DuckDB's JSON-lines reader trims it (C's isspace).
LINE_SPACE = " \t\r\n\x0b\x0c"
_NON_FINITE = re.compile(r"-?(?:infinity|inf|nan)", re.IGNORECASE)
_NON_FINITE_TEXT = {"n": "NaN", "i": "Infinity"}
# A cheap first look: a line with none of these cannot be one the native reader takes.
_NATIVE_EXTENSION = re.compile(r",[ \t\r\n]*[]}]|(?i:nan|inf)|[\x0b\x0c]")


def _native_reader_json(text: str):
    """The line as DuckDB's JSON reader takes it, or ``None`` if that reader refuses it too.

    Its parser accepts three things strict JSON does not: a trailing comma before ``}`` or
    ``]`` (after a value), the literals nan, inf and infinity in any case (with a minus), and
    vertical tab or form feed around the line.  Both paths must accept the same lines, so
    such a line is accepted here too: a non-finite number is then a number (a wrong type for
    the fields ebbwatch reads).  Only lines strict parsing refused come here."""
    if not _NATIVE_EXTENSION.search(text):
        return None  # none of the three: the line is bad for both parsers
    text = text.strip(LINE_SPACE)
    out, i, n, in_string, last = [], 0, len(text), False, ""
    while i < n:
        c = text[i]
        if in_string:
            out.append(c)
            if c == "\\":
                out.append(text[i + 1: i + 2])
                i += 2
                continue
            in_string = c != '"'
            if not in_string:
                last = '"'
            i += 1
            continue
        if c == '"':
            in_string = True
        elif c == ",":
            rest = text[i + 1:].lstrip(" \t\r\n")
            if rest[:1] in ("}", "]") and last not in ("", "[", "{", ",", ":"):
                i += 1
                continue
        elif last in (":", "[", ",") and c in "-nNiI":
            token = _NON_FINITE.match(text, i)
            if token:
                word = token.group()
                sign = "-" if word.startswith("-") else ""
                out.append(sign + _NON_FINITE_TEXT[word.lstrip("-")[0].lower()])
                last = "0"
                i = token.end()
                continue
        out.append(c)
        if c not in " \t\r\n":
            last = c
        i += 1
    try:
        return json.loads("".join(out))
    except (ValueError, RecursionError):
        return None


def parse_line(raw: bytes, rules: LineRules) -> tuple[int, str, str, str | None, str | None] | None:
    """Parse one line (without its terminator).

    Returns ``(ts_us, event, user, account, id)``, or ``None`` for a blank line (blank lines are
    skipped, as DuckDB's reader does).  Raises :class:`LineRejected` with a reason code from
    ``errors.REJECT_REASONS``.
    """
    if len(raw) > rules.max_line_bytes:
        raise LineRejected("too_long", f"{len(raw)} bytes")
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise LineRejected("not_utf8", f"byte {exc.start}") from None
    if not text.strip(LINE_SPACE):
        return None
    try:
        # NaN and Infinity are not JSON (RFC 8259): refuse them rather than let Python accept them.
        obj = json.loads(text, parse_constant=_reject_constant)
    except RecursionError:
        raise LineRejected("not_json", "nested too deeply for the JSON parser") from None
    except ValueError as exc:
        obj = _native_reader_json(text)
        if obj is None:
            raise LineRejected("not_json", str(exc)[:80]) from None
    if not isinstance(obj, dict):
        raise LineRejected("not_object", type(obj).__name__)
    if rules.ts_field not in obj or obj[rules.ts_field] is None:
        raise LineRejected("missing_field", rules.ts_field)
    event = obj.get(rules.event_field)
    if event is None or event == "":
        raise LineRejected("missing_field", rules.event_field)
    if not isinstance(event, str):
        raise LineRejected("wrong_type", f"{rules.event_field} is {type(event).__name__}")
    user = _identifier(obj.get(rules.user_field), rules.user_field, required=True)
    account = _identifier(obj.get(rules.account_field), rules.account_field, required=False)
    event_id = _identifier(obj.get(rules.id_field), rules.id_field, required=False)
    ts_value = obj[rules.ts_field]
    if not isinstance(ts_value, (str, int, float)) or isinstance(ts_value, bool):
        raise LineRejected("wrong_type", f"{rules.ts_field} is {type(ts_value).__name__}")
    try:
        ts_us = parse_timestamp(ts_value, rules.ts_format, rules.naive_timezone)
    except TimestampError as exc:
        raise LineRejected("bad_time", str(exc)) from None
    if ts_us > rules.latest_us:
        raise LineRejected("future_time", str(ts_value)[:40])
    if ts_us < rules.earliest_us:
        raise LineRejected("past_time", str(ts_value)[:40])
    return ts_us, event, user, account, event_id


def excerpt(raw: bytes) -> str:
    """A short, printable excerpt of a line for the rejects file."""
    return raw[: EXCERPT_CHARS * 2].decode("utf-8", errors="replace")[:EXCERPT_CHARS]
