"""The public library API: composes the stages.  The only place that opens the store and unpacks
config into plain arguments; the CLI is a thin shell over these functions."""

from __future__ import annotations

import json
import os
import time
from contextlib import contextmanager
from dataclasses import replace
from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from typing import Callable

import numpy as np

from . import store as store_mod
from .alerts import EPOCH, day_to_date
from .config import Config, load_config
from .errors import InputError, UsageError
from .frames import FileResult, Reject
from .ingest import csvs
from .ingest.lines import LineRules
from .ingest.readers import STDIN, expand_inputs, remove_quietly, spool_stdin
from .ingest.timestamps import parse_rfc3339
from .series import NEVER_ACTIVE

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
        naive_timezone=ing.naive_timezone or None,
    )


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
    engine: str = "local",
    scheduler: str | None = None,
    accept_beyond_window: bool | None = None,
    keep_stored_days: bool = False,
    again: bool = False,
) -> dict:
    """Ingest JSON-lines event files (and/or the accounts, identities and daily-aggregate files).

    Each file is one transaction.  Returns the summary (see README, ``ingest --format json``).
    Files that cannot be read are listed under ``errors``; the others are ingested.
    ``accept_beyond_window`` overrides ``[ingest] accept_beyond_dedupe_window``: with a bounded
    dedupe window, add events whose id is older than it instead of holding them back.
    ``keep_stored_days``: load accounts whose time zone changes although their days are stored
    (those days stay in the old zone); without it such a load is refused.  ``again``: ingest
    files whose content was ingested before, taking the earlier contribution back out first in
    the same transaction (for a file ingested with the wrong settings; local engine only).
    ``engine="dask"``: the files are parsed, attributed and counted on a Dask cluster
    (``scheduler`` as in :func:`scan`; workers must read the same paths), and the store takes
    all of them in one transaction, with the same result as ingesting them in turn here.
    """
    if engine not in ("local", "dask"):
        raise UsageError(f"unknown engine {engine!r}; expected local or dask")
    if engine == "dask" and again:
        raise UsageError("--again runs on the local engine (it takes a file back out and ingests it in one transaction)")
    cfg = _config(config)
    if accept_beyond_window is not None:
        cfg = replace(cfg, ingest=replace(cfg.ingest, accept_beyond_dedupe_window=bool(accept_beyond_window)))
    started = time.perf_counter()
    now = now or datetime.now(timezone.utc)
    now_us = int(now.timestamp() * 1_000_000)
    rules = _line_rules(cfg, now_us)
    # Read and check the reference files before touching the store, so a bad one writes nothing.
    account_frame = csvs.read_accounts(accounts) if accounts else None
    identity_frame = csvs.read_identities(identities) if identities else None
    if daily is not None and not Path(daily).is_file():
        raise InputError(f"no such file: {daily}")
    files, passed_over = expand_inputs(list(inputs))
    if inputs and not files and not (accounts or identities or daily):
        found = "; ".join(f"{p['file']}: {p['reason']}" for p in passed_over[:5]) or "nothing at all"
        raise InputError(f"no event files to ingest in {', '.join(map(str, inputs))} (found {found})")
    if engine == "dask" and STDIN in files:
        raise UsageError("--engine dask reads files its workers can open; it cannot take - (stdin)")
    summary = {
        "files": 0, "lines": 0, "ingested": 0, "duplicates": 0, "rejected": {}, "unattributed": {},
        "skipped_files": [], "errors": [], "accounts_loaded": 0, "identities_loaded": 0,
        "daily_rows_loaded": 0, "paths": {"fast": 0, "precise": 0}, "lines_rechecked": 0, "held_back": {}, "recovered": 0, "taken_back": 0,
        "files_over_reject_share": [], "max_reject_share": cfg.ingest.max_reject_share,
        "rejects_file": None,
    }
    summary["skipped_files"].extend(passed_over)
    db_path = store_mod.resolve_path(db or cfg.store_path)
    rejects_path = rejects_path or str(Path(db_path).with_suffix("")) + ".rejects.jsonl"
    all_rejects: list[Reject] = []
    new_store = db_path != ":memory:" and not os.path.exists(db_path)
    try:
        with store_mod.open_store(db_path) as st:
            problem = st.check_daily_file(daily) if daily is not None else None
            if problem:
                raise InputError(problem)
            if account_frame is not None:
                changed = st.zone_changes_on_stored_days(account_frame)
                if changed and not keep_stored_days:
                    account, old, new, days = changed[0]
                    more = f" (and {len(changed) - 1} more account(s))" if len(changed) > 1 else ""
                    raise InputError(
                        f"{accounts} gives {account} the time zone {new}, but {days} day(s) of its events are "
                        f"already stored by {old} days{more}; days are assigned at ingest, so load accounts "
                        "before their events. To fix: ingest accounts.csv and then the events into a new "
                        "store; or give --keep-stored-days to use the new zone for events from now on only.")
                with st.transaction():
                    summary["accounts_loaded"] = st.upsert_accounts(account_frame)
            if identity_frame is not None:
                with st.transaction():
                    summary["identities_loaded"] = st.replace_identities(identity_frame)
                    # Events kept from earlier ingests: attribute them now, file by file, so what
                    # they add still belongs to the file they came in.
                    for file_no in st.unattributed_files():
                        if st.stage_unattributed(file_no):
                            summary["recovered"] += _merge(st, cfg, file_no)["ingested"]
            if daily is not None:
                with st.transaction():
                    summary["daily_rows_loaded"] = st.load_daily_file(daily)
            if engine == "dask" and files:
                outcomes = _ingest_on_dask(st, files, cfg, rules, scheduler, progress)
            else:
                outcomes = _ingest_here(st, files, cfg, rules, progress, stdin, again)
            for display, outcome, rejects in outcomes:
                _add_to_summary(summary, display, outcome)
                all_rejects.extend(rejects)
                if not isinstance(outcome, str) and not outcome.skipped and outcome.lines:
                    lost = sum(outcome.rejected.values())
                    if lost > cfg.ingest.max_reject_share * outcome.lines:
                        summary["files_over_reject_share"].append(
                            {"file": display, "lines": outcome.lines, "rejected": lost})
            summary["unknown_accounts"] = st.unknown_accounts()
    except BaseException:
        wrote = summary["files"] or any(summary[k] for k in ("accounts_loaded", "identities_loaded", "daily_rows_loaded"))
        if new_store and not wrote:  # a run that failed before writing anything leaves no store behind
            for leftover in (db_path, db_path + ".wal"):
                remove_quietly(leftover)
        raise
    if all_rejects:
        with open(rejects_path, "a", encoding="utf-8") as handle:
            for reject in all_rejects:
                handle.write(json.dumps(reject.as_dict(), ensure_ascii=False) + "\n")
        summary["rejects_file"] = rejects_path
    summary["seconds"] = round(time.perf_counter() - started, 3)
    return summary


def _add_to_summary(summary: dict, display: str, outcome):
    """Count one file's outcome: a ``FileResult``, or the message of an error reading it."""
    if isinstance(outcome, str):
        summary["errors"].append({"file": display, "error": outcome})
        return
    if outcome.skipped:
        summary["skipped_files"].append({"file": display, "reason": outcome.skipped})
        return
    summary["files"] += 1
    summary["paths"][outcome.path_taken] += 1
    for key in ("lines", "ingested", "duplicates"):
        summary[key] += getattr(outcome, key)
    summary["lines_rechecked"] += outcome.rechecked_lines
    summary["taken_back"] += outcome.taken_back
    for group in ("rejected", "unattributed", "held_back"):
        for reason, n in getattr(outcome, group).items():
            summary[group][reason] = summary[group].get(reason, 0) + n


