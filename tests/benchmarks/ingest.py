"""Ingest speed on realistic file shapes: ebbwatch vs a bare DuckDB read_json (read_parquet) +
GROUP BY (and pandas on the first shape), each shape generated and measured in one run.

Run by hand: ``python tests/benchmarks/ingest.py [--events N] [--shapes a,b] [--statements N]``
(default 2,000,000 events a shape; ``--statements`` also prints, per shape, the N costliest store
statements of one more ingest, each timed alone).  Each route runs in its own process (so peak memory is its own) on
the same file, the routes alternating ``--repeat`` times; the ratios of the medians are printed.
Targets (issue 21): every shape within 1.5x of the bare DuckDB time, and ebbwatch at least 10x
faster than pandas.
"""

from __future__ import annotations

import argparse
import gzip
import os
import re
import shutil
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import run_measured  # noqa: E402

# Each shape changes one thing from the first: how ids, users and times are written, bad lines,
# compression.  ``id``/``user``/``ts`` are SQL over ``i`` (the row), ``t`` (a timestamp),
# ``u`` (a user number) and ``a`` (an account number); ``None`` leaves the field out.
BASE = {"id": "CAST(uuid() AS VARCHAR)", "user": "'u-' || u || '-' || a",
        "ts": "strftime(t, '%Y-%m-%dT%H:%M:%S.%gZ')", "bad_every": 0, "gzip": False, "parquet": False}
SHAPES = {
    "uuid ids (base)": {},
    "decimal-string ids": {"id": "printf('%016d', i)"},
    "hex ids": {"id": "md5(CAST(i AS VARCHAR))[:16]"},
    "integer ids": {"id": "i"},
    "no ids": {"id": None},
    "integer users": {"user": "u * 10000 + a"},
    "times with offsets": {"ts": "strftime(t + INTERVAL 2 HOUR, '%Y-%m-%dT%H:%M:%S.%g+02:00')"},
    "epoch-ms times": {"ts": "epoch_ms(t)"},
    "0.1% bad lines": {"bad_every": 1000},
    "gzip": {"gzip": True},
    "Parquet (typed times)": {"ts": "t AT TIME ZONE 'UTC'", "parquet": True},
}


