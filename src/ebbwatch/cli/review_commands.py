"""Commands that look back and show: report, backtest, demo."""

from __future__ import annotations

import click

from .. import api
from .base import (
    _emit, _progress_printer, engine_options, handle_errors, main, shared_dir_option, store_options,
    threads_option,
)
from .store_commands import _print_ingest_summary


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
@click.option("--save-rates", is_flag=True,
              help="Keep in the store what the replay's alerts led to (per kind and severity band); "
                   "scan then adds these outcome rates to its alerts.")
@threads_option
@engine_options
@shared_dir_option
@handle_errors
def backtest_command(db, config_path, outcomes, start, end, step, lead_days, horizon_days, budget, target_precision,
                     fmt, plot_path, chunk_size, save_rates, threads, engine, scheduler, shared_dir):
    """Replay the daily scan over history: how early and how precisely would it have alerted?

    Each replayed day sees only the data up to it (accounts that already churned are left out),
    through the same code as the daily scan. Downward alerts are matched to churned and
    contracted outcomes, upward ones to expanded. The severity sweep shows the trade-off, and
    --budget or --target-precision picks a threshold and prints the config to paste.

    --save-rates keeps, per alert kind and severity band, how many replayed alert episodes were
    followed by each outcome within --horizon-days (only replay days whose whole horizon has
    passed count), and the same for accounts with no alert; from then on each scan alert carries
    these rates with exact intervals, and the scan says how much MRR its alerts put at stake.

    \b
    Examples:
      ebbwatch backtest --outcomes outcomes.csv
      ebbwatch backtest --outcomes outcomes.csv --step 7 --save-rates
      ebbwatch backtest --outcomes outcomes.csv --step 7 --budget 2 --plot backtest.svg
      ebbwatch backtest --outcomes outcomes.csv --from 2026-06-01 --target-precision 0.5 --format json
    """
    if plot_path:  # before the replay, not after minutes of it
        from ..report.plot import require_matplotlib

        require_matplotlib()
    result = api.backtest(outcomes, start=start, end=end, step=step, lead_days=lead_days, horizon_days=horizon_days,
                          budget=budget, target_precision=target_precision, db=db, config=config_path,
                          progress=_progress_printer("replay"), chunk_size=chunk_size, engine=engine,
                          scheduler=scheduler, shared_dir=shared_dir, threads=threads, save_rates=save_rates)
    leads = result.pop("_lead_times")
    result.pop("_alerts"), result.pop("_exposure")
    if plot_path:
        from ..report.plot import plot_backtest

        plot_backtest(result, leads, plot_path)
        click.echo(f"Wrote {plot_path}.", err=True)
    from ..report.backtest_text import render_backtest

    _emit(result, fmt, render_backtest)
    if result.get("saved_rates"):
        from ..report.outcome_text import saved_rates_line

        click.echo(saved_rates_line(result["saved_rates"]), err=True)


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
    from ..report import render_alerts

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
                    f"ebbwatch backtest --db {db} --outcomes {scenario.outcomes_csv} --step 7 --save-rates",
                    f"ebbwatch scan --db {db} --format jsonl",
                    f"ebbwatch status --db {db}"):
        say(f"  {command}")
    if directory is None:
        size = sum(f.stat().st_size for f in folder.rglob("*") if f.is_file())
        say(f"The demo's files ({size / 1e6:.0f} MB) are in a temporary folder, {folder}; remove them with "
            f"rm -r {folder} (or give --dir to choose where they go).")


if __name__ == "__main__":  # pragma: no cover
    main()
