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
from .calibrate import tail_p
from .weekday_misfit import same_weekday_too
from .window_history import BASE_WINDOW, window_statistics


@dataclass(frozen=True)
class WindowPriors:
    """Fleet-wide priors of the window tests, one value per window (``windows`` order).

    ``excess``: the typical variance of a contrast beyond count noise (log scale²);
    ``ratio``: the typical ratio of a window's contrast variance to the 7-day window's.
    Measured on a sample of the fleet (:func:`window_priors`), so every block of accounts is
    judged with the same priors and the chunk size never changes a result.  ``second_look``:
    the same measured as the falling tail's second look judges (heavy days capped, the longest
    windows against their median week; ``detect.ScanParams``); None where it was not measured.
    """

    windows: tuple
    excess: tuple
    ratio: tuple
    second_look: "WindowPriors | None" = None

    def of(self, window: int) -> tuple[float, float]:
        i = self.windows.index(window)
        return self.excess[i], self.ratio[i]


# Priors for a fleet with too few long histories to measure them: a week's contrast varies by
# NEUTRAL_WEEK_EXCESS beyond its count noise, and a k-day window's excess and spread ratio go as
# (7 / k) ** NEUTRAL_DECAY: k days averaged, as independent days would (exponent 1), a little
# slower since levels wander.  The development family's measured priors fall with exponents 0.8-1.1
# and its weekly excess is 0.019, so these are on the wide side of it.
NEUTRAL_WEEK_EXCESS = 0.05
NEUTRAL_DECAY = 0.85
# Where MIN_OWN_WEEKS_ACCOUNTS or more young accounts (a window history shorter than the prior's
# weight) have their own weeks to show, the week's excess is their mean excess when that is
# smaller, never below NEUTRAL_LEAST_WEEK_EXCESS: a fleet of young steady accounts is not judged
# by a guess made for a wider one.  The mean, not the median: each account's estimate is a
# variance from a few weeks, skewed, and the median of such estimates falls below their mean.
NEUTRAL_LEAST_WEEK_EXCESS = 0.01
MIN_OWN_WEEKS_ACCOUNTS = 5


def neutral_priors(windows, week_excess: float = NEUTRAL_WEEK_EXCESS) -> WindowPriors:
    """The :class:`WindowPriors` of a fleet too small to measure them (see ``NEUTRAL_DECAY``)."""
    scale = [(BASE_WINDOW / k) ** NEUTRAL_DECAY for k in windows]
    return WindowPriors(tuple(windows), tuple(week_excess * f for f in scale), tuple(scale))


def _neutral_week_excess(base, prior_windows: float, min_accounts: int = MIN_OWN_WEEKS_ACCOUNTS) -> float:
    """The week's excess of :func:`neutral_priors` for a fleet whose 7-day window statistics are
    ``base`` (see ``MIN_OWN_WEEKS_ACCOUNTS``)."""
    own = base["own_excess"][(base["own_points"] >= 3) & (base["points"] < prior_windows)]
    if own.size < min_accounts:
        return NEUTRAL_WEEK_EXCESS
    return float(np.clip(np.mean(own), NEUTRAL_LEAST_WEEK_EXCESS, NEUTRAL_WEEK_EXCESS))


def _priors_from(by_window, windows, prior_windows: float, min_accounts: int = 20) -> WindowPriors:
    base = by_window[BASE_WINDOW]
    long = (base["points"] >= 20) & (base["spread"] > 0)
    neutral = neutral_priors(windows, _neutral_week_excess(base, prior_windows))
    excess, ratio = list(neutral.excess), list(neutral.ratio)
    for i, k in enumerate(windows):
        s = by_window[k]
        good = long & (s["points"] >= 8)
        if good.sum() >= min_accounts:
            excess[i] = float(np.median(np.maximum(s["spread"][good] ** 2 - s["count_var"][good], 0.0)))
            ratio[i] = float(np.median((s["spread"][good] / base["spread"][good]) ** 2))
    return WindowPriors(tuple(windows), tuple(excess), tuple(ratio))


