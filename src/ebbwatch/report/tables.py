"""Alerts as text for people (table, Markdown) and for programs (JSON lines, CSV, JSON)."""

from __future__ import annotations

import csv
import io
import json
import math

from ..alerts import SCHEMA_VERSION
from ..textsafe import csv_cell, plain_text

ALERT_FORMATS = ("table", "jsonl", "csv", "markdown", "json")
TABLE_COLUMNS = ("account", "name", "kind", "severity", "change_pct", "percentile", "onset", "baseline")


def _clean(value):
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


def _markdown_cell(value) -> str:
    text = plain_text("" if value is None else value)
    for ch in "\\`*_{}[]()#+-.!|~":
        text = text.replace(ch, "\\" + ch)
    return text


def _fmt(value, column) -> str:
    if value is None:
        return "-"
    if column == "change_pct":
        return f"{value:+.0f}%"
    if column == "percentile":
        return f"{value:.1f}"
    if column == "severity":
        return f"{value:.1f}"
    return plain_text(value)


def render_alerts(alerts, fmt: str = "table", summary: dict | None = None) -> str:
    """The alerts as text in ``fmt`` (one of ``ALERT_FORMATS``); ends with a newline if not empty."""
    records = alert_records(alerts)
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
            writer.writerow({k: csv_cell(v) for k, v in r.items()})
        return buffer.getvalue()
    if fmt == "markdown":
        lines = ["| " + " | ".join(TABLE_COLUMNS) + " | message |", "|" + "---|" * (len(TABLE_COLUMNS) + 1)]
        for r in records:
            cells = [_markdown_cell(_fmt(r[c], c)) for c in TABLE_COLUMNS] + [_markdown_cell(r["message"])]
            lines.append("| " + " | ".join(cells) + " |")
        return "\n".join(lines) + "\n"
    if fmt == "table":
        if not records:
            return "No alerts.\n"
        rows = [[_fmt(r[c], c) for c in TABLE_COLUMNS] for r in records]
        widths = [min(max(len(c), *(len(row[i]) for row in rows)), 32) for i, c in enumerate(TABLE_COLUMNS)]
        def line(cells):
            return "  ".join(str(cell)[:w].ljust(w) for cell, w in zip(cells, widths)).rstrip()
        out = [line(TABLE_COLUMNS), line(["-" * w for w in widths])]
        out += [line(row) for row in rows]
        return "\n".join(out) + "\n"
    raise ValueError(f"unknown format {fmt!r}; expected one of {', '.join(ALERT_FORMATS)}")