def _ingest_here(st, files, cfg, rules, progress, stdin, again=False):
    """Each file in turn, one transaction each: ``(name, FileResult or error, rejects)``."""
    legacy_digest = st.has_legacy_digests()  # files this run logs use the new hash alone
    for position, item in enumerate(files, start=1):
        display = "<stdin>" if item == STDIN else item
        path = spool_stdin(stdin) if item == STDIN else item
        if progress:
            progress(display, position, len(files))
        rejects: list[Reject] = []
        try:
            result = _ingest_one(st, path, display, cfg, rules, rejects, legacy_digest, again)
        except InputError as exc:
            yield display, str(exc), []
            continue
        finally:
            if item == STDIN:
                remove_quietly(path)
        yield display, result, rejects


def _ingest_on_dask(st, files, cfg, rules, scheduler, progress):
    """Workers parse, attribute and date the files in parallel; this process dedupes their ids
    in file order (so the first delivery wins as in a local ingest), the workers count what is
    left, and the store takes every file's counts and log row in one transaction."""
    from .engine.dask import dask_client, gather_in_order
    from .tasks import ParsedFile, count_parsed, parse_file

    accounts_table, identities_table = st.reference_tables()
    known = st.ingested_digests()
    outcomes = []
    with dask_client(scheduler) as client:
        reference = client.scatter([accounts_table, identities_table], broadcast=True)
        parsed = client.map(parse_file, [(f, f) for f in files], rules=rules, fields=cfg.fields,
                            accounts=reference[0], identities=reference[1], known_digests=known,
                            legacy_digest=st.has_legacy_digests(),
                            known_accounts_only=cfg.ingest.unknown_accounts == "reject",
                            pure=False, retries=3)
        summaries = gather_in_order(
            client.map(ParsedFile.summary, parsed, pure=False, retries=3), "parsing",
            progress=None if progress is None else (lambda i, n: progress(files[i - 1], i, n)))
        with st.transaction():
            waiting, seen_before = [], []  # files to count: (place in outcomes, digest, parsed future, number)
            first_of_content = {}
            for future, light in zip(parsed, summaries):
                result = light.result
                if light.error is None and result.skipped is None and light.digest in first_of_content:
                    result.skipped = f"already ingested (same content as {first_of_content[light.digest]})"
                if light.error is not None or result.skipped:
                    outcomes.append((light.file, light.error or result, []))
                    continue
                first_of_content[light.digest] = light.file
                file_no = st.next_file_no()
                seen_before.append(st.claim_ids(*light.ids, cfg.ingest.dedupe_window_days,
                                                cfg.ingest.accept_beyond_dedupe_window, file_no))
                waiting.append((len(outcomes), light.digest, future, file_no))
                if light.unattributed is not None and light.unattributed.num_rows:
                    st.keep_unattributed(file_no, light.unattributed)
                outcomes.append((light.file, None, light.rejects))
            counted = gather_in_order(client.map(count_parsed, [w[2] for w in waiting], seen_before,
                                                 pure=False, retries=3), "counting")
            st.merge_user_daily([table for table, *_ in counted])
            for (place, digest, _, file_no), (table, result, first_day, last_day, newest_us) in zip(waiting, counted):
                if cfg.ingest.keep_file_contributions:
                    st.add_contributions(file_no, table)
                name, _, rejects = outcomes[place]
                st.log_ingest(name, digest, result, first_day, last_day, file_no)
                st.note_newest_event(newest_us)
                outcomes[place] = (name, result, rejects)
    return outcomes


def _ingest_one(st, path: str, display: str, cfg: Config, rules: LineRules, all_rejects: list,
                legacy_digest: bool, again: bool = False) -> FileResult:
    from .tasks import stage_file

    seen_digests: list[str] = []

    def earlier_copy(digests):
        seen_digests.extend(digests)
        earlier = None if again else st.already_ingested(digests)
        return None if earlier is None else f"already ingested (same content as {earlier})"

    digest, result, file_rejects = stage_file(st, path, display, rules, cfg.fields, skip_reason=earlier_copy,
                                              legacy_digest=legacy_digest)
    if result.skipped:
        return result
    with st.transaction():
        if again:  # the earlier ingests of the same content come out first, in this transaction
            for earlier in st.files_with_content(seen_digests):
                st.take_back(earlier)
                result.taken_back += 1
        file_no = st.next_file_no()
        merged = _merge(st, cfg, file_no)
        result.ingested = merged["ingested"]
        result.duplicates = merged["duplicates"]
        if merged["held_back"]:
            result.held_back = {"beyond_dedupe_window": merged["held_back"]}
        result.unattributed = merged["unattributed"]
        st.log_ingest(display, digest, result, merged["first_day"], merged["last_day"], file_no)
    all_rejects.extend(file_rejects)
    return result


def _merge(st, cfg: Config, file_no: int | None) -> dict:
    """``Store.merge_staged`` under the config's dedupe and account rules."""
    merged = st.merge_staged(cfg.ingest.dedupe_window_days, cfg.ingest.accept_beyond_dedupe_window,
                             cfg.ingest.unknown_accounts == "reject", file_no, cfg.ingest.keep_file_contributions)
    st.note_newest_event(merged["newest_us"])
    return merged


def _nearest_ids(st, account: str) -> str:
    """", did you mean …?" with up to three stored account ids close to ``account`` (case aside)."""
    import difflib

    ids = st.account_ids()
    by_folded = {a.casefold(): a for a in ids}
    close = difflib.get_close_matches(account.casefold(), list(by_folded), n=3, cutoff=0.6)
    return f"; did you mean {', '.join(by_folded[c] for c in close)}?" if close else ""


def status(*, db: str | None = None, config=None) -> dict:
    """What the store holds: accounts, events, first and last day, last ingest, data-gap days."""
    from .series import fleet_gap_days

    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        info = st.status()
        totals = st.fleet_daily_totals()
    info["dedupe_window_days"] = cfg.ingest.dedupe_window_days
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
FLEET_SAMPLE_RUNS = 100


def fleet_sample(accounts: list[str]) -> tuple[list[str], list[tuple[str, str]]]:
    """The accounts fleet-wide quantities are measured on, and their id ranges: up to
    ``FLEET_SAMPLE_ACCOUNTS``, as ``FLEET_SAMPLE_RUNS`` runs of consecutive ids spread evenly
    over the sorted ``accounts``.  Runs rather than every k-th id: DuckDB reads narrow ranges
    of a table kept in account order without scanning the rest (0.08-0.17 s instead of 0.37 s
    on the 100k-account scan benchmark), and a table in another order costs one scan either
    way.  Runs of 50 keep the sample nearly as spread as every k-th id."""
    accounts = list(accounts)
    if len(accounts) <= FLEET_SAMPLE_ACCOUNTS:
        return accounts, [(min(accounts), max(accounts))] if accounts else []
    size = FLEET_SAMPLE_ACCOUNTS // FLEET_SAMPLE_RUNS
    starts = np.linspace(0, len(accounts) - size, FLEET_SAMPLE_RUNS).astype(int)
    runs = [accounts[s:s + size] for s in starts]
    return [a for run in runs for a in run], [(min(run), max(run)) for run in runs]


