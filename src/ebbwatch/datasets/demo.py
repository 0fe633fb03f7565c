"""The demo's invented scenario: a fleet of small service businesses with stories planted in it,
written as the files a real deployment would have (JSON-lines events, accounts, identities,
outcomes)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta

import numpy as np
import pandas as pd

from .fleet import make_fleet


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
