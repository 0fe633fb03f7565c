"""The ``ebbwatch`` command: a thin shell over :mod:`ebbwatch.api`.

Each command parses options, calls one api function and renders; library errors become
``Error: …`` on stderr with the exit code their type carries (2 usage/config, 3 unusable input).
"""

from __future__ import annotations

import json
import sys
from functools import wraps

import click

from . import __version__, api
from .errors import EbbwatchError, UsageError
from .textsafe import plain_text

EXIT_ALERTS = 1


def _fail(message: str, code: int):
    click.echo(f"Error: {message}", err=True)
    sys.exit(code)


def handle_errors(func):
    @wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except EbbwatchError as exc:
            _fail(str(exc), exc.exit_code)
        except ValueError as exc:  # a library-level argument check
            _fail(str(exc), 2)
    return wrapper


def store_options(func):
    func = click.option("--config", "config_path", type=click.Path(dir_okay=False),
                        help="Config file (TOML). Default: ./ebbwatch.toml if present.")(func)
    func = click.option("--db", envvar="EBBWATCH_DB", show_envvar=True,
                        help="Activity store file. Default: ./ebbwatch.duckdb.")(func)
    return func


def engine_options(func):
    """--engine and --scheduler, the same on every command that can run on Dask."""
    func = click.option("--scheduler", metavar="ADDRESS|local[:N]",
                        help="With --engine dask: local[:N] starts N worker processes here (default 2); "
                             "an address such as tcp://10.0.0.5:8786 connects to a running cluster.")(func)
    return click.option("--engine", type=click.Choice(["local", "dask"]), default="local", show_default=True,
                        help="dask: run the work on a Dask cluster (pip install 'ebbwatch[dask]').")(func)


def threads_option(func):
    return click.option("--threads", type=click.IntRange(min=1),
                        help="Chunks scored at once on the local engine. Default: one per core, at most 4 "
                             "(each chunk in flight adds its memory).")(func)


def shared_dir_option(func):
    return click.option("--shared-dir", type=click.Path(file_okay=False),
                        help="With --engine dask: a folder every worker can read (NFS, a mounted bucket), "
                             "where the store's index is exported for them. Default: a temporary folder here.")(func)


def _emit(document: dict, fmt: str, render):
    """One JSON object on stdout for ``--format json``, else the text ``render`` makes."""
    click.echo(json.dumps(document) if fmt == "json" else render(document), nl=fmt == "json")


def _is_tty(stream) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def _progress_printer(label: str):
    if not _is_tty(sys.stderr):
        return None

    def show(*args):
        if len(args) == 3:
            name, done, total = args
            text = f"\r{label} {done}/{total} {name[-50:]}"
        else:
            done, total = args
            text = f"\r{label} {done}/{total}"
        click.echo(text.ljust(80), err=True, nl=False)
        if done == total:
            click.echo("", err=True)
    return show


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="ebbwatch")
def main():
    """Per-account activity baselines and daily alerts for drops and surges.

    \b
    A day's work:
      ebbwatch ingest events/ --identities identities.csv --accounts accounts.csv
      ebbwatch scan                      # ranked alerts for the last complete day
      ebbwatch scan --format jsonl       # one alert per line, for chat or a queue
    Try it first on invented data:  ebbwatch demo
    """


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


@main.command()
@store_options
@click.option("--as-of", help="Day to judge, YYYY-MM-DD. Default: the last complete day in the store.")
@click.option("--format", "fmt", type=click.Choice(["table", "jsonl", "csv", "markdown", "json"]),
              default="table", show_default=True, help="jsonl: one alert per line with a ready `message`.")
@click.option("--kind", "kinds", multiple=True, type=click.Choice(["drop", "stop", "slide", "surge"]),
              help="Only these kinds (repeatable).")
@click.option("--max-alerts", type=click.IntRange(min=0), help="At most this many alerts, most severe first.")
@click.option("--fail-on-alert", is_flag=True, help="Exit with 1 when there is at least one alert.")
@click.option("--chunk-size", type=click.IntRange(min=1), default=10_000, show_default=True,
              help="Accounts scored at once (bounds memory).")
