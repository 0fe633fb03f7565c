"""Scoring detectors on planted-truth fleets (``fleets``): recall per kind, quiet accounts
flagged, p-value calibration, and recall at a matched false rate.

A *flag* is an account's verdict: ``-1`` down, ``+1`` up, ``0`` none.  A *score* is a number per
account and direction where larger means more unusual; cutting scores where a given share of
quiet accounts is flagged lets detectors with different outputs be compared at the same false
rate.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

KINDS = ("drop", "stop", "slide", "surge", "onset")
ALPHAS = (0.001, 0.01, 0.05, 0.1)
MIN_USUAL = 5.0  # the targets count planted changes in accounts with at least 5 events a day


def target_groups(truth: pd.DataFrame, min_usual: float = MIN_USUAL, small: bool = False) -> dict:
    """Accounts per reported kind: drops at least 7 days old, stops, slides, surges, and onsets
    2–6 days old (drops and surges that young), with the wanted direction.  ``small``: the
    accounts under ``min_usual`` events a day instead of those at or over it."""
    size_ok = truth["usual"] < min_usual if small else truth["usual"] >= min_usual
    t = truth[size_ok]
    age = t["age_days"]
    groups = {
        "drop": (t.loc[(t["kind"] == "drop") & (age >= 7), "account"], -1),
        "stop": (t.loc[t["kind"] == "stop", "account"], -1),
        "slide": (t.loc[t["kind"] == "slide", "account"], -1),
        "surge": (t.loc[(t["kind"] == "surge") & (age >= 7), "account"], 1),
        "onset": (t.loc[t["kind"].isin(["drop", "surge"]) & (age <= 6), "account"], None),
    }
    return groups


def _wanted(truth, accounts, direction):
    if direction is not None:
        return np.full(len(accounts), direction)
    kinds = truth.set_index("account").loc[list(accounts), "kind"]
    return np.where(kinds.to_numpy() == "surge", 1, -1)


def recall(truth: pd.DataFrame, flags: dict, **kw) -> dict:
    """``{kind: (hits, n)}`` for ``target_groups`` plus ``quiet`` (flagged, n) over every
    quiet account whatever its size."""
    out = {}
    for kind, (accounts, direction) in target_groups(truth, **kw).items():
        wanted = _wanted(truth, accounts, direction)
        got = np.array([flags.get(a, 0) for a in accounts])
        out[kind] = (int((got == wanted).sum()), len(accounts))
    quiet = truth.loc[truth["kind"] == "quiet", "account"]
    out["quiet"] = (int(sum(flags.get(a, 0) != 0 for a in quiet)), len(quiet))
    return out


def recall_at_false_rate(truth: pd.DataFrame, down: dict, up: dict, false_rate: float, **kw) -> dict:
    """Recall per kind when each direction's scores (``account -> score``, larger = more unusual)
    are cut so that ``false_rate`` of the quiet accounts are flagged (either direction).

    One threshold on the rank-normalised score of both directions: each direction's scores are
    turned into their quantile among the quiet accounts, and an account is flagged in the
    direction of its larger quantile when it passes.  Ties at the cut are broken toward not
    flagging, so a detector cannot gain by giving many accounts the same extreme score."""
    quiet = truth.loc[truth["kind"] == "quiet", "account"].tolist()
    q_down = np.array([down.get(a, -np.inf) for a in quiet])
    q_up = np.array([up.get(a, -np.inf) for a in quiet])

    def quantile(values, reference):
        reference = np.sort(reference)
        return np.searchsorted(reference, values, side="right") / max(len(reference), 1)

    combined_quiet = np.maximum(quantile(q_down, q_down), quantile(q_up, q_up))
    threshold = np.quantile(combined_quiet, 1 - false_rate, method="higher")
    flags = {}
    for account in truth["account"]:
        qd = quantile(np.array([down.get(account, -np.inf)]), q_down)[0]
        qu = quantile(np.array([up.get(account, -np.inf)]), q_up)[0]
        best = max(qd, qu)
        if best > threshold:
            flags[account] = -1 if qd >= qu else 1
    result = recall(truth, flags, **kw)
    result["quiet"] = (int(sum(flags.get(a, 0) != 0 for a in quiet)), len(quiet))
    return result


def ebbwatch_scores(scores: pd.DataFrame, min_change_pct: float = 30.0):
    """ebbwatch's decision statistic per direction, as the scan decides: -log10 p where the
    change in that direction is at least ``min_change_pct`` (a stop always), else 0 — so a cut
    on it at any level is what a different ``[scan] fdr`` would raise.  ``(down, up)`` dicts."""
    judged = scores[scores["status"] == "judged"].set_index("account")
    big_down = (judged["change_down_pct"] <= -min_change_pct) | (judged["down_kind"] == "stop")
    big_up = judged["change_up_pct"] >= min_change_pct
    log_p = lambda p: -np.log10(np.maximum(p.to_numpy(float), 1e-300))  # noqa: E731
    down = dict(zip(judged.index, np.where(big_down, log_p(judged["p_down"]), 0.0)))
    up = dict(zip(judged.index, np.where(big_up, log_p(judged["p_up"]), 0.0)))
    return down, up


def calibration(truth: pd.DataFrame, scores: pd.DataFrame, alphas=ALPHAS) -> dict:
    """Share of judged quiet accounts with p below each alpha, per direction:
    ``{"n": judged quiet accounts, "down": [share...], "up": [share...]}``."""
    judged = scores[scores["status"] == "judged"].set_index("account")
    quiet = [a for a in truth.loc[truth["kind"] == "quiet", "account"] if a in judged.index]
    p_down = judged.loc[quiet, "p_down"].to_numpy(float)
    p_up = judged.loc[quiet, "p_up"].to_numpy(float)
    return {"n": len(quiet), "down": [float((p_down < a).mean()) for a in alphas],
            "up": [float((p_up < a).mean()) for a in alphas], "p_down": p_down, "p_up": p_up}


def run_ebbwatch(fleet, workdir: Path, *, config=None):
    """``ingest --daily`` then ``scan`` at the as-of day with the defaults, through the same
    library calls the CLI makes.  Returns ``(flags, scores)``."""
    import ebbwatch

    daily = Path(workdir) / f"{fleet.family}-daily.parquet"
    fleet.daily_frame().to_parquet(daily)
    db = str(Path(workdir) / f"{fleet.family}-store.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(daily), config=config)
    alerts = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1_000_000, config=config)
    flags = {a: (-1 if d == "down" else 1) for a, d in zip(alerts["account"], alerts["direction"])}
    return flags, alerts.attrs["scores"]


def add(total: dict, part: dict) -> dict:
    for key, (hit, n) in part.items():
        h, m = total.get(key, (0, 0))
        total[key] = (h + hit, m + n)
    return total


def fmt(pair) -> str:
    hit, n = pair
    return f"{hit / n:5.2f} ({hit}/{n})" if n else "   —"
