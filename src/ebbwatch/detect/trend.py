"""Trend over recent weeks: Theil–Sen slope (Sen 1968) and the Mann–Kendall test (Mann 1945;
Kendall 1975), vectorised over accounts.  Applied to weekly means, not days, because daily
autocorrelation inflates the test's significance (Hamed & Rao 1998)."""

from __future__ import annotations

import numpy as np
from scipy import stats


def _pairs(n: int):
    i, j = np.triu_indices(n, k=1)
    return i, j


def mann_kendall(y):
    """Mann–Kendall S, Var(S) (with the tie correction) and z per row of ``y`` (A, n).

    Rows must be complete (no NaN).  z uses the continuity correction ``(S ∓ 1) / sqrt(Var S)``.
    """
    y = np.asarray(y, float)
    n = y.shape[1]
    i, j = _pairs(n)
    s = np.sign(y[:, j] - y[:, i]).sum(axis=1)
    var = np.full(y.shape[0], n * (n - 1) * (2 * n + 5) / 18.0)
    # Tie correction: subtract sum over tie groups t·(t−1)·(2t+5)/18.
    ordered = np.sort(y, axis=1)
    run_start = np.concatenate([np.ones((y.shape[0], 1), bool), ordered[:, 1:] != ordered[:, :-1]], axis=1)
    tied = np.flatnonzero(~run_start.all(axis=1))
    if tied.size:
        # Each run's length t, read at its first place: the next run's start minus its own.  (A
        # Python loop over the tied rows held the GIL: a quarter of a chunk's rows have ties.)
        starts = run_start[tied]
        place = np.arange(n)
        following = np.minimum.accumulate(np.where(starts, place, n)[:, ::-1], axis=1)[:, ::-1]
        next_start = np.concatenate([following[:, 1:], np.full((tied.size, 1), n)], axis=1)
        t = np.where(starts, next_start - place, 0)
        var[tied] -= (t * (t - 1) * (2 * t + 5)).sum(axis=1) / 18.0
    sd = np.sqrt(np.maximum(var, 1e-12))
    z = np.where(s > 0, (s - 1) / sd, np.where(s < 0, (s + 1) / sd, 0.0))
    return s, var, z


def theil_sen(y):
    """Theil–Sen slope and intercept per row of ``y`` (A, n) against x = 0 … n−1."""
    y = np.asarray(y, float)
    n = y.shape[1]
    i, j = _pairs(n)
    slopes = (y[:, j] - y[:, i]) / (j - i)
    slope = np.median(slopes, axis=1)
    intercept = np.median(y - slope[:, None] * np.arange(n)[None, :], axis=1)
    return slope, intercept


def trend_test(weekly):
    """One-sided Mann–Kendall p-values and the Theil–Sen relative change over the span.

    ``weekly`` (A, n) weekly means, complete rows.  Returns ``(p_down, p_up, relative_change)``
    where relative_change = (fitted last − fitted first) / fitted first (NaN if first <= 0).
    """
    _, _, z = mann_kendall(weekly)
    slope, intercept = theil_sen(weekly)
    n = weekly.shape[1]
    first = intercept
    last = intercept + slope * (n - 1)
    with np.errstate(all="ignore"):
        relative = np.where(first > 0, (last - first) / first, np.nan)
    return stats.norm.cdf(z), stats.norm.sf(z), relative