def make_file(path: str, n_events: int, shape: dict, seed: int = 7):
    """~150-byte lines, 2,000 accounts with log-normal (heavy-tailed) sizes, 60 days, a nested
    ``attrs`` object on every line; ``shape`` as in ``SHAPES`` (over ``BASE``)."""
    import duckdb

    spec = {**BASE, **shape}
    con = duckdb.connect()
    con.execute(f"SELECT setseed({(seed % 100) / 100})")
    id_column = f", {spec['id']} AS id" if spec["id"] else ""
    raw = path + ".raw" if spec["bad_every"] or spec["gzip"] else path
    con.execute(f"""
        COPY (
          WITH acc AS (SELECT range AS a, exp(random() * 4 + 1) AS w FROM range(2000)),
               cum AS (SELECT a, sum(w) OVER (ORDER BY a) / sum(w) OVER () AS c FROM acc),
               ev AS (SELECT range AS i, random() AS r, random() AS r2, random() AS r3 FROM range({n_events})),
               rows AS (SELECT i, TIMESTAMP '2026-01-01' + to_microseconds(CAST(r2 * 60 * 86400e6 AS BIGINT)) AS t,
                               CAST(floor(r3 * 40) AS INT) AS u, r3,
                               (SELECT a FROM cum WHERE c >= r ORDER BY c LIMIT 1) AS a FROM ev)
          SELECT {spec['ts']} AS ts,
                 ['doc.edit', 'doc.view', 'share.create', 'comment.add'][1 + CAST(floor(r3 * 4) AS INT)] AS event,
                 {spec['user']} AS "user", 'acct-' || a AS account{id_column},
                 {{'src': 'web', 'ua': {{'os': 'linux', 'v': u}}}} AS attrs
          FROM rows ORDER BY i
        ) TO '{raw}' (FORMAT {"parquet" if spec["parquet"] else "json"})
    """)
    con.close()
    if raw == path:
        return
    with open(raw, "rb") as src, (gzip.open(path, "wb", compresslevel=6) if spec["gzip"] else open(path, "wb")) as out:
        for n, line in enumerate(src, start=1):
            if spec["bad_every"] and n % spec["bad_every"] == 0:
                line = line[: len(line) // 2] + b"\n"  # cut short: not JSON
            out.write(line)
    os.remove(raw)


def bare_query(path: str, shape: dict) -> str:
    """The bare DuckDB route: read the four fields, count per account, UTC day and event."""
    spec = {**BASE, **shape}
    if spec["parquet"]:
        return f"""SELECT account, CAST(ts AS DATE) AS day, event, count(*) AS events, count(DISTINCT "user") AS users
FROM read_parquet({path!r}) GROUP BY ALL"""
    ts_type, day = ("BIGINT", "CAST(make_timestamp(ts * 1000) AS DATE)") if spec["ts"].startswith("epoch_ms") \
        else ("VARCHAR", "CAST(CAST(ts AS TIMESTAMPTZ) AS DATE)")
    tolerate = ", ignore_errors=true" if spec["bad_every"] else ""
    return f"""SELECT account, {day} AS day, event, count(*) AS events, count(DISTINCT "user") AS users
FROM read_json({path!r}, format='newline_delimited'{tolerate},
               columns={{'ts': '{ts_type}', 'event': 'VARCHAR', 'user': 'VARCHAR', 'account': 'VARCHAR'}})
GROUP BY ALL"""


EBBWATCH = """
import time, ebbwatch
from datetime import datetime, timezone
t = time.perf_counter()
s = ebbwatch.ingest_files([{path!r}], db={db!r}, now=datetime(2026, 6, 1, tzinfo=timezone.utc))
RESULT = {{"seconds": time.perf_counter() - t, "events": s["ingested"], "path": s["paths"],
          "rechecked": s["lines_rechecked"]}}
"""

BARE_DUCKDB = """
import time, duckdb
con = duckdb.connect()
t = time.perf_counter()
rows = con.execute({query!r}).fetchall()
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


def timed_statements(path: str, db: str) -> list[tuple[float, str]]:
    """One ingest of ``path`` into a new store at ``db`` with every ``execute`` of the store's
    connections timed: ``(seconds, statement with its whitespace folded)``, costliest first.  The
    connection class is restored afterwards."""
    import ebbwatch
    from ebbwatch.store import connection

    timings = []

    class TimedConnection:
        def __init__(self, con):
            self._con = con

        def execute(self, query, *args, **kwargs):
            start = time.perf_counter()
            result = self._con.execute(query, *args, **kwargs)
            timings.append((time.perf_counter() - start, re.sub(r"\s+", " ", query).strip()))
            return result

        def __getattr__(self, name):
            return getattr(self._con, name)

    original = connection.StoreConnection.__init__

    def timed_init(self, con, store_path):
        original(self, TimedConnection(con), store_path)

    connection.StoreConnection.__init__ = timed_init
    try:
        ebbwatch.ingest_files([path], db=db, now=datetime(2026, 6, 1, tzinfo=timezone.utc))
    finally:
        connection.StoreConnection.__init__ = original
    return sorted(timings, key=lambda t: -t[0])


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=2_000_000)
    # (argparse expands '%' in help texts, and one shape's name holds one.)
    parser.add_argument("--shapes", help="comma-separated shape names (default: all): "
                        + ", ".join(SHAPES).replace("%", "%%"))
    parser.add_argument("--skip-pandas", action="store_true")
    parser.add_argument("--repeat", type=int, default=3, help="runs of each route, alternated (medians compared)")
    parser.add_argument("--dir", help="keep the generated files here and reuse them (default: a temp directory)")
    parser.add_argument("--statements", type=int, default=0,
                        help="also print each shape's N costliest store statements (one more ingest, in this process)")
    args = parser.parse_args()
    tmp = args.dir or tempfile.mkdtemp(prefix="ebbwatch-ingest-bench-")
    os.makedirs(tmp, exist_ok=True)
    names = [n.strip() for n in args.shapes.split(",")] if args.shapes else list(SHAPES)
    unknown = [n for n in names if n not in SHAPES]
    if unknown:
        parser.error(f"unknown shape(s) {', '.join(map(repr, unknown))}; the shapes are: {', '.join(SHAPES)}")
    rows = []
    for k, name in enumerate(names):
        shape = SHAPES[name]
        number = list(SHAPES).index(name)
        suffix = ".parquet" if shape.get("parquet") else ".jsonl" + (".gz" if shape.get("gzip") else "")
        path = os.path.join(tmp, f"events-{args.events}-{number}{suffix}")
        if not os.path.exists(path):
            make_file(path, args.events, shape)
        size_mb = os.path.getsize(path) / 1e6
        # Timings wander by 20-30% from run to run: the routes alternate, each in a fresh
        # process on the same file, and the medians are compared.
        runs = {"ebbwatch": [], "bare": [], "pandas": []}
        with_pandas = k == 0 and not args.skip_pandas
        for i in range(args.repeat):
            db = os.path.join(tmp, f"bench-{i}.duckdb")
            for stale in (db, db + ".wal"):
                if os.path.exists(stale):
                    os.remove(stale)
            runs["ebbwatch"].append(run_measured(EBBWATCH.format(path=path, db=db)))
            os.remove(db)
            runs["bare"].append(run_measured(BARE_DUCKDB.format(query=bare_query(path, shape))))
            if with_pandas:
                runs["pandas"].append(run_measured(PANDAS.format(path=path)))
        if args.statements:
            db = os.path.join(tmp, "statements.duckdb")
            for stale in (db, db + ".wal"):
                if os.path.exists(stale):
                    os.remove(stale)
            timings = timed_statements(path, db)
            os.remove(db)
            print(f"{name}: {sum(t for t, _ in timings):.2f} s in {len(timings)} statements; the costliest:")
            for seconds, statement in timings[:args.statements]:
                print(f"  {seconds:6.3f}  {statement[:110]}")
        if not args.dir:
            os.remove(path)
        median = {key: float(np.median([r["seconds"] for r in v])) for key, v in runs.items() if v}
        eb = runs["ebbwatch"][0]
        rows.append((name, size_mb, median, eb, runs))
        print(f"{name}: ebbwatch {median['ebbwatch']:.2f} s ({eb['path']}, {eb['events']:,} stored, "
              f"{eb['rechecked']:,} lines rechecked), bare DuckDB {median['bare']:.2f} s, "
              f"ratio {median['ebbwatch'] / median['bare']:.2f}x", flush=True)
    if not args.dir:
        shutil.rmtree(tmp, ignore_errors=True)
    print()
    print(f"{args.events:,} events a shape, medians of {args.repeat} alternated runs")
    print(f"{'shape':<24}{'MB':>6}{'ebbwatch s':>11}{'bare s':>8}{'ratio':>7}{'peak MB':>9}   paths; all ebbwatch runs (s)")
    for name, size_mb, median, eb, runs in rows:
        peak = max(r["peak_rss_mb"] for r in runs["ebbwatch"])
        print(f"{name:<24}{size_mb:>6.0f}{median['ebbwatch']:>11.2f}{median['bare']:>8.2f}{median['ebbwatch'] / median['bare']:>6.2f}x"
              f"{peak:>9.0f}   {eb['path']}; " + ", ".join(format(r["seconds"], ".2f") for r in runs["ebbwatch"]))
    worst = max(m["ebbwatch"] / m["bare"] for _, _, m, _, _ in rows)
    print(f"worst ratio ebbwatch / bare DuckDB: {worst:.2f}x (target <= 1.5x)")
    first = rows[0][2]
    if "pandas" in first:
        print(f"pandas read_json(lines) + groupby on '{rows[0][0]}': {first['pandas']:.2f} s; "
              f"pandas / ebbwatch {first['pandas'] / first['ebbwatch']:.1f}x (target >= 10x)")


if __name__ == "__main__":
    main()
