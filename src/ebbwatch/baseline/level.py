"""Level distribution of the recent-window mean over each account's own history."""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..series import fast_nanmedian_rows
from ._base import Estimator, check_matrix
from .mixture import bic, fit_normal, fit_two_gaussians

LEVEL_MODELS = ("auto", "lognormal", "mixture", "empirical")


class LevelDistribution(Estimator):
    """Log-normal or two-component log-normal mixture of window means, chosen per account by BIC.

    The sample (A, N) holds each account's reference window means (NaN = not in the reference).
    Values are modelled as ``log(level + offset)`` with ``offset = offset_share × median level``, so
    a zero window stays finite.  Windows overlap, so BIC counts ``N / window`` effective points.

    Parameters
    ----------
    model : {"auto", "lognormal", "mixture", "empirical"}
        ``auto`` takes the mixture where BIC prefers it.
    window : int
        Days per window mean (for the effective sample size).
    offset_share : float
        Zero-offset as a share of the account's median level.
    screen_p : float
        ``auto`` fits the mixture only for accounts whose log-normal tail probability is below
        this in either direction (elsewhere it cannot turn a quiet account into an alert).
    var_floor : float
        Smallest variance on the log scale.
    min_weight : float
        Smallest mixture weight.
    """

    _parameters = ("model", "window", "offset_share", "screen_p", "var_floor", "min_weight", "max_iter")

    def __init__(self, model: str = "auto", window: int = 7, offset_share: float = 0.05,
                 screen_p: float = 0.01, var_floor: float = 0.003, min_weight: float = 0.1,
                 max_iter: int = 25):
        self.model = model
        self.window = window
        self.offset_share = offset_share
        self.screen_p = screen_p
        self.var_floor = var_floor
        self.min_weight = min_weight
        self.max_iter = max_iter

    def fit(self, sample, current=None):
        """Fit to ``sample`` (A, N).  ``current`` (A,), the level to be judged, lets ``auto``
        restrict the mixture to accounts where it matters; without it every account is fitted."""
        if self.model not in LEVEL_MODELS:
            raise ValueError(f"unknown level model {self.model!r}; expected one of {', '.join(LEVEL_MODELS)}")
        if self.window < 1 or self.offset_share <= 0 or self.max_iter < 1:
            raise ValueError("window and max_iter must be >= 1 and offset_share > 0")
        sample = check_matrix(sample, "sample")
        n_accounts = sample.shape[0]
        if sample.shape[1]:
            # Overlapping windows: every ceil(window/2)-th one gives the median as well.
            median = np.nan_to_num(fast_nanmedian_rows(sample[:, :: max(1, (self.window + 1) // 2)]))
            positive = sample > 0  # NaN is not
            with np.errstate(invalid="ignore", divide="ignore"):
                positive_mean = np.nan_to_num(np.where(positive, sample, 0.0).sum(axis=1) / positive.sum(axis=1))
        else:
            median = positive_mean = np.zeros(n_accounts)
        scale = np.where(median > 0, median, positive_mean)
        self.offset_ = np.maximum(self.offset_share * scale, 1e-9)
        logs = np.add(sample, self.offset_[:, None])
        np.log(logs, out=logs)
        self.n_ = np.isfinite(sample).sum(axis=1)
        self.sample_ = sample  # kept (not copied) for the empirical tail; NaN = not in it
        self.median_ = np.where(self.n_ > 0, median, np.nan)
        mean, var, loglik1 = fit_normal(logs, self.var_floor)
        self.mu_, self.sigma_ = mean, np.sqrt(var)
        n_eff = self.n_ / self.window
        bic1 = bic(loglik1 / self.window, 2, n_eff)
        self.weights_ = np.column_stack([np.ones(n_accounts), np.zeros(n_accounts)])
        self.means_ = np.column_stack([mean, mean])
        self.variances_ = np.column_stack([var, var])
        self.bic_ = np.column_stack([bic1, np.full(n_accounts, np.inf)])
        fit_mix = np.zeros(n_accounts, bool)
        if self.model == "mixture":
            fit_mix[:] = True
        elif self.model == "auto":
            if current is None:
                fit_mix[:] = True
            else:
                lo, hi = self._lognormal_tails(np.asarray(current, float))
                fit_mix = (np.minimum(lo, hi) < self.screen_p) & (self.n_ >= 4 * self.window)
        if fit_mix.any():
            # Neighbouring windows overlap, so every ceil(window/2)-th one carries nearly all the
            # information; EM runs on those and the log-likelihood is scaled back up.
            stride = max(1, (self.window + 1) // 2)
            thinned = logs[fit_mix][:, ::stride]
            w, m, v, ll2, _ = fit_two_gaussians(thinned, var_floor=self.var_floor, min_weight=self.min_weight,
                                                max_iter=self.max_iter, tol=1e-5)
            self.weights_[fit_mix], self.means_[fit_mix], self.variances_[fit_mix] = w, m, v
            n_thin = np.maximum(np.isfinite(thinned).sum(axis=1), 1)
            ll2 = ll2 * self.n_[fit_mix] / n_thin
            self.bic_[fit_mix, 1] = bic(ll2 / self.window, 5, n_eff[fit_mix])
        if self.model == "mixture":
            use_mix = fit_mix
        elif self.model == "auto":
            use_mix = fit_mix & (self.bic_[:, 1] < self.bic_[:, 0])
        else:
            use_mix = np.zeros(n_accounts, bool)
        self.model_ = np.where(use_mix, "mixture", "empirical" if self.model == "empirical" else "lognormal")
        single = ~use_mix
        self.weights_[single] = [1.0, 0.0]
        self.means_[single] = np.column_stack([mean, mean])[single]
        self.variances_[single] = np.column_stack([var, var])[single]
        return self

    def _lognormal_tails(self, level):
        z = (np.log(level + self.offset_) - self.mu_) / self.sigma_
        return stats.norm.cdf(z), stats.norm.sf(z)

    def parametric_tails(self, level) -> tuple[np.ndarray, np.ndarray]:
        """P(level' <= level) and P(level' >= level) under each account's fitted model."""
        self._check_fitted("means_")
        x = np.log(np.asarray(level, float) + self.offset_)[:, None]
        sd = np.sqrt(self.variances_)
        low = (self.weights_ * stats.norm.cdf((x - self.means_) / sd)).sum(axis=1)
        high = (self.weights_ * stats.norm.sf((x - self.means_) / sd)).sum(axis=1)
        return np.clip(low, 0, 1), np.clip(high, 0, 1)

    def empirical(self, level) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Mid-rank percentile (0–100) and the counts of reference windows at or below / at or
        above ``level``: ``(percentile, n_at_or_below, n_at_or_above)``."""
        self._check_fitted("sample_")
        level = np.asarray(level, float)[:, None]
        with np.errstate(invalid="ignore"):
            below = (self.sample_ < level).sum(axis=1)
            at_or_below = (self.sample_ <= level).sum(axis=1)
        ties = at_or_below - below
        n = np.maximum(self.n_, 1)
        percentile = 100.0 * (below + 0.5 * ties) / n
        return percentile, at_or_below, self.n_ - below

    def tails(self, level, resolution: float | None = None, counts=None) -> tuple[np.ndarray, np.ndarray]:
        """Tail probabilities: empirical in the bulk, parametric beyond the sample's resolution.

        The empirical tail is used where at least ``resolution`` reference windows (default: one
        window's worth, ``window``, since neighbouring windows overlap) are as extreme.
        ``counts``: ``(n_at_or_below, n_at_or_above)`` from :meth:`empirical` for the same
        ``level``, when the caller has them already.
        """
        resolution = self.window if resolution is None else resolution
        n_low, n_high = self.empirical(level)[1:] if counts is None else counts
        p_low, p_high = self.parametric_tails(level)
        if self.model == "lognormal" or self.model == "mixture":
            return p_low, p_high
        n = np.maximum(self.n_, 1)
        low = np.where(n_low >= resolution, n_low / n, p_low)
        high = np.where(n_high >= resolution, n_high / n, p_high)
        return low, high

    def median(self) -> np.ndarray:
        """The median reference level per account (A,); NaN without a reference."""
        self._check_fitted("median_")
        return self.median_
