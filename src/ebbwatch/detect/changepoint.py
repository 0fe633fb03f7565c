"""Changepoints: a vectorised CUSUM screen over all accounts, then PELT's exact search (ruptures)
on the accounts the screen picks."""

from __future__ import annotations

import numpy as np

from ..baseline._base import Estimator, check_matrix
from ..series import fast_nanmedian_rows


def robust_sigma(u) -> np.ndarray:
    """Noise scale per account from the MAD of first differences / √2 (robust to level shifts).

    ``u`` (A, D), NaN ignored.  1.4826 · MAD estimates a normal standard deviation.
    """
    diffs = np.diff(np.asarray(u, float), axis=1)
    centre = fast_nanmedian_rows(diffs)[:, None]
    mad = fast_nanmedian_rows(np.abs(diffs - centre))
    return 1.4826 * np.nan_to_num(mad) / np.sqrt(2.0)


def fill_gaps(u) -> np.ndarray:
    """Replace NaN by the previous valid value in each row (leading NaN by the first valid one;
    an all-NaN row by 0).

    ruptures puts a breakpoint every two samples after a NaN (``../shared/METHODS.md``), so no
    NaN may reach it.  Carrying the last value forward adds no change of its own.
    """
    u = np.asarray(u, float)
    ok = np.isfinite(u)
    n = u.shape[1]
    idx = np.where(ok, np.arange(n)[None, :], -1)
    forward = np.maximum.accumulate(idx, axis=1)
    first_valid = np.where(ok.any(axis=1), ok.argmax(axis=1), 0)
    source = np.where(forward >= 0, forward, first_valid[:, None])
    filled = np.take_along_axis(u, source, axis=1)
    return np.where(np.isfinite(filled), filled, 0.0)


def _pelt_l2_search():
    """``search(signal (n, 1) float64 C-contiguous, penalty, min_size) -> breakpoints``.

    ruptures' ``KernelCPD(kernel="linear").fit(x).predict(pen=...)`` builds a cost object, copies
    and checks the signal, then calls its C core ``ekcpd_pelt_L2`` and walks the returned path
    back into breakpoints.  On a few thousand short rows per chunk the wrapper costs about a
    third of the time (0.12 against 0.084 ms a 182-day row, tests/benchmarks/scan.py machine),
    all of it holding the GIL, so the core is called directly when ruptures still has it, and
    the public API otherwise; tests/test_references.py checks both give the same breakpoints.
    """
    try:
        from ruptures.detection._detection.ekcpd import ekcpd_pelt_L2
    except ImportError:  # a ruptures without that module: the public API, same breakpoints
        import ruptures as rpt

        def search(signal, penalty, min_size):
            return rpt.KernelCPD(kernel="linear", min_size=min_size, jump=1).fit(signal).predict(pen=penalty)
        return search

    def search(signal, penalty, min_size):
        path = ekcpd_pelt_L2(signal, penalty, min_size)
        breakpoints, end = [], signal.shape[0]
        while end > 0:
            breakpoints.append(end)
            end = path[end]
        return breakpoints[::-1]
    return search


def cusum_split(u, first: int, last: int, sigma):
    """The best single split of each row of ``u`` (A, L) with a split column in [first, last].

    For each split ``k``, the standardised difference of the means after and before,
    ``(mean[k:] − mean[:k]) / (σ · sqrt(1/k + 1/(L − k)))``.  Returns ``(k, statistic)`` with
    the statistic signed (negative for a drop).  ``u`` must have no NaN.
    """
    u = np.asarray(u, float)
    n = u.shape[1]
    csum = np.cumsum(u, axis=1)
    total = csum[:, -1:]
    ks = np.arange(max(first, 1), min(last, n - 1) + 1)
    before = csum[:, ks - 1] / ks
    after = (total - csum[:, ks - 1]) / (n - ks)
    scale = np.maximum(np.asarray(sigma, float), 1e-9)[:, None] * np.sqrt(1.0 / ks + 1.0 / (n - ks))
    stat = (after - before) / scale
    best = np.abs(stat).argmax(axis=1)
    return ks[best], stat[np.arange(u.shape[0]), best]


class ChangepointSearch(Estimator):
    """PELT's L2 segmentation (Killick et al. 2012) through ruptures' C-coded
    ``KernelCPD(kernel="linear")``, which returns the same breakpoints much faster.

    The penalty is ``penalty_factor · σ̂² · ln n`` with σ̂ the robust noise scale of each account,
    floored at ``sigma_floor`` (``../shared/METHODS.md``: about 3 · σ̂² ln n, the per-change part of
    MBIC, Zhang & Siegmund 2007, finds the single Nile change where BIC's σ̂² ln n finds nine).

    Parameters
    ----------
    penalty_factor : float
    min_size : int
        Shortest segment in samples (ruptures binds the last segment too).
    sigma_floor : float
    """

    _parameters = ("penalty_factor", "min_size", "sigma_floor")

    def __init__(self, penalty_factor: float = 3.0, min_size: int = 2, sigma_floor: float = 0.05):
        self.penalty_factor = penalty_factor
        self.min_size = min_size
        self.sigma_floor = sigma_floor

    def fit(self, signal):
        """Segment each row of ``signal`` (A, L); NaN is interpolated first.

        Sets ``breakpoints_`` (a list per account of segment ends, ruptures' convention: the last
        is L) and ``sigma_`` (A,).
        """
        if self.penalty_factor <= 0 or self.min_size < 1:
            raise ValueError("penalty_factor must be > 0 and min_size >= 1")
        signal = check_matrix(signal, "signal")
        filled = fill_gaps(signal)
        sigma = np.maximum(robust_sigma(filled), self.sigma_floor)
        n = filled.shape[1]
        if n < 2 * self.min_size:
            breakpoints = [[n] for _ in range(filled.shape[0])]
        else:
            search, log_n = _pelt_l2_search(), np.log(n)
            breakpoints = [search(np.ascontiguousarray(row.reshape(-1, 1)), float(self.penalty_factor * s * s * log_n),
                                  self.min_size) for row, s in zip(filled, sigma)]
        self.breakpoints_ = breakpoints
        self.sigma_ = sigma
        return self

    def last_change(self, signal=None):
        """Start column of the last segment per account (-1 when there is no change)."""
        self._check_fitted("breakpoints_")
        return np.array([b[-2] if len(b) >= 2 else -1 for b in self.breakpoints_])
