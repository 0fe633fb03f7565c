"""The work an engine runs on one partition: stage one event file, score a block of accounts,
replay a block, read a block from the Parquet export.

Plain, picklable arguments only (no config, no open store), so the same functions run in this
process or on a Dask worker.  A block is read from the dataset that
``store.Store.export_index_parts`` writes (``ebbwatch export index``).
"""

from __future__ import annotations

import json
import os
from concurrent.futures import ThreadPoolExecutor
from datetime import date, datetime, time, timezone
from decimal import Decimal
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pyarrow as pa

from . import store as store_mod
from .errors import InputError
from .frames import FileResult, Reject
from .ingest.lines import LineRejected, LineRules, excerpt, parse_line
from .ingest.line_index import LineIndex, NewlineCounts, read_spans
from .ingest.readers import (copied_compression, decompressed_copy, first_value_is_text, index_lines, is_gzip,
                             is_parquet, iter_lines, line_run_width, looks_like_csv, remove_quietly, scan_file)
from .series import NEVER_ACTIVE, Panel, build_panel

# Python's JSON parser (the precise path) gives up near 1,000 levels of nesting; a file whose
# lines may nest deeper than this goes through the precise path so both paths agree.
MAX_FAST_NESTING = 500


# -- events -----------------------------------------------------------------------------------

def precise_records(path: str, display: str, rules: LineRules, result: FileResult, rejects: list,
                    numbered_lines=None) -> pa.Table:
    """Every line of ``path`` through the precise parser (or only ``numbered_lines``, pairs of
    line number and bytes): the valid ones as a table (ts_us, event, user, account, id, and
    ``line``, the line number), each bad one counted in ``result`` and added to ``rejects``."""
    columns = {"ts_us": [], "event": [], "user": [], "account": [], "id": [], "line": []}
    for number, raw in (iter_lines(path) if numbered_lines is None else numbered_lines):
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
        for key, value in zip(columns, (*parsed, number)):
            columns[key].append(value)
    schema = pa.schema([("ts_us", pa.int64()), ("event", pa.string()), ("user", pa.string()),
                        ("account", pa.string()), ("id", pa.string()), ("line", pa.int64())])
    return pa.table(columns, schema=schema)


# Doubted rows up to this many (or 1% of the file's lines, if more) go to the precise parser
# one line at a time; beyond it, a sample says whether reading the file again with its fields
# typed by DuckDB would settle them (they were doubted for their text) or not (they are bad).
RECHECK_LINES = 2_000
RECHECK_SAMPLE = 400


def stage_file(st, path: str, display: str, rules: LineRules, fields, skip_reason=None, legacy_digest=False):
    """Parse one event file into ``st``'s temp table ``staged``: DuckDB's native reader for the
    lines it is sure of, the precise parser for the others (and for the whole file when the
    native reader cannot read it).

    ``skip_reason(digests)`` may return why the file is not to be ingested (its content was
    ingested before; ``digests`` are its content hashes, see ``readers.scan_file``, SHA-256
    too with ``legacy_digest``); then nothing is staged.  Returns ``(digest, result,
    rejects)``, ``digest`` the hash to log, with ``result.skipped`` set for a skipped file.
    """
    packed = copied_compression(path)
    if packed:
        plain = decompressed_copy(path, packed)
        try:
            return stage_file(st, plain, display, rules, fields, skip_reason, legacy_digest)
        finally:
            remove_quietly(plain)
    result = FileResult(file=display)
    if os.path.getsize(path) == 0:
        # Not logged by content: every empty file has the same hash, and a second one is not
        # "already ingested".
        result.skipped = "empty file: nothing to ingest"
        return None, result, []
    if is_parquet(path):
        return _stage_parquet(st, path, display, rules, fields, skip_reason, legacy_digest)
    header = looks_like_csv(path)
    if header is not None:
        raise InputError(f"{display} looks like CSV (first line {header!r}), not JSON lines: daily counts go "
                         "through --daily, accounts through --accounts, identities through --identities")
    rejects: list[Reject] = []
    # Hashing (and measuring the longest line, and counting newlines, which find a doubted
    # row's line again) runs in a thread beside the fast-path parse: both release the GIL.
    # Staging writes only temporary tables, so a fast-path parse error cannot touch the store.
    ts_text = rules.ts_format == "auto" and first_value_is_text(path, fields.ts)
    # A gzip file keeps where every line starts: its text is inflated in that pass anyway, and
    # finding lines from the counts would inflate it once more.  So does a line limit so short
    # that the counts (2 bytes a run) would grow past a twentieth of the text.
    short_line = rules.max_line_bytes + 1
    keep_starts = is_gzip(path) or line_run_width(short_line) < 40
    index = LineIndex() if keep_starts else NewlineCounts(line_run_width(short_line))
    with ThreadPoolExecutor(max_workers=1) as pool:
        scanning = pool.submit(scan_file, path, legacy_digest, index, short_line=short_line)
        try:
            staged = st.stage_jsonl_fast(path, fields, rules.ts_format, ts_text=ts_text,
                                         naive_timezone=rules.naive_timezone)
        finally:
            digests, longest_line, deepest = scanning.result()
    digest = digests[0]
    reason = skip_reason(digests) if skip_reason else None
    if reason is not None:
        st.drop_staged()
        result.skipped = reason
        return digest, result, rejects
    if staged is not None and (longest_line > rules.max_line_bytes or deepest > MAX_FAST_NESTING):
        staged = None
    if staged is not None:
        staged = _settle_doubtful_lines(st, path, display, rules, fields, staged, index, result, rejects)
    if staged is None:
        st.drop_staged()
        result.path_taken = "precise"
        result.lines, result.rejected, result.rechecked_lines = 0, {}, 0
        rejects.clear()
        st.stage_records(precise_records(path, display, rules, result, rejects).drop_columns(["line"]))
    return digest, result, rejects