def _scan_params(cfg: Config):
    from .detect import ScanParams

    s = cfg.scan
    return ScanParams(window_days=s.window_days, min_history_days=s.min_history_days,
                      horizon_days=s.horizon_days, dormant_days=s.dormant_days)


def _fleet_params(cfg: Config, loader):
    """The scan's settings with the fleet-wide quantities the loader measured."""
    return replace(_scan_params(cfg), pooled_count_dispersion=loader.count_dispersion,
                   window_priors=loader.window_priors)


def _score_chunk(panel, *, cfg: Config, loader):
    """``score_panel`` on a block from ``loader.read``, once the fleet-wide quantities are in."""
    from .detect import score_panel

    panel = loader.with_fleet(panel)
    return score_panel(panel, _fleet_params(cfg, loader))


def fleet_factor_summary(voters: int) -> dict:
    """Whether the scan divided out fleet-wide days, and on how many voting accounts."""
    from .series import FLEET_MIN_ACCOUNTS

    return {"estimated": voters >= FLEET_MIN_ACCOUNTS, "voting_accounts": int(voters), "needed": FLEET_MIN_ACCOUNTS}


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

    from .series import fleet_gap_days

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
        self.count_dispersion = None
        self.window_priors = None
        self.fleet_voters = 0
        self._fleet_fit = None  # a Future while the fit runs in the background
        self._first_full = None
        self.first_full()  # before any thread reads blocks or fits the fleet

    def first_full(self, st=None) -> dict:
        """``{account: first full day}`` (day numbers, ``series.first_full_days``) from the whole
        store, not only the loader's window, so every window judges an account alike; read once."""
        from .series import first_full_days

        if self._first_full is None:
            st = st or self.st
            first_active = st.first_active_days(self.weights)
            start = st.first_day()
            data_start = (start - date(1970, 1, 1)).days if start is not None else 0
            days = first_full_days(np.fromiter(first_active.values(), np.int64, len(first_active)), data_start)
            self._first_full = dict(zip(first_active, days.tolist()))
        return self._first_full

    def first_full_of(self, accounts, st=None) -> np.ndarray:
        """The first full day of each of ``accounts`` (A,); a far-future day for one never active."""
        first = self.first_full(st)
        return np.array([first.get(a, NEVER_ACTIVE) for a in accounts], dtype=np.int64)

    def _rows(self, accounts, *, users: bool = False, ranges=None, st=None):
        """``(account_index, day, value, events, users)``; ``events``/``users`` are None and
        account-days may repeat (one row per event name) unless ``users`` is asked for.
        ``ranges``: id ranges holding the accounts (``Store.index_rows``); ``st``: the store
        handle to read through (default the loader's own)."""
        st = st or self.st
        start, end = day_to_date(self.start_day), day_to_date(self.end_day)
        if users:
            return st.weighted_daily(self.weights, list(accounts), start, end)
        return (*st.index_rows(self.weights, list(accounts), start, end, ranges), None, None)

    def sample_counts(self, accounts, st=None) -> np.ndarray:
        """Raw weighted totals (S, D) of the fleet sample (:func:`fleet_sample`) of ``accounts``."""
        from .series import dense_matrix

        sample, ranges = fleet_sample(accounts)
        idx, day, value, _, _ = self._rows(sample, ranges=ranges, st=st)
        return dense_matrix(idx, day, value, len(sample), self.start_day, self.end_day - self.start_day + 1)

    def fit_fleet_in_background(self, accounts):
        """Start :meth:`fit_fleet` in a thread of its own, on a cursor of the store (closed when
        the fit ends), so the first chunks are read meanwhile; :meth:`with_fleet` (and
        ``__call__``) wait for it.  Wait with :meth:`wait_for_fleet` before closing the store."""
        from concurrent.futures import ThreadPoolExecutor

        cursor = self.st.cursor()

        def fit():
            try:
                self.fit_fleet(accounts, cursor)
            finally:
                cursor.close()

        pool = ThreadPoolExecutor(1, thread_name_prefix="ebbwatch-fleet")
        self._fleet_fit = pool.submit(fit)
        pool.shutdown(wait=False)  # the fit still runs; the thread ends with it
        return self

    def wait_for_fleet(self):
        """Wait for a :meth:`fit_fleet_in_background` (re-raising its error); no-op otherwise."""
        if self._fleet_fit is not None:
            self._fleet_fit.result()
        return self

    def fit_fleet(self, accounts, st=None):
        """Measure the fleet-wide quantities (factor, gap mask, count dispersion) on the fleet
        sample of ``accounts``, read through ``st`` (default the loader's store)."""
        from .baseline.counts import pooled_dispersion
        from .detect import fleet_window_priors
        from .series import fleet_factor, fleet_voting_accounts, missing_before_first_full_day

        counts = self.sample_counts(accounts, st)
        sample, _ = fleet_sample(accounts)
        first_full = self.first_full_of(sample, st)
        self.fleet_factor, self.masked = fleet_factor(counts)
        self.fleet_voters = fleet_voting_accounts(counts)
        # The same fleet-wide count dispersion and window priors for every chunk (see
        # backtest.replay_fleet_factors).
        started = missing_before_first_full_day(counts, first_full - self.start_day)
        started[:, self.masked] = np.nan
        self.count_dispersion = pooled_dispersion(started, window=self.cfg.scan.window_days)
        self.window_priors = fleet_window_priors(counts, self.fleet_factor, self.masked,
                                                 np.arange(self.start_day, self.end_day + 1), _scan_params(self.cfg),
                                                 first_full_day=first_full)
        return self

    def read(self, accounts):
        """The block's :class:`series.Panel` without the fleet-wide factor and gap mask, which
        :meth:`with_fleet` adds (so a block can be read while the fleet fit runs)."""
        from .series import build_panel

        idx, day, value, events, users = self._rows(accounts, users=self.cfg.index.normalise == "active_users")
        seats = [self.seats.get(a) for a in accounts]
        return build_panel(idx, day, value, events, users, accounts=accounts, start_day=self.start_day,
                           end_day=self.end_day, normalise=self.cfg.index.normalise,
                           seats=np.array([np.nan if s is None else s for s in seats], float),
                           first_full_day=self.first_full_of(accounts))

    def with_fleet(self, panel):
        """A panel from :meth:`read` with the fleet factor and gap mask applied (waiting for a
        fit in the background first)."""
        from .series import with_fleet

        self.wait_for_fleet()
        return with_fleet(panel, self.fleet_factor, self.masked)

    def __call__(self, accounts):
        return self.with_fleet(self.read(accounts))


def _blocks(accounts: list[str], size: int) -> list[tuple[int, list[str]]]:
    """``(part, accounts)`` pairs: the account blocks ``Store.export_index_parts`` writes."""
    from .engine import chunked

    return list(enumerate(chunked(list(accounts), size)))


@contextmanager
def _exchange(st, loader, accounts_per_part: int, shared_dir: str | None):
    """The store's index for ``loader``'s window, exported as Parquet blocks into a fresh folder
    (inside ``shared_dir`` when given: it must be readable by every worker), removed afterwards."""
    import tempfile

    with tempfile.TemporaryDirectory(prefix="ebbwatch-exchange-", dir=shared_dir) as directory:
        st.export_index_parts(directory, loader.weights, day_to_date(loader.start_day), day_to_date(loader.end_day),
                              accounts_per_part)
        yield directory


