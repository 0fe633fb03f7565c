"""The fleet-wide daily factor: days the whole fleet moved on together (holidays, data gaps),
measured on a sample of accounts' daily counts so each account can be judged without them.

Shapes: ``A`` accounts of the sample, ``D`` days.
"""

from __future__ import annotations

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
