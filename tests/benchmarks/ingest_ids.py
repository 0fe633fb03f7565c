"""What remembering every event id costs: store bytes per million ids, and the time to ingest a
file into a store that remembers many ids against one that remembers none.

Run by hand: ``python tests/benchmarks/ingest_ids.py [--events N] [--remembered M] [--dir D]``
(defaults 2,000,000 and 20,000,000).  A store is built from a file without ids; a copy gets M
remembered ids (random 64-bit hashes, event times over the year before); the same file with ids
is then ingested into fresh copies of both, alternated ``--repeat`` times, each in its own process.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
from datetime import datetime, timezone
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from ingest import SHAPES, make_file  # noqa: E402

INGEST = """
import sys, time, ebbwatch
from datetime import datetime, timezone
t = time.perf_counter()
ebbwatch.ingest_files([sys.argv[1]], db=sys.argv[2], now=datetime(2026, 6, 1, tzinfo=timezone.utc))
print(time.perf_counter() - t)
"""


def main():
    import duckdb
    import ebbwatch

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=2_000_000)
    parser.add_argument("--remembered", type=int, default=20_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--dir", help="keep the generated files here (default: a temp directory)")
    args = parser.parse_args()
    tmp = args.dir or tempfile.mkdtemp(prefix="ebbwatch-ids-bench-")
    os.makedirs(tmp, exist_ok=True)
    without, with_ids = (os.path.join(tmp, f"{name}-{args.events}.jsonl") for name in ("no-ids", "ids"))
    if not os.path.exists(without):
        make_file(without, args.events, SHAPES["no ids"], seed=8)
    if not os.path.exists(with_ids):
        make_file(with_ids, args.events, SHAPES["uuid ids (base)"])
    empty, full = os.path.join(tmp, "remembers-none.duckdb"), os.path.join(tmp, "remembers-many.duckdb")
    for stale in (empty, full):
        if os.path.exists(stale):
            os.remove(stale)
    ebbwatch.ingest_files([without], db=empty, now=datetime(2026, 6, 1, tzinfo=timezone.utc))
    shutil.copy(empty, full)
    con = duckdb.connect(full)
    step_us = int(365 * 86400e6 / args.remembered)
    con.execute(f"""INSERT INTO seen_ids SELECT hash(range + 1e12), TIMESTAMPTZ '2025-01-01 00:00:00+00'
                    + to_microseconds(range * {step_us}) FROM range({args.remembered})""")
    con.execute("CHECKPOINT")
    con.close()
    grown = os.path.getsize(full) - os.path.getsize(empty)
    print(f"{args.remembered:,} remembered ids add {grown / 1e6:.0f} MB: "
          f"{grown / (args.remembered / 1e6) / 1e6:.1f} MB per million events")
    runs = {"remembers none": [], f"remembers {args.remembered:,}": []}
    for _ in range(args.repeat):
        for (name, times), source in zip(runs.items(), (empty, full)):
            work = os.path.join(tmp, "work.duckdb")
            shutil.copy(source, work)
            out = subprocess.run([sys.executable, "-c", INGEST, with_ids, work], capture_output=True, text=True, check=True)
            times.append(float(out.stdout.split()[-1]))
            os.remove(work)
    medians = {name: statistics.median(times) for name, times in runs.items()}
    for name, times in runs.items():
        print(f"ingest {args.events:,} events with ids into a store that {name}: median {medians[name]:.2f} s "
              f"({', '.join(format(t, '.2f') for t in times)})")
    first, second = medians.values()
    print(f"ratio: {second / first:.2f}x")
    if not args.dir:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
