"""Family B (held out): Poisson counts on an autocorrelated latent log-level, calendar holidays.

The log of each account's daily rate is a sum of parts: size, a weekday effect made of two
harmonics (weekday-heavy, flat and weekend-heavy weeks all arise from their phases and
amplitudes), an annual or semi-annual season (large amplitudes give two-peaked levels), logistic
adoption growth, an AR(1) wander whose days are correlated (φ 0.3–0.9), and holidays taken from
a calendar: fleet-wide ones and ones of each of three regions.  Counts are Poisson given the rate.
New accounts ramp up over their first weeks.  Changes are made on the log scale: drops step down
over one to three days, slides are geometric, staged or fast-then-flat, surges ramp up
logistically.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np

from . import PlantedFleet, truth_frame

AS_OF_CHOICES = (date(2026, 9, 22), date(2026, 5, 19), date(2026, 11, 10))


def _calendar_holidays(start: date, n_days: int):
    """(first column, length, depth, region or None) for each holiday between start and the end."""
    found = []
    for year in range(start.year, start.year + n_days // 365 + 2):
        spring = date(year, 4, 3) + timedelta(days=(year * 5) % 14)  # a moving spring weekend
        items = [(date(year, 1, 1), 1, 0.45, None), (date(year, 12, 24), 3, 0.35, None),
                 (date(year, 12, 31), 1, 0.6, None), (spring, 4, 0.55, None),
                 (date(year, 8, 3), 14, 0.5, "north"), (date(year, 7, 1), 7, 0.6, "south"),
                 (date(year, 10, 5), 2, 0.4, "east"), (date(year, 5, 20), 1, 0.5, "south")]
        for when, length, depth, region in items:
            column = (when - start).days
            if -length < column < n_days:
                found.append((column, length, depth, region))
    return found


def _harmonic_weekdays(rng, n, weekday_of_column):
    """Log weekday effect per account and column from two harmonics."""
    style = rng.choice(["office", "office", "flat", "weekend", "strict"], n)
    a1 = np.where(style == "flat", 0.0, rng.uniform(0.25, 0.6, n))
    a2 = np.where(style == "flat", 0.0, rng.uniform(0.0, 0.25, n))
    # Phase so that the trough falls on the weekend (office) or midweek (weekend-heavy).
    phase = np.where(style == "weekend", 5.5, 2.0) + rng.normal(0, 0.3, n)
    w = weekday_of_column[None, :]
    effect = a1[:, None] * np.cos(2 * np.pi * (w - phase[:, None]) / 7) + a2[:, None] * np.cos(4 * np.pi * (w - phase[:, None]) / 7)
    strict = style == "strict"
    effect[strict] = np.where(w >= 5, -3.0, 0.1)[0][None, :]
    return effect, style


def generate(n_accounts: int = 500, seed: int = 0, *, n_days: int = 730, as_of: date | None = None,
             share_changed: float = 0.3) -> PlantedFleet:
    rng = np.random.default_rng(20_000 + seed)
    as_of = as_of or AS_OF_CHOICES[seed % len(AS_OF_CHOICES)]
    start = as_of - timedelta(days=n_days - 1)
    D, n = n_days, n_accounts
    cols = np.arange(D)
    weekday = (start.weekday() + cols) % 7
    ids = [f"b{seed:02d}-{i:05d}" for i in range(n)]
    changed = rng.permutation(n)[: int(round(share_changed * n))]
    is_changed = np.zeros(n, bool)
    is_changed[changed] = True

    log_rate = np.zeros((n, D))
    size = rng.lognormal(np.log(15.0), 1.2, n).clip(0.8, 5000)
    traits = np.full(n, "plain", dtype=object)
    roll = rng.random(n)
    tiny = roll < 0.12
    size[tiny] = rng.uniform(0.5, 4.0, tiny.sum())
    traits[tiny] = "small"
    log_rate += np.log(size)[:, None]

    week, style = _harmonic_weekdays(rng, n, weekday)
    traits[(style == "weekend") & (traits == "plain")] = "weekend"
    traits[(style == "strict") & (traits == "plain")] = "heavy"
    traits[(style == "flat") & (traits == "plain")] = "flat"
    switch = (rng.random(n) < 0.1)
    for a in np.flatnonzero(switch):
        when = D - int(rng.integers(100, 320))
        other, _ = _harmonic_weekdays(rng, 1, weekday[when:])
        week[a, when:] = other[0]
        traits[a] = "shape_change"
    log_rate += week

    seasonal = (rng.random(n) < 0.12) & ~is_changed
    period = rng.choice([121.0, 182.5, 365.0], n)
    amp = rng.uniform(0.35, 0.65, n)
    peak = rng.uniform(0, 365, n)
    season = amp[:, None] * np.cos(2 * np.pi * (cols[None, :] - peak[:, None]) / period[:, None])
    log_rate += np.where(seasonal[:, None], season, 0.0)
    traits[seasonal] = "seasonal"

    # Logistic adoption: up to 2.5 times the level within a year, for some accounts.
    grows = (rng.random(n) < 0.15) & ~is_changed
    gain = rng.uniform(0.3, 1.5, n)
    mid = rng.uniform(D - 400, D + 100, n)
    width = rng.uniform(40, 120, n)
    adoption = np.log1p(gain[:, None] / (1 + np.exp(-(cols[None, :] - mid[:, None]) / width[:, None])))
    log_rate += np.where(grows[:, None], adoption - adoption[:, :1], 0.0)
    traits[grows] = "growth"

    shifted = (rng.random(n) < 0.1) & ~is_changed
    for a in np.flatnonzero(shifted):
        when = D - int(rng.integers(110, 330))
        log_rate[a, when:] += rng.choice([-1, 1]) * rng.uniform(0.4, 0.8)
        traits[a] = "old_shift"

    # The AR(1) wander, generated for all accounts at once.
    phi = rng.uniform(0.3, 0.9, n)
    sd = rng.uniform(0.08, 0.45, n)
    innovation = rng.normal(0, 1, (n, D)) * (sd * np.sqrt(1 - phi**2))[:, None]
    wander = np.empty((n, D))
    wander[:, 0] = rng.normal(0, sd)
    for d in range(1, D):
        wander[:, d] = phi * wander[:, d - 1] + innovation[:, d]
    log_rate += wander

    region = rng.choice(np.array(["north", "south", "east"], dtype=object), n)
    for column, length, depth, where in _calendar_holidays(start, D):
        span = slice(max(column, 0), min(column + length, D))
        rows = slice(None) if where is None else (region == where)
        log_rate[rows, span] += np.log(depth)

    # Accounts start over the history (6 weeks to 2 years) and ramp up over their first weeks.
    first = np.zeros(n, dtype=int)
    late = (rng.random(n) < 0.3) & ~is_changed
    first[late] = D - rng.integers(42, D - 30, late.sum())
    young = late & (first > D - 150)
    traits[young & (traits == "plain")] = "short_history"
    ramp_len = rng.integers(10, 29, n)
    since = cols[None, :] - first[:, None]
    log_rate += np.log(np.clip(0.3 + 0.7 * since / ramp_len[:, None], 0.3, 1.0))

    kind = np.full(n, "quiet", dtype=object)
    onset = np.full(n, -1)
    factor = np.ones(n)
    shapes = np.full(n, "", dtype=object)
    base_rate = log_rate.copy()
    for i, a in enumerate(changed):
        k = ("surge", "slide", "stop", "drop")[i % 4]
        kind[a], traits[a] = k, "plain"
        if size[a] < 1.5:
            log_rate[a] += np.log(1.5 / size[a])
            base_rate[a] += np.log(1.5 / size[a])
        if k == "slide":
            length = int(rng.integers(28, 92))
            final = rng.uniform(0.25, 0.55)
            begin = D - 1 - int(rng.integers(int(0.85 * length), length + 15))
            shapes[a] = rng.choice(["linear", "staged", "exponential"])
            x = np.clip((cols - begin) / length, 0, 1)
            if shapes[a] == "linear":  # geometric: a straight line on the log scale
                path = np.log(final) * x
            elif shapes[a] == "exponential":
                path = np.log(final) * (1 - np.exp(-4 * x)) / (1 - np.exp(-4))
            else:
                n_steps = int(rng.integers(2, 5))
                cuts = np.sort(rng.choice(np.arange(1, length), n_steps - 1, replace=False))
                path = np.zeros(D)
                for j, c in enumerate(np.concatenate([[0], cuts])):
                    path[cols >= begin + c] = np.log(final) * (j + 1) / n_steps
            log_rate[a] += path
            onset[a], factor[a] = begin, float(np.exp(path[-1]))
        else:
            age = int(rng.integers(3 if k == "stop" else 2, 31))
            begin = D - age
            target = {"drop": rng.uniform(0.15, 0.55), "surge": rng.uniform(2.0, 4.0), "stop": 0.0}[k]
            if k == "stop":
                log_rate[a, begin:] = -np.inf
            else:
                steps = int(rng.integers(1, 4)) if k == "drop" else int(rng.integers(1, 6))
                x = np.clip((cols - begin + 1) / steps, 0, 1)
                log_rate[a] += np.log(target) * x
            onset[a], factor[a] = begin, target

    log_rate[cols[None, :] < first[:, None]] = -np.inf
    counts = rng.poisson(np.exp(log_rate))
    lost = D - int(rng.integers(2, 7))  # pipeline outage: nearly all of one day's events lost
    counts[:, lost] = rng.binomial(counts[:, lost], 0.03)

    ref_end = np.where(onset >= 0, onset, D)
    # Usual level: the expected count without the AR wander's realisation and without holidays.
    usual = np.array([np.exp(base_rate[a, max(0, e - 56):e] - wander[a, max(0, e - 56):e]).mean()
                      for a, e in enumerate(ref_end)])
    truth = truth_frame(ids, kind, onset, factor, usual, shapes, traits, first, start, D)
    return PlantedFleet("B", counts.astype(np.int64), start, as_of, ids, truth)
