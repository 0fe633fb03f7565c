"""Family C (held out): an account's count is the sum of its people's activity.

Each account has users who join and leave; a user is active on a day with a probability set by
their working pattern (weekdays, every day, weekends), takes vacations of their own, and when
active makes a negative-binomial number of events.  Over-dispersion comes from the clustering of
events in people and days, not from a drawn rate.  Holidays are days when people of a region (or
everyone) are mostly away; a region's summer puts its people's vacations into the same weeks.
Two-peaked accounts hire seasonal staff; growth is hiring; an old level shift is a team that
joined or left; a weekday change is an account that opened at weekends.  Drops, slides and
surges are people leaving, disengaging or arriving; a stop is an integration that stopped
sending events.  ``backtest=True`` makes two years with outcomes: churners disengage over 6–13
weeks and cancel; expanders onboard a new team 4–8 weeks before upgrading.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd

from . import PlantedFleet, truth_frame

PATTERNS = {  # activity probability multipliers by weekday, Monday first
    "office": np.array([1.0, 1.0, 1.0, 1.0, 0.9, 0.05, 0.03]),
    "daily": np.array([1.0, 1.0, 1.0, 1.0, 1.0, 0.9, 0.85]),
    "weekend": np.array([0.25, 0.2, 0.2, 0.3, 0.6, 1.0, 1.0]),
}


class _Account:
    """Users of one account as arrays: join and leave columns, activity and intensity."""

    def __init__(self, rng, n_users, first, n_days, pattern_mix, mean_events):
        self.rng = rng
        self.join = np.full(n_users, first)
        self.leave = np.full(n_users, n_days)
        self.p = rng.beta(4, 2, n_users) * 0.95
        self.pattern = rng.choice(list(PATTERNS), n_users, p=pattern_mix)
        self.events = rng.lognormal(np.log(mean_events), 0.5, n_users)
        self.shape = rng.uniform(0.8, 4.0, n_users)
        self.engagement = np.ones((n_users, n_days))  # multiplies the activity probability
        self.intensity = np.ones((n_users, n_days))  # multiplies the events of an active day

    def add(self, k, join, leave, pattern_mix, mean_events, n_days):
        rng = self.rng
        self.join = np.concatenate([self.join, np.full(k, join)])
        self.leave = np.concatenate([self.leave, np.full(k, leave)])
        self.p = np.concatenate([self.p, rng.beta(4, 2, k) * 0.95])
        self.pattern = np.concatenate([self.pattern, rng.choice(list(PATTERNS), k, p=pattern_mix)])
        self.events = np.concatenate([self.events, rng.lognormal(np.log(mean_events), 0.5, k)])
        self.shape = np.concatenate([self.shape, rng.uniform(0.8, 4.0, k)])
        self.engagement = np.vstack([self.engagement, np.ones((k, n_days))])
        self.intensity = np.vstack([self.intensity, np.ones((k, n_days))])

    def probability(self, weekday, away):
        """(U, D) activity probability; ``away`` (U, D) multipliers for vacations and holidays."""
        cols = np.arange(weekday.size)
        pattern = np.stack([PATTERNS[p][weekday] for p in self.pattern])
        present = (cols[None, :] >= self.join[:, None]) & (cols[None, :] < self.leave[:, None])
        return np.clip(self.p[:, None] * pattern * present * away * self.engagement, 0, 1)

    def expected(self, weekday, away):
        return (self.probability(weekday, away) * self.events[:, None] * self.intensity).sum(axis=0)

    def simulate(self, weekday, away):
        rng = self.rng
        active = rng.random((self.p.size, weekday.size)) < self.probability(weekday, away)
        mean = self.events[:, None] * self.intensity
        shape = np.broadcast_to(self.shape[:, None], active.shape)
        made = rng.negative_binomial(shape, shape / (shape + mean)) + 1  # an active day has >= 1 event
        return (active * made).sum(axis=0)


def _vacations(rng, n_users, n_days, region_summer):
    """(U, D) multipliers: each user's own vacations, and a region's summer weeks."""
    away = np.ones((n_users, n_days))
    for u in range(n_users):
        for _ in range(int(rng.poisson(n_days / 365 * 2))):
            length = int(rng.integers(5, 15))
            at = int(rng.integers(0, n_days))
            if region_summer is not None and rng.random() < 0.7:  # most take it in the region's summer
                at = int(rng.integers(region_summer[0], region_summer[1]))
            away[u, at:at + length] = 0.05
    return away


def generate(n_accounts: int = 400, seed: int = 0, *, n_days: int = 640, as_of: date = date(2026, 10, 13),
             share_changed: float = 0.3, backtest: bool = False) -> PlantedFleet:
    rng = np.random.default_rng(30_000 + seed)
    if backtest:
        n_days = max(n_days, 730)
    D, n = n_days, n_accounts
    start = as_of - timedelta(days=D - 1)
    cols = np.arange(D)
    weekday = (start.weekday() + cols) % 7
    ids = [f"c{seed:02d}-{i:04d}" for i in range(n)]

    # Fleet-wide public holidays (single days and a winter break) and each region's own days.
    public = np.ones(D)
    for c in cols:
        day = start + timedelta(days=int(c))
        if (day.month, day.day) in ((1, 1), (5, 1), (12, 25), (12, 26)) or (day.month == 12 and day.day >= 27) \
                or (day.month == 1 and day.day <= 3):
            public[c] = 0.15
    regions = np.array(["west", "centre", "east"], dtype=object)
    region = rng.choice(regions, n)
    regional = {r: np.ones(D) for r in regions}
    summer = {}
    for r, (month, first_day, length) in zip(regions, ((7, 20, 3), (8, 10, 1), (6, 2, 2))):
        for year in range(start.year, as_of.year + 1):
            c = (date(year, month, first_day) - start).days
            if 0 <= c < D - 25 or backtest:
                regional[r][max(c, 0):max(c + length, 0)] = 0.2
        sc = (date(as_of.year - (1 if (date(as_of.year, 7, 1) - start).days > D - 60 else 0), 7, 1) - start).days
        summer[r] = (max(sc + {"west": 0, "centre": 21, "east": -14}[r], 0), max(sc + {"west": 35, "centre": 56, "east": 21}[r], 1))

    kind = np.full(n, "quiet", dtype=object)
    traits = np.full(n, "plain", dtype=object)
    onset = np.full(n, -1)
    factor = np.ones(n)
    shapes = np.full(n, "", dtype=object)
    if not backtest:
        chosen = rng.permutation(n)[: int(round(share_changed * n))]
        for i, a in enumerate(chosen):
            kind[a] = ("slide", "drop", "surge", "stop")[i % 4]
    quiet = np.flatnonzero(kind == "quiet")
    traits[quiet] = rng.choice(["plain", "small", "seasonal", "hiring", "team_moved", "weekend_opening",
                                "short_history", "office", "weekend"], quiet.size)

    counts = np.zeros((n, D), dtype=np.int64)
    usual = np.zeros(n)
    outcomes, episodes = [], []
    backtest_role = np.full(n, "", dtype=object)
    if backtest:
        order = rng.permutation(n)
        backtest_role[order[: int(0.10 * n)]] = "churn"
        backtest_role[order[int(0.10 * n): int(0.16 * n)]] = "expand"
        backtest_role[order[int(0.16 * n): int(0.20 * n)]] = "dip"
        traits[backtest_role != ""] = "plain"
    for a in range(n):
        trait = traits[a]
        mix = {"office": [0.9, 0.1, 0.0], "weekend": [0.1, 0.2, 0.7]}.get(trait, [0.6, 0.3, 0.1])
        first = 0
        if trait == "short_history":
            first = D - int(rng.integers(42, 130))
        elif kind[a] == "quiet" and backtest_role[a] == "" and rng.random() < 0.2:
            first = D - int(rng.integers(130, D - 30))
        n_users = int(np.clip(rng.lognormal(np.log(5), 0.9), 1, 250))
        mean_events = rng.uniform(1.5, 6.0)
        if trait == "small":
            n_users, mean_events = int(rng.integers(1, 3)), rng.uniform(1.0, 2.5)
        if kind[a] != "quiet" or backtest_role[a]:
            n_users = max(n_users, 3)
        acct = _Account(rng, n_users, first, D, mix, mean_events)
        if trait == "hiring":  # up to +150% people over the last year
            k = int(np.ceil(n_users * rng.uniform(0.5, 1.5)))
            for j in range(k):
                acct.add(1, D - 365 + int(rng.integers(0, 365)), D, mix, mean_events, D)
        if trait == "team_moved":
            when = D - int(rng.integers(100, 300))
            if backtest and kind[a] == "quiet" and not backtest_role[a]:
                # A team joining or leaving inside the replayed year is a planted change.
                episodes.append((ids[a], "level_shift", start + timedelta(days=when), start + timedelta(days=when)))
            team = max(1, int(round(n_users * rng.uniform(0.35, 0.6))))
            if rng.random() < 0.5:
                acct.leave[:team] = when
            else:
                acct.add(team, when, D, mix, mean_events, D)
        if trait == "seasonal":  # seasonal staff, present in alternating 5-9 week seasons
            staff = int(np.ceil(n_users * rng.uniform(1.2, 2.2)))
            pos = int(rng.integers(0, 40))
            while pos < D:
                length = int(rng.integers(35, 64))
                acct.add(staff, pos, min(pos + length, D), mix, mean_events, D)
                pos += length + int(rng.integers(35, 64))
        if trait == "weekend_opening":
            when = D - int(rng.integers(90, 280))
            acct.pattern[:] = "office"
            for u in range(acct.p.size):
                acct.add(1, max(when, acct.join[u]), acct.leave[u], [0, 0, 1.0], mean_events, D)
        away_user = _vacations(rng, acct.p.size, D, summer[region[a]] if region[a] != "centre" else None)
        away = away_user * (public * regional[region[a]])[None, :]
        before = acct.expected(weekday, away)
        plan = _plant(rng, acct, kind[a], backtest_role[a], D, cols, mix, mean_events)
        away = np.vstack([away, np.ones((acct.p.size - away.shape[0], D)) * (public * regional[region[a]])[None, :]])
        after = acct.expected(weekday, away)
        series = acct.simulate(weekday, away)
        if plan is not None:
            k, begin, stop_at, shape_name, outcome = plan
            onset[a], shapes[a] = begin, shape_name
            if k == "stop":
                series[begin:] = 0
            if stop_at is not None:
                series[stop_at:] = 0
            usual[a] = before[max(0, begin - 56):begin].mean()
            # The change's own effect: expected activity with it over expected without it.
            if not backtest:
                judged = slice(D - 7, D)
            elif k == "slide":
                judged = slice(stop_at - 7, stop_at)
            else:
                judged = slice(begin + 7, begin + 28)
            factor[a] = 0.0 if k == "stop" else after[judged].mean() / max(before[judged].mean(), 1e-9)
            if outcome is not None:
                outcomes.append((ids[a], start + timedelta(days=int(outcome[0])), outcome[1]))
                ep_end = stop_at if stop_at is not None else D - 1
                episodes.append((ids[a], k, start + timedelta(days=int(begin)), start + timedelta(days=int(ep_end))))
            elif backtest_role[a] == "dip":
                episodes.append((ids[a], "drop", start + timedelta(days=int(begin)),
                                 start + timedelta(days=int(min(begin + 70, D - 1)))))
        else:
            usual[a] = before[-56:].mean()
        series[: int(acct.join.min())] = 0
        counts[a] = series
    lost = D - int(rng.integers(2, 7))
    counts[:, lost] = rng.binomial(counts[:, lost], 0.01)
    first_col = np.argmax(counts > 0, axis=1)
    if backtest:
        kind = np.where(backtest_role != "", backtest_role, kind)
    truth = truth_frame(ids, kind, onset, factor, usual, shapes, traits, first_col, start, D)
    fleet = PlantedFleet("C", counts, start, as_of, ids, truth)
    if backtest:
        fleet.outcomes = pd.DataFrame(outcomes, columns=["account", "date", "outcome"])
        fleet.episodes = pd.DataFrame(episodes, columns=["account", "kind", "start", "end"])
    return fleet


def _disengage(rng, acct, begin, length, final, shape_name, cols):
    """People disengage over ``length`` days from ``begin`` toward ``final`` of their activity:
    leaving one by one (staged), or using the product less (linear or fast-then-flat)."""
    if shape_name == "staged":
        n_steps = int(rng.integers(2, 5))
        cuts = np.sort(rng.choice(np.arange(1, length), n_steps - 1, replace=False))
        steps = np.concatenate([[0], cuts])
        for j, c in enumerate(steps):
            acct.engagement[:, cols >= begin + c] = 1 - (1 - final) * (j + 1) / n_steps
        return
    x = np.clip((cols - begin) / length, 0, 1)
    if shape_name == "linear":
        level = 1 - (1 - final) * x
    else:
        level = final + (1 - final) * np.exp(-3.5 * np.clip(cols - begin, 0, None) / length)
    acct.engagement[:] = np.minimum(acct.engagement, level[None, :])


def _plant(rng, acct, kind, role, D, cols, mix, mean_events):
    """Apply a planted change to ``acct``; returns (kind, onset, silent-from, slide shape,
    (outcome column, outcome) or None) or None for a quiet account."""
    if role == "churn":
        length = int(rng.integers(42, 92))
        cancel = int(rng.integers(D - 230, D - 10))  # the whole slide inside the replayed year
        begin = cancel - length - int(rng.integers(0, 8))
        shape_name = str(rng.choice(["linear", "staged", "exponential"]))
        _disengage(rng, acct, begin, length, rng.uniform(0.25, 0.55), shape_name, cols)
        return "slide", begin, cancel, shape_name, (cancel, "churned")
    if role == "expand":
        upgrade = int(rng.integers(D - 270, D - 10))  # the whole surge inside the replayed year
        begin = upgrade - int(rng.integers(28, 57))
        team = int(np.ceil(acct.p.size * rng.uniform(1.0, 3.0)))
        acct.add(team, begin, D, mix, mean_events, D)
        return "surge", begin, None, "", (upgrade, "expanded")
    if role == "dip":
        begin = int(rng.integers(D - 300, D - 60))
        length = int(rng.integers(14, 43))
        acct.engagement[:, begin:begin + length] = rng.uniform(0.15, 0.55)
        return "drop", begin, None, "", None
    if kind == "quiet":
        return None
    if kind == "slide":
        length = int(rng.integers(28, 92))
        begin = D - 1 - int(rng.integers(int(0.85 * length), length + 15))
        shape_name = str(rng.choice(["linear", "staged", "exponential"]))
        _disengage(rng, acct, begin, length, rng.uniform(0.25, 0.55), shape_name, cols)
        return "slide", begin, None, shape_name, None
    age = int(rng.integers(3 if kind == "stop" else 2, 31))
    begin = D - age
    if kind == "stop":
        return "stop", begin, None, "", None
    if kind == "drop":
        target = rng.uniform(0.15, 0.55)
        if rng.random() < 0.5:  # people left
            n_users = acct.p.size
            weights = acct.p * acct.events
            order = rng.permutation(n_users)
            kept = np.cumsum(weights[order]) / weights.sum()
            gone = order[kept > target + 1e-9]
            if gone.size < n_users:
                acct.leave[gone] = np.minimum(acct.leave[gone], begin)
            else:
                acct.engagement[:, begin:] *= target
        else:  # everyone uses it less
            acct.engagement[:, begin:] *= target
        return "drop", begin, None, "", None
    # surge: a new team arrives, or the people there use it much more
    boost = rng.uniform(2.0, 4.0)
    if rng.random() < 0.5:
        acct.add(int(np.ceil(acct.p.size * (boost - 1))), begin, D, mix, mean_events, D)
    else:
        acct.intensity[:, begin:] *= boost
    return "surge", begin, None, "", None