def window_priors(values, factors, first_seen, half_event, *, windows, reference_days=182, min_reference_days=28,
                  history_gap_days=60, prior_windows=5.0, min_accounts: int = 20,
                  median_reference_from: int = 0) -> WindowPriors:
    """The fleet-wide :class:`WindowPriors`, from accounts with long histories in a sample.

    ``values``/``factors`` (S, D) as :class:`WindowTests` takes them.  With fewer than
    ``min_accounts`` long histories, :func:`neutral_priors`.
    """
    p = dict(windows=tuple(windows), reference_days=reference_days, min_reference_days=min_reference_days,
             history_gap_days=history_gap_days, prior_windows=prior_windows, median_reference_from=median_reference_from)
    by_window, _ = window_statistics(np.asarray(values, float), np.asarray(factors, float), np.asarray(first_seen),
                                     np.asarray(half_event, float), p)
    return _priors_from(by_window, p["windows"], prior_windows, min_accounts)


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
    median_reference_from : int
        Windows of at least this many days (0: none) take as their reference the median of the
        weekly levels of the ``reference_days`` before them, not their mean: a slide that has run
        into the half-year moves the mean, not the median week.
    weekday_misfit : float
        A window shorter than a week is judged against windows ending on every weekday; where
        those ending on its own weekday sit this far (log) from the rest, the weekday profile
        does not fit that weekday (a nearly empty weekend pulled toward the week's mean, say),
        and the window must also be unusual against its own weekday's windows (the larger
        p-value of the two: an intersection-union test, valid at the level of each).
    """

    _parameters = ("windows", "reference_days", "min_reference_days", "history_gap_days", "prior_windows",
                   "ratio_prior_windows", "anchor_points", "count_floor_events", "weekday_misfit",
                   "median_reference_from")

    def __init__(self, windows=(2, 4, 7, 14, 28), reference_days: int = 182, min_reference_days: int = 28,
                 history_gap_days: int = 60, prior_windows: float = 5.0, ratio_prior_windows: float = 10.0,
                 anchor_points: int = 5, count_floor_events: float = 30.0, weekday_misfit: float = 0.3,
                 median_reference_from: int = 0):
        self.windows = windows
        self.reference_days = reference_days
        self.min_reference_days = min_reference_days
        self.history_gap_days = history_gap_days
        self.prior_windows = prior_windows
        self.ratio_prior_windows = ratio_prior_windows
        self.anchor_points = anchor_points
        self.count_floor_events = count_floor_events
        self.weekday_misfit = weekday_misfit
        self.median_reference_from = median_reference_from

    def _check(self):
        try:
            windows = tuple(int(k) for k in self.windows)
        except TypeError:
            raise ValueError(f"windows must be a sequence of day counts, got {self.windows!r}") from None
        if BASE_WINDOW not in windows or min(windows) < 1 or len(set(windows)) != len(windows):
            raise ValueError(f"windows must be distinct positive day counts including {BASE_WINDOW}, got {self.windows}")
        if self.reference_days < self.min_reference_days or self.min_reference_days < 1 or self.history_gap_days < 0:
            raise ValueError("need reference_days >= min_reference_days >= 1 and history_gap_days >= 0")
        if not (isinstance(self.median_reference_from, (int, np.integer)) and self.median_reference_from >= 0):
            raise ValueError(f"median_reference_from must be a day count >= 0, got {self.median_reference_from!r}")
        if not self.weekday_misfit > 0:
            raise ValueError(f"weekday_misfit must be a positive log distance, got {self.weekday_misfit}")
        return windows

    def fit(self, values, factors, first_seen, half_event, priors: WindowPriors | None = None,
            count_dispersion: float = 0.0, whole_weeks_only=None):
        """Test each account's last column.

        ``values`` (A, D): the activity index with the fleet factor divided out, NaN where missing;
        ``factors`` (A, D): each day's weekday factor; ``first_seen`` (A,): first active column;
        ``half_event`` (A,): half an event in index units; ``priors``: fleet-wide priors (None:
        pooled over this block); ``count_dispersion``: the fleet's pooled negative-binomial
        dispersion of small accounts (the count floor's least dispersion); ``whole_weeks_only``
        (A,) bool: accounts whose windows shorter than a week do not speak (p-values 1), as after
        a change of weekday shape their history is of another shape.

        Sets ``p_low_``/``p_high_``/``z_``/``change_pct_`` (A, W), ``growth_`` (A, log per day;
        reported, not taken out),
        ``history_points_`` (A, 7-day history points), ``own_weeks_`` (A, the account's own whole
        weeks that counted beside a short history, 0 where they did not), ``percentile_`` (A, W: where each window's
        contrast falls among the same window's contrasts in the account's history, 0-100 by mid-rank:
        0 below every one, 100 above every one, NaN without a history), ``level_`` and ``baseline_``
        (A, W: each window's level and its reference's, per day, weekday-adjusted) and ``priors_``.
        """
        windows = self._check()
        values = check_matrix(values, "values")
        factors = check_matrix(factors, "factors")
        half_event = np.asarray(half_event, float)
        p = dict(windows=windows, reference_days=self.reference_days, min_reference_days=self.min_reference_days,
                 history_gap_days=self.history_gap_days, prior_windows=self.prior_windows,
                 median_reference_from=self.median_reference_from)
        by_window, growth = window_statistics(values, factors, np.asarray(first_seen), half_event, p)
        if priors is None:
            priors = _priors_from(by_window, windows, self.prior_windows)
        base = by_window[BASE_WINDOW]
        n0 = self.prior_windows
        base_excess, _ = priors.of(BASE_WINDOW)
        # Where the window history is short, the account's own recent weeks say how steady it
        # is, as many points as they outnumber the history's.
        own_points = np.maximum(base["own_points"] - base["points"], 0.0)
        own_excess = np.maximum(base["own_excess"], 0.0)
        known = base["points"] + own_points + n0
        weekly_var = (base["points"] * base["spread"] ** 2 + own_points * (own_excess + base["count_var"])
                      + n0 * (base_excess + base["count_var"])) / known
        # ... and scale the fleet's excess of every window by how this account's weeks compare.
        steadiness = 1.0 - own_points / known * (1.0 - own_excess / max(base_excess, 1e-9))
        self.own_weeks_ = np.where(own_points > 0, base["own_points"] + 1, 0).astype(np.int64)
        shape = (values.shape[0], len(windows))
        self.p_low_, self.p_high_ = np.ones(shape), np.ones(shape)
        self.z_, self.change_pct_ = np.full(shape, np.nan), np.full(shape, np.nan)
        self.percentile_, self.level_, self.baseline_ = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
        rows = np.arange(values.shape[0])
        for i, k in enumerate(windows):
            s = by_window[k]
            excess, ratio = priors.of(k)
            weight = s["points"] / (s["points"] + n0)
            if k == BASE_WINDOW:
                var = np.where(own_points > 0, weekly_var,
                               weight * s["spread"] ** 2 + (1 - weight) * (excess + s["count_var"]))
                points = s["points"]
            else:
                # A long window has few independent points of history: its spread leans on the
                # weekly spread times the fleet's ratio between the two.
                prior = np.maximum(ratio * weekly_var, excess * steadiness + s["count_var"])
                w2 = s["points"] / (s["points"] + self.ratio_prior_windows)
                var = w2 * s["spread"] ** 2 + (1 - w2) * prior
                points = s["points"] + self.ratio_prior_windows
            var = var / s["complete"]  # a window with masked days is noisier than full ones
            # A two-peaked history is wide as a whole, but beyond its outer peaks it is as narrow as
            # they are: where both halves are narrower than the whole, both tails narrow with the
            # wider of them.  The upper tail also narrows with its own half alone: log counts
            # compress rises, and an account's own dips and holidays stretch only the lower half,
            # so a quiet account's upper half is usually the narrow one (with one spread for both,
            # 1.35% of the development family's quiet accounts had a rising p-value under 0.05).
            # A narrow lower half alone is a bursty account's, and narrowing the lower tail there
            # turned quiet days into drops when every day of a year was replayed (false episodes
            # 2.5 -> 3.0 per 100 account-months).  Never widened, narrowed by at most half, shrunk
            # toward the whole on a short history.
            sd = np.sqrt(np.maximum(var, 1e-6))
            sd_low = sd * np.clip(1 + weight * (np.maximum(s["half_low"], s["half_high"]) - 1), 0.5, 1.0)
            sd_high = sd * np.clip(1 + weight * (s["half_high"] - 1), 0.5, 1.0)
            centre = weight * s["centre"]
            z_low, z_high = (s["current"] - centre) / sd_low, (s["current"] - centre) / sd_high
            df = np.clip(points + own_points + n0, 3.0, 50.0)
            ordered, n = s["ordered"], s["n"]
            anchor = max(self.anchor_points, -(-k // s["stride"]))  # at least one window's worth
            with np.errstate(invalid="ignore"):
                at_or_below = (ordered <= s["current"][:, None]).sum(axis=1)
                at_or_above = n - (ordered < s["current"][:, None]).sum(axis=1)
            if ordered.shape[1]:
                last = ordered.shape[1] - 1
                lowest = (ordered[:, min(anchor, ordered.shape[1]) - 1] - centre) / sd_low
                highest = (ordered[rows, np.clip(n - anchor, 0, last)] - centre) / sd_high
            else:
                lowest = highest = np.full(len(n), np.nan)
            p_low = tail_p(z_low, at_or_below, n, np.where(n >= anchor, lowest, np.nan), df, anchor,
                           independent=k == 1)
            small = np.flatnonzero(s["events"] < self.count_floor_events)
            if small.size:
                dispersion = np.maximum(var[small] - s["count_var"][small], count_dispersion)
                floor, _ = nbinom_mid_p(np.round(s["observed"][small] / (2 * half_event[small])), s["events"][small],
                                        dispersion)
                p_low[small] = np.maximum(p_low[small], floor)
            p_high = tail_p(-z_high, at_or_above, n, np.where(n >= anchor, -highest, np.nan), df, anchor,
                            independent=k == 1)
            if "same_weekday" in s:
                p_low, p_high = same_weekday_too(s, p_low, p_high, half_event, count_dispersion,
                                                 misfit=self.weekday_misfit, count_floor_events=self.count_floor_events)
            if whole_weeks_only is not None and k < BASE_WINDOW:
                p_low, p_high = np.where(whole_weeks_only, 1.0, p_low), np.where(whole_weeks_only, 1.0, p_high)
            self.p_low_[:, i] = p_low
            self.p_high_[:, i] = p_high
            self.z_[:, i] = np.where(s["current"] < centre, z_low, z_high)
            with np.errstate(invalid="ignore", divide="ignore"):
                self.change_pct_[:, i] = 100.0 * (s["observed"] / s["expected"] - 1.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                below = n - at_or_above
                self.percentile_[:, i] = np.where(
                    (n > 0) & np.isfinite(s["current"]),
                    100.0 * (below + 0.5 * (at_or_below - below)) / np.maximum(n, 1), np.nan)
                self.level_[:, i] = np.where(s["weight"] > 0, s["observed"] / s["weight"], np.nan)
            self.baseline_[:, i] = s["reference_level"]
            if k == BASE_WINDOW:
                self.history_points_ = n * s["stride"]
        self.windows_ = windows
        self.growth_ = growth
        self.priors_ = priors
        return self
