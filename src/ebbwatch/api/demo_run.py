"""The demo: write the invented scenario, ingest it and scan its last day."""

from __future__ import annotations

import time
from datetime import datetime, timedelta, timezone
from pathlib import Path
from .ingesting import ingest_files
from .scanning import scan


def run_demo(directory: str | None = None, *, n_accounts: int = 300, n_days: int = 425, seed: int = 7,
             progress=None, say=lambda text: None):
    """Generate the invented Tidewell scenario into ``directory``, ingest it, and scan its last day.

    Returns ``(scenario, ingest_summary, alerts)``.  ``say`` receives one line per step.
    """
    import tempfile

    from ..datasets import write_demo_scenario

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
