"""Commands that fill the store and say what it holds: ingest, status, export."""

from __future__ import annotations

import json
import sys

import click

from .. import api
from .base import _progress_printer, engine_options, handle_errors, main, store_options


@main.command()
@click.argument("inputs", nargs=-1, type=click.Path(allow_dash=True))
@store_options
@click.option("--accounts", type=click.Path(dir_okay=False),
              help="accounts.csv: account,name,seats,segment,timezone,mrr (load or update).")
@click.option("--identities", type=click.Path(dir_okay=False),
              help="identities.csv: user,account,valid_from,valid_to (replaces those users' rows).")
@click.option("--daily", type=click.Path(dir_okay=False),
              help="Pre-aggregated daily counts, CSV or Parquet: account,day,event,count[,users].")
@click.option("--rejects", "rejects_path", type=click.Path(dir_okay=False),
              help="Where rejected lines go (JSON lines). Default: beside the store.")
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text", show_default=True,
              help="json prints one summary object on stdout.")
@click.option("--accept-beyond-window", is_flag=True, default=None,
              help="With [ingest] dedupe_window_days set: add events whose id is older than the window "
                   "(they cannot be checked for redelivery) instead of holding them back.")
@click.option("--again", is_flag=True,
              help="Ingest files whose content was ingested before: what the earlier ingest added is taken "
                   "back out first, in the same transaction (a file ingested with the wrong settings).")
@click.option("--keep-stored-days", is_flag=True,
              help="Load --accounts whose time zone changes although their days are already stored; "
                   "those days stay in the old zone (without this the load is refused).")
@engine_options
@handle_errors
def ingest(inputs, db, config_path, accounts, identities, daily, rejects_path, fmt, accept_beyond_window,
           again, keep_stored_days, engine, scheduler):
    """Ingest JSON-lines events into the activity store.

    INPUTS are JSON-lines files (.jsonl, .ndjson or .json; plain, .gz, .bz2 or .zst), .parquet
    files, directories (searched recursively, in sorted order; other files there are listed with
    the reason they were passed over) or - for standard input. Each file is one transaction; a file already ingested (same content) is
    skipped. Bad lines go to the rejects file with their line number and reason; the rest of the
    file is ingested.

    Exits 4 when a file lost more than [ingest] max_reject_share of its lines (10%; what could
    be read is kept), 3 when a file could not be read at all.

    An event id counts once, however late it is redelivered (every id is remembered unless
    [ingest] dedupe_window_days bounds it; then events with older ids are held back and counted
    as beyond_dedupe_window, or added with --accept-beyond-window).

    With --engine dask the files are parsed on the cluster's workers (they must see the same
    paths) and the store takes them all in one transaction, with the same result.

    \b
    Examples:
      ebbwatch ingest events/ --identities identities.csv --accounts accounts.csv
      ebbwatch ingest /mnt/events/2026-11/ --engine dask --scheduler tcp://10.0.0.5:8786
      zcat today.jsonl.gz | ebbwatch ingest -
      ebbwatch ingest exports/events-2026-11.parquet
      ebbwatch ingest --identities identities.csv        # attribute events kept without an account
      ebbwatch ingest events/2026-11-30.jsonl --again    # take back and redo, after fixing the config
      ebbwatch ingest --daily warehouse_daily.parquet
    """
    if not (inputs or accounts or identities or daily):
        raise click.UsageError("nothing to ingest: give INPUTS, --accounts, --identities or --daily")
    summary = api.ingest_files(list(inputs), db=db, config=config_path, accounts=accounts,
                               identities=identities, daily=daily, rejects_path=rejects_path,
                               progress=_progress_printer("ingest"), engine=engine, scheduler=scheduler,
                               accept_beyond_window=accept_beyond_window, keep_stored_days=keep_stored_days,
                               again=again)
    if fmt == "json":
        click.echo(json.dumps(summary, default=str))
    else:
        _print_ingest_summary(summary)
    if summary["errors"]:
        sys.exit(3)
    if summary["files_over_reject_share"]:
        sys.exit(EXIT_MOSTLY_REJECTED)


