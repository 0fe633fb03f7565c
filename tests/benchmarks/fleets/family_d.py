"""Family D (held out): heavy-tailed, bursty days with month-end cycles.

Each day's rate is the account's size times a weekday share drawn from a Dirichlet (any shape:
weekday-heavy, flat, weekend-heavy, one busy day), a month-end cycle for accounts that bill or
report monthly, a season (two peaks a year for some), piecewise-linear growth, holidays and
changes; the day's noise is a Student-t on the log scale (3–8 degrees of freedom), and on top
of it come batch days (an import: 2–6 times the usual) and empty days (nobody worked).  Counts
are Poisson given the rate.  Holidays are random blocks of 1–14 days, fleet-wide or for one of
three regions, and one day of lost data falls within the last week.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np

from . import PlantedFleet, truth_frame


def generate(n_accounts: int = 400, seed: int = 0, *, n_days: int = 560, as_of: date = date(2026, 4, 28),
             share_changed: float = 0.3) -> PlantedFleet:
    rng = np.random.default_rng(40_000 + seed)
    D, n = n_days, n_accounts
    start = as_of - timedelta(days=D - 1)
    days = [start + timedelta(days=i) for i in range(D)]
    weekday = np.array([d.weekday() for d in days])
    day_of_month = np.array([d.day for d in days])
    days_in_month = np.array([((d.replace(day=28) + timedelta(days=4)).replace(day=1) - timedelta(days=1)).day for d in days])
    ids = [f"d{seed:02d}-{i:04d}" for i in range(n)]

    kind = np.full(n, "quiet", dtype=object)
    picked = rng.choice(n, int(round(share_changed * n)), replace=False)
    kind[picked] = np.resize(np.array(["stop", "surge", "drop", "slide"], dtype=object), picked.size)
    traits = np.full(n, "plain", dtype=object)
    quiet = kind == "quiet"
    traits[quiet] = rng.choice(["plain", "small", "month_end", "seasonal", "growth", "old_shift", "shape_change",
                                "bursty", "short_history"], quiet.sum())

    size = np.exp(rng.normal(np.log(20), 1.0, n)).clip(1.0, 2500.0)
    size[traits == "small"] = rng.uniform(0.5, 4.0, (traits == "small").sum())
    size[~quiet] = np.maximum(size[~quiet], 1.5)
    alpha = rng.choice([0.5, 2.0, 8.0, 50.0], n)  # small alpha: lopsided weeks; large: flat
    week = np.stack([rng.dirichlet(np.full(7, a)) * 7 for a in alpha])
    rate = size[:, None] * week[:, weekday]
    for a in np.flatnonzero(traits == "shape_change"):
        when = D - int(rng.integers(80, 300))
        rate[a, when:] = size[a] * (rng.dirichlet(np.full(7, 2.0)) * 7)[weekday[when:]]

    # Month-end cycle: the last days of a month carry extra work.
    month_end = (traits == "month_end") | (quiet & (rng.random(n) < 0.1))
    to_end = days_in_month - day_of_month
    bump = np.where(to_end < 3, 2.2, np.where(day_of_month <= 2, 1.4, 0.9))
    rate[month_end] *= bump[None, :]

    t = np.arange(D)
    season = traits == "seasonal"
    phase = rng.uniform(0, 2 * np.pi, n)
    amp = rng.uniform(0.45, 0.7, n)
    rate[season] *= np.exp(amp[season, None] * np.sign(np.sin(4 * np.pi * t[None, :] / 365 + phase[season, None]))
                           * np.abs(np.sin(4 * np.pi * t[None, :] / 365 + phase[season, None])) ** 0.3)
    grow = traits == "growth"
    for a in np.flatnonzero(grow):
        knots = np.sort(rng.choice(np.arange(1, D), 2, replace=False))
        slopes = rng.uniform(0.0, np.log(2.5) / 365, 3)
        log_level = np.cumsum(np.select([t < knots[0], t < knots[1]], [slopes[0], slopes[1]], slopes[2]))
        rate[a] *= np.exp(log_level - log_level[-1])
    for a in np.flatnonzero(traits == "old_shift"):
        rate[a, D - int(rng.integers(100, 320)):] *= rng.choice([rng.uniform(0.4, 0.65), rng.uniform(1.5, 2.4)])

    region = rng.integers(0, 3, n)
    for _ in range(4):
        length = int(rng.integers(1, 15))
        at = int(rng.integers(7, D - 21 - length))
        who = slice(None) if rng.random() < 0.5 else (region == rng.integers(0, 3))
        rate[who, at:at + length] *= rng.uniform(0.25, 0.75)

    onset = np.full(n, -1)
    factor = np.ones(n)
    shapes = np.full(n, "", dtype=object)
    change = np.ones((n, D))
    for a in np.flatnonzero(~quiet):
        if kind[a] == "slide":
            length = int(rng.integers(28, 92))
            begin = D - 1 - int(rng.integers(int(0.85 * length), length + 15))
            final = rng.uniform(0.25, 0.55)
            shapes[a] = rng.choice(["linear", "staged", "exponential"])
            x = np.clip((t - begin) / length, 0, 1)
            if shapes[a] == "linear":
                path = 1 - (1 - final) * x
            elif shapes[a] == "exponential":
                path = final + (1 - final) * np.exp(-5 * x)
            else:
                stairs = int(rng.integers(2, 5))
                path = 1 - (1 - final) * np.ceil(x * stairs - 1e-9).clip(0, stairs) / stairs
            change[a] = path
            onset[a], factor[a] = begin, path[-1]
        else:
            begin = D - int(rng.integers(3 if kind[a] == "stop" else 2, 31))
            factor[a] = {"stop": 0.0, "drop": rng.uniform(0.15, 0.55), "surge": rng.uniform(2.0, 4.0)}[kind[a]]
            change[a, begin:] = factor[a]
            onset[a] = begin

    ref_end = np.where(onset >= 0, onset, D)
    usual = np.array([rate[a, max(0, e - 56):e].mean() for a, e in enumerate(ref_end)])
    df = rng.uniform(3, 8, n)
    scale = rng.uniform(0.1, 0.35, n)
    noise = np.exp(scale[:, None] * rng.standard_t(df[:, None], (n, D)).clip(-8, 8))
    batch_p = np.where(traits == "bursty", rng.uniform(0.04, 0.08, n), rng.uniform(0.0, 0.02, n))
    batch = np.where(rng.random((n, D)) < batch_p[:, None], rng.uniform(2, 6, (n, D)), 1.0)
    empty_p = np.where(traits == "bursty", rng.uniform(0.03, 0.06, n), rng.uniform(0.0, 0.02, n))
    empty = rng.random((n, D)) >= empty_p[:, None]
    counts = rng.poisson(rate * change * noise * batch * empty)

    first = np.zeros(n, dtype=int)
    short = traits == "short_history"
    first[short] = D - rng.integers(42, 140, short.sum())
    other = quiet & ~short & (rng.random(n) < 0.15)
    first[other] = D - rng.integers(140, D - 20, other.sum())
    counts[t[None, :] < first[:, None]] = 0
    lost = D - int(rng.integers(2, 7))
    counts[:, lost] = 0
    truth = truth_frame(ids, kind, onset, factor, usual, shapes, traits, first, start, D)
    return PlantedFleet("D", counts.astype(np.int64), start, as_of, ids, truth)
