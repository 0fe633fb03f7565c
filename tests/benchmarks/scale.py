"""Scale: wall time and peak memory of the scan at 10k, 100k and 300k accounts x 730 days
(through the daily input), and of ingest at 1, 4 and 16 million events, side by side in one run.

Run by hand: ``python tests/benchmarks/scale.py [--accounts 10000 100000 300000]
[--events 1000000 4000000 16000000] [--dir DIR]``.  Each measurement runs in a fresh process;
peak memory is that process's maximum resident set.  Cost should grow no faster than linearly:
the last columns divide by the size.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import run_measured  # noqa: E402
from ingest import make_file  # noqa: E402
from scan import write_fleet  # noqa: E402


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--accounts", type=int, nargs="*", default=[10_000, 100_000, 300_000])
    parser.add_argument("--events", type=int, nargs="*", default=[1_000_000, 4_000_000, 16_000_000])
    parser.add_argument("--days", type=int, default=730)
    parser.add_argument("--dir", help="keep generated inputs here (reused when present)")
    args = parser.parse_args()
    work = Path(args.dir or tempfile.mkdtemp(prefix="ebbwatch-scale-"))
    work.mkdir(parents=True, exist_ok=True)
    rows = []
    for n in args.accounts:
        parquet, db = work / f"daily-{n}.parquet", work / f"store-{n}.duckdb"
        if not db.exists():
            as_of = write_fleet(str(parquet), n, args.days)
            (work / f"as_of-{n}").write_text(as_of.isoformat())
            load = run_measured(f"""
import time, ebbwatch
t = time.perf_counter()
s = ebbwatch.ingest_files([], db={str(db)!r}, daily={str(parquet)!r})
RESULT = {{"seconds": time.perf_counter() - t, "rows": s["daily_rows_loaded"]}}
""")
            rows.append((f"load --daily, {n:,} accounts", load["rows"], load["seconds"], load["peak_rss_mb"]))
        as_of = (work / f"as_of-{n}").read_text()
        scan = run_measured(f"""
import time, ebbwatch
t = time.perf_counter()
a = ebbwatch.scan(db={str(db)!r}, as_of={as_of!r})  # the daily scan as run: top 50 alerts with drivers
RESULT = {{"seconds": time.perf_counter() - t}}
""")
        rows.append((f"scan, {n:,} accounts x {args.days} days", n, scan["seconds"], scan["peak_rss_mb"]))
        print(f"done: {n:,} accounts", file=sys.stderr)
    for n in args.events:
        path = work / f"events-{n}.jsonl"
        if not path.exists():
            make_file(str(path), n)
        db = work / f"ingest-{n}.duckdb"
        for stale in (db, Path(str(db) + ".wal")):
            if stale.exists():
                stale.unlink()
        ingest = run_measured(f"""
import time, ebbwatch
from datetime import datetime, timezone
t = time.perf_counter()
s = ebbwatch.ingest_files([{str(path)!r}], db={str(db)!r}, now=datetime(2026, 6, 1, tzinfo=timezone.utc))
RESULT = {{"seconds": time.perf_counter() - t, "events": s["ingested"]}}
""")
        rows.append((f"ingest, {n:,} events ({os.path.getsize(path) / 1e6:.0f} MB)", n, ingest["seconds"], ingest["peak_rss_mb"]))
        print(f"done: {n:,} events", file=sys.stderr)
    print(f"{'what':<44}{'size':>12}{'seconds':>9}{'peak MB':>9}{'us per unit':>13}{'peak KB per unit':>18}")
    for name, size, seconds, peak in rows:
        print(f"{name:<44}{size:>12,}{seconds:>9.1f}{peak:>9.0f}{1e6 * seconds / size:>13.2f}{1024 * peak / size:>18.3f}")


if __name__ == "__main__":
    main()