# Ingest ran and kept what it could, but some file lost more than [ingest] max_reject_share of
# its lines (a wrong format or settings, most likely): distinct from 3, where nothing was written.
EXIT_MOSTLY_REJECTED = 4


def _print_ingest_summary(s: dict):
    err = lambda text: click.echo(text, err=True)  # noqa: E731
    loaded = [f"{s[k]} {label}" for k, label in (("accounts_loaded", "accounts"),
              ("identities_loaded", "identity rows"), ("daily_rows_loaded", "daily rows")) if s[k]]
    if loaded:
        err("Loaded " + ", ".join(loaded) + ".")
    if s["files"] or s["skipped_files"] or s["errors"]:
        err(f"Ingested {s['ingested']:,} events from {s['files']} file(s), {s['lines']:,} lines "
            f"in {s['seconds']:.1f} s; {s['duplicates']:,} duplicates dropped.")
    if s["rejected"]:
        total = sum(s["rejected"].values())
        reasons = ", ".join(f"{k} {v:,}" for k, v in sorted(s["rejected"].items()))
        err(f"Rejected {total:,} lines ({reasons}); see {s['rejects_file']}.")
    if s["taken_back"]:
        err(f"Took back what {s['taken_back']} earlier ingest(s) of the same content had added, then ingested again.")
    if s["recovered"]:
        err(f"Attributed {s['recovered']:,} events kept from earlier ingests, now that identities are loaded.")
    if s["unattributed"]:
        reasons = ", ".join(f"{k} {v:,}" for k, v in sorted(s["unattributed"].items()))
        err(f"Unattributed {sum(s['unattributed'].values()):,} events ({reasons}); they are kept, and "
            "loading identities later (ingest --identities FILE) attributes them.")
    if s["held_back"]:
        reasons = ", ".join(f"{k} {v:,}" for k, v in sorted(s["held_back"].items()))
        err(f"Held back {sum(s['held_back'].values()):,} events ({reasons}): their ids are older than "
            "[ingest] dedupe_window_days, so a redelivery could not be recognised; "
            "--accept-beyond-window adds them.")
    unknown = s.get("unknown_accounts")
    if unknown and unknown["accounts"]:
        names = ", ".join(f"{u['account']} ({u['events']:,})" for u in unknown["top"])
        err(f"The store holds {unknown['events']:,} events for {unknown['accounts']:,} account(s) accounts.csv "
            f"does not know: {names}. A misspelt id? [ingest] unknown_accounts = \"reject\" refuses them.")
    for lossy in s["files_over_reject_share"]:
        err(f"Warning: {lossy['file']}: {lossy['rejected']:,} of {lossy['lines']:,} lines rejected "
            f"(more than {s['max_reject_share']:.0%}); see the reasons above and in {s['rejects_file']}.")
    for skipped in s["skipped_files"]:
        err(f"Skipped {skipped['file']}: {skipped['reason']}.")
    for error in s["errors"]:
        err(f"Error: {error['file']}: {error['error']} (nothing written for it)")
    for left in s["stdin_copies_left"]:
        err(f"Found {left}: a copy of standard input left by an ingest that was stopped before it "
            "finished. It may hold events that were never ingested: ingest it (ebbwatch ingest FILE) "
            "and delete it, or delete it.")


