"""Planted-truth fleet families for the accuracy benchmark, the calibration test and the backtest.

Each family is written on its own, with its own way of making counts: how noise arises, what a
week looks like, how holidays, seasons, growth and changes are made.  Detection is developed on
``DEV_FAMILY`` only; the others are held out and only reported (README, ``accuracy.py``).  A
detector that is good on the family it was developed on and not on the others is not good.

Every family's ``generate(n_accounts, seed, **options)`` returns a :class:`PlantedFleet`.  All
data is invented.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, timedelta

import numpy as np
import pandas as pd

CHANGE_KINDS = ("drop", "stop", "slide", "surge")
TRUTH_COLUMNS = ("account", "kind", "onset", "age_days", "factor", "usual", "shape", "traits", "first_day")


@dataclass
class PlantedFleet:
    """A generated fleet and what was planted in it.

    ``counts`` (A, D) int64: events per account and day, column 0 is ``start`` and the last column
    ``as_of``; zero before an account's first day.  ``truth``: one row per account with
    ``TRUTH_COLUMNS``: ``kind`` (a change kind or ``quiet``), ``onset`` (first changed day, a
    date, or None), ``age_days`` (days changed up to as_of, the onset day and as_of included), ``factor`` (the change's level at as_of as
    a multiple of the usual level), ``usual`` (expected events a day over the eight weeks before
    the onset, or before as_of for quiet accounts), ``shape`` (a slide's shape: linear, staged or
    exponential), ``traits`` (what makes a quiet account hard, comma-separated) and ``first_day``.
    ``outcomes``: ``account, date, outcome`` (churned / expanded) for backtest fleets, else empty.
    ``episodes``: backtest fleets only — every planted change with its ``start`` and ``end`` dates
    (``account, kind, start, end``), so a replayed alert can be told apart from a false one.
    """

    family: str
    counts: np.ndarray
    start: date
    as_of: date
    accounts: list
    truth: pd.DataFrame
    outcomes: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=["account", "date", "outcome"]))
    episodes: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=["account", "kind", "start", "end"]))

    @property
    def n_days(self) -> int:
        return self.counts.shape[1]

    def day(self, column: int) -> date:
        return self.start + timedelta(days=int(column))

    def daily_frame(self, event: str = "app.use") -> pd.DataFrame:
        """Long rows ``account, day, event, count`` (zero counts left out), for ``ingest --daily``."""
        a, d = np.nonzero(self.counts)
        return pd.DataFrame({
            "account": np.asarray(self.accounts, dtype=object)[a],
            "day": pd.to_datetime(self.start) + pd.to_timedelta(d, unit="D"),
            "event": event,
            "count": self.counts[a, d].astype(np.int64),
        })


def truth_frame(accounts, kind, onset_col, factor, usual, shape, traits, first_col, start: date,
                n_days: int) -> pd.DataFrame:
    """The truth table from per-account arrays (``onset_col`` −1 where no change)."""
    as_of = start + timedelta(days=n_days - 1)
    onset = [start + timedelta(days=int(c)) if c >= 0 else None for c in onset_col]
    return pd.DataFrame({
        "account": list(accounts),
        "kind": list(kind),
        "onset": onset,
        "age_days": [(as_of - o).days + 1 if o is not None else -1 for o in onset],
        "factor": np.asarray(factor, float),
        "usual": np.asarray(usual, float),
        "shape": list(shape),
        "traits": list(traits),
        "first_day": [start + timedelta(days=int(c)) for c in first_col],
    }, columns=list(TRUTH_COLUMNS))


def slide_path(rng, n_days: int, onset: int, duration: int, final: float, shape: str) -> np.ndarray:
    """Multiplier over columns for a slide from 1 at ``onset`` to ``final`` after ``duration`` days."""
    t = np.arange(n_days) - onset
    progress = np.clip(t / duration, 0.0, 1.0)
    if shape == "linear":
        return 1.0 - (1.0 - final) * progress
    if shape == "exponential":
        # Fast at first, then flattening: 95% of the way after `duration` days.
        rate = 3.0 / duration
        return final + (1.0 - final) * np.exp(-rate * np.clip(t, 0, None))
    if shape == "staged":
        steps = int(rng.integers(2, 5))
        edges = np.sort(rng.uniform(0, 1, steps - 1))
        edges = np.concatenate([[0.0], edges]) * duration
        levels = 1.0 - (1.0 - final) * np.arange(1, steps + 1) / steps
        out = np.ones(n_days)
        for edge, level in zip(edges, levels):
            out[t >= edge] = level
        return out
    raise ValueError(shape)


def _families():
    from . import family_a, family_b, family_c, family_d

    return {"A": family_a, "B": family_b, "C": family_c, "D": family_d}


DEV_FAMILY = "A"
HELD_OUT = ("B", "C", "D")


def generate(family: str, n_accounts: int, seed: int, **options) -> PlantedFleet:
    """A fleet of the named family (``A``–``D``)."""
    families = _families()
    if family not in families:
        raise ValueError(f"unknown family {family!r}; expected one of {', '.join(families)}")
    return families[family].generate(n_accounts, seed, **options)
