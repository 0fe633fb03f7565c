"""TOML configuration → frozen dataclasses with defaults.

Config stops here and in ``api``: nothing below ``api`` imports this module, so the statistics and
the store take plain arguments.  Every error names the key and the file.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from .errors import ConfigError


@dataclass(frozen=True)
class FieldsConfig:
    """Names of the fields in each JSON-lines event."""

    ts: str = "ts"
    event: str = "event"
    user: str = "user"
    account: str = "account"
    id: str = "id"


@dataclass(frozen=True)
class IngestConfig:
    ts_format: str = "auto"  # auto | rfc3339 | epoch_s | epoch_ms
    future_tolerance_hours: float = 24.0
    earliest: str = "1970-01-01"
    max_line_bytes: int = 1_048_576
    # 0: every event id is remembered for as long as the store keeps its day.  A bound forgets
    # older ids; an event whose id is older than the bound is then held back (it cannot be
    # told from a redelivery) unless accept_beyond_dedupe_window.
    dedupe_window_days: int = 0
    accept_beyond_dedupe_window: bool = False
    # An IANA time zone for producers that write local date-times without an offset ("" : such
    # times are rejected as bad_time, "no UTC offset").
    naive_timezone: str = ""
    # A run where some file lost more than this share of its lines exits with code 4.
    max_reject_share: float = 0.10
    # Events for accounts accounts.csv does not know: "keep" (reported in the summary and
    # status) or "reject" (not attributed, reason unknown_account).  Only once accounts are loaded.
    unknown_accounts: str = "keep"
    # Record what each file adds (a hash and a count per per-user daily row: 0.06 s for a
    # 2M-event file), so `ingest --again` can take it back out.
    keep_file_contributions: bool = True


@dataclass(frozen=True)
class IndexConfig:
    """How the daily activity index is built from event counts."""

    weights: dict = field(default_factory=dict)  # event name or glob -> weight
    exclude: tuple = ()  # event names or globs left out
    normalise: str = "none"  # none | seats | active_users


@dataclass(frozen=True)
class ScanConfig:
    window_days: int = 7
    min_history_days: int = 42
    history_days: int = 365
    horizon_days: int = 91
    fdr: float = 0.01
    max_alerts: int = 50
    min_change_pct: float = 30.0
    min_severity: float = 0.0
    dormant_days: int = 91
    read_against_fleet: bool = False


@dataclass(frozen=True)
class Config:
    fields: FieldsConfig = FieldsConfig()
    ingest: IngestConfig = IngestConfig()
    index: IndexConfig = IndexConfig()
    scan: ScanConfig = ScanConfig()
    store_path: str | None = None
    source: str = "<defaults>"


_SECTIONS = {"fields": FieldsConfig, "ingest": IngestConfig, "index": IndexConfig, "scan": ScanConfig}
_CHOICES = {
    ("ingest", "ts_format"): ("auto", "rfc3339", "epoch_s", "epoch_ms"),
    ("ingest", "unknown_accounts"): ("keep", "reject"),
    ("index", "normalise"): ("none", "seats", "active_users"),
}


def _coerce(section: str, key: str, value, default, source: str):
    where = f"[{section}] {key} in {source}"
    if isinstance(default, bool) or isinstance(default, str):
        if not isinstance(value, type(default)):
            raise ConfigError(f"{where}: expected {type(default).__name__}, got {value!r}")
    elif isinstance(default, int):
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where}: expected an integer, got {value!r}")
    elif isinstance(default, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where}: expected a number, got {value!r}")
        value = float(value)
    elif isinstance(default, tuple):
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ConfigError(f"{where}: expected a list of strings, got {value!r}")
        value = tuple(value)
    elif isinstance(default, dict):
        if not isinstance(value, dict):
            raise ConfigError(f"{where}: expected a table of name = weight, got {value!r}")
        for name, weight in value.items():
            if isinstance(weight, bool) or not isinstance(weight, (int, float)) or weight < 0:
                raise ConfigError(f"{where}: weight of {name!r} must be a number >= 0, got {weight!r}")
        value = {k: float(v) for k, v in value.items()}
    choices = _CHOICES.get((section, key))
    if choices and value not in choices:
        raise ConfigError(f"{where}: expected one of {', '.join(choices)}, got {value!r}")
    if isinstance(value, (int, float)) and not isinstance(value, bool) and value < 0:
        raise ConfigError(f"{where}: must not be negative, got {value!r}")
    return value


def config_from_dict(data: dict, source: str = "<dict>") -> Config:
    """Build a :class:`Config` from parsed TOML, checking every key and type."""
    parts = {}
    for section, value in data.items():
        if section == "store":
            if not isinstance(value, dict) or set(value) - {"path"}:
                raise ConfigError(f"[store] in {source}: only 'path' is allowed")
            continue
        if section not in _SECTIONS:
            raise ConfigError(
                f"unknown section [{section}] in {source}; expected one of "
                f"{', '.join(['store', *_SECTIONS])}"
            )
        if not isinstance(value, dict):
            raise ConfigError(f"[{section}] in {source} must be a table")
        cls = _SECTIONS[section]
        defaults = {f.name: getattr(cls(), f.name) for f in dataclasses.fields(cls)}
        kwargs = {}
        for key, item in value.items():
            if key not in defaults:
                raise ConfigError(
                    f"unknown key [{section}] {key} in {source}; expected one of {', '.join(defaults)}"
                )
            kwargs[key] = _coerce(section, key, item, defaults[key], source)
        parts[section] = cls(**kwargs)
    naive = parts.get("ingest", IngestConfig()).naive_timezone
    if naive:
        try:
            ZoneInfo(naive)
        except (ZoneInfoNotFoundError, ValueError):
            raise ConfigError(f"[ingest] naive_timezone in {source}: unknown time zone {naive!r} "
                              "(an IANA name such as 'Europe/Berlin')") from None
    if not 0 <= parts.get("ingest", IngestConfig()).max_reject_share <= 1:
        raise ConfigError(f"[ingest] max_reject_share in {source}: expected a share in [0, 1]")
    scan = parts.get("scan", ScanConfig())
    if scan.window_days < 1 or scan.window_days > 28:
        raise ConfigError(f"[scan] window_days in {source}: expected 1..28, got {scan.window_days}")
    if not 0 < scan.fdr < 1:
        raise ConfigError(f"[scan] fdr in {source}: expected a number in (0, 1), got {scan.fdr}")
    store_path = data.get("store", {}).get("path")
    if store_path is not None and not isinstance(store_path, str):
        raise ConfigError(f"[store] path in {source}: expected a string")
    return Config(store_path=store_path, source=source, **parts)


def load_config(path: str | Path | None) -> Config:
    """Read ``path`` (TOML); ``None`` means ``./ebbwatch.toml`` if it exists, else defaults."""
    if path is None:
        default = Path("ebbwatch.toml")
        if not default.exists():
            return Config()
        path = default
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read config file {path}: {exc.strerror or exc}") from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config file {path} is not valid TOML: {exc}") from exc
    return config_from_dict(data, source=str(path))
