"""Count model for low-volume accounts: negative binomial on window totals."""

from __future__ import annotations

import numpy as np
from scipy import stats

from ._base import Estimator, check_matrix


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


class WindowCountModel(Estimator):
    """Negative binomial for each account's window totals, dispersion shrunk toward the pool.

    Method-of-moments dispersion ``(var − mean) / mean²`` is unstable on short histories, so it
    is pulled toward a pooled value, as counts are pooled in Love, Huber & Anders (2014), with
    ``prior_windows`` windows of weight.  The pool is ``pooled`` when given (the scan passes the
    fleet's, :func:`pooled_dispersion`), else the median over the accounts fitted together.

    Parameters
    ----------
    window : int
        Days per window (for the effective sample size of overlapping windows).
    prior_windows : float
        Weight of the pooled dispersion, in windows.
    pooled : float or None
        The dispersion to shrink toward; None pools over the accounts fitted together.
    """

    _parameters = ("window", "prior_windows", "pooled")

    def __init__(self, window: int = 7, prior_windows: float = 8.0, pooled: float | None = None):
        self.window = window
        self.prior_windows = prior_windows
        self.pooled = pooled

    def fit(self, totals):
        """``totals`` (A, N): reference window totals (NaN = not in the reference)."""
        if self.window < 1 or self.prior_windows < 0 or (self.pooled is not None and self.pooled < 0):
            raise ValueError("window must be >= 1, prior_windows >= 0 and pooled >= 0")
        totals = check_matrix(totals, "totals")
        valid = np.isfinite(totals)
        n = valid.sum(axis=1)
        safe = np.where(valid, totals, 0.0)
        mean = safe.sum(axis=1) / np.maximum(n, 1)
        var = np.where(valid, (safe - mean[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(n - 1, 1)
        with np.errstate(all="ignore"):
            raw = np.where(mean > 0, (var - mean) / mean**2, 0.0)
        raw = np.clip(raw, 0.0, 50.0)
        fitted = n >= 2
        if self.pooled is not None:
            pool = float(self.pooled)
        else:
            pool = float(np.median(raw[fitted])) if fitted.any() else 0.0
        n_eff = n / self.window
        self.mean_ = mean
        self.dispersion_ = (n_eff * raw + self.prior_windows * pool) / np.maximum(n_eff + self.prior_windows, 1e-9)
        self.pooled_dispersion_ = pool
        return self

    def tails(self, total):
        """Mid-p ``(p_low, p_high)`` of each account's window total (A,)."""
        self._check_fitted("mean_")
        return nbinom_mid_p(np.round(np.asarray(total, float)), self.mean_, self.dispersion_)
