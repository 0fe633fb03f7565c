"""How far ahead of a cancellation can its slide be seen at all?  ebbwatch's falling p-value beside
a detector told the slide's true start, on the days 30 and 45 days before each cancellation.

Run by hand: ``python tests/benchmarks/lead_ceiling.py [--families A,C] [--seeds 2]``.  The
fleets are the backtest's (``fleets``, ``backtest=True``: churners slide for 6-13 weeks to
25-55% of their level, then cancel).  For every churner, on the day ``lead`` days before its
cancellation, the store is scanned at that day (``ebbwatch.scan``, default settings) and every
account of the fleet is scored there: the churner by its ``p_down`` and by the onset-told
statistic of ``oracle.py`` (the days since the true slide start, at most 28, against the
half-year before it, standardised by the same comparison at every earlier day), the quiet
accounts of that day (no outcome, no planted change) alike, given the churner's slide start.
Each detector is cut where 1% (and 2%) of those quiet account-days are flagged, and the share of
churners over the cut is printed: the backtest's churned-at-30-days recall counts an alert on
any day up to 30 days ahead, so it can sit a little above the single-day figure.

The onset-told detector is not a bound (it knows nothing of fleet-wide holidays), but where it
also misses, the slide so far is within what the account's own history already shows.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from fleets import generate  # noqa: E402
from oracle import onset_told_z  # noqa: E402

LEADS = (30, 45)
RATES = (0.01, 0.02)


def scored_days(fleet, db: str, leads=LEADS) -> pd.DataFrame:
    """One row per (scanned day, account): ``role`` (``churn<lead>`` or ``quiet``), ``p_down``
    and ``told`` (the onset-told falling statistic, larger = more unusual; NaN without enough
    history)."""
    import ebbwatch

    start = fleet.start
    weekday = (start.weekday() + np.arange(fleet.n_days)) % 7
    truth = fleet.truth.set_index("account")
    index = {a: i for i, a in enumerate(fleet.accounts)}
    slide_start = fleet.episodes.drop_duplicates("account").set_index("account")["start"]
    planted = set(fleet.episodes["account"])
    days: dict = {}
    for o in fleet.outcomes[fleet.outcomes["outcome"] == "churned"].itertuples():
        for lead in leads:
            days.setdefault(pd.Timestamp(o.date).date() - timedelta(days=lead), []).append((o.account, lead))
    rows = []
    for day, targets in sorted(days.items()):
        scores = ebbwatch.scan(as_of=day, db=db, drivers=False).attrs["scores"].set_index("account")
        column = (day - start).days
        onset_given = (pd.Timestamp(slide_start[targets[0][0]]).date() - start).days
        roles = {account: f"churn{lead}" for account, lead in targets}
        for account, row in scores.iterrows():
            role = roles.get(account, "quiet")
            if (role == "quiet" and account in planted) or row["status"] != "judged":
                continue
            onset = (pd.Timestamp(slide_start[account]).date() - start).days if role != "quiet" else onset_given
            first = (truth.loc[account, "first_day"] - start).days
            told = np.nan
            if first < onset <= column:
                told = -onset_told_z(fleet.counts[index[account], :column + 1], first, onset, weekday[:column + 1])
            rows.append({"day": day, "account": account, "role": role, "p_down": row["p_down"], "told": told})
    return pd.DataFrame(rows)


def recall_at_quiet_share(frame: pd.DataFrame, role: str, rate: float) -> dict:
    """The share of ``role`` rows each detector flags when cut where ``rate`` of the quiet rows are."""
    quiet, targets = frame[frame["role"] == "quiet"], frame[frame["role"] == role]
    p_cut = np.quantile(quiet["p_down"], rate)
    told_cut = np.quantile(quiet["told"].dropna(), 1 - rate)
    return {"ebbwatch": float((targets["p_down"] <= p_cut).mean()),
            "onset-told": float((targets["told"] >= told_cut).mean()), "n": len(targets)}


def main(argv=None):
    import ebbwatch

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", default="A,C")
    parser.add_argument("--seeds", type=int, default=2)
    parser.add_argument("--accounts", type=int, default=400)
    args = parser.parse_args(argv)
    print("churners over the cut where a share of the same days' quiet accounts are flagged")
    print(f"{'family':<8}{'seed':>5}{'lead':>6}{'share':>7}{'ebbwatch':>10}{'onset-told':>12}{'churners':>10}"
          f"{'quiet p < 0.01':>16}{'< 0.001':>9}{'quiet days':>12}")
    for family in args.families.split(","):
        frames = []
        for seed in range(args.seeds):
            fleet = generate(family, args.accounts, seed, backtest=True)
            with tempfile.TemporaryDirectory() as tmp:
                daily, db = Path(tmp) / "daily.parquet", str(Path(tmp) / "store.duckdb")
                fleet.daily_frame().to_parquet(daily)
                ebbwatch.ingest_files([], db=db, daily=str(daily))
                frames.append(scored_days(fleet, db).assign(seed=seed))
        for seed, frame in [(s, f) for s, f in enumerate(frames)] + [("all", pd.concat(frames))]:
            for lead in LEADS:
                for rate in RATES:
                    r = recall_at_quiet_share(frame, f"churn{lead}", rate)
                    quiet = frame.loc[frame["role"] == "quiet", "p_down"]
                    print(f"{family:<8}{seed!s:>5}{lead:>6}{rate:>7.0%}{r['ebbwatch']:>10.2f}{r['onset-told']:>12.2f}{r['n']:>10}"
                          f"{(quiet < 0.01).mean():>16.4f}{(quiet < 0.001).mean():>9.4f}{len(quiet):>12}")


if __name__ == "__main__":
    main()