def _on_dask(scheduler, task, blocks, progress, block_size: int, n_accounts: int):
    """``task`` over account ``blocks`` on the cluster; progress is counted in accounts."""
    from .engine.dask import dask_client, map_dask

    in_accounts = None if progress is None else (
        lambda done, _: progress(min(done * block_size, n_accounts), n_accounts))
    with dask_client(scheduler) as client:
        return map_dask(client, task, blocks, progress=in_accounts)


def _seats(loader) -> dict:
    return {a: s for a, s in loader.seats.items() if s == s}


def _score_on_dask(st, loader, accounts, params, chunk_size, scheduler, progress, shared_dir=None):
    import functools

    from .engine.dask import concat_accounts
    from .tasks import score_part

    blocks = _blocks(accounts, chunk_size)
    with _exchange(st, loader, chunk_size, shared_dir) as directory:
        task = functools.partial(score_part, directory=directory, start_day=loader.start_day, end_day=loader.end_day,
                                 normalise=loader.cfg.index.normalise, seats=_seats(loader),
                                 fleet_factor=loader.fleet_factor, masked=loader.masked, params=params,
                                 first_full=loader.first_full())
        return concat_accounts(_on_dask(scheduler, task, blocks, progress, chunk_size, len(accounts)), accounts)


def export_index(output: str, *, as_of=None, history_days: int | None = None, accounts_per_part: int = 10_000,
                 db: str | None = None, config=None, today: date | None = None) -> dict:
    """Write the activity index the scan reads (weights and exclusions applied) as a Parquet
    dataset of account blocks in the folder ``output`` (see ``Store.export_index_parts``), for
    a Dask cluster or a notebook.  Returns what was written and the window."""
    cfg = _config(config)
    as_of = parse_day(as_of)
    if accounts_per_part < 1 or (history_days is not None and history_days < 1):
        raise UsageError("accounts per part and history days must be >= 1")
    target = Path(output)
    if target.exists() and (not target.is_dir() or any(target.iterdir())):
        raise UsageError(f"{output} exists and is not an empty folder; give a new folder (nothing was written)")
    with store_mod.open_store(db or cfg.store_path, read_only=True, must_exist=True) as st:
        if as_of is None:  # an export judges nothing: every stored day goes
            as_of = default_as_of(st.last_day(), today)
        check_as_of(st, as_of)
        loader = PanelLoader(st, cfg, as_of, history_days or cfg.scan.history_days)
        info = st.export_index_parts(output, loader.weights, day_to_date(loader.start_day), day_to_date(loader.end_day),
                                     accounts_per_part)
    info.update({"directory": output, "from": day_to_date(loader.start_day).isoformat(), "to": as_of.isoformat(),
                 "accounts_per_part": accounts_per_part})
    return info


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
    record: bool = False,
    show: str = "all",
    drivers: bool = True,
    engine: str = "local",
    scheduler: str | None = None,
    shared_dir: str | None = None,
    threads: int | None = None,
):
    """Judge every account at ``as_of`` (default: the last complete day) and return the alerts.

    Returns a DataFrame with ``frames.ALERT_COLUMNS`` ranked by severity; ``.attrs["summary"]``
    holds the counts (accounts judged, not enough history, dormant, masked days) and
    ``.attrs["scores"]`` the per-account scores.  ``record`` writes the day's alert states to
    the store (the daily job does; a look at a past day does not).  ``show``: ``all`` open
    alerts, or only ``new`` and escalated ones; snoozed accounts are never shown.  ``engine``:
    ``local`` (chunks in this process) or ``dask`` (chunks on a cluster: ``scheduler`` is
    ``local[:N]`` or a scheduler address; workers read a Parquet export of the store, written
    into a temporary folder inside ``shared_dir``, which every worker must be able to read).
    ``threads``: chunks scored at once by the local engine (default: one per core, at most 4).
    """
    if engine not in ("local", "dask"):
        raise UsageError(f"unknown engine {engine!r}; expected local or dask")
    from .alerts import advance_lifecycle, select_alerts, still_changed
    import functools

    import pandas as pd

    from .engine import default_threads, run_local

    if show not in ("all", "new"):
        raise UsageError(f"show must be all or new, got {show!r}")
    from .frames import ALERT_KINDS

    unknown = set(kinds or ()) - set(ALERT_KINDS)
    if unknown:
        raise UsageError(f"unknown alert kind(s) {', '.join(sorted(unknown))}; expected {', '.join(ALERT_KINDS)}")
    cfg = _config(config)
    started = time.perf_counter()
    as_of = parse_day(as_of)
    with store_mod.open_store(db or cfg.store_path, read_only=not record, must_exist=True) as st:
        if as_of is None:
            as_of, as_of_reason = last_complete_day(st, today)
        else:
            as_of_reason = "given (--as-of)"
        check_as_of(st, as_of)
        accounts = st.account_ids()
        if not accounts:
            raise InputError("the store has no accounts yet; ingest events or --daily first")
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days)
        if engine == "dask":
            loader.fit_fleet(accounts)
            scores = _score_on_dask(st, loader, accounts, _fleet_params(cfg, loader), chunk_size, scheduler,
                                    progress, shared_dir)
        else:
            # The fleet fit (about 1 s on 100k accounts) overlaps the reading of the first
            # chunks; each chunk's scoring waits for it (_score_chunk).
            loader.fit_fleet_in_background(accounts)
            try:
                parts = run_local(accounts, loader.read, functools.partial(_score_chunk, cfg=cfg, loader=loader),
                                  chunk_size=chunk_size, progress=progress, threads=threads or default_threads())
            finally:
                loader.wait_for_fleet()
            scores = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
        # The day's judgement is the whole fleet's, whatever is printed: --kind, --max-alerts and
        # the output format choose what is shown, never what is recorded.
        alerts = select_alerts(
            scores, as_of=as_of, names=loader.names, window_days=cfg.scan.window_days, fdr=cfg.scan.fdr,
            max_alerts=None, min_change_pct=cfg.scan.min_change_pct, min_severity=cfg.scan.min_severity,
        )
        lifecycle = advance_lifecycle(st.alert_states_before(as_of), alerts, as_of,
                                      holding=still_changed(scores, cfg.scan.min_change_pct))
        snoozed = st.snoozed_accounts(as_of)
        history_changed = st.history_changes_since_last_record()
        if record:
            with st.transaction():
                st.record_alert_day(as_of, lifecycle)
        state_of = dict(zip(zip(lifecycle["account"].tolist(), lifecycle["direction"].tolist()),
                            lifecycle["state"].tolist()))
        alerts["state"] = [state_of.get((a, d), "new") for a, d in zip(alerts["account"], alerts["direction"])]
        hidden = alerts["account"].isin(list(snoozed))
        wanted = ~hidden if show == "all" else ~hidden & alerts["state"].isin(["new", "escalated"])
        if kinds:
            wanted &= alerts["kind"].isin(list(kinds))
        limit = cfg.scan.max_alerts if max_alerts is None else max_alerts
        shown = alerts[wanted].head(limit).reset_index(drop=True)  # alerts come most severe first
        if drivers and len(shown):
            _add_drivers(st, loader, scores, shown, as_of, cfg.scan.window_days)
        known = st.accounts().set_index("account")
        # What accounts.csv says of the shown accounts (MRR, segment), for the tables people read.
        details = {a: {"mrr": _clean_value(known.at[a, "mrr"]), "segment": _clean_value(known.at[a, "segment"])}
                   for a in shown["account"] if a in known.index}
    masked_days = [
        (date(1970, 1, 1) + timedelta(days=loader.start_day + int(i))).isoformat()
        for i in np.flatnonzero(loader.masked)
    ]
    counts = scores["status"].value_counts().to_dict() if len(scores) else {}
    shown.attrs["summary"] = {
        "as_of": as_of.isoformat(),
        "as_of_reason": as_of_reason,
        "accounts": len(scores),
        "judged": int(counts.get("judged", 0)),
        "not_enough_history": sorted(scores.loc[scores["status"] == "not_enough_history", "account"].tolist()),
        "dormant": int(counts.get("dormant", 0)),
        "alerts": len(shown),
        "open_alerts": len(alerts),
        "snoozed": int(hidden.sum()),
        "resolved_today": int((lifecycle["state"] == "resolved").sum()) if len(lifecycle) else 0,
        "recorded": bool(record),
        "history_changed": history_changed,
        "masked_days": masked_days,
        "fleet_factor": fleet_factor_summary(loader.fleet_voters),
        "seconds": round(time.perf_counter() - started, 3),
    }
    shown.attrs["scores"] = scores
    shown.attrs["lifecycle"] = lifecycle  # the day's whole judgement: every open alert's state
    shown.attrs["snoozed"] = {a: (u.isoformat(), r) for a, (u, r, _) in snoozed.items()}
    shown.attrs["fleet_factor"] = loader.fleet_factor
    shown.attrs["masked"] = loader.masked
    shown.attrs["start_day"] = loader.start_day
    shown.attrs["account_details"] = details
    return shown


