"""How detectable are the planted changes at all?  A detector told each change's true onset,
scored beside ebbwatch at the same false rate on the same fleets.

Run by hand: ``python tests/benchmarks/oracle.py [--families B,C,D] [--seeds 3]``.

The onset-told detector compares the changed days (from the true onset, at most the last 28) with
what the half-year before the onset expects of them (weekday-adjusted), and standardises that log
ratio by the same comparison at every earlier day of the account (median and IQR/1.349): it
needs no search, no multiplicity over windows and no guess of where the change began.  Quiet
accounts get an onset drawn from the changed accounts' onsets, so their windows are alike.  Both
detectors are cut where 1% of quiet accounts are flagged (``planted.recall_at_false_rate``).
It is not a bound — it knows nothing of fleet-wide holidays, which ebbwatch divides out — but
where it also misses, the change is within what the account's own history already shows.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import planted  # noqa: E402
from fleets import generate  # noqa: E402

MAX_WINDOW, REFERENCE, MIN_REFERENCE = 28, 182, 42


def _contrast(x, first, last, weekday):
    """log((observed + ½) / (expected + ½)) of days first..last (inclusive) against the up to
    REFERENCE days before, weekday-adjusted; NaN without MIN_REFERENCE reference days."""
    ref = x[max(0, first - REFERENCE):first]
    wd_ref = weekday[max(0, first - REFERENCE):first]
    valid = ~np.isnan(ref)
    if valid.sum() < MIN_REFERENCE:
        return np.nan
    mean = ref[valid].mean()
    if mean <= 0:
        return np.nan
    factors = np.array([ref[valid & (wd_ref == d)].mean() / mean if (valid & (wd_ref == d)).any() else 1.0
                        for d in range(7)])
    window = x[first:last + 1]
    keep = ~np.isnan(window)
    expected = (mean * factors[weekday[first:last + 1]])[keep].sum()
    return float(np.log((window[keep].sum() + 0.5) / (expected + 0.5)))


def onset_told_z(counts_row, first_day_col, onset_col, weekday):
    """The onset-told statistic of one account (z, positive = up)."""
    x = counts_row.astype(float)
    x[:first_day_col] = np.nan
    last = len(x) - 1
    start = max(onset_col, last - MAX_WINDOW + 1)
    length = last - start + 1
    now = _contrast(x, start, last, weekday)
    history = [_contrast(x, end - length + 1, end, weekday)
               for end in range(first_day_col + MIN_REFERENCE + length - 1, onset_col)]
    history = np.array([h for h in history if np.isfinite(h)])
    if not np.isfinite(now) or len(history) < 20:
        return np.nan
    q25, median, q75 = np.percentile(history, [25, 50, 75])
    spread = max((q75 - q25) / 1.349, 1e-3)
    return (now - median) / spread


def scores(fleet, rng):
    """``(down, up)`` score dicts of the onset-told detector (larger = more unusual)."""
    truth = fleet.truth.set_index("account")
    start = np.datetime64(fleet.start)
    weekday = ((np.arange(fleet.n_days) + (start.astype("datetime64[D]").astype(int) + 3)) % 7).astype(int)
    onsets = [(np.datetime64(o) - start).astype(int) for o in truth["onset"] if o is not None and o == o]
    down, up = {}, {}
    for i, account in enumerate(fleet.accounts):
        row = truth.loc[account]
        first = int((np.datetime64(row["first_day"]) - start).astype(int))
        onset = row["onset"]
        column = int((np.datetime64(onset) - start).astype(int)) if onset is not None and onset == onset \
            else int(rng.choice(onsets))
        z = onset_told_z(fleet.counts[i], first, column, weekday)
        if np.isfinite(z):
            down[account], up[account] = -z, z
    return down, up


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", default="B,C,D")
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--accounts", type=int, default=400)
    args = parser.parse_args(argv)
    kinds = planted.KINDS
    print(f"recall at 1% of quiet accounts flagged; {args.seeds} seeds x {args.accounts} accounts a family")
    print(f"{'family':<8}{'detector':<14}" + "".join(f"{k:>16}" for k in kinds))
    for family in args.families.split(","):
        totals = {"ebbwatch": {}, "onset-told": {}}
        for seed in range(args.seeds):
            fleet = generate(family, args.accounts, seed, share_changed=0.3)
            with tempfile.TemporaryDirectory() as tmp:
                _, ebb_scores = planted.run_ebbwatch(fleet, Path(tmp))
            d, u = planted.ebbwatch_scores(ebb_scores)
            planted.add(totals["ebbwatch"], planted.recall_at_false_rate(fleet.truth, d, u, 0.01))
            d, u = scores(fleet, np.random.default_rng(seed))
            truth = fleet.truth[fleet.truth["account"].isin(set(d))]
            planted.add(totals["onset-told"], planted.recall_at_false_rate(truth, d, u, 0.01))
        for name, total in totals.items():
            print(f"{family:<8}{name:<14}" + "".join(f"{planted.fmt(total[k]):>16}" for k in kinds))


if __name__ == "__main__":
    main()
