"""The command group, and what its commands share: error handling and exit codes, common
options, output helpers, progress."""

from __future__ import annotations

import json
import sys
from functools import wraps

import click

from .. import __version__
from ..errors import EbbwatchError

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
