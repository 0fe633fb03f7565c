"""Shared by the API's jobs: config unpacking into plain arguments, the day judged, small value
helpers."""

from __future__ import annotations

from dataclasses import replace
from datetime import date, datetime, timedelta, timezone
from typing import Callable

import numpy as np

from ..config import Config, load_config
from ..errors import InputError, UsageError

Progress = Callable[[str, int, int], None]


def _config(config) -> Config:
    if isinstance(config, Config):
        return config
    return load_config(config)


# How ``[scan]`` settings reach the scoring: a setting whose name is a field of
# ``detect.ScanParams`` is passed on under that name; the others are used by the alert selection
# and the loader, never by the scoring.  Scoring parameters that are not settings stay at
# ScanParams' defaults.  ``tests/test_config.py`` fails when a field joins one side and not the
# other, or when a shared field's defaults differ, so the two cannot drift.
SELECTION_SETTINGS = ("history_days", "fdr", "max_alerts", "min_change_pct", "min_severity")
SCORING_ONLY = ("windows", "reference_days", "history_gap_days", "cusum_threshold", "penalty_factor", "trend_weeks",
                "pooled_count_dispersion", "window_priors", "log_offset", "stop_p", "trend_screen_p", "ramp_advantage",
                "profile_weeks", "shape_change_statistic", "recent_shape_statistic", "weekday_factor_spread",
                "onset_screen_p", "falling_screen_p", "heavy_day_multiple", "falling_median_reference_from",
                "rising_screen_p", "rising_median_reference_from", "fleet_null_trigger")


def scan_settings_for_scoring() -> tuple[str, ...]:
    """The ``[scan]`` settings that are also ``ScanParams`` fields, passed on by name."""
    from dataclasses import fields

    from ..config import ScanConfig
    from ..detect import ScanParams

    scoring = {f.name for f in fields(ScanParams)}
    return tuple(f.name for f in fields(ScanConfig) if f.name in scoring)


def _scan_params(cfg: Config):
    """``detect.ScanParams`` from the config's ``[scan]`` section."""
    from ..detect import ScanParams

    return ScanParams(**{name: getattr(cfg.scan, name) for name in scan_settings_for_scoring()})


def _fleet_params(cfg: Config, loader):
    """The scan's settings with the fleet-wide quantities the loader measured."""
    return replace(_scan_params(cfg), pooled_count_dispersion=loader.count_dispersion,
                   window_priors=loader.window_priors)


def _score_chunk(panel, *, cfg: Config, loader):
    """``score_panel`` on a block from ``loader.read``, once the fleet-wide quantities are in."""
    from ..detect import score_panel

    panel = loader.with_fleet(panel)
    return score_panel(panel, _fleet_params(cfg, loader))


def fleet_factor_summary(voters: int) -> dict:
    """Whether the scan divided out fleet-wide days, and on how many voting accounts: in full
    from ``needed`` of them, only the moves that stand out of the votes' noise from
    ``needed_for_large_moves`` (``large_moves_only``), not at all below that."""
    from ..fleet import FLEET_MIN_ACCOUNTS, FLEET_MIN_SMALL

    return {"estimated": voters >= FLEET_MIN_SMALL, "voting_accounts": int(voters), "needed": FLEET_MIN_ACCOUNTS,
            "large_moves_only": FLEET_MIN_SMALL <= voters < FLEET_MIN_ACCOUNTS,
            "needed_for_large_moves": FLEET_MIN_SMALL}


def default_as_of(last_day: date | None, today: date | None = None) -> date:
    """The last complete day by the calendar alone: the store's last day, unless that is today."""
    today = today or datetime.now(timezone.utc).date()
    if last_day is None:
        raise InputError("the store has no activity yet; ingest events or --daily first")
    return min(last_day, today - timedelta(days=1))


def last_complete_day(st, today: date | None = None) -> tuple[date, str]:
    """The day a scan judges by default, and why: the last day complete for the whole fleet.

    Not today; not a day still open in some account's time zone at the newest event ingested (a
    Sydney account's day starts ten hours before London's); and not a fleet-wide data gap.
    Stores loaded from daily aggregates have no event times: their last day counts as complete.
    """
    from zoneinfo import ZoneInfo

    from ..fleet import fleet_gap_days

    as_of = default_as_of(st.last_day(), today)
    why = f"the store's last day {as_of}" if as_of == st.last_day() else f"the day before today ({as_of})"
    newest = st.newest_event_us()
    if newest is not None:
        instant = datetime(1970, 1, 1, tzinfo=timezone.utc) + timedelta(microseconds=newest)
        for zone in st.account_timezones():
            open_day = instant.astimezone(ZoneInfo(zone)).date()  # the day the newest event fell on, there
            if open_day - timedelta(days=1) < as_of:
                as_of = open_day - timedelta(days=1)
                why = (f"the last day complete in every account's time zone: the newest event "
                       f"({instant.isoformat(timespec='minutes')}) fell on {open_day} in {zone}, a day still open")
    totals = st.fleet_daily_totals()
    gaps = set(fleet_gap_days(totals["day"], totals["events"].to_numpy(float))) if len(totals) else set()
    while as_of in gaps:
        why += f"; {as_of} is a fleet-wide data gap, so the day before"
        as_of -= timedelta(days=1)
    return as_of, why


def check_as_of(st, as_of: date, what: str = "--as-of") -> None:
    """Refuse a day the store cannot judge: after its last day (days not ingested are not data,
    and would read as silence) or before its first.  (A day with too little history before it
    is judged, and its accounts are listed as having not enough history.)"""
    first, last = st.first_day(), st.last_day()
    if last is None:
        raise InputError("the store has no activity yet; ingest events or --daily first")
    if as_of > last:
        raise InputError(f"{what} {as_of} is after the store's last day with data ({last}): the days after it are "
                         f"not data and would read as silence. Ingest them first, or judge {last} or earlier "
                         f"(the store holds {first} .. {last}).")
    if as_of < first:
        raise InputError(f"{what} {as_of} is before the store's first day with data: the store holds "
                         f"{first} .. {last}.")


def parse_day(text: str | date | None, what: str = "--as-of") -> date | None:
    if text is None or isinstance(text, date):
        return text
    try:
        return date.fromisoformat(str(text))
    except ValueError:
        raise UsageError(f"{what} must be a date YYYY-MM-DD, got {text!r}") from None


def _clean_value(value):
    """A cell from accounts.csv, with pandas' missing values as None."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return None
    return value.item() if hasattr(value, "item") else value


def _finite(value):
    """A float, or None for a missing or non-finite value (a NaN kept by a DataFrame)."""
    return None if value is None or not np.isfinite(value) else float(value)


def _finite_list(values) -> list:
    return [float(v) if np.isfinite(v) else None for v in values]
