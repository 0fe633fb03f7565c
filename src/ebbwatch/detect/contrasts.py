"""Window tests: is the last k days' activity unusual against the half-year before it, as judged
by the same comparison at every earlier day of the account's own history?

For each window length k (days) and each day τ, the contrast is
``s_k(τ) = log((O + c) / (E + c))``: ``O`` the activity of the k days ending on τ, ``E`` what the
reference — the ``reference_days`` before the window, weekday-adjusted — expects of those days,
``c`` half an event.  The contrasts of the account's earlier days (ending at least
``history_gap_days`` before the judged day, so a recent change does not leak into its own
reference) show how this account's contrast varies when nothing in particular happens: weekly
noise, holidays, seasons, growth.  The judged day's contrast is standardised by their centre and
spread — the spread shrunk toward fleet-wide priors where the history is short — and turned into
one-sided p-values by ``calibrate.history_tail_p``.

Shapes: ``A`` accounts, ``D`` days (the last column is the judged day), ``W`` windows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..baseline._base import Estimator, check_matrix
from ..baseline.counts import nbinom_mid_p
from ..series import fast_nanmedian_rows
from .calibrate import history_percentile, history_tail_p

BASE_WINDOW = 7  # the window every other window's spread is pooled against (a whole week)


@dataclass(frozen=True)
class WindowPriors:
    """Fleet-wide priors of the window tests, one value per window (``windows`` order).

    ``excess``: the typical variance of a contrast beyond count noise (log scale²);
    ``ratio``: the typical ratio of a window's contrast variance to the 7-day window's.
    Measured on a sample of the fleet (:func:`window_priors`), so every block of accounts is
    judged with the same priors and the chunk size never changes a result.
    """

    windows: tuple
    excess: tuple
    ratio: tuple

    def of(self, window: int) -> tuple[float, float]:
        i = self.windows.index(window)
        return self.excess[i], self.ratio[i]


def _cumulative(matrix) -> np.ndarray:
    """Row-wise cumulative sums with a leading zero column, (A, D + 1)."""
    out = np.zeros((matrix.shape[0], matrix.shape[1] + 1))
    np.cumsum(matrix, axis=1, out=out[:, 1:])
    return out


class _Sums:
    """Cumulative sums behind every window and the reference series, computed once a block."""

    def __init__(self, values, factors, first_seen, reference_days: int):
        valid = np.isfinite(values)
        self.X = _cumulative(np.where(valid, values, 0.0))
        self.F = _cumulative(np.where(valid, factors, 0.0))
        self.N = _cumulative(valid.astype(np.float64))
        self.FA = _cumulative(np.asarray(factors, float))  # every day's factor, valid or not
        n_accounts, n_days = values.shape
        ends = np.arange(n_days + 1)
        # The reference ending before column j starts at max(j - R, first activity).
        starts = np.maximum(ends[None, :] - reference_days, np.asarray(first_seen)[:, None])
        starts = np.minimum(starts, ends[None, :])
        take = lambda m: np.take_along_axis(m, starts, axis=1)  # noqa: E731
        with np.errstate(invalid="ignore", divide="ignore"):
            self.reference_level = (self.X - take(self.X)) / (self.F - take(self.F))
        self.reference_days = self.N - take(self.N)
        self.reference_span = ends[None, :] - starts  # calendar days, masked ones included
        self.first_seen = np.asarray(first_seen)

    def window(self, k: int, half_event, min_reference_days: int):
        """The contrast of the k-day window ending on every column, with what it is made of."""
        n_days = self.X.shape[1] - 1
        end = np.arange(1, n_days + 1)
        start = np.maximum(end - k, 0)
        observed = self.X[:, end] - self.X[:, start]
        weight = self.F[:, end] - self.F[:, start]
        expected = self.reference_level[:, start] * weight
        with np.errstate(invalid="ignore", divide="ignore"):
            contrast = np.log((observed + half_event[:, None]) / (expected + half_event[:, None]))
        usable = ((self.N[:, end] - self.N[:, start]) >= (k + 1) // 2) \
            & (self.reference_days[:, start] >= min_reference_days) \
            & (start[None, :] >= self.first_seen[:, None]) & np.isfinite(contrast)
        contrast[~usable] = np.nan
        lag = 0.5 * (k + self.reference_span[:, start])  # days between the two periods' centres
        whole = self.FA[:, -1] - self.FA[:, -1 - k]
        return {
            "contrast": contrast, "lag": lag, "observed": observed[:, -1], "expected": expected[:, -1],
            "reference_days": self.reference_days[:, start[-1]], "reference_level": self.reference_level[:, start[-1]],
            "weight": weight[:, -1],
            "complete": np.clip(weight[:, -1] / np.maximum(whole, 1e-9), 0.05, 1.0),
        }


def _centre_and_spread(history):
    """Median and 1.4826 · MAD of each row (0 where the row is empty)."""
    if history.shape[1] == 0:
        zeros = np.zeros(history.shape[0])
        return zeros, zeros.copy()
    centre = np.nan_to_num(fast_nanmedian_rows(history))
    spread = 1.4826 * np.nan_to_num(fast_nanmedian_rows(np.abs(history - centre[:, None])))
    return centre, spread


def _block_statistics(values, factors, first_seen, half_event, p):
    """Each window's current contrast and its growth-corrected history, for :class:`WindowTests`
    and :func:`window_priors`."""
    sums = _Sums(values, factors, first_seen, p["reference_days"])
    n_days = values.shape[1]
    cut = max(n_days - p["history_gap_days"], 0)
    raw = {k: sums.window(k, half_event, p["min_reference_days"]) for k in p["windows"]}
    # Steady growth or decline: the contrast grows with the distance between the two periods, so
    # it is read as a rate per day from the weekly window's history and taken out of every window.
    base = raw[BASE_WINDOW]
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = fast_nanmedian_rows(base["contrast"][:, :cut] / base["lag"][:, :cut]) if cut else np.zeros(len(values))
    points = np.isfinite(base["contrast"][:, :cut]).sum(axis=1) / BASE_WINDOW
    growth = np.nan_to_num(rate) * points / (points + p["prior_windows"])
    out = {}
    for k, w in raw.items():
        residual = w["contrast"] - growth[:, None] * w["lag"]
        history = residual[:, :cut]
        centre, spread = _centre_and_spread(history)
        events = np.nan_to_num(w["expected"] / (2.0 * half_event))  # half_event is half of one event
        count_var = (1.0 / (events + 0.5)) * (1.0 + k / np.maximum(w["reference_days"], 1.0))
        out[k] = {**w, "current": residual[:, -1], "history": history, "centre": centre, "spread": spread,
                  "points": np.isfinite(history).sum(axis=1) / k, "count_var": count_var, "events": events}
    return out, growth


def window_priors(values, factors, first_seen, half_event, *, windows, reference_days=182, min_reference_days=28,
                  history_gap_days=60, prior_windows=5.0, min_accounts: int = 20) -> WindowPriors:
    """The fleet-wide :class:`WindowPriors`, from accounts with long histories in a sample.

    ``values``/``factors`` (S, D) as :class:`WindowTests` takes them.  With fewer than
    ``min_accounts`` long histories, neutral priors: excess 0.05, ratio 1.
    """
    p = dict(windows=tuple(windows), reference_days=reference_days, min_reference_days=min_reference_days,
             history_gap_days=history_gap_days, prior_windows=prior_windows)
    stats_by_window, _ = _block_statistics(np.asarray(values, float), np.asarray(factors, float),
                                           np.asarray(first_seen), np.asarray(half_event, float), p)
    base = stats_by_window[BASE_WINDOW]
    long = (base["points"] >= 20) & (base["spread"] > 0)
    excess, ratio = [], []
    for k in p["windows"]:
        s = stats_by_window[k]
        good = long & (s["points"] >= 8)
        if good.sum() >= min_accounts:
            excess.append(float(np.median(np.maximum(s["spread"][good] ** 2 - s["count_var"][good], 0.0))))
            ratio.append(float(np.median((s["spread"][good] / base["spread"][good]) ** 2)))
        else:
            excess.append(0.05)
            ratio.append(1.0)
    return WindowPriors(p["windows"], tuple(excess), tuple(ratio))


class WindowTests(Estimator):
    """One-sided tests of the last k days against the half-year before, for several k at once.

    Parameters
    ----------
    windows : tuple of int
        Window lengths in days; must include 7.
    reference_days : int
        Days of reference before each window.
    min_reference_days : int
        Fewest valid reference days for a contrast to count.
    history_gap_days : int
        The history used to calibrate ends this many days before the judged day.
    prior_windows : float
        Weight of the fleet priors, in independent windows of history.
    ratio_prior_windows : float
        Weight of "this window's spread is the weekly spread times the fleet's ratio".
    anchor_points : int
        Fewest history points as extreme for the empirical rank to stand alone (at least k).
    count_floor_events : float
        Windows expecting fewer events than this never get a lower tail below the negative
        binomial's mid-p (small counts are discrete and their zeros heavy).
    """

    _parameters = ("windows", "reference_days", "min_reference_days", "history_gap_days", "prior_windows",
                   "ratio_prior_windows", "anchor_points", "count_floor_events")

    def __init__(self, windows=(1, 2, 3, 5, 7, 14, 28), reference_days: int = 182, min_reference_days: int = 28,
                 history_gap_days: int = 60, prior_windows: float = 5.0, ratio_prior_windows: float = 10.0,
                 anchor_points: int = 5, count_floor_events: float = 30.0):
        self.windows = windows
        self.reference_days = reference_days
        self.min_reference_days = min_reference_days
        self.history_gap_days = history_gap_days
        self.prior_windows = prior_windows
        self.ratio_prior_windows = ratio_prior_windows
        self.anchor_points = anchor_points
        self.count_floor_events = count_floor_events

    def _check(self):
        try:
            windows = tuple(int(k) for k in self.windows)
        except TypeError:
            raise ValueError(f"windows must be a sequence of day counts, got {self.windows!r}") from None
        if BASE_WINDOW not in windows or min(windows) < 1 or len(set(windows)) != len(windows):
            raise ValueError(f"windows must be distinct positive day counts including {BASE_WINDOW}, got {self.windows}")
        if self.reference_days < self.min_reference_days or self.min_reference_days < 1 or self.history_gap_days < 0:
            raise ValueError("need reference_days >= min_reference_days >= 1 and history_gap_days >= 0")
        return windows

    def fit(self, values, factors, first_seen, half_event, priors: WindowPriors | None = None,
            count_dispersion: float = 0.0):
        """Test each account's last column.

        ``values`` (A, D): the activity index with the fleet factor divided out, NaN where missing;
        ``factors`` (A, D): each day's weekday factor; ``first_seen`` (A,): first active column;
        ``half_event`` (A,): half an event in index units; ``priors``: fleet-wide priors (None:
        pooled over this block); ``count_dispersion``: the fleet's pooled negative-binomial
        dispersion of small accounts (the count floor's least dispersion).

        Sets ``p_low_``/``p_high_``/``z_``/``change_pct_`` (A, W), ``growth_`` (A, per day),
        ``history_points_`` (A, 7-day history points), ``percentile_`` (A, of the 7-day
        contrast among its history), ``level_`` and ``baseline_`` (A, the last 7 days' and the
        reference's level per day, weekday-adjusted) and ``priors_``.
        """
        windows = self._check()
        values = check_matrix(values, "values")
        factors = check_matrix(factors, "factors")
        half_event = np.asarray(half_event, float)
        p = dict(windows=windows, reference_days=self.reference_days, min_reference_days=self.min_reference_days,
                 history_gap_days=self.history_gap_days, prior_windows=self.prior_windows)
        by_window, growth = _block_statistics(values, factors, np.asarray(first_seen), half_event, p)
        if priors is None:
            priors = window_priors(values, factors, first_seen, half_event, windows=windows,
                                   reference_days=self.reference_days, min_reference_days=self.min_reference_days,
                                   history_gap_days=self.history_gap_days, prior_windows=self.prior_windows)
        base = by_window[BASE_WINDOW]
        n0 = self.prior_windows
        base_excess, _ = priors.of(BASE_WINDOW)
        weekly_var = (base["points"] * base["spread"] ** 2 + n0 * (base_excess + base["count_var"])) / (base["points"] + n0)
        shape = (values.shape[0], len(windows))
        self.p_low_, self.p_high_ = np.ones(shape), np.ones(shape)
        self.z_, self.change_pct_ = np.full(shape, np.nan), np.full(shape, np.nan)
        for i, k in enumerate(windows):
            s = by_window[k]
            excess, ratio = priors.of(k)
            weight = s["points"] / (s["points"] + n0)
            if k == BASE_WINDOW:
                var = weight * s["spread"] ** 2 + (1 - weight) * (excess + s["count_var"])
                points = s["points"]
            else:
                # A long window has few independent points of history: its spread leans on the
                # weekly spread times the fleet's ratio between the two.
                prior = np.maximum(ratio * weekly_var, excess + s["count_var"])
                w2 = s["points"] / (s["points"] + self.ratio_prior_windows)
                var = w2 * s["spread"] ** 2 + (1 - w2) * prior
                points = s["points"] + self.ratio_prior_windows
            var = var / s["complete"]  # a window with masked days is noisier than full ones
            sd = np.sqrt(np.maximum(var, 1e-6))
            centre = weight * s["centre"]
            z = (s["current"] - centre) / sd
            z_history = (s["history"] - centre[:, None]) / sd[:, None]
            df = np.clip(points + n0, 3.0, 50.0)
            anchor = max(self.anchor_points, k)
            p_low = history_tail_p(z, z_history, df, anchor, lower=True, independent=k == 1)
            small = np.flatnonzero(s["events"] < self.count_floor_events)
            if small.size:
                dispersion = np.maximum(var[small] - s["count_var"][small], count_dispersion)
                floor, _ = nbinom_mid_p(np.round(s["observed"][small] / (2 * half_event[small])), s["events"][small],
                                        dispersion)
                p_low[small] = np.maximum(p_low[small], floor)
            self.p_low_[:, i] = p_low
            self.p_high_[:, i] = history_tail_p(z, z_history, df, anchor, lower=False, independent=k == 1)
            self.z_[:, i] = z
            with np.errstate(invalid="ignore", divide="ignore"):
                self.change_pct_[:, i] = 100.0 * (s["observed"] / s["expected"] - 1.0)
            if k == BASE_WINDOW:
                self.percentile_ = history_percentile(z, z_history)
                self.baseline_ = s["reference_level"]
                with np.errstate(invalid="ignore", divide="ignore"):
                    self.level_ = np.where(s["weight"] > 0, s["observed"] / s["weight"], np.nan)
                self.history_points_ = np.isfinite(s["history"]).sum(axis=1)
        self.windows_ = windows
        self.growth_ = growth
        self.priors_ = priors
        return self
