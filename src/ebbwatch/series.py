"""Store rows → accounts × days arrays of the activity index, with masks and the fleet factor.

Shapes: ``A`` accounts (a chunk), ``D`` days; column ``D - 1`` is the as-of day.  Days are
integers since 1970-01-01 (1970-01-01 was a Thursday, so weekday = (day + 3) % 7, Monday = 0).
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, replace

import numpy as np

FLEET_GAP_RATIO = 0.3  # a day at under 30% of the fleet's usual volume is a data gap, not quiet
FLEET_LOOKBACK_WEEKS = 4
FLEET_DEADBAND = 0.05  # fleet-wide moves under ±5% are left alone (noise of the median)
# A fleet-wide move is read in full from at least FLEET_MIN_ACCOUNTS voting accounts.  From
# FLEET_MIN_SMALL to one fewer than that, a day's move counts (in full) only where it stands
# beyond FLEET_SMALL_Z standard errors of the votes' centre: a handful of accounts can still tell
# a holiday that moves nearly all of them from their own changes, not a small one from noise.
# Fewer than FLEET_MIN_SMALL cannot, and such a fleet's accounts are judged on their own.
FLEET_MIN_ACCOUNTS = 20
FLEET_MIN_SMALL = 8
FLEET_SMALL_Z = 3.0
SHORTH_EFFICIENCY = 1.7  # see _centre_standard_error
FLEET_MIN_REFERENCE = 3.0  # accounts whose usual day is under 3 events are too noisy to vote
FLEET_EXCLUDE = 0.2  # days the fleet moved on by more than this (log) stay out of later references
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
    :func:`fleet_factor` computed over the whole fleet; they default to 1 / nothing masked.
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


def _same_weekday_reference(matrix: np.ndarray, weeks: int = FLEET_LOOKBACK_WEEKS) -> np.ndarray:
    """Median of the same weekday over the previous ``weeks`` weeks, (A, D); NaN where unknown.

    The ``weeks`` lagged copies are put in order by a network of elementwise compare-and-swaps
    (NaN as +inf sorts last, as in ``np.sort``), much faster than sorting along a short axis
    or ``np.nanmedian`` on (weeks, A, D).
    """
    n_days = matrix.shape[1]
    # NaN as +inf once, then each lag is a shifted copy of it.
    unknown_inf = np.where(np.isnan(matrix), np.inf, matrix)
    lagged = []
    for k in range(1, weeks + 1):
        lag = np.empty(matrix.shape)
        shift = min(7 * k, n_days)
        lag[:, :shift] = np.inf
        lag[:, shift:] = unknown_inf[:, : n_days - shift]
        lagged.append(lag)
    spare = np.empty_like(lagged[0])  # the swaps write into buffers, not fresh arrays
    for i in range(weeks):
        for j in range(weeks - 1 - i):
            low, high = lagged[j], lagged[j + 1]
            np.minimum(low, high, out=spare)
            np.maximum(low, high, out=high)
            lagged[j], spare = spare, low
    count = np.isfinite(lagged[0]).astype(np.int8)
    for lag in lagged[1:]:
        count += np.isfinite(lag)
    lower_rank, upper_rank = (count - 1) // 2, count // 2
    lo, hi = lagged[0].copy(), lagged[0]
    for k in range(1, weeks):
        np.copyto(lo, lagged[k], where=lower_rank == k)
        np.copyto(hi, lagged[k], where=upper_rank == k)
    with np.errstate(invalid="ignore"):
        np.add(lo, hi, out=lo)
    lo *= 0.5
    lo[count == 0] = np.nan
    return lo


def shorth_location(votes: np.ndarray, coverage: float = 0.6) -> np.ndarray:
    """Per column of ``votes`` (A, D), the mean of the log votes inside the shortest interval
    that holds ``coverage`` of them (the shorth of Andrews et al. 1972, averaged as in
    Rousseeuw's least-trimmed-squares location).

    Unlike the median, it stays with the bulk when a large minority of accounts (a fifth, say)
    moves together in one direction; averaging inside the interval keeps it less noisy than the
    interval's midpoint.  Returned on the ratio scale; NaN where no vote.
    """
    out = np.full(votes.shape[1], np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        logs = np.log(votes)
    for column in range(votes.shape[1]):
        x = np.sort(logs[np.isfinite(logs[:, column]), column])
        if x.size == 0:
            continue
        keep = max(int(np.ceil(coverage * x.size)), 1)
        widths = x[keep - 1:] - x[: x.size - keep + 1]
        best = int(np.argmin(widths))
        out[column] = np.exp(x[best:best + keep].mean())
    return out


def fleet_factor(counts: np.ndarray, *, gap_ratio: float = FLEET_GAP_RATIO,
                 iterations: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """:func:`fleet_factor_and_voters` without the voters: ``(factor (D,), masked (D,) bool)``."""
    factor, masked, _ = fleet_factor_and_voters(counts, gap_ratio=gap_ratio, iterations=iterations)
    return factor, masked


def fleet_factor_and_voters(counts: np.ndarray, *, gap_ratio: float = FLEET_GAP_RATIO,
                            iterations: int = 3) -> tuple[np.ndarray, np.ndarray, int]:
    """The fleet-wide daily factor and the data-gap mask from a sample of accounts' counts (A, D).

    Each account votes with its day's count over its own median of the same weekday in the
    previous weeks; the factor is the shorth of the votes, so even a large minority of accounts
    changing moves it little, and an ordinary day's value is scaled to 1.  The references are then recomputed on counts with the factor divided out, a few
    times without the days the fleet moved on, so that the weeks after a holiday are not read as
    a lift over holiday-depressed references.  Returns ``(factor (D,), masked (D,) bool, voters)``;
    a day under ``gap_ratio`` is masked; ``voters`` as :func:`fleet_voting_accounts` counts them
    (from the first references, which are those of the counts as they are).
    """
    counts = np.where(np.isnan(counts), 0.0, counts)
    n_days = counts.shape[1]
    factor = np.ones(n_days)
    masked = np.zeros(n_days, dtype=bool)
    voting = 0
    for iteration in range(iterations):
        # Days the fleet moved on are left out of the later days' references rather than divided
        # by their factor: dividing fed every estimate's noise into the next weeks' references,
        # and over a month the factor crept up to 1.3 on an ordinary fleet.
        adjusted = counts.copy()
        adjusted[:, masked | (np.abs(np.log(factor)) > FLEET_EXCLUDE)] = np.nan
        reference = _same_weekday_reference(adjusted)
        voters = reference >= FLEET_MIN_REFERENCE
        if iteration == 0:
            voting = _typical_voters(voters)
        with np.errstate(all="ignore"):
            ratio = np.where(voters, counts / reference, np.nan)
        n_voters = voters.sum(axis=0)
        enough = n_voters >= FLEET_MIN_SMALL
        new = np.ones(n_days)
        new[enough] = shorth_location(ratio[:, enough])
        # The central vote of over-dispersed (right-skewed) counts sits below 1 on an ordinary
        # day; divide by its typical value so an ordinary day's factor is 1.
        ordinary = enough & (new >= gap_ratio)
        if ordinary.any():
            new[enough] /= np.median(new[ordinary])
        masked = new < gap_ratio
        factor = np.where(masked, 1.0, new)
    log_factor = np.log(np.clip(factor, 1e-9, None))
    few = enough & (n_voters < FLEET_MIN_ACCOUNTS)
    if few.any():
        # A small fleet's move within its votes' noise is none; beyond it, it is read as a larger
        # fleet's would be (shrinking it by the noise instead left a third of a holiday's dip).
        noise = FLEET_SMALL_Z * _centre_standard_error(ratio[:, few])
        log_factor[few] = np.where(np.abs(log_factor[few]) > noise, log_factor[few], 0.0)
    shrunk = np.sign(log_factor) * np.maximum(np.abs(log_factor) - FLEET_DEADBAND, 0.0)
    return np.where(masked, 1.0, np.exp(shrunk)), masked, voting


def _centre_standard_error(votes: np.ndarray) -> np.ndarray:
    """Per column of ``votes`` (A, D), the standard error of the shorth of the log votes: their
    spread (1.4826 × the median absolute deviation, the median of it over the columns, as a day's
    dozen votes tell their own spread poorly) times 1.7 over the root of the day's number of
    votes; inf without two.  (1.7: the shorth's standard deviation times √n for 8 to 19 normal
    votes, 1.63-1.77 in 20,000 simulated days each; a median's would be 1.17-1.24.)"""
    with np.errstate(divide="ignore", invalid="ignore"):
        logs = np.log(votes)
    logs[~np.isfinite(logs)] = np.nan
    n = np.isfinite(logs).sum(axis=0)
    some = n >= 2
    out = np.full(votes.shape[1], np.inf)
    if some.any():
        centre = np.nanmedian(logs[:, some], axis=0)
        spread = 1.4826 * np.median(np.nanmedian(np.abs(logs[:, some] - centre), axis=0))
        out[some] = SHORTH_EFFICIENCY * spread / np.sqrt(n[some])
    return out


def fleet_voting_accounts(counts: np.ndarray) -> int:
    """How many accounts of a sample (A, D) can vote on a typical day of the fleet factor: those
    with a usual same-weekday count of at least ``FLEET_MIN_REFERENCE`` (the median over days)."""
    counts = np.where(np.isnan(counts), 0.0, np.asarray(counts, float))
    if counts.size == 0:
        return 0
    return _typical_voters(_same_weekday_reference(counts) >= FLEET_MIN_REFERENCE)


def _typical_voters(voters: np.ndarray) -> int:
    """The median over days (past the references' first weeks) of ``voters`` (A, D) bool."""
    per_day = voters.sum(axis=0)
    return int(np.median(per_day[FLEET_LOOKBACK_WEEKS * 7:])) if voters.shape[1] > FLEET_LOOKBACK_WEEKS * 7 else 0


def adjust_for_fleet(panel: Panel) -> np.ndarray:
    """The index divided by the fleet factor (masked days stay NaN), (A, D)."""
    return panel.values / panel.fleet_factor[None, :]


def fleet_gap_days(days, totals: np.ndarray) -> list:
    """Days whose fleet-wide total is under ``FLEET_GAP_RATIO`` of the same weekday's recent median
    (for ``ebbwatch status``).  ``days``: a sequence of dates, consecutive or not."""
    import pandas as pd

    if len(totals) == 0:
        return []
    index = pd.to_datetime(pd.Series(list(days)))
    full = pd.date_range(index.min(), index.max(), freq="D")
    series = pd.Series(np.asarray(totals, float), index=index).reindex(full, fill_value=0.0)
    matrix = series.to_numpy()[None, :]
    reference = _same_weekday_reference(matrix)[0]
    with np.errstate(all="ignore"):
        gap = (reference > 0) & (matrix[0] < FLEET_GAP_RATIO * reference)
    return [d.date() for d in full[gap]]
