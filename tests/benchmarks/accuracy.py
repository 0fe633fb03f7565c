"""Accuracy on planted-truth fleets of several independently written families.

Run by hand: ``python tests/benchmarks/accuracy.py [--families A,B,C,D] [--seeds 3]
[--accounts 400] [--peers hand,stl,ets,prophet,capa,kernelcpd] [--qq qq.png]``.

Each family (``fleets/``) makes its counts its own way; detection is developed on family A and
B, C, D are held out.  Each seed's fleet is written as daily aggregates, loaded with the same
library call as ``ebbwatch ingest --daily`` and judged with ``ebbwatch scan`` at the defaults.
Printed per family and seed: recall per kind over planted changes in accounts of at least 5
events a day (drops and surges at least 7 days old, stops, slides, onsets 2–6 days old), the
same for smaller accounts, the share of quiet accounts flagged (all sizes), the calibration of
p-values on quiet accounts, and — with ``--peers`` — every detector's recall at matched false
rates (1% and 2% of quiet accounts) and its time per account.

Targets (issue 18), on the held-out families: recall >= 0.95 on drops, stops and surges,
>= 0.9 on slides, >= 0.7 on onsets 2–6 days old; quiet accounts flagged <= 1%; calibration
within sampling error; above every peer on every kind at a matched 1% false rate.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import planted  # noqa: E402
from fleets import DEV_FAMILY, generate  # noqa: E402

REPORTED = ("drop", "stop", "slide", "surge", "onset")


def line(label, result, keys=REPORTED + ("quiet",)):
    return f"{label:<26}" + "".join(f"{planted.fmt(result[k]) if k in result else '—':>16}" for k in keys)


def header():
    return f"{'':<26}" + "".join(f"{k if k != 'quiet' else 'quiet flagged':>16}" for k in REPORTED + ("quiet",))


# Quiet accounts' traits that put a real change inside a store of a few months: an old level
# shift (months back in a two-year fleet) and a season's swing.
CHANGES_IN_A_SHORT_STORE = ("old_shift", "seasonal")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", default="A,B,C,D")
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--accounts", type=int, default=400)
    parser.add_argument("--share-changed", type=float, default=0.3)
    parser.add_argument("--days", type=int, default=0,
                        help="days of data in each fleet (default: the family's own, 560-730); a short one is a young store")
    parser.add_argument("--peers", default="", help="comma-separated: hand,stl,ets,prophet,capa,kernelcpd")
    parser.add_argument("--peer-sample", type=int, default=100,
                        help="score slow peers (prophet) on this many accounts a fleet (0 = all)")
    parser.add_argument("--qq", help="write a QQ plot of quiet accounts' p-values (PNG) here")
    args = parser.parse_args(argv)
    peers = [p for p in args.peers.split(",") if p]
    families = args.families.split(",")
    qq = {}
    for family in families:
        tag = "development" if family == DEV_FAMILY else "held out"
        print(f"\n== family {family} ({tag}): {args.seeds} seeds x {args.accounts} accounts ==")
        print(header())
        total, total_small, matched = {}, {}, {}
        calib_down, calib_up = [], []
        steady_calib, steady_flagged = [], {}
        timing = {}
        for seed in range(args.first_seed, args.first_seed + args.seeds):
            fleet = generate(family, args.accounts, seed, share_changed=args.share_changed,
                             **({"n_days": args.days} if args.days else {}))
            with tempfile.TemporaryDirectory() as tmp:
                started = time.perf_counter()
                flags, scores = planted.run_ebbwatch(fleet, Path(tmp))
                timing.setdefault("ebbwatch", []).append((time.perf_counter() - started) / len(fleet.accounts))
            result = planted.recall(fleet.truth, flags)
            planted.add(total, result)
            planted.add(total_small, planted.recall(fleet.truth, flags, small=True))
            print(line(f"seed {seed}", result))
            cal = planted.calibration(fleet.truth, scores)
            calib_down.append(cal["p_down"])
            calib_up.append(cal["p_up"])
            if args.days:
                steady = fleet.truth[~fleet.truth["traits"].str.contains("|".join(CHANGES_IN_A_SHORT_STORE))]
                steady_cal = planted.calibration(steady, scores)
                steady_calib.append((steady_cal["p_down"], steady_cal["p_up"]))
                planted.add(steady_flagged, {"quiet": planted.recall(steady, flags)["quiet"]})
            if peers:
                from peers import SLOW, peer_scores

                runs = {"ebbwatch": planted.ebbwatch_scores(scores)}
                for name in peers:
                    started = time.perf_counter()
                    runs[name], n_scored = peer_scores(name, fleet, sample=args.peer_sample if name in SLOW else 0)
                    timing.setdefault(name, []).append((time.perf_counter() - started) / max(n_scored, 1))
                for name, (d, u) in runs.items():
                    truth = fleet.truth[fleet.truth["account"].isin(set(d))]  # a sampled peer: its accounts
                    for rate in (0.01, 0.02):
                        planted.add(matched.setdefault((name, rate), {}), planted.recall_at_false_rate(truth, d, u, rate))
        print(line("all seeds", total))
        print(line("accounts < 5 a day", total_small))
        p_down, p_up = np.concatenate(calib_down), np.concatenate(calib_up)
        qq[family] = (p_down, p_up)
        n = p_down.size
        cells = []
        for alpha in planted.ALPHAS:
            sd = np.sqrt(alpha * (1 - alpha) / max(n, 1))
            cells.append(f"a={alpha:g}: down {np.mean(p_down < alpha):.4f} up {np.mean(p_up < alpha):.4f} (±{2 * sd:.4f})")
        print(f"calibration on {n} judged quiet accounts, share with p < a (2 SE): " + "; ".join(cells))
        if steady_calib:
            d, u = (np.concatenate([c[i] for c in steady_calib]) for i in (0, 1))
            hit, total_steady = steady_flagged["quiet"]
            print(f"without the quiet accounts whose level shift or season falls inside {args.days} days of data "
                  f"(real changes there): {hit}/{total_steady} flagged; " + "; ".join(
                      f"a={a:g}: down {np.mean(d < a):.4f} up {np.mean(u < a):.4f}" for a in planted.ALPHAS))
        if matched:
            print(f"\nrecall at matched false rates (family {family}, cut on quiet accounts' scores)")
            for rate in (0.01, 0.02):
                print(f"  {rate:.0%} of quiet accounts flagged")
                print("  " + header())
                for name in ["ebbwatch"] + peers:
                    print("  " + line(name, matched[(name, rate)]))
            print("  ms per account: " + ", ".join(f"{k} {1000 * np.median(v):.2f}" for k, v in timing.items()))
    if args.qq:
        write_qq(qq, args.qq)


def write_qq(qq: dict, path: str):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(qq), figsize=(4 * len(qq), 4), squeeze=False)
    for ax, (family, (p_down, p_up)) in zip(axes[0], qq.items()):
        for p, label in ((p_down, "down"), (p_up, "up")):
            p = np.sort(p[np.isfinite(p)])
            expected = (np.arange(1, p.size + 1) - 0.5) / p.size
            ax.plot(-np.log10(expected), -np.log10(np.maximum(p, 1e-12)), ".", ms=3, label=label)
        top = 4
        ax.plot([0, top], [0, top], "k-", lw=0.8)
        ax.set_xlim(0, top)
        ax.set_ylim(0, top + 1)
        ax.set_title(f"family {family}: quiet accounts")
        ax.set_xlabel("expected −log10 p")
        ax.set_ylabel("observed −log10 p")
        ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    print(f"QQ plot written to {path}")


if __name__ == "__main__":
    main()
