"""Alerts as text for people (table, Markdown) and for programs (JSON lines, CSV, JSON)."""

from __future__ import annotations

import csv
import io
import json
import math
import re

from ..alerts import SCHEMA_VERSION
from ..textsafe import csv_cell, plain_text

ALERT_FORMATS = ("table", "jsonl", "csv", "markdown", "json")
# The terminal and Markdown tables: what a person reads by default, then the model's details
# (--wide).  Headers are words, not field names; the JSON field each shows is in the README.
TABLE_COLUMNS = ("account", "name", "state", "kind", "severity", "change_pct", "onset")
WIDE_COLUMNS = TABLE_COLUMNS + ("level", "baseline_level", "window_days", "percentile", "p_value", "q_value",
                                "baseline")
HEADERS = {"account": "Account", "name": "Name", "state": "State", "kind": "Kind", "severity": "Severity",
           "change_pct": "Change", "onset": "Since", "level": "Level", "baseline_level": "Usual",
           "window_days": "Days", "percentile": "Percentile", "p_value": "p", "q_value": "q",
           "baseline": "Baseline model", "mrr": "MRR", "segment": "Segment"}


def _clean(value):
    if isinstance(value, (list, dict)):
        return value
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if hasattr(value, "item"):
        return value.item()
    return value


def alert_records(alerts) -> list[dict]:
    """Alerts as JSON-ready dicts, each with the schema version first."""
    out = []
    for row in alerts.to_dict(orient="records"):
        record = {"schema": SCHEMA_VERSION}
        record.update({k: _clean(v) for k, v in row.items()})
        out.append(record)
    return out


# What Markdown (CommonMark and GitHub's tables) could read as markup inside a table cell: the
# escape itself, code, emphasis, links and images (an escaped "[" disarms "![...](...)"),
# strikethrough, entities and the cell separator.  "#", "-", "+", "." and "!" mark up only at
# the start of a line, which a cell never is, so ids such as acct-054 and numbers stay as typed.
_MARKDOWN_SPECIAL = re.compile(r"([\\`*_\[\]~&|])")


def _markdown_cell(value) -> str:
    return _MARKDOWN_SPECIAL.sub(r"\\\1", plain_text("" if value is None else value))


def _fmt(value, column) -> str:
    if value is None:
        return "-"
    if column == "change_pct":
        return f"{value:+.0f}%"
    if column == "percentile":
        return f"{value:.1f}"
    if column in ("severity", "level", "baseline_level"):
        return f"{value:.1f}"
    if column in ("p_value", "q_value"):
        return f"{value:.2g}"
    if column == "mrr":
        return f"{value:,.0f}"
    return plain_text(value)


def render_alerts(alerts, fmt: str = "table", summary: dict | None = None, wide: bool = False) -> str:
    """The alerts as text in ``fmt`` (one of ``ALERT_FORMATS``); ends with a newline if not empty.
    ``wide``: the table and Markdown formats add the model's details (``WIDE_COLUMNS``)."""
    records = alert_records(alerts)
    columns = [c for c in (WIDE_COLUMNS if wide else TABLE_COLUMNS) if c in alerts.columns]
    if fmt in ("table", "markdown"):
        # MRR and segment from accounts.csv, when it gives them for any shown account.
        details = alerts.attrs.get("account_details") or {}
        for key in ("segment", "mrr"):
            if any((details.get(r["account"]) or {}).get(key) is not None for r in records):
                columns.insert(columns.index("state"), key)
                for r in records:
                    r[key] = (details.get(r["account"]) or {}).get(key)
    if fmt == "jsonl":
        return "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in records)
    if fmt == "json":
        return json.dumps({"schema": SCHEMA_VERSION, "summary": summary or {}, "alerts": records},
                          ensure_ascii=False, indent=2, default=str) + "\n"
    if fmt == "csv":
        buffer = io.StringIO()
        columns = ["schema", *alerts.columns]
        writer = csv.DictWriter(buffer, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        for r in records:
            writer.writerow({k: csv_cell(json.dumps(v) if isinstance(v, (list, dict)) else v) for k, v in r.items()})
        return buffer.getvalue()
    if fmt == "markdown":
        lines = ["| " + " | ".join(HEADERS[c] for c in columns) + " | Message |", "|" + "---|" * (len(columns) + 1)]
        for r in records:
            cells = [_markdown_cell(_fmt(r[c], c)) for c in columns] + [_markdown_cell(r["message"])]
            lines.append("| " + " | ".join(cells) + " |")
        return "\n".join(lines) + "\n"
    if fmt == "table":
        if not records:
            return "No alerts.\n"
        heads = [HEADERS[c] for c in columns]
        rows = [[_fmt(r[c], c) for c in columns] for r in records]
        widths = [min(max(len(h), *(len(row[i]) for row in rows)), 32) for i, h in enumerate(heads)]

        def line(cells):
            return "  ".join(str(cell)[:w].ljust(w) for cell, w in zip(cells, widths)).rstrip()
        out = [line(heads), line(["-" * w for w in widths])]
        out += [line(row) for row in rows]
        return "\n".join(out) + "\n"
    raise ValueError(f"unknown format {fmt!r}; expected one of {', '.join(ALERT_FORMATS)}")


LOG_COLUMNS = ("as_of", "account", "direction", "kind", "state", "severity", "opened", "snoozed")


def render_log(log, fmt: str = "table") -> str:
    """The alert log (``store.alert_log``) as a table, JSON lines or CSV."""
    records = []
    for row in log.to_dict(orient="records"):
        records.append({k: (v.isoformat() if hasattr(v, "isoformat") else _clean(v)) for k, v in row.items()})
    if fmt == "jsonl":
        return "".join(json.dumps(r, ensure_ascii=False, default=str) + "\n" for r in records)
    if fmt == "csv":
        buffer = io.StringIO()
        writer = csv.DictWriter(buffer, fieldnames=list(log.columns), lineterminator="\n")
        writer.writeheader()
        for r in records:
            writer.writerow({k: csv_cell(v) for k, v in r.items()})
        return buffer.getvalue()
    if not records:
        return "No recorded alerts.\n"
    for r in records:
        until, reason = r.get("snoozed_until"), r.get("snooze_reason")
        r["snoozed"] = None if until is None else f"until {until}" + (f": {reason}" if reason else "")
    rows = [[plain_text("-" if r[c] is None else (f"{r[c]:.1f}" if c == "severity" else r[c])) for c in LOG_COLUMNS] for r in records]
    widths = [max(len(c), *(len(row[i]) for row in rows)) for i, c in enumerate(LOG_COLUMNS)]
    line = lambda cells: "  ".join(str(x).ljust(w) for x, w in zip(cells, widths)).rstrip()  # noqa: E731
    return "\n".join([line(LOG_COLUMNS), line(["-" * w for w in widths])] + [line(r) for r in rows]) + "\n"


def fleet_null_sentences(nulls: dict | None) -> list[str]:
    """One plain sentence per direction in which the day's fleet moved as a whole (the scan
    summary's ``fleet_null``), saying whether its accounts were read against the fleet's spread."""
    moved = {"down": "falling", "up": "rising"}
    return [f"the fleet's typical account is {moved[d]} today (median z {n['median_z']:+.2f}): "
            + (f"{moved[d]} p-values read against the fleet's own spread (centre {n['shift']:+.2f}, scale "
               f"{n['scale']:.2f})" if n["applied"] else
               "[scan] read_against_fleet = true would read each account against the fleet's own spread")
            for d, n in (nulls or {}).items() if n["moved"]]

