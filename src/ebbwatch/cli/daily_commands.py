"""The daily commands: scan, explain, snooze, alerts."""

from __future__ import annotations

import sys

import click

from .. import api
from ..errors import UsageError
from ..textsafe import plain_text
from .base import (
    EXIT_ALERTS, _emit, _progress_printer, engine_options, handle_errors, main, shared_dir_option,
    store_options, threads_option,
)


@main.command()
@store_options
@click.option("--as-of", help="Day to judge, YYYY-MM-DD. Default: the last complete day in the store.")
@click.option("--format", "fmt", type=click.Choice(["table", "jsonl", "csv", "markdown", "json"]),
              default="table", show_default=True, help="jsonl: one alert per line with a ready `message`.")
@click.option("--kind", "kinds", multiple=True, type=click.Choice(["drop", "stop", "slide", "surge"]),
              help="Only these kinds (repeatable).")
@click.option("--max-alerts", type=click.IntRange(min=0), help="At most this many alerts, most severe first.")
@click.option("--fail-on-alert", is_flag=True, help="Exit with 1 when there is at least one alert.")
@click.option("--chunk-size", type=click.IntRange(min=1), default=api.DEFAULT_CHUNK_SIZE, show_default=True,
              help="Accounts scored at once (bounds memory; results do not depend on it).")
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
    from ..report import render_alerts

    summary = alerts.attrs["summary"]
    click.echo(render_alerts(alerts, fmt, summary, wide=wide), nl=False)
    # On stderr whatever the format, so a cron log that keeps the JSON lines records what happened.
    click.echo(
        f"{summary['alerts']} alert(s) shown of {summary['open_alerts']} open as of {summary['as_of']}"
        f"{' (recorded)' if summary['recorded'] else ''}; {summary['judged']:,} accounts judged, "
        f"{len(summary['not_enough_history']):,} with not enough history, {summary['dormant']:,} dormant"
        + (f"; masked data-gap days: {', '.join(summary['masked_days'])}" if summary["masked_days"] else "")
        + _fleet_words(summary["fleet_factor"]) + _fleet_null_words(summary.get("fleet_null"))
        + ("" if summary["as_of_reason"].startswith("given") else f"; judged {summary['as_of_reason']}") + ".",
        err=True,
    )
    if summary.get("at_risk"):
        from ..report.outcome_text import at_risk_lines

        for line in at_risk_lines(summary["at_risk"]):
            click.echo(line, err=True)
    for change in summary["history_changed"]:
        click.echo(f"Note: {change['file']} ({change['events']:,} events) arrived after the last recorded scan and "
                   f"changed days already judged ({change['first_day']} .. {change['last_day']}).", err=True)
    if fail_on_alert and len(alerts):
        sys.exit(EXIT_ALERTS)


def _fleet_words(fleet: dict) -> str:
    if fleet["large_moves_only"]:
        return (f"; fleet-wide days read from {fleet['voting_accounts']:,} accounts, only where nearly all "
                f"moved together ({fleet['needed']} needed to read smaller moves)")
    if fleet["estimated"]:
        return f"; fleet-wide days read from {fleet['voting_accounts']:,} accounts"
    return (f"; no fleet-wide factor ({fleet['voting_accounts']} account(s) vote, {fleet['needed_for_large_moves']} "
            "needed): each account judged on its own")


def _fleet_null_words(nulls: dict | None) -> str:
    from ..report.tables import fleet_null_sentences

    return "".join(f"; {sentence}" for sentence in fleet_null_sentences(nulls))


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
        from ..report.plot import require_matplotlib

        require_matplotlib()
    info = api.explain(account, as_of=as_of, db=db, config=config_path)
    if plot_path:
        from ..report.plot import plot_account

        plot_account(info, plot_path)
        click.echo(f"Wrote {plot_path}.", err=True)
    from ..report.explain_text import render_explanation

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
    from ..report.tables import render_log

    click.echo(render_log(log, fmt), nl=False)
