"""The public library API: composes the stages.  The only place that opens the store and unpacks
config into plain arguments; the CLI is a thin shell over these functions."""

from __future__ import annotations

import json
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict
from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa

from . import store as store_mod
from .config import Config, load_config
from .errors import InputError, UsageError
from .frames import FileResult, Reject
from .ingest import csvs
from .ingest.lines import LineRejected, LineRules, excerpt, parse_line
from .ingest.readers import STDIN, expand_inputs, iter_lines, remove_quietly, scan_file, spool_stdin
from .ingest.timestamps import parse_rfc3339

Progress = Callable[[str, int, int], None]


def _config(config) -> Config:
    if isinstance(config, Config):
        return config
    return load_config(config)


def _line_rules(cfg: Config, now_us: int) -> LineRules:
    f, ing = cfg.fields, cfg.ingest
    try:
        earliest = parse_rfc3339(ing.earliest + ("T00:00:00Z" if len(ing.earliest) == 10 else ""))
    except ValueError as exc:
        raise UsageError(f"[ingest] earliest in {cfg.source}: {exc}") from None
    return LineRules(
        ts_field=f.ts, event_field=f.event, user_field=f.user, account_field=f.account, id_field=f.id,
        ts_format=ing.ts_format, max_line_bytes=ing.max_line_bytes, earliest_us=earliest,
        latest_us=now_us + int(ing.future_tolerance_hours * 3600 * 1_000_000),
    )


def _precise_records(path: str, display: str, rules: LineRules, result: FileResult, rejects: list):
    columns = {"ts_us": [], "event": [], "user": [], "account": [], "id": []}
    for number, raw in iter_lines(path):
        try:
            parsed = parse_line(raw, rules)
        except LineRejected as exc:
            result.lines += 1
            result.rejected[exc.reason] = result.rejected.get(exc.reason, 0) + 1
            rejects.append(Reject(display, number, exc.reason, excerpt(raw), exc.detail))
            continue
        if parsed is None:
            continue
        result.lines += 1
        for key, value in zip(columns, parsed):
            columns[key].append(value)
    schema = pa.schema([("ts_us", pa.int64()), ("event", pa.string()), ("user", pa.string()),
                        ("account", pa.string()), ("id", pa.string())])
    return pa.table(columns, schema=schema)


def ingest_files(
    inputs: list[str] = (),
    *,
    db: str | None = None,
    config=None,
    accounts: str | None = None,
    identities: str | None = None,
    daily: str | None = None,
    rejects_path: str | None = None,
    now: datetime | None = None,
    progress: Progress | None = None,
    stdin=None,
) -> dict:
    """Ingest JSON-lines event files (and/or the accounts, identities and daily-aggregate files).

    Each file is one transaction.  Returns the summary (see README, ``ingest --format json``).
    Files that cannot be read are listed under ``errors``; the others are ingested.
    """
    cfg = _config(config)
    started = time.perf_counter()
    now = now or datetime.now(timezone.utc)
    now_us = int(now.timestamp() * 1_000_000)
    rules = _line_rules(cfg, now_us)
    # Read and check the reference files before touching the store, so a bad one writes nothing.
    account_frame = csvs.read_accounts(accounts) if accounts else None
    identity_frame = csvs.read_identities(identities) if identities else None
    daily_frame = csvs.read_daily(daily) if daily else None
    files = expand_inputs(list(inputs))
    summary = {
        "files": 0, "lines": 0, "ingested": 0, "duplicates": 0, "rejected": {}, "unattributed": {},
        "skipped_files": [], "errors": [], "accounts_loaded": 0, "identities_loaded": 0,
        "daily_rows_loaded": 0, "paths": {"fast": 0, "precise": 0}, "rejects_file": None,
    }
    db_path = store_mod.resolve_path(db or cfg.store_path)
    rejects_path = rejects_path or str(Path(db_path).with_suffix("")) + ".rejects.jsonl"
    all_rejects: list[Reject] = []
    with store_mod.open_store(db_path) as st:
        if account_frame is not None:
            with st.transaction():
                summary["accounts_loaded"] = st.upsert_accounts(account_frame)
        if identity_frame is not None:
            with st.transaction():
                summary["identities_loaded"] = st.replace_identities(identity_frame)
        if daily_frame is not None:
            with st.transaction():
                summary["daily_rows_loaded"] = st.load_daily(daily_frame)
        for position, item in enumerate(files, start=1):
            display = "<stdin>" if item == STDIN else item
            path = spool_stdin(stdin) if item == STDIN else item
            if progress:
                progress(display, position, len(files))
            try:
                result = _ingest_one(st, path, display, cfg, rules, all_rejects)
            except InputError as exc:
                summary["errors"].append({"file": display, "error": str(exc)})
                continue
            finally:
                if item == STDIN:
                    remove_quietly(path)
            if result.skipped:
                summary["skipped_files"].append({"file": display, "reason": result.skipped})
                continue
            summary["files"] += 1
            summary["paths"][result.path_taken] += 1
            for key in ("lines", "ingested", "duplicates"):
                summary[key] += getattr(result, key)
            for group in ("rejected", "unattributed"):
                for reason, n in getattr(result, group).items():
                    summary[group][reason] = summary[group].get(reason, 0) + n
    if all_rejects:
        with open(rejects_path, "a", encoding="utf-8") as handle:
            for reject in all_rejects:
                handle.write(json.dumps(reject.as_dict(), ensure_ascii=False) + "\n")
        summary["rejects_file"] = rejects_path
    summary["seconds"] = round(time.perf_counter() - started, 3)
    return summary


