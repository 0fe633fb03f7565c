"""Seeded generators of account fleets with planted truth, for the demo, tests and benchmarks.

Everything here is invented.  :func:`make_fleet` returns daily counts per account (and event)
together with what was planted: changes (drop, stop, slide, surge) with their onset dates, and
quiet accounts of hard kinds (two-peaked seasonal, very small, weekday-heavy, flat, an old level
shift) that a good detector must leave alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, timedelta

import numpy as np
import pandas as pd

EPOCH = date(1970, 1, 1)
CHANGE_KINDS = ("drop", "stop", "slide", "surge")
QUIET_PROFILES = ("plain", "seasonal", "small", "weekday_heavy", "flat", "old_shift")
WEEKDAY_SHAPES = {
    "b2b": np.array([1.12, 1.2, 1.22, 1.18, 1.0, 0.15, 0.13]),
    "heavy": np.array([1.35, 1.4, 1.4, 1.35, 1.3, 0.02, 0.02]),
    "flat": np.ones(7),
}
DEFAULT_EVENTS = (("doc.edit", 0.5), ("doc.view", 0.3), ("share.create", 0.2))


@dataclass
class Fleet:
    """A generated fleet.

    ``counts`` (A, D, E) int64: events per account, day and event name; day column 0 is
    ``start``, the last column is ``as_of``.  ``truth``: one row per account with ``kind``
    (a change kind or ``quiet``), ``profile``, ``onset`` (date or None), ``factor`` (the change's
    final level as a multiple of the usual one).  ``accounts``: the accounts-file columns.
    """

    counts: np.ndarray
    start: date
    as_of: date
    account_ids: list
    event_names: list
    truth: pd.DataFrame
    accounts: pd.DataFrame
    holiday: tuple | None = None
    gap_day: date | None = None
    expected: np.ndarray = field(default=None, repr=False)

    @property
    def days(self) -> list[date]:
        return [self.start + timedelta(days=i) for i in range(self.counts.shape[1])]

    def daily_frame(self) -> pd.DataFrame:
        """Long rows ``account, day, event, count`` (zero counts left out), for ``--daily``."""
        a, d, e = np.nonzero(self.counts)
        return pd.DataFrame({
            "account": np.asarray(self.account_ids, dtype=object)[a],
            "day": pd.to_datetime(self.start) + pd.to_timedelta(d, unit="D"),
            "event": np.asarray(self.event_names, dtype=object)[e],
            "count": self.counts[a, d, e],
        })


def _kind_plan(n_accounts, share_changed, rng):
    n_changed = int(round(n_accounts * share_changed))
    kinds = np.array(["quiet"] * n_accounts, dtype=object)
    kinds[:n_changed] = [CHANGE_KINDS[i % len(CHANGE_KINDS)] for i in range(n_changed)]
    rng.shuffle(kinds)
    profiles = np.array(["plain"] * n_accounts, dtype=object)
    quiet = np.flatnonzero(kinds == "quiet")
    profiles[quiet] = [QUIET_PROFILES[i % len(QUIET_PROFILES)] for i in range(quiet.size)]
    rng.shuffle(profiles[quiet])
    return kinds, profiles


def make_fleet(
    n_accounts: int = 400,
    n_days: int = 365,
    *,
    as_of: date = date(2026, 3, 31),
    seed: int = 0,
    share_changed: float = 0.3,
    events=DEFAULT_EVENTS,
    holiday: bool = True,
    gap: bool = True,
    median_daily: float = 40.0,
    size_spread: float = 1.2,
) -> Fleet:
    """A fleet of ``n_accounts`` over ``n_days`` ending at ``as_of``, seeded.

    Sizes are log-normal (median ``median_daily`` events a day, log-sd ``size_spread``, clipped to
    three orders of magnitude); counts are gamma–Poisson (over-dispersed).  A two-week fleet-wide
    dip to 60% starts five weeks before ``as_of`` and one day of lost data (2% of the usual volume)
    falls two days before it.  Planted changes start 3–70 days before ``as_of``; slides ramp down
    over 6–10 weeks.
    """
    rng = np.random.default_rng(seed)
    D = n_days
    t = np.arange(D)
    start = as_of - timedelta(days=D - 1)
    weekday0 = start.weekday()
    weekday = (weekday0 + t) % 7
    kinds, profiles = _kind_plan(n_accounts, share_changed, rng)

    size = np.exp(rng.normal(np.log(median_daily), size_spread, n_accounts))
    size = np.clip(size, median_daily / 20, median_daily * 50)
    small = profiles == "small"
    size[small] = rng.uniform(0.6, 2.5, small.sum())
    changed = kinds != "quiet"
    size[changed] = np.maximum(size[changed], 6.0)  # planted changes are on accounts big enough to see

    shape_names = rng.choice(np.array(["b2b", "b2b", "flat"], dtype=object), n_accounts)
    shape_names[profiles == "weekday_heavy"] = "heavy"
    shape_names[profiles == "flat"] = "flat"
    shape = np.stack([WEEKDAY_SHAPES[s] for s in shape_names])  # (A, 7)

    level = np.ones((n_accounts, D))
    # Gentle growth or decline over the year, and onboarding ramps for some accounts.
    drift = rng.normal(0.0, 0.15, n_accounts)
    level *= np.exp(drift[:, None] * (t[None, :] / D))
    # Two-peaked seasonal accounts: plateaus of 5–9 weeks alternating between two levels.
    for a in np.flatnonzero(profiles == "seasonal"):
        ratio = rng.uniform(2.2, 3.2)
        pos, high = 0, rng.random() < 0.5
        while pos < D:
            length = int(rng.integers(35, 64))
            level[a, pos:pos + length] *= ratio if high else 1.0
            pos += length
            high = not high
        level[a] /= np.mean(level[a])
    for a in np.flatnonzero(profiles == "old_shift"):
        when = D - int(rng.integers(120, 240))
        level[a, when:] *= rng.choice([rng.uniform(0.45, 0.65), rng.uniform(1.6, 2.2)])

    onset = np.full(n_accounts, -1)
    factor = np.ones(n_accounts)
    for a in np.flatnonzero(changed):
        kind = kinds[a]
        if kind == "slide":
            duration = int(rng.integers(42, 71))
            ago = duration + int(rng.integers(0, 8))
            start_col = D - ago
            factor[a] = rng.uniform(0.25, 0.45)
            ramp = np.clip((t - start_col) / duration, 0, 1)
            level[a] *= 1 - (1 - factor[a]) * ramp
        else:
            ago = int(rng.integers(3, 71))
            start_col = D - ago
            if kind == "drop":
                factor[a] = rng.uniform(0.15, 0.45)
            elif kind == "surge":
                factor[a] = rng.uniform(2.5, 4.0)
            else:
                factor[a] = 0.0
            level[a, start_col:] *= factor[a]
        onset[a] = start_col

    fleet_factor = np.ones(D)
    holiday_span = None
    if holiday and D > 60:
        h0 = D - 35
        fleet_factor[h0:h0 + 14] = 0.6
        holiday_span = (start + timedelta(days=h0), start + timedelta(days=h0 + 13))
    gap_day = None
    if gap and D > 3:
        fleet_factor[D - 3] = 0.02
        gap_day = start + timedelta(days=D - 3)

    expected = size[:, None] * shape[:, weekday] * level * fleet_factor[None, :]
    dispersion_k = rng.uniform(4.0, 25.0, n_accounts)  # gamma shape: smaller = more over-dispersed
    rate = expected * rng.gamma(dispersion_k[:, None], 1.0 / dispersion_k[:, None], (n_accounts, D))
    totals = rng.poisson(rate)
    # Some plain quiet accounts start during the year (onboarding): their history is short.
    # (A seasonal account that has not lived through one cycle cannot be told from a changed one.)
    late = (profiles == "plain") & (~changed) & (rng.random(n_accounts) < 0.15)
    first = np.zeros(n_accounts, dtype=int)
    first[late] = rng.integers(D // 3, D - 20, late.sum())
    totals[t[None, :] < first[:, None]] = 0

    names = [e for e, _ in events]
    shares = np.array([s for _, s in events], float)
    mix = rng.dirichlet(shares * 30, n_accounts)  # each account's own event mix
    counts = np.zeros((n_accounts, D, len(names)), dtype=np.int64)
    remaining = totals.copy()
    left = np.ones(n_accounts)
    for e in range(len(names) - 1):
        p = np.clip(mix[:, e] / np.maximum(left, 1e-12), 0, 1)
        counts[:, :, e] = rng.binomial(remaining, p[:, None])
        remaining -= counts[:, :, e]
        left -= mix[:, e]
    counts[:, :, -1] = remaining

    width = len(str(n_accounts))
    ids = [f"acct-{i:0{width}d}" for i in range(n_accounts)]
    truth = pd.DataFrame({
        "account": ids,
        "kind": kinds,
        "profile": profiles,
        "onset": [start + timedelta(days=int(o)) if o >= 0 else None for o in onset],
        "factor": factor,
        "size": size,
        "first_day": [start + timedelta(days=int(f)) for f in first],
    })
    accounts = pd.DataFrame({
        "account": ids,
        "name": [f"Account {i}" for i in range(n_accounts)],
        "seats": np.maximum(1, np.round(size / 4)).astype(int),
        "segment": np.where(size > median_daily * 3, "enterprise", np.where(size > median_daily / 3, "team", "starter")),
        "timezone": None,
        "mrr": np.round(np.maximum(1, np.round(size / 4)) * 25.0, 2),
    })
    return Fleet(counts, start, as_of, ids, names, truth, accounts, holiday_span, gap_day, expected)


def day_number(d: date) -> int:
    return (d - EPOCH).days
