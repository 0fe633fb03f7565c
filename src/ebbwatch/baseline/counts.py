"""Count model for low-volume windows: negative-binomial tails and the fleet's pooled dispersion."""

from __future__ import annotations

import numpy as np
from scipy import stats



def nbinom_mid_p(total, mean, dispersion):
    """Mid-p tail probabilities of ``total`` under NB(mean, dispersion), both directions.

    Parameterised as variance = mean + dispersion · mean² (dispersion 0 is Poisson).  Mid-p
    (half the probability of the observed value) is less conservative than P(X <= x) for
    discrete data (Lancaster 1961).  Returns ``(p_low, p_high)``.
    """
    total = np.asarray(total, float)
    mean = np.maximum(np.asarray(mean, float), 1e-9)
    dispersion = np.asarray(dispersion, float)
    poisson = dispersion < 1e-6
    size = np.where(poisson, 1.0, 1.0 / np.maximum(dispersion, 1e-6))
    prob = size / (size + mean)
    cdf_nb = stats.nbinom.cdf(total, size, prob)
    pmf_nb = stats.nbinom.pmf(total, size, prob)
    cdf_po = stats.poisson.cdf(total, mean)
    pmf_po = stats.poisson.pmf(total, mean)
    cdf = np.where(poisson, cdf_po, cdf_nb)
    pmf = np.where(poisson, pmf_po, pmf_nb)
    p_low = cdf - 0.5 * pmf
    p_high = 1.0 - cdf + 0.5 * pmf
    return np.clip(p_low, 0, 1), np.clip(p_high, 0, 1)


def pooled_dispersion(counts, *, window: int = 7, low_volume_events: float = 60.0, weeks: int = 26) -> float:
    """The fleet's typical negative-binomial dispersion of low-volume window totals.

    ``counts`` (S, D): raw daily event totals of a sample of accounts (NaN where none), the last
    column the as-of day.  Over the ``weeks`` before the recent window, each account's
    consecutive ``window``-day totals give a method-of-moments dispersion; the median over the
    sampled low-volume accounts (usual week under ``low_volume_events``) is the pool each
    account's own estimate is shrunk toward.  It comes from the fleet, not from the block of
    accounts being scored, so a scan's result does not depend on how it is chunked.  0 (Poisson)
    when the sample holds no low-volume account.
    """
    counts = np.asarray(counts, float)
    history = counts[:, max(0, counts.shape[1] - window - 7 * weeks):counts.shape[1] - window]
    n_windows = history.shape[1] // window
    if counts.shape[0] == 0 or n_windows < 2:
        return 0.0
    blocks = history[:, history.shape[1] - n_windows * window:].reshape(counts.shape[0], n_windows, window)
    totals = np.where(np.isnan(blocks).any(axis=2), np.nan, np.nansum(blocks, axis=2))
    valid = np.isfinite(totals)
    n = valid.sum(axis=1)
    safe = np.where(valid, totals, 0.0)
    mean = safe.sum(axis=1) / np.maximum(n, 1)
    var = np.where(valid, (safe - mean[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(n - 1, 1)
    low = (n >= 2) & (mean > 0) & (mean * 7.0 / window < low_volume_events)
    if not low.any():
        return 0.0
    raw = np.clip((var[low] - mean[low]) / mean[low] ** 2, 0.0, 50.0)
    return float(np.median(raw))
