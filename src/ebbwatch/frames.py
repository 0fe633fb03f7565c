"""Column names and record types that cross module boundaries, declared once."""

from __future__ import annotations

from dataclasses import dataclass, field

# One alert as the scan returns it (the JSON-lines schema; README documents each key).
ALERT_COLUMNS = (
    "account",
    "name",
    "kind",
    "direction",
    "as_of",
    "severity",
    "p_value",
    "q_value",
    "percentile",
    "change_pct",
    "window_days",
    "level",
    "baseline_level",
    "onset",
    "baseline",
    "state",
    "drivers",
    "message",
)
ALERT_KINDS = ("drop", "stop", "slide", "surge")


@dataclass
class Reject:
    """One rejected input line: where it was, why, and a short excerpt of it."""

    file: str
    line: int
    reason: str
    excerpt: str
    detail: str = ""

    def as_dict(self) -> dict:
        return {
            "file": self.file,
            "line": self.line,
            "reason": self.reason,
            "detail": self.detail,
            "excerpt": self.excerpt,
        }


@dataclass
class FileResult:
    """What ingesting one file did."""

    file: str
    lines: int = 0
    ingested: int = 0
    duplicates: int = 0
    rejected: dict = field(default_factory=dict)
    unattributed: dict = field(default_factory=dict)
    held_back: dict = field(default_factory=dict)  # by reason: events not added though valid (beyond_dedupe_window)
    skipped: str | None = None  # reason the whole file was skipped (e.g. already ingested)
    path_taken: str = "fast"  # "fast" (native reader) or "precise" (line by line)
    taken_back: int = 0  # earlier ingests of the same content taken back out first (ingest --again)
    rechecked_lines: int = 0  # lines of a fast-path file the native reader left to the precise parser