@click.option("--all", "show_all", is_flag=True, help="Print every open alert, not only new and escalated ones.")
@click.option("--wide", is_flag=True,
              help="The table and Markdown add the model's details: level and usual level, window, "
                   "percentile, p- and q-value, baseline model.")
@click.option("--record/--no-record", default=None,
              help="Record the day's alert states. Default: record when --as-of is not given.")
@threads_option
@engine_options
@shared_dir_option
@handle_errors
def scan(db, config_path, as_of, fmt, kinds, max_alerts, fail_on_alert, chunk_size, show_all, wide, record, threads,
         engine, scheduler, shared_dir):
    """Judge every account's recent days against its own history and print ranked alerts.

    Kinds: drop (a sudden fall), stop (no activity, unusual for the account), slide (a gradual
    fall over weeks), surge (a sudden rise). Each account is compared with its own weekday rhythm
    and level history; Benjamini-Hochberg control keeps false alerts from growing with the fleet.

    Alerts have a state across days: new, ongoing, escalated (severity rose), clearing, resolved.
    By default only new and escalated alerts are printed, so a daily run does not repeat itself;
    --all prints every open one. Snoozed accounts (ebbwatch snooze) are not printed. The day's
    whole judgement is recorded whatever --kind, --max-alerts or --format print.

    \b
    Examples:
      ebbwatch scan
      ebbwatch scan --format jsonl | python examples/post_to_chat.py
      ebbwatch scan --as-of 2026-11-30 --kind drop --kind stop --max-alerts 20 --fail-on-alert
      ebbwatch scan --all --format csv > open-alerts.csv
      ebbwatch scan --wide                 # with levels, percentile, p- and q-values

    \b
    Exit codes: 0 ran; 1 alerts found with --fail-on-alert; 2 usage or config error;
    3 unusable input or store.
    """
    record = (as_of is None) if record is None else record
    alerts = api.scan(as_of=as_of, db=db, config=config_path, kinds=list(kinds) or None,
                      max_alerts=max_alerts, chunk_size=chunk_size, progress=_progress_printer("scan"),
                      record=record, show="all" if show_all else "new", engine=engine, scheduler=scheduler,
                      shared_dir=shared_dir, threads=threads)
    from .report import render_alerts

    summary = alerts.attrs["summary"]
    click.echo(render_alerts(alerts, fmt, summary, wide=wide), nl=False)
    # On stderr whatever the format, so a cron log that keeps the JSON lines records what happened.
    click.echo(
        f"{summary['alerts']} alert(s) shown of {summary['open_alerts']} open as of {summary['as_of']}"
        f"{' (recorded)' if summary['recorded'] else ''}; {summary['judged']:,} accounts judged, "
        f"{len(summary['not_enough_history']):,} with not enough history, {summary['dormant']:,} dormant"
        + (f"; masked data-gap days: {', '.join(summary['masked_days'])}" if summary["masked_days"] else "")
        + _fleet_words(summary["fleet_factor"])
        + ("" if summary["as_of_reason"].startswith("given") else f"; judged {summary['as_of_reason']}") + ".",
        err=True,
    )
    for change in summary["history_changed"]:
        click.echo(f"Note: {change['file']} ({change['events']:,} events) arrived after the last recorded scan and "
                   f"changed days already judged ({change['first_day']} .. {change['last_day']}).", err=True)
    if fail_on_alert and len(alerts):
        sys.exit(EXIT_ALERTS)


def _fleet_words(fleet: dict) -> str:
    if fleet["estimated"]:
        return f"; fleet-wide days read from {fleet['voting_accounts']:,} accounts"
    return (f"; no fleet-wide factor ({fleet['voting_accounts']} account(s) vote, {fleet['needed']} needed): "
            "each account judged on its own")


@main.command("explain")
@click.argument("account")
@store_options
@click.option("--as-of", help="Day to judge, YYYY-MM-DD. Default: the last complete day in the store.")
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text", show_default=True)
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False),
              help="Write a chart (.svg or .png): daily index, usual band, window, onset.")
