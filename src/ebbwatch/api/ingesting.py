"""Ingest: event files (locally or on a Dask cluster) and daily aggregates into the store, and
what the store holds."""

from __future__ import annotations

import json
import os
import time
from dataclasses import replace
from datetime import datetime, timezone
from pathlib import Path


from .. import store as store_mod
from ..config import Config
from ..errors import InputError, UsageError
from ..frames import FileResult, Reject
from ..ingest import csvs
from ..ingest.lines import LineRules
from ..ingest.readers import STDIN, expand_inputs, left_spools, remove_quietly, spool_stdin
from ..ingest.timestamps import parse_rfc3339
from .common import Progress, _config


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
        "rejects_file": None, "stdin_copies_left": [],
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
        spools = _spool_directory(db_path)
        if spools:
            summary["stdin_copies_left"] = left_spools(spools)
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


def _spool_directory(store_path: str) -> str | None:
    """Where standard input is copied while it is ingested: the store's directory (None for an
    in-memory store: the system's temporary directory)."""
    return None if store_path == ":memory:" else str(Path(store_path).resolve().parent)


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
        path = spool_stdin(stdin, _spool_directory(st.path)) if item == STDIN else item
        if progress:
            progress(display, position, len(files))
        rejects: list[Reject] = []
        try:
            result = _ingest_one(st, path, display, cfg, rules, rejects, legacy_digest, again)
        except InputError as exc:
            # Standard input's copy is gone once this returns: name what the user gave instead.
            yield display, str(exc).replace(path, "standard input") if item == STDIN else str(exc), []
            continue
        finally:
            if item == STDIN:
                remove_quietly(path)
        yield display, result, rejects


def _ingest_on_dask(st, files, cfg, rules, scheduler, progress):
    """Workers parse, attribute and date the files in parallel; this process dedupes their ids
    in file order (so the first delivery wins as in a local ingest), the workers count what is
    left, and the store takes every file's counts and log row in one transaction."""
    from ..engine.dask import dask_client, gather_in_order
    from ..tasks import ParsedFile, count_parsed, parse_file

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
    from ..tasks import stage_file

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


def status(*, db: str | None = None, config=None) -> dict:
    """What the store holds: accounts, events, first and last day, last ingest, data-gap days."""
    from ..fleet import fleet_gap_days

    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        info = st.status()
        totals = st.fleet_daily_totals()
        saved = st.saved_outcome_counts()
    info["dedupe_window_days"] = cfg.ingest.dedupe_window_days
    # Outcome rates a backtest saved (issue 23): when, from which replay, on how many episodes.
    info["outcome_rates"] = None if saved is None else {
        **{k: saved[1][k] for k in ("saved_at", "from", "to", "horizon_days", "known_until")},
        "alert_episodes": int(saved[0].loc[(saved[0]["kind"] != "none") & (saved[0]["outcome"] == "churned"), "n"].sum())}
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