def _ingest_one(st, path: str, display: str, cfg: Config, rules: LineRules, all_rejects: list) -> FileResult:
    result = FileResult(file=display)
    file_rejects: list[Reject] = []
    # Hashing (and measuring the longest line) runs in a thread beside the fast-path parse:
    # both release the GIL.  Staging writes only temporary tables, so it runs before the
    # file's transaction: a fast-path parse error must not abort it.
    with ThreadPoolExecutor(max_workers=1) as pool:
        scanning = pool.submit(scan_file, path)
        try:
            staged = st.stage_jsonl_fast(path, cfg.fields, rules.ts_format, rules.max_line_bytes,
                                         rules.earliest_us, rules.latest_us)
        finally:
            digest, longest_line = scanning.result()
    earlier = st.already_ingested(digest)
    if earlier is not None:
        st.drop_staged()
        result.skipped = f"already ingested (same content as {earlier})"
        return result
    if staged is not None and longest_line > rules.max_line_bytes:
        st.drop_staged()
        staged = None
    if staged is None:
        result.path_taken = "precise"
        table = _precise_records(path, display, rules, result, file_rejects)
        st.stage_records(table)
    else:
        result.lines = staged
    with st.transaction():
        merged = st.merge_staged(cfg.ingest.dedupe_window_days)
        result.ingested = merged["ingested"]
        result.duplicates = merged["duplicates"]
        result.unattributed = merged["unattributed"]
        st.log_ingest(display, digest, result, merged["first_day"], merged["last_day"])
    all_rejects.extend(file_rejects)
    return result


def status(*, db: str | None = None, config=None) -> dict:
    """What the store holds: accounts, events, first and last day, last ingest, data-gap days."""
    from .series import fleet_gap_days

    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        info = st.status()
        totals = st.fleet_daily_totals()
    info["gap_days"] = [d.isoformat() for d in fleet_gap_days(totals["day"], totals["events"].to_numpy(float))]
    for key in ("first_day", "last_day"):
        info[key] = info[key].isoformat() if info[key] is not None else None
    return info


def export_daily(output: str, *, fmt: str = "csv", db: str | None = None, config=None) -> int:
    """Write the daily table (account, day, event, events, users) to ``output``; returns rows."""
    if fmt not in ("csv", "parquet"):
        raise UsageError(f"unknown export format {fmt!r}; expected csv or parquet")
    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        return st.export_daily(output, fmt)


def daily_frame(*, db: str | None = None, config=None):
    """The daily table as a pandas DataFrame (for notebooks)."""
    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        return st.export_daily_rows()


# -- scan ------------------------------------------------------------------------------------

FLEET_SAMPLE_ACCOUNTS = 5_000


def _scan_params(cfg: Config):
    from .detect import ScanParams

    s = cfg.scan
    return ScanParams(window_days=s.window_days, min_history_days=s.min_history_days,
                      horizon_days=s.horizon_days, dormant_days=s.dormant_days)


def default_as_of(last_day: date | None, today: date | None = None) -> date:
    """The last complete day: the store's last day, unless that is today (still filling)."""
    today = today or datetime.now(timezone.utc).date()
    if last_day is None:
        raise InputError("the store has no activity yet; ingest events or --daily first")
    return min(last_day, today - timedelta(days=1))


def parse_day(text: str | date | None, what: str = "--as-of") -> date | None:
    if text is None or isinstance(text, date):
        return text
    try:
        return date.fromisoformat(str(text))
    except ValueError:
        raise UsageError(f"{what} must be a date YYYY-MM-DD, got {text!r}") from None


