"""Silence: days since the last activity, against how often the account is quiet on those days."""

from __future__ import annotations

import numpy as np

from .calibrate import cauchy_combination

SILENT_DAYS = 2  # the fewest quiet days in a row whose chance joins the falling p-value


def falling_p(p_level_low, p_stop, silent_days) -> np.ndarray:
    """The falling p-value (A,): the window tests' ``p_level_low``, joined by the Cauchy
    combination with the silence test's ``p_stop`` where the account has been silent for
    ``SILENT_DAYS`` or more (``silent_days``, (A,))."""
    silent = np.asarray(silent_days) >= SILENT_DAYS
    p_level_low = np.asarray(p_level_low, float)
    if not silent.any():
        return p_level_low
    return np.where(silent, cauchy_combination(np.vstack([p_level_low, p_stop])), p_level_low)


def last_active_column(values) -> np.ndarray:
    """Column of each account's last day with activity, -1 if none; (A,)."""
    active = np.isfinite(values) & (np.asarray(values) > 0)
    n_days = active.shape[1]
    return np.where(active.any(axis=1), n_days - 1 - active[:, ::-1].argmax(axis=1), -1)


def silence(values, reference_end, weekdays, first_seen, last_active=None):
    """Days of silence and their probability under the account's own quiet days.

    ``values`` (A, D), NaN = masked/missing (masked days neither break nor extend a silence).
    For each weekday, q = (quiet days + ½) / (days + 1) over the reference history
    (columns before ``reference_end``); the chance of the current silence is the product of q over
    its days, as if days were independent.  Returns ``(silent_days (A,), p_silence (A,),
    last_active (A,) column or -1)``; ``last_active`` may be given when already known
    (:func:`last_active_column`).
    """
    values = np.asarray(values, float)
    n_accounts, n_days = values.shape
    valid = np.isfinite(values)
    idx = np.arange(n_days)
    last_active = last_active_column(values) if last_active is None else np.asarray(last_active)
    in_reference = (idx[None, :] < np.asarray(reference_end)[:, None]) & (idx[None, :] >= np.asarray(first_seen)[:, None]) & valid
    quiet = in_reference & (values == 0)
    weekdays = np.asarray(weekdays)
    # Days and quiet days per weekday, (A, 7).  Counted per weekday's columns rather than as a
    # product with a weekday indicator: a float matrix product starts OpenBLAS's threads, which
    # then spin beside the scan's own (about 1.5 s of CPU on the 100k-account scan benchmark).
    columns = [weekdays == w for w in range(7)]
    n = np.stack([in_reference[:, c].sum(axis=1) for c in columns], axis=1)
    z = np.stack([quiet[:, c].sum(axis=1) for c in columns], axis=1)
    log_q = np.log((z + 0.5) / (n + 1.0))
    after_last = idx[None, :] > last_active[:, None]
    silent_cols = after_last & valid
    silent_days = silent_cols.sum(axis=1)
    # Only the silent accounts' rows: most accounts were active on the last day.
    silent_rows = np.flatnonzero(silent_days)
    log_p = np.zeros(n_accounts)
    log_p[silent_rows] = (silent_cols[silent_rows] * log_q[silent_rows][:, weekdays]).sum(axis=1)
    return silent_days, np.exp(log_p), last_active
