"""From standardised statistics to p-values: each account's own history as the reference
distribution, and the combination of several windows' tests into one.

Shapes: ``A`` accounts; a history is (A, n) with NaN where a point is missing.
"""

from __future__ import annotations

import threading
from functools import lru_cache

import numpy as np
from scipy import stats


def tail_p(z, at_least_as_extreme, n, anchor, df, anchor_points, *, independent: bool = False) -> np.ndarray:
    """The lower-tail p-value of :func:`history_tail_p` from its parts, each (A,): ``z`` the
    statistic, ``at_least_as_extreme`` how many of the ``n`` history points are <= it, and
    ``anchor`` the ``anchor_points``-th smallest history point (NaN where there is none)."""
    z = np.asarray(z, float)
    t_tail = stats.t.cdf(z, df)
    usable = (n >= 2 * anchor_points) & np.isfinite(anchor)
    p_anchor = anchor_points / (n + 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = p_anchor / stats.t.cdf(np.where(usable, anchor, 0.0), df)
    if not independent:
        ratio = np.maximum(ratio, 1.0)
    beyond = np.minimum(t_tail * ratio, p_anchor)
    p = np.where(usable, np.where(at_least_as_extreme < anchor_points, beyond, (at_least_as_extreme + 1.0) / (n + 1.0)),
                 t_tail)
    return np.where(np.isfinite(z), np.clip(p, 0.0, 1.0), 1.0)


def history_tail_p(z, z_history, df, anchor_points, *, lower: bool = True, independent: bool = False) -> np.ndarray:
    """One-sided p-value of each account's statistic ``z`` (A,) against its own history.

    Where at least ``anchor_points`` history points are as extreme as ``z``, the p-value is
    the conformal rank ``(r + 1) / (n + 1)`` (Vovk et al. 2005): valid whenever the present is
    exchangeable with the past, whatever the statistic's distribution — zero days, seasons,
    batch spikes.  Beyond that, a rank says only "beyond everything seen", so the Student-t
    tail with ``df`` degrees of freedom carries on from the empirical frequency at the
    ``anchor_points``-th most extreme point, never lighter than the t itself: a level far outside
    a long history gets a p-value that says how far.  (That continuation is a model: for a
    history whose tail is much heavier than the t's, such as single days of a very bursty
    account, it is too light beyond the anchor.)  The anchor may make the tail lighter than
    the t only when the history's points are ``independent`` (single days); overlapping
    windows put few independent points behind it.  Accounts with fewer than twice
    ``anchor_points`` history points get the t tail alone.  ``df`` scalar or (A,).
    """
    z = np.asarray(z, float)
    history = np.asarray(z_history, float)
    if not lower:
        z, history = -z, -history
    if history.shape[1] == 0:
        return tail_p(z, np.zeros(len(z)), np.zeros(len(z)), np.full(len(z), np.nan), df, anchor_points)
    valid = np.isfinite(history)
    filled = np.where(valid, history, np.inf)
    with np.errstate(invalid="ignore"):
        r = (filled <= z[:, None]).sum(axis=1)
    kth = min(anchor_points - 1, filled.shape[1] - 1)
    anchor = np.partition(filled, kth, axis=1)[:, kth]
    return tail_p(z, r, valid.sum(axis=1), np.where(np.isfinite(anchor), anchor, np.nan), df, anchor_points,
                  independent=independent)


MULTIPLICITY_SAMPLES = 400_000
# Chunks are scored in threads, and the first two would both simulate the factor (0.2 s each)
# before either had cached it.
_MULTIPLICITY_LOCK = threading.Lock()


def nested_window_multiplicity(windows: tuple, reference_days: int, samples: int = MULTIPLICITY_SAMPLES):
    """How much more often the smallest of the windows' one-sided tests falls below a level than
    one test does, when days are independent: ``(z grid, factor)``, factor = P(min z < g) / Φ(g).

    The windows are nested (each the last k days) and share the reference before them, so their
    statistics are strongly correlated and the factor is well under the number of windows
    (Bonferroni's).  Computed by simulation with a fixed seed, once per process.  Positive
    correlation between days makes nested windows more alike, so the factor is an upper bound
    for the autocorrelated series activity is.
    """
    with _MULTIPLICITY_LOCK:
        return _simulated_multiplicity(windows, reference_days, samples)


@lru_cache(maxsize=16)
def _simulated_multiplicity(windows: tuple, reference_days: int, samples: int):
    rng = np.random.default_rng(20_201)
    longest = max(windows)
    grid = np.linspace(-5.0, 0.0, 201)
    below = np.zeros(grid.size)
    batch = 50_000
    for _ in range(max(1, samples // batch)):
        days = rng.standard_normal((batch, longest))
        sums = np.cumsum(days, axis=1)  # column k-1: the sum of the k most recent days
        reference = rng.standard_normal(batch) / np.sqrt(reference_days)
        zmin = np.full(batch, np.inf)
        for k in windows:
            z = (sums[:, k - 1] / k - reference) / np.sqrt(1.0 / k + 1.0 / reference_days)
            np.minimum(zmin, z, out=zmin)
        below += np.searchsorted(np.sort(zmin), grid)
    total = max(1, samples // batch) * batch
    factor = below / total / stats.norm.cdf(grid)
    resolved = below >= 50  # enough simulated minima below the grid point to trust the ratio
    return grid[resolved], np.maximum(factor[resolved], 1.0)


def nested_min_p(p_values, windows: tuple, reference_days: int) -> np.ndarray:
    """Combine the windows' one-sided p-values (W, A) through their minimum, calibrated by
    :func:`nested_window_multiplicity`; beyond the simulated range the factor is held at its
    last resolved value, and it never exceeds the number of windows."""
    p_values = np.asarray(p_values, float)
    smallest = p_values.min(axis=0)
    grid, factor = nested_window_multiplicity(tuple(windows), int(reference_days))
    z = stats.norm.ppf(np.clip(smallest, 1e-300, 1.0))
    at = np.interp(z, grid, factor, left=factor[0], right=factor[-1])
    return np.clip(smallest * np.minimum(at, len(windows)), 0.0, 1.0)


def cauchy_combination(p_values, weights=None) -> np.ndarray:
    """Liu & Xie (2020, JASA): Σ w·tan((½ − p)π) is close to standard Cauchy under any
    dependence between the tests; returns the combined p (A,) from p-values (T, A)."""
    p = np.clip(np.asarray(p_values, float), 1e-300, 1.0 - 1e-15)
    w = np.full(p.shape[0], 1.0 / p.shape[0]) if weights is None else np.asarray(weights, float) / np.sum(weights)
    statistic = (w[:, None] * np.tan((0.5 - p) * np.pi)).sum(axis=0)
    return np.clip(0.5 - np.arctan(statistic) / np.pi, 0.0, 1.0)