@handle_errors
def explain_command(account, db, config_path, as_of, fmt, plot_path):
    """Why an account was (or was not) flagged: baseline, levels, changepoint, trend, drivers.

    The first line says whether the account is alerted on the day (kind, severity, state,
    snooze), judged across the whole fleet as the scan judges it.

    \b
    Examples:
      ebbwatch explain acct-030
      ebbwatch explain acct-030 --as-of 2026-11-20 --format json
      ebbwatch explain acct-030 --plot acct-030.svg
    """
    if plot_path:
        from .report.plot import require_matplotlib

        require_matplotlib()
    info = api.explain(account, as_of=as_of, db=db, config=config_path)
    if plot_path:
        from .report.plot import plot_account

        plot_account(info, plot_path)
        click.echo(f"Wrote {plot_path}.", err=True)
    from .report.explain_text import render_explanation

    _emit(info, fmt, render_explanation)


@main.command()
@click.argument("account", required=False)
@store_options
@click.option("--until", help="Last day (YYYY-MM-DD) the account's alerts stay hidden.")
@click.option("--reason", help="Why (kept with the snooze, shown in `ebbwatch alerts` and --list).")
@click.option("--lift", is_flag=True, help="End the account's snooze now.")
@click.option("--list", "list_them", is_flag=True, help="List the snoozes in force.")
@click.option("--force", is_flag=True, help="Accept an --until in the past or more than a year away.")
@handle_errors
def snooze(account, db, config_path, until, reason, lift, list_them, force):
    """Hide an account's alerts until a date (a known migration, a customer on holiday, ...).

    The latest snooze of an account wins, so snoozing again with an earlier date shortens it.

    \b
    Examples:
      ebbwatch snooze acct-030 --until 2026-12-15 --reason "planned migration"
      ebbwatch snooze --list
      ebbwatch snooze acct-030 --lift
    """
    if list_them:
        if account or until or lift:
            raise UsageError("--list takes no account, --until or --lift")
        found = api.snoozes(db=db, config=config_path)
        if not len(found):
            click.echo("No snoozes in force.")
        for row in found.itertuples():
            click.echo(f"{plain_text(row.account)}  until {row.until}" + (f"  {plain_text(row.reason)}" if row.reason else "")
                       + f"  (set {row.set_at})")
        return
    if not account:
        raise UsageError("give the account to snooze (or --list)")
    if lift:
        if until:
            raise UsageError("--lift takes no --until")
        api.lift_snooze(account, db=db, config=config_path)
        click.echo(f"Lifted the snooze of {plain_text(account)}: its alerts show again.", err=True)
        return
    if not until:
        raise UsageError("give --until YYYY-MM-DD (or --lift, or --list)")
    result = api.snooze(account, until, reason=reason, force=force, db=db, config=config_path)
    click.echo(f"Snoozed {plain_text(result['account'])} until {result['until']}.", err=True)


@main.command("alerts")
@store_options
@click.option("--state", "states", multiple=True,
              type=click.Choice(["new", "ongoing", "escalated", "clearing", "resolved"]),
              help="Only rows in these states (repeatable).")
@click.option("--account", "accounts", multiple=True, help="Only these accounts (repeatable).")
@click.option("--from", "start", help="First scan day shown, YYYY-MM-DD.")
@click.option("--to", "end", help="Last scan day shown, YYYY-MM-DD.")
@click.option("--format", "fmt", type=click.Choice(["table", "jsonl", "csv"]), default="table", show_default=True)
@click.option("--limit", type=click.IntRange(min=1), default=200, show_default=True)
@handle_errors
def alerts_command(db, config_path, states, accounts, start, end, fmt, limit):
    """The recorded alert history: one row per recorded scan day and open alert, newest first.

    The snoozed column says which accounts are snoozed today, until when and why.

    \b
    Examples:
      ebbwatch alerts --state new --state escalated
      ebbwatch alerts --account acct-030 --from 2026-11-01 --to 2026-11-30
    """
    log = api.alert_history(states=list(states) or None, accounts=list(accounts) or None, start=start, end=end,
                            db=db, config=config_path).head(limit)
    from .report.tables import render_log

    click.echo(render_log(log, fmt), nl=False)


