"""The planted changes the scan misses, one row each, beside what the scan made of them.

Run by hand: ``python tests/benchmarks/missed.py [--families C] [--seeds 3] [--kinds drop,slide]
[--small]``.  Fleets are made and judged as ``accuracy.py`` makes and judges them (``ingest
--daily``, ``scan`` at the defaults); for every planted change of the reported kinds that the
scan did not alert on in its direction, it prints the truth (kind, age in days, factor, usual
events a day, slide shape, the account's other traits) and the scan's own figures: the
p-values, the window that told most and its change, the kind a drop was read as, the Mann–Kendall
trend p and the growth the history shows.  A miss with a p-value just above the alert threshold
and a miss at p 0.3 want different work; this is where to start telling them apart.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
import planted  # noqa: E402
from fleets import generate  # noqa: E402

SCAN_COLUMNS = {"p_down": "p_down", "p_up": "p_up", "window_down": "win_down", "change_down_pct": "down %",
                "window_up": "win_up", "change_up_pct": "up %", "down_kind": "read as",
                "p_trend_down": "p_trend", "growth_pct_year": "growth %/yr"}


def missed(fleet, flags: dict, scores: pd.DataFrame, kinds, small: bool = False) -> pd.DataFrame:
    """One row per planted change of ``kinds`` not alerted on in its direction."""
    truth = fleet.truth.set_index("account")
    judged = scores.set_index("account")
    rows = []
    for kind, (accounts, direction) in planted.target_groups(fleet.truth, small=small).items():
        if kind not in kinds:
            continue
        for account in accounts:
            t = truth.loc[account]
            wanted = direction if direction is not None else (1 if t["kind"] == "surge" else -1)
            if flags.get(account, 0) == wanted:
                continue
            row = {"account": account, "reported as": kind, "planted": t["kind"], "age": t["age_days"],
                   "factor": round(float(t["factor"]), 2), "usual": round(float(t["usual"]), 1),
                   "shape": t["shape"], "traits": t["traits"]}
            if account in judged.index:
                s = judged.loc[account]
                row["status"] = s["status"]
                row.update({label: s[column] for column, label in SCAN_COLUMNS.items()})
            rows.append(row)
    return pd.DataFrame(rows)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", default="C")
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--accounts", type=int, default=400)
    parser.add_argument("--share-changed", type=float, default=0.3)
    parser.add_argument("--kinds", default=",".join(planted.KINDS))
    parser.add_argument("--small", action="store_true", help="accounts under 5 events a day instead")
    args = parser.parse_args(argv)
    kinds = set(args.kinds.split(","))
    pd.set_option("display.width", 250)
    pd.set_option("display.max_columns", 30)
    pd.set_option("display.max_rows", 1000)
    for family in args.families.split(","):
        parts = []
        for seed in range(args.first_seed, args.first_seed + args.seeds):
            fleet = generate(family, args.accounts, seed, share_changed=args.share_changed)
            with tempfile.TemporaryDirectory() as tmp:
                flags, scores = planted.run_ebbwatch(fleet, Path(tmp))
            parts.append(missed(fleet, flags, scores, kinds, args.small).assign(seed=seed))
        table = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
        print(f"== family {family}: {len(table)} missed ==")
        if len(table):
            print(table.to_string(index=False, float_format=lambda v: f"{v:.3g}"))


if __name__ == "__main__":
    main()
