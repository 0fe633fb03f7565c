"""Seeded generators of account fleets with planted truth, for the demo, tests and benchmarks.

Everything here is invented.  :func:`make_fleet` returns daily counts per account (and event)
together with what was planted: changes (drop, stop, slide, surge) with their onset dates, and
quiet accounts of hard kinds (two-peaked seasonal, very small, weekday-heavy, flat, an old level
shift) that a good detector must leave alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, timedelta

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


# -- the demo scenario -----------------------------------------------------------------------
# Tidewell is an invented company selling an invented booking and scheduling product to
# invented small businesses; every name below is made up.
DEMO_EVENTS = (("booking.create", 0.34), ("booking.view", 0.3), ("calendar.sync", 0.2),
               ("invite.send", 0.11), ("report.export", 0.05))
_NAME_FIRST = ("Alder", "Brindle", "Copperfen", "Dunmore", "Elmsway", "Fallowby", "Gorsewick",
               "Hollin", "Ivybank", "Juniper", "Kestrel", "Larchmoor", "Marrowby", "Nettlecombe",
               "Oakhurst", "Pennyrose", "Quillan", "Rookwell", "Sallowfield", "Thistlewood",
               "Umberleigh", "Vetchley", "Wrenfold", "Yarrowdale")
_NAME_KIND = ("Physio", "Dental Studio", "Yoga Loft", "Driving School", "Tutors", "Barbers",
              "Vet Practice", "Climbing Wall", "Music Rooms", "Pilates", "Counselling",
              "Bike Repairs", "Language School", "Photo Studio", "Escape Rooms", "Tax Clinic")
_ZONES = ("Europe/London", "Europe/Berlin", "America/New_York", "America/Chicago",
          "Asia/Tokyo", "Australia/Sydney", None, None, None)


@dataclass
class DemoScenario:
    """Files and truth of the demo: where each file was written and which stories were planted."""

    directory: str
    events_dir: str
    accounts_csv: str
    identities_csv: str
    outcomes_csv: str
    as_of: date
    stories: pd.DataFrame  # account, story, expect ("alert" today or "quiet"), detail
    n_events: int


def _thin(rng, counts, factor):
    """Keep each event with probability ``factor`` (A, D[, E] broadcast), for drops and slides."""
    return rng.binomial(counts, np.clip(factor, 0.0, 1.0))


def demo_fleet(n_accounts: int = 300, n_days: int = 425, *, as_of: date = date(2026, 11, 30), seed: int = 7):
    """The demo fleet (counts) with its planted stories, before users and timestamps."""
    rng = np.random.default_rng(seed)
    fleet = make_fleet(n_accounts, n_days, as_of=as_of, seed=seed, share_changed=0.0, events=DEMO_EVENTS,
                       median_daily=9.0, size_spread=1.1)
    truth = fleet.truth
    counts = fleet.counts
    D = n_days
    t = np.arange(D)
    # Planted stories go to plain accounts with a full history, made big enough for a week to say
    # something (at least 15 events a day).
    candidates = [i for i in range(n_accounts) if truth["profile"][i] == "plain"
                  and truth["first_day"][i] == fleet.start]
    rng.shuffle(candidates)
    for a in candidates[:12]:
        if truth["size"][a] < 15:
            boost = 15.0 / truth["size"][a]
            counts[a] += rng.poisson(fleet.expected[a][:, None] * (boost - 1) * np.array([s for _, s in DEMO_EVENTS]))
            fleet.expected[a] *= boost
            truth.loc[a, "size"] = 15.0
    stories, outcomes = [], []

    def take(k):
        picked, candidates[:] = candidates[:k], candidates[k:]
        return picked

    for a in take(4):  # sliding now, for weeks, the usual road to a cancellation
        duration = int(rng.integers(42, 64))
        ramp = np.clip((t - (D - duration)) / duration, 0, 1)
        counts[a] = _thin(rng, counts[a], (1 - 0.7 * ramp)[:, None])
        stories.append((a, "sliding now", "alert", f"activity sliding since {fleet.start + timedelta(days=D - duration)}"))
    for a in take(1):  # the integration broke five days ago: nothing arrives since
        counts[a, D - 5:] = 0
        stories.append((a, "integration broke", "alert", f"no events since {fleet.start + timedelta(days=D - 5)}"))
    for a in take(2):  # a team's usage surging now, ready for a larger plan
        start = D - int(rng.integers(10, 21))
        extra = rng.poisson(fleet.expected[a, start:, None] * 2.0 * np.array([s for _, s in DEMO_EVENTS]))
        counts[a, start:] += extra
        stories.append((a, "surging now", "alert", f"usage about 3x since {fleet.start + timedelta(days=start)}"))
    for a in take(3):  # slid and cancelled months ago (history for the backtest)
        end = D - int(rng.integers(120, 220))
        duration = int(rng.integers(35, 56))
        ramp = np.clip((t - (end - duration)) / duration, 0, 1)
        factor = np.where(t >= end, 0.0, 1 - 0.75 * ramp)
        counts[a] = _thin(rng, counts[a], factor[:, None])
        cancelled = end + int(rng.integers(20, 46))  # the contract ran out weeks after use stopped
        outcomes.append((a, fleet.start + timedelta(days=cancelled), "churned"))
        stories.append((a, "cancelled earlier", "quiet",
                        f"slid, stopped on {fleet.start + timedelta(days=end)}, cancelled on {fleet.start + timedelta(days=cancelled)}"))
    for a in take(2):  # surged, then upgraded (history for the backtest)
        start = D - int(rng.integers(150, 230))
        extra = rng.poisson(fleet.expected[a, start:, None] * 1.5 * np.array([s for _, s in DEMO_EVENTS]))
        counts[a, start:] += extra
        outcomes.append((a, fleet.start + timedelta(days=start + 45), "expanded"))
        stories.append((a, "upgraded earlier", "quiet", f"surged from {fleet.start + timedelta(days=start)}, upgraded 45 days later"))
    for a in np.flatnonzero(truth["profile"] == "small")[:3]:
        stories.append((int(a), "small, empty weeks are normal", "quiet", "a few events a day, many empty days"))
    for a in np.flatnonzero(truth["profile"] == "seasonal")[:3]:
        stories.append((int(a), "seasonal", "quiet", "busy and quiet seasons alternate"))
    names = []
    for i in range(n_accounts):
        names.append(f"{_NAME_FIRST[i % len(_NAME_FIRST)]} {_NAME_KIND[(i // len(_NAME_FIRST) + i) % len(_NAME_KIND)]}"
                     + (f" {i // (len(_NAME_FIRST) * len(_NAME_KIND)) + 2}" if i >= len(_NAME_FIRST) * len(_NAME_KIND) else ""))
    fleet.accounts["name"] = names
    fleet.accounts["timezone"] = [_ZONES[i % len(_ZONES)] for i in range(n_accounts)]
    story_frame = pd.DataFrame(stories, columns=["index", "story", "expect", "detail"])
    story_frame.insert(0, "account", [fleet.account_ids[i] for i in story_frame["index"]])
    outcome_frame = pd.DataFrame([(fleet.account_ids[a], d, o) for a, d, o in outcomes], columns=["account", "date", "outcome"])
    return fleet, story_frame.drop(columns="index"), outcome_frame


def _users(rng, fleet):
    """Users per account with [start, end) day ranges; some join late, some leave, a few move."""
    rows = []  # (user, account index, start_col, end_col)
    D = fleet.counts.shape[1]
    for a in range(len(fleet.account_ids)):
        n = int(max(2, min(60, round(fleet.truth["size"][a] / 2.5))))
        for u in range(n):
            # The first user of each account (its owner) stays for the whole history.
            start = 0 if u == 0 or rng.random() > 0.12 else int(rng.integers(1, D - 30))
            end = D if u == 0 or rng.random() > 0.1 else int(rng.integers(start + 30, D + 1))
            rows.append([f"u-{a:03d}-{u:02d}", a, start, end])
    users = pd.DataFrame(rows, columns=["user", "a", "start", "end"])
    # A few people move between accounts mid-history: they leave one and join another.
    not_owners = np.flatnonzero(~users["user"].str.endswith("-00").to_numpy())
    movers = rng.choice(not_owners, size=min(8, not_owners.size // 10), replace=False)
    extra = []
    for m in movers:
        user, a, start, end = users.iloc[m]
        when = int(rng.integers(max(start + 30, 60), max(start + 31, D - 30)))
        target = int(rng.integers(len(fleet.account_ids)))
        if target == a or when >= end:
            continue
        users.loc[m, "end"] = when
        extra.append([user, target, when, end])
    return pd.concat([users, pd.DataFrame(extra, columns=users.columns)], ignore_index=True)


def write_demo_scenario(directory: str, n_accounts: int = 300, n_days: int = 425, *, seed: int = 7,
                        as_of: date = date(2026, 11, 30), gzip_level: int = 1) -> DemoScenario:
    """Generate the Tidewell demo and write it as input files under ``directory``.

    Writes ``events/YYYY-MM.jsonl.gz`` (one file a month; most events carry no account and are
    attributed through identities, the server-side ``calendar.sync`` events carry it; a few lines
    are delivered twice and a few are broken), ``accounts.csv``, ``identities.csv`` and
    ``outcomes.csv``.
    """
    import gzip
    import json
    from pathlib import Path
    from zoneinfo import ZoneInfo

    rng = np.random.default_rng(seed + 1)
    fleet, stories, outcomes = demo_fleet(n_accounts, n_days, as_of=as_of, seed=seed)
    users = _users(rng, fleet)
    out = Path(directory)
    events_dir = out / "events"
    events_dir.mkdir(parents=True, exist_ok=True)
    D = n_days
    zones = fleet.accounts["timezone"].tolist()
    event_names = np.array([e for e, _ in DEMO_EVENTS], dtype=object)
    by_month: dict[str, list[str]] = {}
    n_events = 0
    for a, account in enumerate(fleet.account_ids):
        mine = users[users["a"] == a]
        if mine.empty:
            continue
        a_idx, d_idx, e_idx = np.nonzero(fleet.counts[a:a + 1])
        reps = fleet.counts[a, d_idx, e_idx]
        day = np.repeat(d_idx, reps)
        ev = np.repeat(e_idx, reps)
        if day.size == 0:
            continue
        weight = 1.0 / np.arange(1, len(mine) + 1) ** 0.8  # a few people do most of the work
        active = (mine["start"].to_numpy()[None, :] <= np.arange(D)[:, None]) & (np.arange(D)[:, None] < mine["end"].to_numpy()[None, :])
        w = active * weight[None, :]
        cum = np.cumsum(w, axis=1)
        cum /= cum[:, -1:]
        pick = (cum[day] < rng.random(day.size)[:, None]).sum(axis=1)
        pick = np.minimum(pick, len(mine) - 1)
        user_ids = mine["user"].to_numpy()[pick]
        zone = ZoneInfo(zones[a]) if isinstance(zones[a], str) else None
        seconds = rng.integers(3 * 3600, 22 * 3600, day.size)
        millis = rng.integers(0, 1000, day.size)
        local_midnight = np.array([datetime.combine(fleet.start + timedelta(days=int(d)), datetime.min.time()) for d in range(D)])
        if zone is not None:
            offsets = np.array([zone.utcoffset(m + timedelta(hours=12)).total_seconds() for m in local_midnight])
        else:
            offsets = np.zeros(D)
        base = np.array([(m - datetime(1970, 1, 1)).total_seconds() for m in local_midnight]) - offsets
        instants = base[day] + seconds
        carries_account = event_names[ev] == "calendar.sync"
        for k in range(day.size):
            ts = datetime.utcfromtimestamp(instants[k]).strftime("%Y-%m-%dT%H:%M:%S") + f".{millis[k]:03d}Z"
            record = {"ts": ts, "event": event_names[ev[k]], "user": user_ids[k]}
            if carries_account[k]:
                record["account"] = account
            record["id"] = f"e-{a:03d}-{k:07d}"
            by_month.setdefault(ts[:7], []).append(json.dumps(record))
        n_events += day.size
    months = sorted(by_month)
    # Realistic dirt: some lines delivered twice (across files), a few broken ones.
    for month in months[-3:]:
        lines = by_month[month]
        resent = [lines[i] for i in rng.choice(len(lines), size=min(40, len(lines)), replace=False)]
        by_month[months[-1]].extend(resent)
    by_month[months[-1]].extend(['{"ts": "2026-11-31T09:00:00Z", "event": "booking.create", "user": "u-000-00"}',
                                 '{"ts": "2026-11-20T09:00:00Z", "event": "booking.create"}',
                                 '{"ts": "2026-11-20T09:00:00Z", "event": "booking.create", "user": "u-000-00"',
                                 'booking.create u-000-01 2026-11-20'])
    for month in months:
        with gzip.open(events_dir / f"{month}.jsonl.gz", "wt", encoding="utf-8", compresslevel=gzip_level) as handle:
            handle.write("\n".join(by_month[month]) + "\n")
    accounts_csv = out / "accounts.csv"
    fleet.accounts.to_csv(accounts_csv, index=False)
    identities = pd.DataFrame({
        "user": users["user"],
        "account": [fleet.account_ids[a] for a in users["a"]],
        "valid_from": [(fleet.start + timedelta(days=int(s))).isoformat() if s > 0 else "" for s in users["start"]],
        "valid_to": [(fleet.start + timedelta(days=int(e))).isoformat() if e < D else "" for e in users["end"]],
    })
    identities_csv = out / "identities.csv"
    identities.to_csv(identities_csv, index=False)
    outcomes_csv = out / "outcomes.csv"
    outcomes.to_csv(outcomes_csv, index=False)
    stories.to_csv(out / "stories.csv", index=False)
    return DemoScenario(str(out), str(events_dir), str(accounts_csv), str(identities_csv), str(outcomes_csv),
                        as_of, stories, n_events)
