"""The rules people write by hand, as comparisons for the accuracy benchmark and its CI test.

Both take daily totals (A, D) whose last column is the as-of day and return, per account,
``-1`` (flagged down), ``+1`` (flagged up) or ``0``.
"""

from __future__ import annotations

import numpy as np


def hand_z(totals: np.ndarray) -> np.ndarray:
    """The hand rule's z: last-7-day mean minus the trailing 28-day mean, over the standard
    deviation of those 28 daily totals."""
    recent = totals[:, -7:].mean(axis=1)
    trailing = totals[:, -35:-7]
    mean, sd = trailing.mean(axis=1), trailing.std(axis=1, ddof=1)
    with np.errstate(all="ignore"):
        return np.where(sd > 0, (recent - mean) / sd, np.where(recent != mean, np.sign(recent - mean) * np.inf, 0.0))


def hand_rule(totals: np.ndarray, threshold: float = 3.0) -> np.ndarray:
    """Last-7-day mean against the trailing 28-day mean and standard deviation of daily totals
    (the 28 days before the last 7): flag when |z| > threshold (common practice)."""
    z = hand_z(totals)
    return np.where(z > threshold, 1, np.where(z < -threshold, -1, 0))


def stl_rule(totals: np.ndarray, threshold: float = 3.0, history: int = 182) -> np.ndarray:
    """Per-account STL (statsmodels, period 7, robust) on log1p daily totals of the last
    ``history`` days; flag when the mean residual of the last 7 days, against the residuals'
    standard deviation before them, has |z| > threshold."""
    from statsmodels.tsa.seasonal import STL

    out = np.zeros(totals.shape[0], dtype=int)
    for a, row in enumerate(np.log1p(totals[:, -history:].astype(float))):
        if np.all(row == row[0]):
            continue
        resid = STL(row, period=7, robust=True).fit().resid
        sd = resid[:-7].std(ddof=1)
        if sd <= 0:
            continue
        z = resid[-7:].mean() / (sd / np.sqrt(7))
        out[a] = 1 if z > threshold else (-1 if z < -threshold else 0)
    return out


def score_flags(truth, flags_by_account: dict) -> dict:
    """Recall per planted kind (flagged in the right direction) and the share of quiet accounts
    flagged at all.  ``truth``: ``Fleet.truth``; ``flags_by_account``: account -> -1/0/+1."""
    result = {}
    for kind, want in (("drop", -1), ("stop", -1), ("slide", -1), ("surge", 1)):
        accounts = truth.loc[truth["kind"] == kind, "account"]
        result[kind] = (sum(flags_by_account.get(a, 0) == want for a in accounts), len(accounts))
    quiet = truth.loc[truth["kind"] == "quiet", "account"]
    result["quiet_flagged"] = (sum(flags_by_account.get(a, 0) != 0 for a in quiet), len(quiet))
    return result