def _settle_doubtful_lines(st, path, display, rules, fields, staged: int, index, result, rejects):
    """Have the precise parser decide the lines the native reader doubted.  Returns the number
    of rows staged, or ``None`` when the native reader's rows cannot be matched to lines (the
    caller then parses the whole file line by line)."""
    doubtful = st.doubtful_staged_rows(rules.earliest_us, rules.latest_us)
    result.lines = staged
    if not doubtful.size:
        return staged
    numbers, starts, ends = _lines_of_rows(path, index, doubtful, staged)
    if numbers is None:
        return None  # the reader and the line index disagree on what a line is
    if doubtful.size > max(RECHECK_LINES, staged // 100):
        pick = np.arange(0, doubtful.size, max(1, doubtful.size // RECHECK_SAMPLE))[:RECHECK_SAMPLE]
        trial = FileResult(file=display)
        accepted = precise_records(path, display, rules, trial, [],
                                   zip(numbers[pick].tolist(), read_spans(path, starts[pick], ends[pick]))).num_rows
        if accepted * 10 >= pick.size:  # doubted for their text, not bad: let DuckDB type them
            if st.stage_jsonl_fast(path, fields, rules.ts_format, typed=True,
                                  naive_timezone=rules.naive_timezone) != staged:
                return None
            doubtful = st.doubtful_staged_rows(rules.earliest_us, rules.latest_us)
            numbers, starts, ends = _lines_of_rows(path, index, doubtful, staged)
    checked = _decide_doubtful(st, path, display, rules, doubtful, numbers, read_spans(path, starts, ends),
                               result, rejects)
    # Lines the precise parser finds blank (a byte-order mark alone) are not lines it counts.
    result.lines = staged - doubtful.size + checked.lines
    return result.lines - sum(checked.rejected.values())


def _lines_of_rows(path: str, index: LineIndex | NewlineCounts, rows: np.ndarray, row_count: int):
    """The native reader's ``rows`` (of ``row_count``) as lines: ``(line_numbers, starts,
    ends)``, or three ``None`` when the reader and the file's lines disagree.  Newline counts
    find them where no line is blank; otherwise a pass of its own indexes the lines."""
    if isinstance(index, NewlineCounts):
        found = index.spans(path, rows, row_count)
        if found is not None:
            return found
        index = index_lines(path)
    nonblank, numbers, starts, ends = index.nonblank_lines(path, rows)
    return (numbers, starts, ends) if nonblank == row_count else (None, None, None)


def _decide_doubtful(st, path, display, rules, doubtful, line_numbers, raw_lines, result, rejects) -> FileResult:
    """The precise parser's verdict on the doubted rows (``doubtful`` ordinals, ascending, with
    their ``line_numbers`` and bytes): valid ones replace their rows in ``staged``, bad ones are
    counted in ``result`` and added to ``rejects``.  Returns the precise parser's own counts."""
    checked = FileResult(file=display)
    recovered = precise_records(path, display, rules, checked, rejects, zip(line_numbers.tolist(), raw_lines))
    ordinals = doubtful[np.searchsorted(line_numbers, recovered["line"].to_numpy())]
    st.settle_doubtful_staged(doubtful, recovered.append_column("ordinal", pa.array(ordinals, pa.int64()))
                              .drop_columns(["line"]))
    result.rejected = checked.rejected
    result.rechecked_lines = int(doubtful.size)
    return checked


def _stage_parquet(st, path, display, rules: LineRules, fields, skip_reason, legacy_digest):
    """:func:`stage_file` for a Parquet file: DuckDB reads it by column type; the rows it doubts
    are written as JSON objects and given to the precise parser, so a row is valid exactly when
    the same values on a JSON line would be (a reject's ``line`` is the row's 1-based number)."""
    result = FileResult(file=display)
    rejects: list[Reject] = []
    digests, _, _ = scan_file(path, legacy_digest, measure_lines=False)
    reason = skip_reason(digests) if skip_reason else None
    if reason is not None:
        result.skipped = reason
        return digests[0], result, rejects
    staged = st.stage_parquet_fast(path, fields, rules.ts_format, rules.naive_timezone)
    if staged is None:
        raise InputError(f"cannot read {path} as Parquet")
    result.lines = staged
    doubtful = st.doubtful_staged_rows(rules.earliest_us, rules.latest_us)
    if doubtful.size:
        rows = [json.dumps(row, default=_json_value).encode() for row in st.parquet_rows(path, doubtful, fields)]
        _decide_doubtful(st, path, display, rules, doubtful, doubtful + 1, rows, result, rejects)
    return digests[0], result, rejects


def _json_value(value):
    """A Parquet value that JSON has no type for, as the JSON value a producer would write."""
    if isinstance(value, datetime):
        if value.tzinfo is None:  # a TIMESTAMP without a time zone is read as UTC
            value = value.replace(tzinfo=timezone.utc)
        return value.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")
    if isinstance(value, (date, time)):
        return value.isoformat()
    if isinstance(value, Decimal):
        return float(value)
    if isinstance(value, bytes):
        return {"bytes": value.hex()}  # not a string: a wrong type wherever a text is wanted
    return str(value)


@dataclass
class ParsedFile:
    """One event file parsed, attributed and dated on a worker, not yet deduped across files.

    ``events``: the prepared rows (``Store.prepared_table``); ``candidates`` attributed events,
    ``repeats`` later deliveries of an id within the file.  ``error``: why the file could not
    be read (then nothing else is set).
    """

    file: str
    digest: str | None = None
    result: FileResult | None = None
    rejects: list = field(default_factory=list)
    candidates: int = 0
    repeats: int = 0
    events: pa.Table | None = None
    error: str | None = None
    ids: tuple | None = None  # (id_hash uint64, ts_us int64) of the events with an id
    unattributed: pa.Table | None = None  # events no account was found for, kept for identities to come

    def summary(self) -> "ParsedFile":
        """This file without its events but with their ids: what the driver needs to dedupe."""
        ids = None
        if self.events is not None:
            with_id = self.events.filter(self.events["id_hash"].is_valid())
            ids = (with_id["id_hash"].to_numpy(), with_id["ts_us"].to_numpy())
        return replace(self, events=None, ids=ids)


def parse_file(item: tuple[str, str], *, rules: LineRules, fields, accounts: pa.Table, identities: pa.Table,
               known_digests: dict, legacy_digest: bool = False, known_accounts_only: bool = False) -> ParsedFile:
    """Stage, attribute and date one event file in a scratch store holding the real store's
    accounts and identities (one task of a Dask ingest).  ``item``: (path, name to report);
    ``known_digests``: ``Store.ingested_digests``; ``legacy_digest``: ``Store.has_legacy_digests``."""
    path, display = item
    st = store_mod.scratch_store(accounts, identities)
    try:
        try:
            digest, result, rejects = stage_file(
                st, path, display, rules, fields, skip_reason=lambda digests: next(
                    (f"already ingested (same content as {known_digests[d]})" for d in digests if d in known_digests),
                    None),
                legacy_digest=legacy_digest)
        except InputError as exc:
            return ParsedFile(display, error=str(exc))
        parsed = ParsedFile(display, digest, result, rejects)
        if result.skipped is None:
            prepared = st.prepare_staged(known_accounts_only)
            result.unattributed = prepared["unattributed"]
            parsed.candidates, parsed.repeats = prepared["candidates"], prepared["repeats"]
            parsed.events = st.prepared_table()
            if prepared["unattributed"]:
                parsed.unattributed = st.unattributed_table()
            st.drop_prepared()
        return parsed
    finally:
        st.close()


def count_parsed(parsed: ParsedFile, claimed: tuple):
    """One parsed file's per-user daily counts without the ids already seen or held back
    (``claimed``: the two arrays of ``Store.claim_ids``; one task of a Dask ingest).  Returns
    ``(table, result, first_day, last_day, newest_us)`` with the result's counts filled."""
    duplicate_hashes, held_hashes = claimed
    left_out = np.concatenate([duplicate_hashes, held_hashes]).astype(np.uint64)
    table, counted, first_day, last_day, newest_us = store_mod.aggregate_events(parsed.events, left_out)
    result = parsed.result
    result.ingested = counted
    if len(held_hashes):
        result.held_back = {"beyond_dedupe_window": int(len(held_hashes))}
    result.duplicates = parsed.candidates - counted - len(held_hashes)
    return table, result, first_day, last_day, newest_us


# -- accounts ---------------------------------------------------------------------------------


def read_index_part(directory: str, part: int, accounts: list[str]):
    """Block ``part`` of an index export as ``(account_index, day, value, events, users)``
    arrays, ``account_index`` indexing into ``accounts`` (the block's accounts, in order)."""
    import pyarrow.parquet as pq

    folder = Path(directory) / "rows" / f"part={int(part)}"
    if not folder.is_dir():  # no account of the block was active in the window
        empty = np.zeros(0)
        return empty.astype(np.int64), empty.astype(np.int64), empty, empty, empty
    frame = pq.read_table(folder).to_pandas()
    position = {a: i for i, a in enumerate(accounts)}
    index = frame["account"].map(position)
    if index.isna().any():
        stray = frame.loc[index.isna(), "account"].iloc[0]
        raise ValueError(f"{folder} holds account {stray!r}, which is not in the block's account list")
    return (index.to_numpy(np.int64), frame["day"].to_numpy(np.int64), frame["value"].to_numpy(float),
            frame["events"].to_numpy(float), frame["users"].to_numpy(float))


def part_panel(directory: str, part: int, accounts: list[str], *, start_day: int, end_day: int, normalise: str,
               seats: dict, fleet_factor=None, masked=None, first_full: dict | None = None) -> Panel:
    """Block ``part`` as a :class:`series.Panel` over days ``start_day .. end_day``; ``first_full``
    maps accounts to their first full day (``series.first_full_days``)."""
    idx, day, value, events, users = read_index_part(directory, part, accounts)
    keep = (day >= start_day) & (day <= end_day)
    first_full_day = None if first_full is None else \
        np.array([first_full.get(a, NEVER_ACTIVE) for a in accounts], dtype=np.int64)
    return build_panel(idx[keep], day[keep], value[keep], events[keep], users[keep], accounts=list(accounts),
                       start_day=start_day, end_day=end_day, normalise=normalise,
                       seats=np.array([seats.get(a, np.nan) for a in accounts], float),
                       fleet_factor=fleet_factor, masked=masked, first_full_day=first_full_day)


def score_part(part_and_accounts, *, directory: str, start_day: int, end_day: int, normalise: str, seats: dict,
               fleet_factor, masked, params, first_full: dict | None = None):
    """``detect.score_panel`` on one block of the export (one task of the scan)."""
    from .detect import score_panel

    part, accounts = part_and_accounts
    panel = part_panel(directory, part, accounts, start_day=start_day, end_day=end_day, normalise=normalise,
                       seats=seats, fleet_factor=fleet_factor, masked=masked, first_full=first_full)
    return score_panel(panel, params)


def replay_block(panel: Panel, *, as_of_days, fleet_factors, churn: dict, params, history_days: int, fdr: float):
    """``backtest.replay_scores`` on one block's panel, ``churn`` mapping accounts to the day
    number of their cancellation (accounts without one are judged on every day)."""
    from .backtest import replay_scores

    never = np.iinfo(np.int64).max
    return replay_scores(panel, as_of_days, fleet_factors, params=params, history_days=history_days,
                         churn=np.array([churn.get(a, never) for a in panel.accounts], dtype=np.int64), fdr=fdr)


def replay_part(part_and_accounts, *, directory: str, start_day: int, end_day: int, normalise: str, seats: dict,
                first_full: dict | None = None, **replay):
    """:func:`replay_block` on one block of the export (one task of the backtest)."""
    part, accounts = part_and_accounts
    panel = part_panel(directory, part, accounts, start_day=start_day, end_day=end_day, normalise=normalise,
                       seats=seats, first_full=first_full)
    return replay_block(panel, **replay)
