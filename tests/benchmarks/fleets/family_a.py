"""Family A (the development family): gamma–Poisson counts on a multiplicative level.

Each account's expected count is size × weekday shape × level × holiday factor, where the level
carries growth, old shifts and two-peaked seasons as piecewise plateaus.  Daily counts are
Poisson with a gamma-distributed rate (shape 2–50: over-dispersed, independent from day to day).
Weekday shapes are drawn from four types with jitter; some accounts switch type months before
as_of.  Holidays: a few fleet-wide dips of 1–14 days in history, regional ones (a third of the
fleet) of 1–14 days, and one fleet-wide day of lost data within the last week.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np

from . import PlantedFleet, slide_path, truth_frame

SHAPES = {
    "b2b": [1.15, 1.2, 1.2, 1.15, 1.0, 0.15, 0.15],
    "heavy": [1.4, 1.4, 1.4, 1.4, 1.3, 0.03, 0.03],
    "flat": [1.0] * 7,
    "weekend": [0.7, 0.7, 0.75, 0.8, 1.0, 1.6, 1.5],
}
QUIET_TRAITS = ("plain", "small", "heavy", "flat", "weekend", "shape_change", "growth", "old_shift",
                "seasonal", "short_history")


def _weekday_shape(rng, kind):
    base = np.array(SHAPES[kind])
    jitter = np.exp(rng.normal(0, 0.08, 7))
    shape = base * jitter
    return shape / shape.mean()


def _plateaus(rng, n_days, ratio):
    """Two-peaked season: plateaus of 4–10 weeks alternating between 1 and ``ratio``."""
    out = np.ones(n_days)
    pos, high = int(rng.integers(0, 50)), rng.random() < 0.5
    out[:pos] = ratio if not high else 1.0
    while pos < n_days:
        length = int(rng.integers(28, 71))
        out[pos:pos + length] = ratio if high else 1.0
        pos += length
        high = not high
    return out


def generate(n_accounts: int = 400, seed: int = 0, *, n_days: int = 600, as_of: date = date(2026, 6, 30),
             share_changed: float = 0.3, backtest: bool = False, holidays: bool = True) -> PlantedFleet:
    rng = np.random.default_rng(10_000 + seed)
    D = n_days
    t = np.arange(D)
    start = as_of - timedelta(days=D - 1)
    weekday = (start.weekday() + t) % 7
    ids = [f"a{seed:02d}-{i:04d}" for i in range(n_accounts)]

    # What each account is: a planted change (accuracy fleets) or quiet with a hard trait.
    kind = np.array(["quiet"] * n_accounts, dtype=object)
    if not backtest:
        n_changed = int(round(share_changed * n_accounts))
        kind[:n_changed] = [("drop", "stop", "slide", "surge")[i % 4] for i in range(n_changed)]
        rng.shuffle(kind)
    traits = np.array(["plain"] * n_accounts, dtype=object)
    quiet = np.flatnonzero(kind == "quiet")
    traits[quiet] = rng.choice(QUIET_TRAITS, quiet.size)

    # History: most accounts have all of it; some are young.
    first = np.zeros(n_accounts, dtype=int)
    young = traits == "short_history"
    first[young] = D - rng.integers(42, 121, young.sum())
    medium = (~young) & (rng.random(n_accounts) < 0.15)
    first[medium] = D - rng.integers(160, 420, medium.sum())

    size = np.exp(rng.normal(np.log(12.0), 1.1, n_accounts)).clip(1.0, 3000.0)
    small = traits == "small"
    size[small] = rng.uniform(0.5, 4.0, small.sum())

    shape_kind = rng.choice(["b2b", "b2b", "heavy", "flat", "flat", "weekend"], n_accounts)
    for trait in ("heavy", "flat", "weekend"):
        shape_kind[traits == trait] = trait
    shape = np.stack([_weekday_shape(rng, k) for k in shape_kind])  # (A, 7)
    weekly = shape[:, weekday]  # (A, D)
    for a in np.flatnonzero(traits == "shape_change"):
        when = D - int(rng.integers(90, 300))
        other = rng.choice([k for k in SHAPES if k != shape_kind[a]])
        weekly[a, when:] = _weekday_shape(rng, other)[weekday[when:]]

    level = np.ones((n_accounts, D))
    drift = rng.normal(0.0, 0.15, n_accounts)
    growth = traits == "growth"
    drift[growth] = rng.uniform(0.35, np.log(2.5), growth.sum())  # up to +150% a year
    level *= np.exp(drift[:, None] * (t[None, :] - (D - 1)) / 365.0)
    shifted = {}  # account -> column of its old level shift (a planted change, for backtest fleets)
    for a in np.flatnonzero(traits == "old_shift"):
        when = D - int(rng.integers(100, 300))
        shifted[a] = when
        level[a, when:] *= rng.uniform(0.45, 0.7) if rng.random() < 0.5 else rng.uniform(1.5, 2.2)
    for a in np.flatnonzero(traits == "seasonal"):
        level[a] *= _plateaus(rng, D, rng.uniform(2.0, 3.2))

    # Holidays: fleet-wide dips in history, regional ones for a third of the fleet.
    holiday = np.ones((n_accounts, D))
    for _ in range(3 if holidays else 0):
        length = int(rng.integers(1, 15))
        when = int(rng.integers(30, D - 21 - length))
        holiday[:, when:when + length] *= rng.uniform(0.3, 0.8)
    region = rng.random(n_accounts) < 1 / 3
    for _ in range(2 if holidays else 0):
        length = int(rng.integers(1, 15))
        when = int(rng.integers(30, D - (7 if backtest else 21) - length))
        holiday[np.ix_(region, np.arange(when, when + length))] *= rng.uniform(0.3, 0.8)

    onset = np.full(n_accounts, -1)
    factor = np.ones(n_accounts)
    slide_shape = np.array([""] * n_accounts, dtype=object)
    change = np.ones((n_accounts, D))
    outcomes, episodes = [], []
    if backtest:
        _plan_outcomes(rng, kind, traits, first, size, change, onset, factor, slide_shape, outcomes, episodes, D)
    else:
        for a in np.flatnonzero(kind != "quiet"):
            size[a] = max(size[a], 1.5)
            if kind[a] == "slide":
                duration = int(rng.integers(28, 92))
                final = rng.uniform(0.25, 0.55)
                slide_shape[a] = rng.choice(["linear", "staged", "exponential"])
                onset[a] = D - 1 - int(rng.integers(int(0.85 * duration), duration + 15))
                change[a] = slide_path(rng, D, onset[a], duration, final, slide_shape[a])
                factor[a] = change[a, -1]
            else:
                age = int(rng.integers(3 if kind[a] == "stop" else 2, 31))
                onset[a] = D - age
                factor[a] = {"drop": rng.uniform(0.15, 0.55), "stop": 0.0, "surge": rng.uniform(2.0, 4.0)}[kind[a]]
                change[a, onset[a]:] = factor[a]
            first[a] = max(0, min(first[a], onset[a] - 120))

    expected = size[:, None] * weekly * level * holiday * change
    usual = _usual(size[:, None] * weekly * level, onset, D)
    shape_k = np.exp(rng.uniform(np.log(2.0), np.log(50.0), n_accounts))
    rate = expected * rng.gamma(shape_k[:, None], 1.0 / shape_k[:, None], (n_accounts, D))
    counts = rng.poisson(rate)
    gap = D - int(rng.integers(2, 7))  # a day of lost telemetry within the last week
    counts[:, gap] = rng.binomial(counts[:, gap], 0.02)
    counts[t[None, :] < first[:, None]] = 0

    truth = truth_frame(ids, kind, onset, factor, usual, slide_shape, traits, first, start, D)
    fleet = PlantedFleet("A", counts.astype(np.int64), start, as_of, ids, truth)
    if backtest:
        fleet.outcomes = _frame(outcomes, ["account", "date", "outcome"], ids, start)
        # A quiet account's level shift falls inside the replayed year: alerts on it are not false.
        episodes += [(a, "level_shift", when, when) for a, when in shifted.items() if kind[a] == "quiet"]
        fleet.episodes = _frame(episodes, ["account", "kind", "start", "end"], ids, start)
    return fleet


def _usual(baseline, onset, n_days):
    """Mean expected count over the 56 days before each onset (before as_of without one)."""
    end = np.where(onset >= 0, onset, n_days)
    out = np.empty(baseline.shape[0])
    for a, e in enumerate(end):
        out[a] = baseline[a, max(0, e - 56):max(e, 1)].mean()
    return out


def _plan_outcomes(rng, kind, traits, first, size, change, onset, factor, slide_shape, outcomes, episodes, D):
    """Backtest fleets: churners slide for 6–13 weeks and cancel; expanders surge 4–8 weeks before
    upgrading; some accounts drop for a few weeks and recover (a change without an outcome).
    They are drawn among accounts already given a quiet trait (growth, seasons, a weekday shape
    change, ...), which they keep, and the truth frame says so."""
    n = kind.size
    order = rng.permutation(n)
    n_churn, n_expand, n_dip = int(0.10 * n), int(0.06 * n), int(0.04 * n)
    for a in order[:n_churn]:
        duration = int(rng.integers(42, 92))
        cancel = int(rng.integers(D - 230, D - 10))  # the whole slide inside the replayed year
        begin = cancel - duration - int(rng.integers(0, 8))
        final = rng.uniform(0.25, 0.55)
        slide_shape[a] = rng.choice(["linear", "staged", "exponential"])
        change[a] = slide_path(rng, D, begin, duration, final, slide_shape[a])
        change[a, cancel:] = 0.0
        kind[a], onset[a], factor[a] = "churn", begin, final
        first[a] = max(0, min(first[a], begin - 150))
        size[a] = max(size[a], 1.5)
        outcomes.append((a, cancel, "churned"))
        episodes.append((a, "slide", begin, cancel))
    for a in order[n_churn:n_churn + n_expand]:
        upgrade = int(rng.integers(D - 270, D - 10))  # the whole surge inside the replayed year
        begin = upgrade - int(rng.integers(28, 57))
        boost = rng.uniform(2.0, 4.0)
        change[a, begin:] = boost
        kind[a], onset[a], factor[a] = "expand", begin, boost
        first[a] = max(0, min(first[a], begin - 150))
        size[a] = max(size[a], 1.5)
        outcomes.append((a, upgrade, "expanded"))
        episodes.append((a, "surge", begin, D - 1))
    for a in order[n_churn + n_expand:n_churn + n_expand + n_dip]:
        begin = int(rng.integers(D - 300, D - 60))
        length = int(rng.integers(14, 43))
        change[a, begin:begin + length] = rng.uniform(0.15, 0.55)
        kind[a], onset[a] = "dip", begin
        first[a] = max(0, min(first[a], begin - 150))
        episodes.append((a, "drop", begin, min(begin + length + 28, D - 1)))


def _frame(rows, columns, ids, start):
    import pandas as pd

    out = []
    for row in rows:
        converted = [ids[row[0]]]
        for value in row[1:]:
            converted.append(start + timedelta(days=int(value)) if isinstance(value, (int, np.integer)) else value)
        out.append(converted)
    return pd.DataFrame(out, columns=columns)