class PanelLoader:
    """Reads account blocks from an open store into :class:`series.Panel` objects."""

    def __init__(self, st, cfg: Config, as_of: date, history_days: int):
        from .series import resolve_event_weights

        self.st = st
        self.cfg = cfg
        self.end_day = (as_of - date(1970, 1, 1)).days
        self.start_day = self.end_day - history_days + 1
        self.weights = resolve_event_weights(st.event_names(), cfg.index.weights, cfg.index.exclude)
        meta = st.accounts().set_index("account")
        self.names = meta["name"].dropna().to_dict()
        self.seats = meta["seats"].to_dict()
        self.mrr = meta["mrr"].dropna().to_dict()
        self.fleet_factor = None
        self.masked = None

    def _rows(self, accounts):
        start = date(1970, 1, 1) + timedelta(days=self.start_day)
        end = date(1970, 1, 1) + timedelta(days=self.end_day)
        return self.st.weighted_daily(self.weights, list(accounts), start, end)

    def fit_fleet(self, accounts):
        from .series import dense_matrix, fleet_factor

        step = max(1, len(accounts) // FLEET_SAMPLE_ACCOUNTS)
        sample = list(accounts)[::step]
        idx, day, value, _, _ = self._rows(sample)
        n_days = self.end_day - self.start_day + 1
        counts = dense_matrix(idx, day, value, len(sample), self.start_day, n_days)
        self.fleet_factor, self.masked = fleet_factor(counts)
        return self

    def __call__(self, accounts):
        from .series import build_panel

        idx, day, value, events, users = self._rows(accounts)
        seats = [self.seats.get(a) for a in accounts]
        return build_panel(idx, day, value, events, users, accounts=accounts, start_day=self.start_day,
                           end_day=self.end_day, normalise=self.cfg.index.normalise,
                           seats=np.array([np.nan if s is None else s for s in seats], float),
                           fleet_factor=self.fleet_factor, masked=self.masked)


def scan(
    *,
    as_of=None,
    db: str | None = None,
    config=None,
    kinds=None,
    max_alerts: int | None = None,
    chunk_size: int = 10_000,
    progress=None,
    today: date | None = None,
):
    """Judge every account at ``as_of`` (default: the last complete day) and return the alerts.

    Returns a DataFrame with ``frames.ALERT_COLUMNS`` ranked by severity; ``.attrs["summary"]``
    holds the counts (accounts judged, not enough history, dormant, masked days) and
    ``.attrs["scores"]`` the per-account scores.
    """
    from .alerts import select_alerts
    from .detect import score_panel
    from .engine import run_local

    cfg = _config(config)
    started = time.perf_counter()
    as_of = parse_day(as_of)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        if as_of is None:
            as_of = default_as_of(st.last_day(), today)
        accounts = st.account_ids()
        if not accounts:
            raise InputError("the store has no accounts yet; ingest events or --daily first")
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days).fit_fleet(accounts)
        params = _scan_params(cfg)
        scores = run_local(accounts, loader, lambda panel: score_panel(panel, params),
                           chunk_size=chunk_size, progress=progress)
    alerts = select_alerts(
        scores, as_of=as_of, names=loader.names, window_days=cfg.scan.window_days, fdr=cfg.scan.fdr,
        max_alerts=cfg.scan.max_alerts if max_alerts is None else max_alerts,
        min_change_pct=cfg.scan.min_change_pct, kinds=kinds,
    )
    masked_days = [
        (date(1970, 1, 1) + timedelta(days=loader.start_day + int(i))).isoformat()
        for i in np.flatnonzero(loader.masked)
    ]
    counts = scores["status"].value_counts().to_dict() if len(scores) else {}
    alerts.attrs["summary"] = {
        "as_of": as_of.isoformat(),
        "accounts": len(scores),
        "judged": int(counts.get("judged", 0)),
        "not_enough_history": sorted(scores.loc[scores["status"] == "not_enough_history", "account"].tolist()),
        "dormant": int(counts.get("dormant", 0)),
        "alerts": len(alerts),
        "masked_days": masked_days,
        "seconds": round(time.perf_counter() - started, 3),
    }
    alerts.attrs["scores"] = scores
    return alerts


# -- demo ------------------------------------------------------------------------------------

def run_demo(directory: str | None = None, *, n_accounts: int = 300, n_days: int = 425, seed: int = 7,
             progress=None, say=lambda text: None):
    """Generate the invented Tidewell scenario into ``directory``, ingest it, and scan its last day.

    Returns ``(scenario, ingest_summary, alerts)``.  ``say`` receives one line per step.
    """
    import tempfile

    from .datasets import write_demo_scenario

    directory = directory or tempfile.mkdtemp(prefix="ebbwatch-demo-")
    Path(directory).mkdir(parents=True, exist_ok=True)
    db = str(Path(directory) / "ebbwatch.duckdb")
    for stale in (db, db + ".wal"):
        if Path(stale).exists():
            Path(stale).unlink()
    say(f"Writing the Tidewell scenario ({n_accounts} invented accounts, {n_days} days) to {directory} ...")
    started = time.perf_counter()
    scenario = write_demo_scenario(directory, n_accounts, n_days, seed=seed)
    say(f"  {scenario.n_events:,} events in {time.perf_counter() - started:.1f} s; ingesting ...")
    summary = ingest_files([scenario.events_dir], db=db, accounts=scenario.accounts_csv,
                           identities=scenario.identities_csv, progress=progress,
                           rejects_path=str(Path(directory) / "rejects.jsonl"),
                           now=datetime.combine(scenario.as_of + timedelta(days=1), datetime.min.time(), timezone.utc))
    alerts = scan(db=db, today=scenario.as_of + timedelta(days=1))
    return scenario, summary, alerts