def _clean_value(value):
    """A cell from accounts.csv, with pandas' missing values as None."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return None
    return value.item() if hasattr(value, "item") else value


def _period_days(start_day: int, end_day: int, masked, panel_start: int) -> np.ndarray:
    """Day numbers from ``start_day`` to ``end_day`` (inclusive) that are not masked."""
    days = np.arange(start_day, end_day + 1)
    column = days - panel_start
    inside = (column >= 0) & (column < len(masked))
    hidden = np.zeros(days.size, bool)
    hidden[inside] = np.asarray(masked, bool)[column[inside]]
    return days[~hidden]


BASELINE_DRIVER_DAYS = 56


def _find_drivers(st, loader, targets, as_of, window_days, max_events=None) -> list[list[dict]]:
    """Drivers for each ``(account, reference_end_day, direction)`` in ``targets``: the window is
    the last ``window_days`` days, the baseline the 8 weeks before the reference history ends
    (from the account's first full day if later), masked days left out of both; event totals are summed in the store, and user rows (where
    the store has them) read in one query."""
    import pandas as pd

    from .explain import drivers_from_sums, user_drivers

    end = (as_of - date(1970, 1, 1)).days
    first_needed = max(min(ref for _, ref, _ in targets) - BASELINE_DRIVER_DAYS, loader.start_day)
    accounts = [account for account, _, _ in targets]
    window = _period_days(end - window_days + 1, end, loader.masked, loader.start_day)
    # A young account's baseline starts at its first full day, not on days it did not exist.
    first_full = loader.first_full_of(accounts)
    baseline_first = [max(reference_end - BASELINE_DRIVER_DAYS, loader.start_day, int(first))
                      for (_, reference_end, _), first in zip(targets, first_full)]
    baselines = [(account, _period_days(first, reference_end - 1, loader.masked, loader.start_day))
                 for first, (account, reference_end, _) in zip(baseline_first, targets)]
    periods = pd.DataFrame({"place": np.arange(len(targets)), "account": accounts, "first": baseline_first,
                            "last": [reference_end - 1 for _, reference_end, _ in targets]})
    masked_days = loader.start_day + np.flatnonzero(loader.masked)
    sums = st.event_period_sums(loader.weights, periods, (end - window_days + 1, end), masked_days)
    found = [drivers[:max_events] for drivers in
             drivers_from_sums(sums, loader.weights, [len(days) for _, days in baselines], len(window))]
    users = st.accounts_user_activity(accounts, date(1970, 1, 1) + timedelta(days=first_needed), as_of)
    users_by = dict(list(users.groupby("account")))
    for drivers, (account, baseline), (_, _, direction) in zip(found, baselines, targets):
        if account in users_by:
            drivers += user_drivers(users_by[account], loader.weights, baseline, window, direction)
    return found


def _add_drivers(st, loader, scores, alerts, as_of, window_days):
    """Fill the ``drivers`` column and extend each ``message`` with a short clause."""
    from .alerts import alert_message
    from .explain import drivers_phrase
    from .textsafe import plain_text

    reference_end = scores.set_index("account")["reference_end_day"]
    targets = [(a, int(reference_end[a]), d) for a, d in zip(alerts["account"], alerts["direction"])]
    driver_lists = _find_drivers(st, loader, targets, as_of, window_days, max_events=5)
    alerts["drivers"] = driver_lists
    # Records from column lists: DataFrame.to_dict("records") boxes every cell (~0.15 s for
    # ~5,000 alerts).
    fields = ("account", "name", "kind", "direction", "change_pct", "onset", "silent_days",
              "trend_change_pct", "percentile", "severity", "window_days")
    columns = [alerts[name].tolist() for name in fields]
    records = [dict(zip(fields, values)) for values in zip(*columns)]
    alerts["message"] = [alert_message(record, record["window_days"], drivers_phrase(found, plain_text))
                         for record, found in zip(records, driver_lists)]


# -- explain, snooze, alert history -----------------------------------------------------------

def explain(account: str, *, as_of=None, db: str | None = None, config=None, today: date | None = None) -> dict:
    """Everything the scan knows about one account on ``as_of``, as a JSON-ready dict.

    The account is judged exactly as in the scan (the fleet factor comes from the whole fleet),
    and the result says which baseline model was chosen and why, the weekday factors, the recent
    level with its percentile and tail probabilities, the changepoint, trend, silence, drivers,
    and the daily series behind them (for plotting).
    """
    from .detect import history_segments, score_panel

    cfg = _config(config)
    as_of = parse_day(as_of)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        if as_of is None:
            as_of, _ = last_complete_day(st, today)
        check_as_of(st, as_of)
        if not st.has_account(account):
            raise InputError(f"no account {account!r} in the store{_nearest_ids(st, account)}; "
                             "`ebbwatch status` lists what is there")
        accounts = st.account_ids()
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days).fit_fleet(accounts)
        panel = loader([account])
        params = _fleet_params(cfg, loader)
        row = score_panel(panel, params).iloc[0]
        segments = history_segments(panel, params)[0]
        reference_end = int(row["reference_end_day"])
        direction = "down" if row["p_down"] <= row["p_up"] else "up"
        drivers = _find_drivers(st, loader, [(account, reference_end, direction)], as_of, cfg.scan.window_days)[0]
    today_alerts = _alerts_on(account, as_of, db=db, config=cfg)
    weekday_names = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
    f = lambda v: None if v is None or (isinstance(v, float) and not np.isfinite(v)) else float(v)  # noqa: E731
    points = int(row["n_reference"])
    if row["model"] == "history":
        why = (f"its own history: the same comparisons on {points} earlier days show how much its "
               "activity varies when nothing in particular happens")
    else:
        why = (f"mostly the fleet's typical variation: only {points} earlier days to compare with, "
               "so its own history is weighted against the fleet's")
    if row["low_volume"]:
        why += "; low volume, so a drop is never more significant than a negative binomial count allows"
    days = panel.days
    return {
        "account": account,
        "name": loader.names.get(account) or account,
        "as_of": as_of.isoformat(),
        "status": row["status"],
        "today": today_alerts,
        "masked_days_in_window": [day_to_date(x).isoformat() for x in days[-cfg.scan.window_days:]
                                  if loader.masked[int(x) - loader.start_day]],
        "baseline": {"model": row["model"], "why": why, "history_days": points,
                     "growth_pct_year": f(row["growth_pct_year"]), "low_volume": bool(row["low_volume"]),
                     "reference_ends": day_to_date(reference_end).isoformat()},
        "weekday_factors": dict(zip(weekday_names, (round(float(v), 3) for v in row["weekday_factors"]))),
        "recent": {"window_days": int(row["window_days"]), "level": f(row["window_level"]),
                   "usual_level": f(row["window_baseline"]), "change_pct": f(row["change_pct"]),
                   "percentile": f(row["percentile"]), "p_low": f(row["p_level_low"]), "p_high": f(row["p_level_high"])},
        "changepoint": {"onset": None if row["onset_day"] < 0 else day_to_date(row["onset_day"]).isoformat(),
                        "level_before": f(row["level_before"]), "level_after": f(row["level_after"]),
                        "kind_if_down": row["down_kind"]},
        "trend": {"weeks": int(row["trend_weeks"]), "theil_sen_change_pct": f(row["trend_change_pct"]), "mann_kendall_p_down": f(row["p_trend_down"])},
        "segments": [{"start": day_to_date(a).isoformat(), "end": day_to_date(b).isoformat(), "level": f(level)}
                     for a, b, level in segments],
        "silence": {"silent_days": int(row["silent_days"]), "p_silence": f(row["p_stop"])},
        "p_down": f(row["p_down"]), "p_up": f(row["p_up"]),
        "drivers": drivers,
        "series": {"days": [day_to_date(d).isoformat() for d in days],
                   "index": [None if not np.isfinite(v) else round(float(v), 3) for v in panel.values[0] / panel.fleet_factor]},
    }


def _finite(value):
    """A float, or None for a missing or non-finite value (a NaN kept by a DataFrame)."""
    return None if value is None or not np.isfinite(value) else float(value)


def _alerts_on(account: str, as_of: date, *, db, config) -> dict:
    """Whether ``account`` is alerted on ``as_of`` in the whole fleet's judgement (the scan's,
    not recorded): ``{"alerted", "alerts": [{direction, kind, state, severity, opened}],
    "snoozed_until", "snooze_reason"}``.  An open alert no longer significant but still changed
    is listed with its state and no severity."""
    judged = scan(as_of=as_of, db=db, config=config, drivers=False, max_alerts=0)
    lifecycle = judged.attrs["lifecycle"]
    mine = lifecycle[lifecycle["account"] == account] if len(lifecycle) else lifecycle
    rows = [{"direction": r.direction, "kind": r.kind, "state": r.state,
             "severity": None if r.severity is None or r.severity != r.severity else float(r.severity),
             "opened": r.opened.isoformat() if hasattr(r.opened, "isoformat") else str(r.opened)}
            for r in mine.itertuples() if r.state != "resolved"]
    until, reason = judged.attrs["snoozed"].get(account, (None, None))
    return {"alerted": any(r["severity"] is not None for r in rows), "alerts": rows,
            "snoozed_until": until, "snooze_reason": reason}


SNOOZE_LONGEST_DAYS = 366


def snooze(account: str, until, *, reason: str | None = None, force: bool = False, db: str | None = None,
           config=None, today: date | None = None) -> dict:
    """Hide ``account``'s alerts until ``until`` (inclusive); the latest snooze of an account
    wins, so a shorter one shortens it.  An end before ``today`` or more than a year after it
    is refused unless ``force`` (a typo would otherwise hide an account for good, or not at all)."""
    cfg = _config(config)
    until = parse_day(until, "--until")
    today = today or datetime.now(timezone.utc).date()
    if not force and until < today:
        raise UsageError(f"--until {until} is in the past (today is {today}); to end a snooze use --lift, "
                         "or give --force to record it anyway")
    if not force and until > today + timedelta(days=SNOOZE_LONGEST_DAYS):
        raise UsageError(f"--until {until} is more than a year away; give --force if that is meant")
    with store_mod.open_store(db or cfg.store_path, must_exist=True) as st:
        if not st.has_account(account):
            raise InputError(f"no account {account!r} in the store{_nearest_ids(st, account)}")
        st.add_snooze(account, until, reason)
    return {"account": account, "until": until.isoformat(), "reason": reason}


def lift_snooze(account: str, *, db: str | None = None, config=None) -> dict:
    """Show ``account``'s alerts again: its snoozes are removed."""
    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, must_exist=True) as st:
        removed = st.lift_snooze(account)
    if not removed:
        raise InputError(f"{account!r} has no snooze to lift; `ebbwatch snooze --list` shows the snoozes")
    return {"account": account, "lifted": removed}