@main.command()
@store_options
@click.option("--html", "html_path", required=True, type=click.Path(dir_okay=False), help="The HTML file to write.")
@click.option("--as-of", help="Day to report, YYYY-MM-DD. Default: the last complete day in the store.")
@click.option("--limit", type=click.IntRange(min=0), default=50, show_default=True, help="At most this many alert cards.")
@handle_errors
def report(db, config_path, html_path, as_of, limit):
    """Write a self-contained HTML report: fleet overview, one chart per alert, an account index.

    Cards come most severe first, then the same alerts by MRR, then every account the scan saw
    with its state, level against its usual level and a sparkline. The file has no scripts and
    fetches nothing, so it opens offline and can be attached to an email. Every account, user
    and event name in it is escaped.

    \b
    Examples:
      ebbwatch report --html today.html
      ebbwatch report --html 2026-11-30.html --as-of 2026-11-30 --limit 20
    """
    data = api.write_report(html_path, as_of=as_of, limit=limit, db=db, config=config_path)
    click.echo(f"Wrote {html_path}: {data['n_alerts']} alert card(s) as of {data['summary']['as_of']}.", err=True)


@main.command("backtest")
@store_options
@click.option("--outcomes", required=True, type=click.Path(dir_okay=False),
              help="CSV account,date,outcome with outcome churned, contracted or expanded.")
@click.option("--from", "start", help="First day replayed (default: once the minimum history is there).")
@click.option("--to", "end", help="Last day replayed (default: the last complete day).")
@click.option("--step", type=click.IntRange(min=1), default=1, show_default=True, help="Replay every N-th day.")
@click.option("--lead-days", type=click.IntRange(min=0), default=30, show_default=True,
              help="An outcome counts as caught when an alert came at least this many days before it.")
@click.option("--horizon-days", type=click.IntRange(min=1), default=90, show_default=True,
              help="How far back from an outcome an alert may be and still count for it.")
@click.option("--budget", type=click.FloatRange(min=0, min_open=True), help="Alerts a day you can handle: calibrate to it.")
@click.option("--target-precision", type=click.FloatRange(0, 1), help="Or calibrate to this precision.")
@click.option("--format", "fmt", type=click.Choice(["table", "json"]), default="table", show_default=True)
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False), help="Precision-recall over the sweep and lead times (.svg/.png).")
@click.option("--chunk-size", type=click.IntRange(min=1), default=10_000, show_default=True,
              help="Accounts replayed at once (bounds memory).")
@threads_option
@engine_options
@shared_dir_option
@handle_errors
def backtest_command(db, config_path, outcomes, start, end, step, lead_days, horizon_days, budget, target_precision,
                     fmt, plot_path, chunk_size, threads, engine, scheduler, shared_dir):
    """Replay the daily scan over history: how early and how precisely would it have alerted?

    Each replayed day sees only the data up to it (accounts that already churned are left out),
    through the same code as the daily scan. Downward alerts are matched to churned and
    contracted outcomes, upward ones to expanded. The severity sweep shows the trade-off, and
    --budget or --target-precision picks a threshold and prints the config to paste.

    \b
    Examples:
      ebbwatch backtest --outcomes outcomes.csv
      ebbwatch backtest --outcomes outcomes.csv --step 7 --budget 2 --plot backtest.svg
      ebbwatch backtest --outcomes outcomes.csv --from 2026-06-01 --target-precision 0.5 --format json
    """
    if plot_path:  # before the replay, not after minutes of it
        from .report.plot import require_matplotlib

        require_matplotlib()
    result = api.backtest(outcomes, start=start, end=end, step=step, lead_days=lead_days, horizon_days=horizon_days,
                          budget=budget, target_precision=target_precision, db=db, config=config_path,
                          progress=_progress_printer("replay"), chunk_size=chunk_size, engine=engine,
                          scheduler=scheduler, shared_dir=shared_dir, threads=threads)
    leads = result.pop("_lead_times")
    result.pop("_alerts"), result.pop("_exposure")
    if plot_path:
        from .report.plot import plot_backtest

        plot_backtest(result, leads, plot_path)
        click.echo(f"Wrote {plot_path}.", err=True)
    from .report.backtest_text import render_backtest

    _emit(result, fmt, render_backtest)


