"""Ingest speed: ebbwatch vs a bare DuckDB read_json + GROUP BY vs pandas, on one generated file.

Run by hand: ``python tests/benchmarks/ingest.py [--events N]`` (default 2,000,000).  Each route
runs in its own process (so peak memory is its own) on the same file, in the same run, the
routes alternating ``--repeat`` times; the ratios of the medians are printed.  Targets (issue 2): ebbwatch within 1.7x of the bare DuckDB time and at least
10x faster than pandas.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import run_measured  # noqa: E402


def make_file(path: str, n_events: int, seed: int = 7):
    """~150-byte lines, 2,000 accounts with log-normal (heavy-tailed) sizes, 60 days, ids on all."""
    import duckdb

    con = duckdb.connect()
    con.execute(f"SELECT setseed({(seed % 100) / 100})")
    con.execute(f"""
        COPY (
          WITH acc AS (SELECT range AS a, exp(random() * 4 + 1) AS w FROM range(2000)),
               cum AS (SELECT a, sum(w) OVER (ORDER BY a) / sum(w) OVER () AS c FROM acc),
               ev AS (SELECT range AS i, random() AS r, random() AS r2, random() AS r3 FROM range({n_events}))
          SELECT strftime(TIMESTAMP '2026-01-01' + to_microseconds(CAST(r2 * 60 * 86400e6 AS BIGINT)),
                          '%Y-%m-%dT%H:%M:%S.%gZ') AS ts,
                 ['doc.edit', 'doc.view', 'share.create', 'comment.add'][1 + CAST(floor(r3 * 4) AS INT)] AS event,
                 'u-' || CAST(floor(r3 * 40) AS INT) || '-' || (SELECT a FROM cum WHERE c >= r ORDER BY c LIMIT 1) AS "user",
                 'acct-' || (SELECT a FROM cum WHERE c >= r ORDER BY c LIMIT 1) AS account,
                 'e-' || md5(CAST(i AS VARCHAR))[:16] AS id,
                 {{'src': 'web'}} AS attrs
          FROM ev
        ) TO '{path}' (FORMAT json)
    """)
    con.close()


EBBWATCH = """
import time, ebbwatch
from datetime import datetime, timezone
t = time.perf_counter()
s = ebbwatch.ingest_files([{path!r}], db={db!r}, now=datetime(2026, 6, 1, tzinfo=timezone.utc))
RESULT = {{"seconds": time.perf_counter() - t, "events": s["ingested"], "path": s["paths"]}}
"""

BARE_DUCKDB = """
import time, duckdb
con = duckdb.connect()
t = time.perf_counter()
rows = con.execute('''SELECT account, CAST(CAST(ts AS TIMESTAMPTZ) AS DATE) AS day, event,
       count(*) AS events, count(DISTINCT "user") AS users
FROM read_json({path!r}, format='newline_delimited',
               columns={{'ts': 'VARCHAR', 'event': 'VARCHAR', 'user': 'VARCHAR', 'account': 'VARCHAR'}})
GROUP BY ALL''').fetchall()
RESULT = {{"seconds": time.perf_counter() - t, "groups": len(rows)}}
"""

PANDAS = """
import time, pandas as pd
t = time.perf_counter()
parts = []
for chunk in pd.read_json({path!r}, lines=True, chunksize=500_000, dtype={{"user": str, "account": str}}):
    chunk["day"] = pd.to_datetime(chunk["ts"], utc=True).dt.date
    parts.append(chunk.groupby(["account", "day", "event"]).agg(events=("id", "size"), users=("user", "nunique")))
out = pd.concat(parts)
RESULT = {{"seconds": time.perf_counter() - t, "groups": len(out)}}
"""


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=2_000_000)
    parser.add_argument("--skip-pandas", action="store_true")
    parser.add_argument("--repeat", type=int, default=3, help="runs of each route, alternated (medians compared)")
    parser.add_argument("--dir", help="keep the generated file here and reuse it (default: a temp directory)")
    args = parser.parse_args()
    tmp = args.dir or tempfile.mkdtemp(prefix="ebbwatch-ingest-bench-")
    os.makedirs(tmp, exist_ok=True)
    path = os.path.join(tmp, f"events-{args.events}.jsonl")
    if not os.path.exists(path):
        t = time.perf_counter()
        make_file(path, args.events)
        print(f"generated in {time.perf_counter() - t:.1f} s")
    size = os.path.getsize(path)
    print(f"file: {args.events:,} events, {size / 1e6:.0f} MB, {size / args.events:.0f} B/line")
    # Timings here wander by 20-30% from run to run: the routes alternate, each in a fresh
    # process on the same file, and the medians are compared.
    runs = {"ebbwatch": [], "bare": [], "pandas": []}
    for i in range(args.repeat):
        db = os.path.join(tmp, f"bench-{i}.duckdb")
        for stale in (db, db + ".wal"):
            if os.path.exists(stale):
                os.remove(stale)
        runs["ebbwatch"].append(run_measured(EBBWATCH.format(path=path, db=db)))
        os.remove(db)
        runs["bare"].append(run_measured(BARE_DUCKDB.format(path=path)))
        if not args.skip_pandas:
            runs["pandas"].append(run_measured(PANDAS.format(path=path)))
    if not args.dir:
        os.remove(path)
    median = {k: float(np.median([r["seconds"] for r in v])) for k, v in runs.items() if v}
    print(f"{'route (median of ' + str(args.repeat) + ')':<34}{'seconds':>9}{'events/s':>13}{'peak MB':>9}   all runs (s)")
    names = {"ebbwatch": "ebbwatch ingest (fast path)", "bare": "bare DuckDB read_json + GROUP BY",
             "pandas": "pandas read_json(lines) + groupby"}
    for key, name in names.items():
        if key in median:
            peak = max(r["peak_rss_mb"] for r in runs[key])
            print(f"{name:<34}{median[key]:>9.2f}{args.events / median[key]:>13,.0f}{peak:>9.0f}   "
                  + ", ".join(format(r["seconds"], ".2f") for r in runs[key]))
    eb = runs["ebbwatch"][0]
    print(f"ebbwatch paths: {eb['path']}; events stored: {eb['events']:,}")
    print(f"ratio ebbwatch / bare DuckDB: {median['ebbwatch'] / median['bare']:.2f}x (target <= 1.7x)")
    if "pandas" in median:
        print(f"ratio pandas / ebbwatch: {median['pandas'] / median['ebbwatch']:.1f}x (target >= 10x)")

if __name__ == "__main__":
    main()