def snoozes(*, db: str | None = None, config=None, today: date | None = None):
    """The snoozes in force on ``today``: a frame ``account, until, reason, set_at``."""
    import pandas as pd

    cfg = _config(config)
    today = today or datetime.now(timezone.utc).date()
    with store_mod.open_store(db or cfg.store_path, read_only=True, must_exist=True) as st:
        found = st.snoozed_accounts(today)
    rows = [(a, u.isoformat(), r, c.isoformat(timespec="seconds") if c else None) for a, (u, r, c) in sorted(found.items())]
    return pd.DataFrame(rows, columns=["account", "until", "reason", "set_at"])


def alert_history(*, states=None, accounts=None, start=None, end=None, db: str | None = None, config=None,
                  today: date | None = None):
    """The recorded alert log (one row per recorded scan day and open alert), newest first,
    narrowed to ``states``, ``accounts`` and the days ``start`` .. ``end``; the columns
    ``snoozed_until`` and ``snooze_reason`` say which accounts are snoozed ``today``."""
    from .alerts import LIFECYCLE_STATES

    unknown = set(states or ()) - set(LIFECYCLE_STATES)
    if unknown:
        raise UsageError(f"unknown state(s) {', '.join(sorted(unknown))}; expected {', '.join(LIFECYCLE_STATES)}")
    start, end = parse_day(start, "--from"), parse_day(end, "--to")
    cfg = _config(config)
    today = today or datetime.now(timezone.utc).date()
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        log = st.alert_log(states, accounts, start, end)
        snoozed = st.snoozed_accounts(today)
    log["snoozed_until"] = [snoozed[a][0].isoformat() if a in snoozed else None for a in log["account"]]
    log["snooze_reason"] = [snoozed[a][1] if a in snoozed else None for a in log["account"]]
    return log


# -- backtest --------------------------------------------------------------------------------