@main.command()
@click.option("--dir", "directory", type=click.Path(file_okay=False),
              help="Where to write the scenario and its store. Default: a new temporary directory.")
@click.option("--accounts", "n_accounts", type=click.IntRange(20, 5000), default=300, show_default=True,
              help="How many invented accounts.")
@click.option("--days", "n_days", type=click.IntRange(120, 900), default=425, show_default=True,
              help="Days of history (about 14 months by default).")
@click.option("--seed", type=int, default=7, show_default=True)
@handle_errors
def demo(directory, n_accounts, n_days, seed):
    """Run the whole job on invented data: generate, ingest, scan, print the alerts.

    The scenario is Tidewell, an invented company selling a booking product to invented small
    businesses: JSON-lines telemetry keyed by user (attributed through identities.csv), weekday
    rhythms, seasonal customers, a holiday week, a day of lost telemetry, and planted stories —
    accounts sliding toward cancellation, one whose integration broke, teams surging before an
    upgrade, and small accounts whose empty weeks are normal. stories.csv in the directory lists
    what was planted, so you can check the alerts against it.

    \b
    Examples:
      ebbwatch demo
      ebbwatch demo --dir tidewell-demo --accounts 1000 --seed 3
    """
    say = lambda text: click.echo(text, err=True)  # noqa: E731
    scenario, summary, alerts = api.run_demo(directory, n_accounts=n_accounts, n_days=n_days, seed=seed,
                                             progress=_progress_printer("ingest"), say=say)
    _print_ingest_summary(summary)
    from .report import render_alerts

    click.echo(f"\nAlerts for {alerts.attrs['summary']['as_of']}:")
    click.echo(render_alerts(alerts, "table"), nl=False)
    stories = scenario.stories
    found = set(alerts["account"])
    click.echo("\nPlanted stories (stories.csv): what a good scan does today, and what this one did:")
    for row in stories.itertuples():
        mark = "flagged" if row.account in found else "quiet"
        click.echo(f"  {row.account}  {row.story:<30} expect {row.expect:<6} got {mark:<8} {row.detail}")
    planted = set(stories["account"])
    outside = alerts[~alerts["account"].isin(planted)]
    if len(outside):
        click.echo("\nAlerts outside the planted stories (no story was planted there; the invented noise, "
                   "holidays and seasons made them):")
        for row in outside.itertuples():
            click.echo(f"  {row.account}  {row.kind:<6} severity {row.severity:.1f}  {row.message}")
    from datetime import timedelta
    from pathlib import Path

    folder = Path(scenario.directory)
    db = str(folder / "ebbwatch.duckdb")
    report_path = str(folder / "report.html")
    api.write_report(report_path, db=db, today=scenario.as_of + timedelta(days=1))
    top = alerts["account"].iloc[0] if len(alerts) else scenario.stories["account"].iloc[0]
    say(f"\nThe store is {db}; the HTML report is {report_path}. Try next:")
    for command in (f"ebbwatch explain {top} --db {db}",
                    f"ebbwatch backtest --db {db} --outcomes {scenario.outcomes_csv} --step 7",
                    f"ebbwatch scan --db {db} --format jsonl",
                    f"ebbwatch status --db {db}"):
        say(f"  {command}")
    if directory is None:
        size = sum(f.stat().st_size for f in folder.rglob("*") if f.is_file())
        say(f"The demo's files ({size / 1e6:.0f} MB) are in a temporary folder, {folder}; remove them with "
            f"rm -r {folder} (or give --dir to choose where they go).")


if __name__ == "__main__":  # pragma: no cover
    main()
