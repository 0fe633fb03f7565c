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


class WindowCountModel(Estimator):
    """Negative binomial for each account's window totals, dispersion shrunk toward the pool.

    Method-of-moments dispersion ``(var − mean) / mean²`` is unstable on short histories, so it
    is pulled toward the median over the accounts fitted together, as counts are pooled in
    Love, Huber & Anders (2014), with ``prior_windows`` windows of weight.

    Parameters
    ----------
    window : int
        Days per window (for the effective sample size of overlapping windows).
    prior_windows : float
        Weight of the pooled dispersion, in windows.
    """

    _parameters = ("window", "prior_windows")

    def __init__(self, window: int = 7, prior_windows: float = 8.0):
        self.window = window
        self.prior_windows = prior_windows

    def fit(self, totals):
        """``totals`` (A, N): reference window totals (NaN = not in the reference)."""
        if self.window < 1 or self.prior_windows < 0:
            raise ValueError("window must be >= 1 and prior_windows >= 0")
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
