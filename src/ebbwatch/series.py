"""Store rows → accounts × days arrays of the activity index, with masks; the fleet factor
(measured by :mod:`.fleet`) applied.

Shapes: ``A`` accounts (a chunk), ``D`` days; column ``D - 1`` is the as-of day.  Days are
integers since 1970-01-01 (1970-01-01 was a Thursday, so weekday = (day + 3) % 7, Monday = 0).
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, replace

import numpy as np

NEVER_ACTIVE = 10**9  # the "first full day" of an account without activity: after every column


def weekday_of(day: np.ndarray | int):
    """Monday = 0 … Sunday = 6 for days since the epoch."""
    return (np.asarray(day) + 3) % 7


def fast_nanmedian_rows(array, overwrite_input: bool = False) -> np.ndarray:
    """Row medians of a 2-d array ignoring NaN, by partition instead of ``np.nanmedian``.

    NaNs are replaced by alternately +inf and -inf, which leaves the median of the rest in
    place when a row's NaN count is even and moves it by half a rank when odd: good enough for
    noise scales and typical levels, about 10x faster.  All-NaN rows give NaN.
    ``overwrite_input``: ``array`` is a float64 scratch array that may be reordered (one copy
    fewer).
    """
    array = np.asarray(array, float)
    missing = np.isnan(array)
    if not missing.any():
        return np.median(array, axis=1, overwrite_input=overwrite_input)
    odd = np.logical_xor.accumulate(missing, axis=1)  # parity of the row's NaN count so far
    filled = array if overwrite_input else array.copy()
    filled[missing & odd] = -np.inf
    filled[missing & ~odd] = np.inf
    # The median by an in-place partition of the copy (np.median would copy again).
    n = filled.shape[1]
    if n % 2:
        filled.partition(n // 2, axis=1)
        out = filled[:, n // 2].copy()
    else:
        filled.partition([n // 2 - 1, n // 2], axis=1)
        with np.errstate(invalid="ignore"):
            out = 0.5 * (filled[:, n // 2 - 1] + filled[:, n // 2])
    out[missing.all(axis=1) | ~np.isfinite(out)] = np.nan
    return out


def quiet_nanmean(array, axis):
    """``np.nanmean`` (the same sums and counts) giving NaN for all-NaN slices without a warning.

    ``warnings.catch_warnings`` would be simpler but is not thread-safe, and chunks are scored
    in threads.
    """
    array = np.asarray(array, float)
    valid = ~np.isnan(array)
    total = np.where(valid, array, 0.0).sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return total / valid.sum(axis=axis)


def first_full_days(first_active, data_start: int) -> np.ndarray:
    """Each account's first full day (day numbers, (A,)) from its first day with activity.

    The day an account starts on is partial (its first events arrive part-way through it, and
    in the account's own time zone the store's day may have begun hours earlier), so it reads
    as a change and is part of no history: the first full day is the next one.  Activity on the
    store's first day ``data_start`` is not known to be a start (the account may be older than
    the data), so that day is kept.  Days are absolute, so a scan and a backtest replay of the
    same day, whatever columns their panels span, agree.
    """
    first_active = np.asarray(first_active, np.int64)
    return np.where(first_active > data_start, first_active + 1, first_active)


def first_columns(counts, first_full_column=None) -> np.ndarray:
    """The first column of each account's history (A,), ``D`` for an account with none.

    ``first_full_column``: each account's first full day as a column (from
    :func:`first_full_days`; before column 0 for an account older than the columns), so that
    days without activity after it are zeros, whichever columns a panel spans.  Without it, the
    first column with activity in ``counts``."""
    n_days = np.shape(counts)[1]
    if first_full_column is not None:
        return np.clip(np.asarray(first_full_column, np.int64), 0, n_days)
    active = np.nan_to_num(np.asarray(counts, float)) > 0
    return np.where(active.any(axis=1), active.argmax(axis=1), n_days)


def missing_before_first_full_day(counts, first_full_column=None) -> np.ndarray:
    """Raw daily totals (A, D) with the days before each account's history starts
    (:func:`first_columns`) as NaN, not 0."""
    counts = np.asarray(counts, float)
    first = first_columns(counts, first_full_column)
    return np.where(np.arange(counts.shape[1])[None, :] >= first[:, None], counts, np.nan)


def resolve_event_weights(event_names, weights: dict[str, float], exclude=()) -> dict[str, float]:
    """Each event name's weight: the first matching exact name, else the first matching glob,
    else 1; names matching an ``exclude`` glob get weight 0."""
    resolved = {}
    globs = [(pattern, w) for pattern, w in weights.items() if any(c in pattern for c in "*?[")]
    for name in event_names:
        if any(fnmatch.fnmatchcase(name, pattern) for pattern in exclude):
            resolved[name] = 0.0
        elif name in weights:
            resolved[name] = float(weights[name])
        else:
            resolved[name] = next((w for p, w in globs if fnmatch.fnmatchcase(name, p)), 1.0)
    return resolved


@dataclass
class Panel:
    """The activity of a block of accounts over consecutive days.

    ``values`` (A, D) float64: the activity index, NaN where missing (before the account's
    history starts, or a masked fleet-wide data-gap day).  ``counts`` (A, D): the weighted event totals
    before normalisation (the count model's scale), NaN where ``values`` is.  ``start_day``: the
    day number of column 0.  ``first_seen`` (A,): the column the account's history starts
    at (:func:`first_columns`), ``D`` if none.
    """

    accounts: list
    start_day: int
    values: np.ndarray
    counts: np.ndarray
    first_seen: np.ndarray
    masked: np.ndarray  # (D,) bool
    fleet_factor: np.ndarray  # (D,)

    @property
    def n_days(self) -> int:
        return self.values.shape[1]

    @property
    def days(self) -> np.ndarray:
        return self.start_day + np.arange(self.n_days)


def dense_matrix(account_index, day, value, n_accounts: int, start_day: int, n_days: int) -> np.ndarray:
    """Sum (account, day, value) rows into a zero-filled (A, D) float64 matrix; rows outside the
    days are dropped and repeated account-days add up."""
    col = np.asarray(day, np.int64) - start_day
    account_index = np.asarray(account_index, np.int64)
    keep = (col >= 0) & (col < n_days)
    if not keep.all():
        account_index, col, value = account_index[keep], col[keep], np.asarray(value)[keep]
    # bincount over the flat cell index: one pass, several times faster than np.add.at.
    flat = np.bincount(account_index * n_days + col, weights=np.asarray(value, float),
                       minlength=n_accounts * n_days)
    return flat.reshape(n_accounts, n_days)


def cells_matrix(cell, value, n_accounts: int, n_days: int) -> np.ndarray:
    """Sum ``value`` rows into a zero-filled (A, D) float64 matrix at their flat places ``cell``
    (``account * n_days + column``, all inside it); repeated places add up."""
    return np.bincount(np.asarray(cell, np.int64), weights=np.asarray(value, float),
                       minlength=n_accounts * n_days).reshape(n_accounts, n_days)


def build_panel(
    account_index, day, value, events, users, *, accounts, start_day: int, end_day: int,
    normalise: str = "none", seats=None, fleet_factor=None, masked=None, first_full_day=None,
) -> Panel:
    """Arrays from the store's rows for one block of accounts.

    ``normalise``: ``none``, ``seats`` (divide by the account's seats) or ``active_users``
    (divide by the day's distinct users).  ``fleet_factor`` / ``masked`` (D,) come from
    :func:`.fleet.fleet_factor` computed over the whole fleet; they default to 1 / nothing masked.
    ``value`` rows of one account-day add up; ``users`` (one row per account-day) is needed only
    for ``active_users`` and ``events`` is not used.  ``first_full_day`` (A,): each account's
    first full day (:func:`first_full_days`); without it a history starts at the first activity.
    """
    n_days = end_day - start_day + 1
    n_accounts = len(accounts)
    counts = dense_matrix(account_index, day, value, n_accounts, start_day, n_days)
    active = dense_matrix(account_index, day, users, n_accounts, start_day, n_days) \
        if normalise == "active_users" and users is not None else None
    return panel_from_counts(counts, accounts=accounts, start_day=start_day, normalise=normalise, seats=seats,
                             active_users=active, fleet_factor=fleet_factor, masked=masked,
                             first_full_day=first_full_day)


def panel_from_counts(counts, *, accounts, start_day: int, normalise: str = "none", seats=None, active_users=None,
                      fleet_factor=None, masked=None, first_full_day=None) -> Panel:
    """:func:`build_panel` from the summed counts (A, D) float64 (taken over, not copied) and, for
    ``active_users``, each account-day's users (A, D)."""
    n_accounts, n_days = counts.shape
    if normalise == "seats":
        s = np.asarray(seats, dtype=float) if seats is not None else np.ones(n_accounts)
        s = np.where(np.isfinite(s) & (s > 0), s, 1.0)
        values = counts / s[:, None]
    elif normalise == "active_users":
        if active_users is None:
            raise ValueError("normalise='active_users' needs each account-day's users")
        active = active_users
        with np.errstate(invalid="ignore", divide="ignore"):
            values = np.where(active > 0, counts / np.maximum(active, 1), 0.0)
    elif normalise == "none":
        values = counts.copy()
    else:
        raise ValueError(f"unknown normalise {normalise!r}; expected none, seats or active_users")
    first_seen = first_columns(counts, None if first_full_day is None else np.asarray(first_full_day) - start_day)
    before = np.arange(n_days)[None, :] < first_seen[:, None]
    if masked is None:
        masked = np.zeros(n_days, dtype=bool)
    if fleet_factor is None:
        fleet_factor = np.ones(n_days)
    hide = before | masked[None, :]
    values[hide] = np.nan
    counts[hide] = np.nan
    return Panel(list(accounts), start_day, values, counts, first_seen, np.asarray(masked, bool),
                 np.asarray(fleet_factor, float))


def with_fleet(panel: Panel, fleet_factor, masked) -> Panel:
    """``panel`` (built without them) with the fleet factor and gap mask (D,) applied: masked
    days become NaN in ``values`` and ``counts`` (in place), as :func:`build_panel` would
    have made them.  Lets a block be read before the fleet-wide quantities are known.  None
    leaves the panel's own (1 / nothing masked)."""
    fleet_factor = panel.fleet_factor if fleet_factor is None else fleet_factor
    masked = np.asarray(panel.masked if masked is None else masked, bool)
    if masked.any():
        panel.values[:, masked] = np.nan
        panel.counts[:, masked] = np.nan
    return replace(panel, masked=masked, fleet_factor=np.asarray(fleet_factor, float))


def adjust_for_fleet(panel: Panel) -> np.ndarray:
    """The index divided by the fleet factor (masked days stay NaN), (A, D)."""
    return panel.values / panel.fleet_factor[None, :]