def _single_regressor_sse(y, x, starts=None):
    """Residual sum of squares of y ~ a + b·x for each row of y (A, L) and each row of x (K, L).
    ``starts`` (A,): the first column of each row that counts (None: all); only rows that start
    later take the weighted route, so a whole row's sums are the plain ones."""
    late = np.flatnonzero(np.asarray(starts) > 0) if starts is not None else np.zeros(0, np.int64)
    if late.size:
        whole = np.setdiff1d(np.arange(len(y)), late)
        out = np.empty((len(y), len(x)))
        out[whole] = _single_regressor_sse(y[whole], x)
        out[late] = _weighted_sse(y[late], x, np.arange(y.shape[1])[None, :] >= np.asarray(starts)[late, None])
        return out
    yc = y - y.mean(axis=1, keepdims=True)
    xc = x - x.mean(axis=1, keepdims=True)
    sxx = (xc**2).sum(axis=1)  # (K,)
    # einsum's own loop, not a BLAS product: OpenBLAS's threads would spin beside the scan's.
    sxy = np.einsum("al,kl->ak", yc, xc)  # (A, K)
    syy = (yc**2).sum(axis=1, keepdims=True)
    with np.errstate(all="ignore"):
        return syy - np.where(sxx > 0, sxy**2 / np.where(sxx > 0, sxx, 1.0), 0.0)


def _weighted_sse(y, x, counts):
    """:func:`_single_regressor_sse` over the columns where ``counts`` (A, L) bool is true."""
    w = counts.astype(float)
    yw = y * w
    n = w.sum(axis=1, keepdims=True)
    sy, syy = yw.sum(axis=1, keepdims=True), (yw * y).sum(axis=1, keepdims=True)
    sx, sxx = np.einsum("al,kl->ak", w, x), np.einsum("al,kl->ak", w, x * x)
    sxy = np.einsum("al,kl->ak", yw, x)
    with np.errstate(all="ignore"):
        var_x = sxx - sx**2 / n
        cov = sxy - sx * sy / n
        return (syy - sy**2 / n) - np.where(var_x > 1e-12, cov**2 / np.where(var_x > 1e-12, var_x, 1.0), 0.0)


def step_or_ramp(y, earliest, *, min_ramp: int = 21, grid: int = 7, starts=None):
    """Is the recent change in each row of ``y`` (A, L; no NaN) a step or a ramp?

    Fits two one-change families by least squares: a step at ``k`` and a ramp that runs from
    ``k1`` to ``k2`` (at least ``min_ramp`` days) and is flat on either side, with ``k``, ``k1``,
    ``k2`` on a ``grid``-day lattice from ``earliest`` (a column, or one per row: a young
    account's change cannot start before its history does).  ``starts`` (A,): the column each
    row's history starts at; the columns before it (filled, not data) do not count in the fits.
    Returns ``(sse_step, sse_ramp, ramp_start)``, each (A,); a row with no room for a ramp gets
    ``inf`` and ``-1``.
    """
    y = np.asarray(y, float)
    n = y.shape[1]
    t = np.arange(n)
    earliest = np.broadcast_to(np.asarray(earliest, np.int64), (y.shape[0],))
    lowest = int(earliest.min()) if earliest.size else 0
    steps = np.arange(max(lowest, 1), n - 1, max(1, grid // 2))
    step_x = (t[None, :] >= steps[:, None]).astype(float)
    sse_step = np.where(steps[None, :] >= earliest[:, None], _single_regressor_sse(y, step_x, starts), np.inf).min(axis=1)
    ramp_starts, ramp_ends = [], []
    for k1 in range(max(lowest, 0), n - min_ramp + 1, grid):
        for k2 in range(k1 + min_ramp, n + grid, grid):
            ramp_starts.append(k1)
            ramp_ends.append(min(k2, n))
    if not ramp_starts:
        return sse_step, np.full(y.shape[0], np.inf), np.full(y.shape[0], -1)
    k1 = np.array(ramp_starts)[:, None]
    k2 = np.array(ramp_ends)[:, None]
    ramp_x = np.clip(t[None, :] - k1, 0, k2 - k1).astype(float)
    sse = np.where(k1[:, 0][None, :] >= earliest[:, None], _single_regressor_sse(y, ramp_x, starts), np.inf)
    best = sse.argmin(axis=1)
    found = np.isfinite(sse[np.arange(y.shape[0]), best])
    return sse_step, sse[np.arange(y.shape[0]), best], np.where(found, np.array(ramp_starts)[best], -1)