def backtest(outcomes: str, *, start=None, end=None, step: int = 1, lead_days: int = 30, horizon_days: int = 90,
             budget: float | None = None, target_precision: float | None = None, db: str | None = None,
             config=None, progress=None, today: date | None = None, chunk_size: int = 10_000,
             engine: str = "local", scheduler: str | None = None, shared_dir: str | None = None,
             threads: int | None = None) -> dict:
    """Replay the daily scan from ``start`` to ``end`` every ``step`` days against ``outcomes``
    (a CSV ``account,date,outcome``) and return the metrics, a severity sweep and a calibration.

    Accounts are replayed in blocks of ``chunk_size`` (memory is bounded by the block), in this
    process or, with ``engine="dask"``, on a cluster as in :func:`scan`.  Each day's fleet factor
    comes from one fleet-wide sample and each day's Benjamini–Hochberg step sees the whole
    fleet, so the blocks give the same alerts as one pass over every account.
    """
    import functools

    from .backtest import (calibrate, churn_days, evaluate, lookback_days, replay_fleet_factors, select_replayed,
                           sweep)
    from .engine import default_threads
    from .ingest.csvs import read_outcomes

    if engine not in ("local", "dask"):
        raise UsageError(f"unknown engine {engine!r}; expected local or dask")
    if step < 1 or lead_days < 0 or horizon_days < max(lead_days, 1):
        raise UsageError("need --step >= 1, --lead-days >= 0 and --horizon-days >= max(--lead-days, 1)")
    if chunk_size < 1:
        raise UsageError(f"chunk size must be >= 1, got {chunk_size}")
    cfg = _config(config)
    started = time.perf_counter()
    outcome_frame = read_outcomes(outcomes)
    start, end = parse_day(start, "--from"), parse_day(end, "--to")
    params = _scan_params(cfg)
    history_days = cfg.scan.history_days
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        first_day = st.status()["first_day"]
        if first_day is None:
            raise InputError("the store has no activity yet; ingest events or --daily first")
        end = end or last_complete_day(st, today)[0]
        check_as_of(st, end, "--to")
        start = start or first_day + timedelta(days=cfg.scan.min_history_days + cfg.scan.window_days)
        if start > end:
            raise UsageError(f"--from {start} is after --to {end}")
        accounts = st.account_ids()
        history = max((end - first_day).days + 1, cfg.scan.window_days + 14)
        loader = PanelLoader(st, cfg, end, history)
        sampled = list(range((start - EPOCH).days, (end - EPOCH).days + 1, step))
        # Each sampled day with the days before it, so an alert new on it is told as the daily
        # scan tells it and the rates estimated do not depend on the step.
        days = lookback_days(sampled)
        sample_counts = loader.sample_counts(accounts)
        factors = replay_fleet_factors(sample_counts, loader.start_day, days, history_days=history_days,
                                       params=params, first_full_day=loader.first_full_of(fleet_sample(accounts)[0]))
        never = np.iinfo(np.int64).max
        churn = {a: int(c) for a, c in zip(accounts, churn_days(accounts, outcome_frame)) if c != never}
        replay = dict(as_of_days=days, fleet_factors=factors, churn=churn, params=params, history_days=history_days,
                      fdr=cfg.scan.fdr)
        if engine == "dask":
            from .tasks import replay_part

            blocks = _blocks(accounts, chunk_size)
            with _exchange(st, loader, chunk_size, shared_dir) as directory:
                task = functools.partial(replay_part, directory=directory, start_day=loader.start_day,
                                         end_day=loader.end_day, normalise=cfg.index.normalise, seats=_seats(loader),
                                         first_full=loader.first_full(), **replay)
                results = _on_dask(scheduler, task, blocks, progress, chunk_size, len(accounts))
        else:
            from .engine import run_local
            from .tasks import replay_block

            results = run_local(accounts, loader, functools.partial(replay_block, **replay), chunk_size=chunk_size,
                                progress=progress, threads=threads or default_threads())
    import pandas as pd

    found = [candidates for candidates, _ in results if len(candidates)]
    candidates = pd.concat(found, ignore_index=True) if found else pd.DataFrame(columns=["as_of_day"])
    judged = np.sum([j for _, j in results], axis=0) if results else np.zeros(len(days), dtype=np.int64)
    alerts, exposure = select_replayed(candidates, judged, days, fdr=cfg.scan.fdr,
                                       min_change_pct=cfg.scan.min_change_pct, window_days=params.window_days)
    exposure["sampled"] = np.isin(days, sampled)
    kw = dict(lead_days=lead_days, horizon_days=horizon_days)
    result = evaluate(alerts[alerts["severity"] >= cfg.scan.min_severity], outcome_frame, exposure, **kw)
    thresholds = sorted({0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 7.5, 10.0, 15.0, 20.0, 30.0})
    swept = sweep(alerts, outcome_frame, exposure, thresholds, **kw)
    chosen = calibrate(swept, budget=budget, target_precision=target_precision) if (budget or target_precision) else None
    result.update({
        "from": start.isoformat(), "to": end.isoformat(), "step_days": step, "lookback_days_replayed": len(days) - len(sampled),
        "sweep": [{"min_severity": m["min_severity"], "alerts_per_day": m["alerts_per_day"],
                   "false_alerts_per_100_account_months": m["false_alerts_per_100_account_months"],
                   "outcomes": {k: {"recall_at_lead": v["recall_at_lead"], "precision": v["precision"],
                                    "median_lead_days": v["median_lead_days"]} for k, v in m["outcomes"].items()}}
                  for m in swept],
        "calibration": None if chosen is None else {
            "min_severity": chosen["min_severity"], "budget": budget, "target_precision": target_precision,
            "alerts_per_day": chosen["alerts_per_day"],
            "config": f"[scan]\nmin_severity = {chosen['min_severity']}\n"},
        "seconds": round(time.perf_counter() - started, 3),
    })
    if (budget or target_precision) and chosen is None:
        result["calibration"] = {"min_severity": None, "budget": budget, "target_precision": target_precision,
                                 "note": "no severity threshold in the sweep meets it"}
    result["_lead_times"] = _lead_list(alerts, outcome_frame, horizon_days)
    result["_alerts"], result["_exposure"] = alerts, exposure  # every replayed alert, for programs
    return result


def _lead_list(alerts, outcomes, horizon_days) -> list:
    import pandas as pd

    from .backtest import UP_OUTCOMES

    leads = []
    a = alerts.assign(as_of=pd.to_datetime(alerts["as_of"]))
    for o in outcomes.itertuples():
        direction = "up" if o.outcome in UP_OUTCOMES else "down"
        d = pd.Timestamp(o.date)
        mine = a[(a["account"] == o.account) & (a["direction"] == direction) & (a["as_of"] <= d)
                 & (a["as_of"] >= d - pd.Timedelta(days=horizon_days))]
        if len(mine):
            leads.append(int((d - mine["as_of"].min()).days))
    return leads


# -- HTML report -------------------------------------------------------------------------------

SHOWN_DAYS = 120  # days a card's chart and an index sparkline show
INDEX_LIMIT = 5_000  # accounts the report's index lists at most (a larger fleet: see ``scan --all``)


def _chart_levels(panel, scores, window: int):
    """The panel's daily values (fleet factor divided out) and their weekday-adjusted trailing
    ``window``-day levels, both (A, D), with each account's weekday factors from ``scores``."""
    from .detect.tail import trailing_levels
    from .series import weekday_of

    values = panel.values / panel.fleet_factor
    factors = np.ones((len(panel.accounts), 7))
    for i, account in enumerate(panel.accounts):
        own = scores.at[account, "weekday_factors"] if account in scores.index else None
        if own is not None and len(own) == 7 and np.all(np.isfinite(own)):
            factors[i] = own
    return values, trailing_levels(values, factors, weekday_of(panel.days), window)


