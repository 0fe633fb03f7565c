"""Young accounts: how the scan judges accounts with 6 to 17 weeks of history.

Run by hand: ``python tests/benchmarks/young.py [--families A,B,C,D] [--seeds 6] [--accounts 400]``.
The families make few young accounts, and never a changed one, so this makes them: in each fleet,
a share of the quiet accounts with at least 250 days of history are cut to 42-119 days (their
earlier days emptied), and of those a third keep quiet, a third slide (to 25-55% of their level
over 3-9 weeks, linear, staged or exponential, still sliding at the as-of day) and a third drop
(to 15-55%, 7-30 days before it).  Seasonal accounts and those with an old level shift are not
cut: within a few weeks of history their season or their shift is a real fall.  The rest of the
fleet is as generated, so the fleet factor and the window priors are those of a real fleet;
``--accounts 15`` judges the young accounts of a fleet too small to measure them.

Prints per family: the young quiet accounts' share with a falling p-value under each alpha and
the share flagged either way, and the recall of young slides and drops at least 7 days old in
accounts of at least 5 events a day, as ``accuracy.py`` counts them.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from dataclasses import replace
from datetime import timedelta
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import planted  # noqa: E402
from fleets import generate, slide_path  # noqa: E402

SHAPES = ("linear", "staged", "exponential")
NOT_CUT = ("seasonal", "old_shift")


def make_young(fleet, seed: int, share: float = 0.6, shortest: int = 42, longest: int = 119):
    """A copy of ``fleet`` in which ``share`` of the long quiet accounts are young (see the module's
    text).  Returns ``(fleet, young)``: the new fleet (counts and truth changed for the cut
    accounts, their traits ending in ``young``) and the names of the cut accounts."""
    rng = np.random.default_rng(seed)
    truth = fleet.truth.copy()
    counts = fleet.counts.copy()
    n_days = fleet.n_days
    life = np.array([(fleet.as_of - d).days + 1 for d in truth["first_day"]])
    plain = ~truth["traits"].str.contains("|".join(NOT_CUT)).to_numpy()
    candidates = np.flatnonzero((truth["kind"].to_numpy() == "quiet") & (life >= 250) & plain)
    chosen = rng.permutation(candidates)[: int(share * len(candidates))]
    for i, row in enumerate(chosen):
        days = int(rng.integers(shortest, longest + 1))
        start = n_days - days
        counts[row, :start] = 0
        kind, onset, factor, shape = ("quiet", "slide", "drop")[i % 3], -1, 1.0, ""
        if kind == "slide":
            duration = int(rng.integers(21, min(days - 14, 63) + 1))
            factor, shape = float(rng.uniform(0.25, 0.55)), SHAPES[int(rng.integers(len(SHAPES)))]
            onset = n_days - duration
            path = slide_path(rng, n_days, onset, duration, factor, shape)
        elif kind == "drop":
            age = int(rng.integers(7, min(days - 14, 30) + 1))
            factor, onset = float(rng.uniform(0.15, 0.55)), n_days - age
            path = np.where(np.arange(n_days) >= onset, factor, 1.0)
        if onset >= 0:
            counts[row] = rng.binomial(counts[row], np.clip(path, 0.0, 1.0))
        before = counts[row, start:onset if onset >= 0 else n_days][-56:]
        truth.loc[truth.index[row], ["kind", "onset", "age_days", "factor", "usual", "shape", "traits", "first_day"]] = [
            kind, fleet.day(onset) if onset >= 0 else None, n_days - onset if onset >= 0 else -1, factor,
            float(before.mean()), shape, truth["traits"].iloc[row] + ",young", fleet.start + timedelta(days=start)]
    young = list(truth["account"].iloc[chosen])
    return replace(fleet, counts=counts, truth=truth), young


def judge(family: str, n_accounts: int, seeds) -> dict:
    """Young accounts' calibration and recall pooled over fleets of ``family``."""
    recall, p_down, flagged = {}, [], []
    for seed in seeds:
        fleet, young = make_young(generate(family, n_accounts, seed, share_changed=0.2), 1000 + seed)
        with tempfile.TemporaryDirectory() as tmp:
            flags, scores = planted.run_ebbwatch(fleet, Path(tmp))
        truth = fleet.truth[fleet.truth["account"].isin(young)]
        planted.add(recall, planted.recall(truth, flags))
        judged = scores[scores["status"] == "judged"].set_index("account")
        quiet = truth.loc[truth["kind"] == "quiet", "account"]
        p_down.append(judged.loc[[a for a in quiet if a in judged.index], "p_down"].to_numpy(float))
        flagged.extend(flags.get(a, 0) != 0 for a in quiet)
    return {"recall": recall, "p_down": np.concatenate(p_down) if p_down else np.zeros(0),
            "flagged": np.array(flagged, bool)}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", default="A,B,C,D")
    parser.add_argument("--seeds", type=int, default=6)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--accounts", type=int, default=400)
    args = parser.parse_args(argv)
    seeds = range(args.first_seed, args.first_seed + args.seeds)
    print(f"young accounts (42-119 days) of {args.seeds} fleets x {args.accounts} accounts per family")
    print(f"{'family':<8}{'quiet':>7}" + "".join(f"{'p_down<' + str(a):>14}" for a in planted.ALPHAS)
          + f"{'flagged':>10}{'slides':>16}{'drops':>16}")
    for family in args.families.split(","):
        result = judge(family, args.accounts, seeds)
        p = result["p_down"]
        shares = "".join(f"{float(np.mean(p < a)) if p.size else float('nan'):>14.4f}" for a in planted.ALPHAS)
        print(f"{family:<8}{p.size:>7}{shares}{float(np.mean(result['flagged'])):>10.4f}"
              f"{planted.fmt(result['recall'].get('slide', (0, 0))):>16}{planted.fmt(result['recall'].get('drop', (0, 0))):>16}")


if __name__ == "__main__":
    main()