@main.command()
@store_options
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text", show_default=True)
@handle_errors
def status(db, config_path, fmt):
    """Whether the store is healthy: what it holds, what ingest lost, last ingest and scan.

    \b
    Examples:
      ebbwatch status
      ebbwatch status --db /srv/ebbwatch/store.duckdb
    """
    info = api.status(db=db, config=config_path)
    if fmt == "json":
        click.echo(json.dumps(info, default=str))
        return
    out = click.echo
    out(f"store          {info['store']} (schema {info['schema_version']})")
    loaded = f"; {info['accounts_loaded']:,} in accounts.csv" if info["accounts_loaded"] else ""
    out(f"accounts       {info['accounts']:,} with activity{loaded}")
    unknown = info["unknown_accounts"]
    if unknown and unknown["accounts"]:
        names = ", ".join(f"{u['account']} ({u['events']:,})" for u in unknown["top"])
        out(f"               {unknown['accounts']:,} not in accounts.csv, {unknown['events']:,} events: {names}")
    out(f"events         {info['events']:,}")
    if info["first_day"] is None:
        out("days           no data yet: ebbwatch ingest events/ (or --daily FILE)")
    else:
        out(f"days           {info['first_day']} .. {info['last_day']}")
    last = info["last_ingest"]
    out(f"last ingest    {'-' if last is None else last['at'] + ' ' + last['file']}")
    out(f"lines read     {info['lines_read']:,}; rejected {info['rejected']:,}, unattributed "
        f"{info['unattributed']:,} ({info['unattributed_waiting']:,} still waiting for identities), "
        f"duplicates {info['duplicates']:,}")
    dedupe = ("every id remembered" if not info["dedupe_window_days"]
              else f"ids remembered {info['dedupe_window_days']} days of event time")
    out(f"event ids      {info['ids_remembered']:,} ({dedupe}); "
        f"{info['held_back']:,} events held back beyond the window")
    scan = info["last_scan"]
    out(f"last scan      {'-' if scan is None else scan['as_of'] + ' (recorded ' + scan['at'] + ')'}")
    click.echo(f"data-gap days  {', '.join(info['gap_days']) or 'none'}")
    rates = info.get("outcome_rates")
    click.echo("outcome rates  " + ("none saved (ebbwatch backtest --outcomes FILE --save-rates)" if rates is None else
                                    f"{rates['alert_episodes']:,} alert episodes from the replay {rates['from']} .. "
                                    f"{rates['to']} ({rates['horizon_days']}-day horizon), saved {rates['saved_at']}"))


@main.group()
def export():
    """Take the history out of the store (to a notebook or a warehouse).

    \b
    Examples:
      ebbwatch export daily --format parquet -o daily.parquet
      ebbwatch export index -o index/
    """


@export.command("daily")
@store_options
@click.option("--format", "fmt", type=click.Choice(["csv", "parquet"]), default="csv", show_default=True)
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False),
              help="File to write (- is not supported for parquet).")
@handle_errors
def export_daily(db, config_path, fmt, output):
    """Write account, day, event, events, users for every stored day (ingest --daily loads it back).

    \b
    Examples:
      ebbwatch export daily -o daily.csv
      ebbwatch export daily --format parquet -o daily.parquet
    """
    rows = api.export_daily(output, fmt=fmt, db=db, config=config_path)
    click.echo(f"Wrote {rows:,} rows to {output}.", err=True)


@export.command("index")
@store_options
@click.option("-o", "--output", required=True, type=click.Path(file_okay=False),
              help="A new (or empty) folder to write.")
@click.option("--as-of", help="Last day, YYYY-MM-DD. Default: the last complete day in the store.")
@click.option("--history-days", type=click.IntRange(min=1),
              help="Days up to --as-of. Default: the scan's history_days from the config.")
@click.option("--accounts-per-part", type=click.IntRange(min=1), default=10_000, show_default=True,
              help="Accounts per block file.")
@handle_errors
def export_index(db, config_path, output, as_of, history_days, accounts_per_part):
    """Write the activity index the scan reads, as Parquet blocks of accounts.

    The index is the weighted daily activity per account (event weights and exclusions from
    the config applied): OUTPUT/rows/part=K/*.parquet holds block K's rows (account, day as days
    since 1970-01-01, value, events, users) and OUTPUT/accounts.parquet lists each account's
    block. The Dask engine reads these blocks on its workers; a notebook can read the folder
    with pandas.read_parquet(OUTPUT + "/rows").

    \b
    Examples:
      ebbwatch export index -o index/
      ebbwatch export index -o index/ --as-of 2026-11-30 --history-days 180
    """
    info = api.export_index(output, as_of=as_of, history_days=history_days, accounts_per_part=accounts_per_part,
                            db=db, config=config_path)
    click.echo(f"Wrote {info['rows']:,} rows for {info['accounts']:,} accounts in {info['parts']:,} block(s), "
               f"{info['from']} .. {info['to']}, to {output}.", err=True)