def _finite_list(values) -> list:
    return [float(v) if np.isfinite(v) else None for v in values]


def report_data(*, as_of=None, limit: int = 50, index_limit: int = INDEX_LIMIT, db: str | None = None, config=None,
                today: date | None = None) -> dict:
    """What the HTML report shows: the fleet overview; per alert (at most ``limit``) the account's
    last days, their weekday-adjusted 7-day level, its usual band, onset and segments; and an
    index of every account the scan saw (at most ``index_limit``, by id) with its state, level
    and a sparkline.  Levels are in activity-index units a day."""
    from .alerts import history_rank
    from .detect import history_segments
    from .explain import drivers_phrase

    cfg = _config(config)
    alerts = scan(as_of=as_of, db=db, config=config, max_alerts=limit, today=today)
    summary = alerts.attrs["summary"]
    scores = alerts.attrs["scores"].set_index("account")
    masked = alerts.attrs["masked"]
    as_of = parse_day(summary["as_of"])
    lifecycle = alerts.attrs["lifecycle"]
    open_alerts = lifecycle[lifecycle["state"] != "resolved"] if len(lifecycle) else lifecycle
    index_accounts = sorted(scores.index)[:index_limit]
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days)
        loader.fleet_factor, loader.masked = alerts.attrs["fleet_factor"], masked
        meta = st.accounts().set_index("account")
        panel = loader(list(alerts["account"])) if len(alerts) else None
        index_panel = loader(index_accounts) if index_accounts else None
        states = st.alert_log()
        totals = st.weighted_daily(loader.weights, st.account_ids(), as_of - timedelta(days=27), as_of)
        all_accounts = st.account_ids()
    window = cfg.scan.window_days
    reference_days = _scan_params(cfg).reference_days
    shown = slice(-SHOWN_DAYS, None)
    days = [day_to_date(d).isoformat() for d in range(loader.end_day - SHOWN_DAYS + 1, loader.end_day + 1)]
    cards = []
    first_shown = loader.end_day - SHOWN_DAYS + 1
    if panel is not None:
        all_segments = history_segments(panel, _scan_params(cfg))
        values, levels = _chart_levels(panel, scores, window)
    for i, alert in enumerate(alerts.to_dict(orient="records")):
        row = scores.loc[alert["account"]]
        # The band: the middle half of the 7-day levels over the account's reference half-year,
        # on the scale of the level line drawn over it.
        reference_end = int(row["reference_end_day"]) - panel.start_day
        ref = levels[i, max(reference_end - reference_days + window - 1, 0): max(reference_end, 0)]
        ref = ref[np.isfinite(ref)]
        band = (float(np.percentile(ref, 25)), float(np.percentile(ref, 75))) if ref.size else None
        onset_index = None
        alert["onset"] = alert["onset"] if isinstance(alert["onset"], str) else None
        if alert["change_pct"] is not None and not np.isfinite(alert["change_pct"]):
            alert["change_pct"] = None
        if alert["onset"]:
            onset_index = (date.fromisoformat(alert["onset"]) - as_of).days + SHOWN_DAYS - 1
        events = [d for d in alert["drivers"] if d["type"] == "event"][:2]
        words = [f"{d['event']} {d['expected']:.0f} expected, {d['observed']:.0f} seen" for d in events]
        users = [d for d in alert["drivers"] if d["type"] == "user"]
        if users:
            words.append(drivers_phrase(users, str))
        cards.append({
            "account": alert["account"], "name": alert["name"], "kind": alert["kind"], "direction": alert["direction"],
            "state": alert["state"], "severity": alert["severity"], "percentile": _finite(alert["percentile"]),
            "rank": history_rank(_finite(alert["percentile"]), alert["direction"]),
            "change": "of unknown size" if alert["change_pct"] is None else f"{alert['change_pct']:+.0f}%",
            "onset": alert["onset"], "days": days, "raw": _finite_list(values[i, shown]),
            "level": _finite_list(levels[i, shown]), "band": band, "window": window,
            "onset_index": onset_index, "driver_words": words,
            "masked": [j for j, m in enumerate(masked[shown]) if m],
            "segments": [(max(a, first_shown) - first_shown, b - first_shown, level)
                         for a, b, level in all_segments[i] if b >= first_shown],
            **alerts.attrs.get("account_details", {}).get(alert["account"], {"mrr": None, "segment": None}),
        })
    idx, _, value, _, _ = totals
    activity = np.bincount(idx, weights=value, minlength=len(all_accounts))
    down = set(open_alerts.loc[open_alerts["direction"] == "down", "account"]) if len(open_alerts) else set()
    mrr = meta["mrr"].dropna() if "mrr" in meta else None
    if mrr is not None and len(mrr) and mrr.sum() > 0:
        at_stake = float(mrr[mrr.index.isin(down)].sum())
        basis, share = "mrr", at_stake / float(mrr.sum())
    else:
        in_down = np.array([a in down for a in all_accounts])
        at_stake = float(activity[in_down].sum())
        basis, share = "activity", at_stake / max(float(activity.sum()), 1e-9)
    latest = states[states["as_of"] == states["as_of"].max()] if len(states) else states
    by_state = latest["state"].value_counts().to_dict() if len(latest) else alerts["state"].value_counts().to_dict()
    return {
        "summary": summary, "n_alerts": len(alerts), "by_kind": alerts["kind"].value_counts().to_dict(),
        "by_state": by_state, "share_basis": basis, "down_share": share, "down_at_stake": at_stake,
        "down_accounts": len(down), "cards": cards,
        "index": _index_rows(index_panel, scores, open_alerts, meta, window) if index_panel is not None else [],
        "index_total": len(scores),
        "fleet": {"days": [day_to_date(d).isoformat() for d in range(loader.start_day, loader.end_day + 1)],
                  "factor": [float(f) for f in alerts.attrs["fleet_factor"]], "masked": [bool(m) for m in masked],
                  "masked_days": summary["masked_days"]},
    }


def _index_rows(panel, scores, open_alerts, meta, window: int) -> list[dict]:
    """The report's account index: per account of ``panel`` its status, open alerts, 7-day level
    against its usual level, MRR and segment, and the last days' levels for a sparkline."""
    _, levels = _chart_levels(panel, scores, window)
    alerts_of = {}
    for r in open_alerts.itertuples():
        alerts_of.setdefault(r.account, []).append(f"{r.kind} ({r.state})")
    rows = []
    for i, account in enumerate(panel.accounts):
        row = scores.loc[account]
        level, usual = _finite(row["level"]), _finite(row["baseline_level"])
        rows.append({
            "account": account, "name": _clean_value(meta["name"].get(account)) if "name" in meta else None,
            "status": row["status"], "alerts": alerts_of.get(account, []), "level": level, "usual": usual,
            "change_pct": 100.0 * (level / usual - 1.0) if level is not None and usual else None,
            "mrr": _clean_value(meta["mrr"].get(account)) if "mrr" in meta else None,
            "segment": _clean_value(meta["segment"].get(account)) if "segment" in meta else None,
            "spark": _finite_list(levels[i, -SHOWN_DAYS:]),
        })
    return rows


def write_report(path: str, **kwargs) -> dict:
    """Write the self-contained HTML report to ``path``; returns ``report_data``'s dict."""
    from .report.html import render_report

    data = report_data(**kwargs)
    Path(path).write_text(render_report(data), encoding="utf-8")
    return data


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
