"""Detection: judge each account's recent days against its own history.

:func:`score_panel` composes the baselines and detectors over one block of accounts and returns
one row per account; ``alerts`` turns those rows into ranked alerts across the whole fleet.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from ..baseline import WeekdayProfile
from ..series import Panel, adjust_for_fleet, missing_before_first_full_day, quiet_nanmean, weekday_of
from .calibrate import nested_min_p
from .changepoint import ChangepointSearch, changepoints, cusum_split, fill_gaps, robust_sigma
from .contrasts import BASE_WINDOW, WindowPriors, WindowTests, window_priors
from .heavy_days import cap_heavy_days
from .second_looks import falling_tail_second_look, long_windows, rising_tail_against_median_week
from .silence import SILENT_DAYS, falling_p, last_active_column, silence
from .tail import weekly_levels
from .trend import step_or_ramp, trend_test

def sustained_changes(values, factors, pair_rows, pair_breakpoints, lookback: int = 56):
    """Per account, the candidate breakpoint where activity changed for good.

    ``values``/``factors`` are (A, L); candidate ``pair_breakpoints`` (columns) belong to rows
    ``pair_rows``, grouped by row and in each row's own order.  For each candidate, the
    weekday-weighted level (Σ values / Σ factors) from it to the end against the ``lookback``
    days before it, scored as |log ratio| · sqrt(usual volume of the shorter side): a step that
    lasts to the end beats a blip on a quiet weekend; ties go to the earlier candidate.  Returns
    ``(rows, column, level_before, level_after)``, one entry per distinct row; levels are NaN
    where no candidate had days on both sides (the column is then the row's first candidate).
    """
    pair_rows = np.asarray(pair_rows, np.int64)
    b = np.asarray(pair_breakpoints, np.int64)
    rows = np.unique(pair_rows)
    if not rows.size:
        return rows, b[:0], np.zeros(0), np.zeros(0)
    valid = np.isfinite(values[rows])
    zero = np.zeros((rows.size, 1))
    cum_v = np.hstack([zero, np.cumsum(np.where(valid, values[rows], 0.0), axis=1)])
    cum_w = np.hstack([zero, np.cumsum(np.where(valid, factors[rows], 0.0), axis=1)])
    r = np.searchsorted(rows, pair_rows)
    lo = np.maximum(0, b - lookback)
    w_before, w_after = cum_w[r, b] - cum_w[r, lo], cum_w[r, -1] - cum_w[r, b]
    usable = (w_before > 0) & (w_after > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        before = (cum_v[r, b] - cum_v[r, lo]) / w_before
        after = (cum_v[r, -1] - cum_v[r, b]) / w_after
        score = np.abs(np.log((after + 1e-3) / (before + 1e-3))) * np.sqrt(
            np.minimum(w_before, w_after) * np.maximum(np.maximum(before, after), 1e-9))
    score = np.where(usable, score, -1.0)
    # Best score per row, the earliest candidate among equals.
    order = np.lexsort((np.arange(b.size), -score, r))
    best = order[np.searchsorted(r[order], np.arange(rows.size))]
    found = usable[best]
    return rows, b[best], np.where(found, before[best], np.nan), np.where(found, after[best], np.nan)


@dataclass(frozen=True)
class ScanParams:
    """Settings of the per-account scoring (plain values; ``config.ScanConfig`` maps onto them).

    Days are calendar days.  ``windows`` are the lengths of the recent windows tested against
    the ``reference_days`` before them (``contrasts.WindowTests``); ``window_days`` is the
    window of messages and the report's level (an alert's drivers read its own window).
    """

    window_days: int = 7
    min_history_days: int = 42
    horizon_days: int = 91
    windows: tuple = (2, 4, 7, 14, 28)
    reference_days: int = 182
    history_gap_days: int = 60
    cusum_threshold: float = 5.0
    penalty_factor: float = 3.0
    trend_weeks: int = 12
    dormant_days: int = 91
    # Fleet-wide quantities (the loader measures them on a sample): the count dispersion of
    # small accounts (baseline.counts.pooled_dispersion) and the window tests' priors
    # (fleet_window_priors).  None pools over the block being scored.
    pooled_count_dispersion: float | None = None
    window_priors: WindowPriors | None = None
    log_offset: float = 0.1
    stop_p: float = 1e-3
    trend_screen_p: float = 0.01
    # A second look at the falling tail of the windows of a week or more, for the accounts whose
    # falling p-value there is already at most ``falling_screen_p``, the order of an alert's
    # (q <= fdr, and q >= p); the others' p-values stay as they were.  In it, days above
    # ``heavy_day_multiple`` times the account's median active day are capped (detect.heavy_days;
    # 0: not capped) and windows of ``falling_median_reference_from`` days or more (0: none) are
    # judged against the median week of their half-year rather than its mean.
    falling_screen_p: float = 0.01
    heavy_day_multiple: float = 3.0
    falling_median_reference_from: int = 28
    # The rising tail of windows of ``rising_median_reference_from`` days or more (0: none) must
    # also be high against the median week of their half-year, not only against its mean, which a
    # dip the account has come back from (a summer's vacations) has pulled down: the larger of the
    # two p-values (an intersection-union test, valid at the level of each; never below the first
    # look's, so the first look's calibration bounds it, and the second borrows the first's fleet
    # priors where its history is short).  Only accounts whose rising p-value there is at most
    # ``rising_screen_p`` are tested again; above it the larger of the two is above it too, so the
    # share of quiet accounts under any alpha up to it is as if every account were.
    rising_screen_p: float = 0.1
    rising_median_reference_from: int = 28
    ramp_advantage: float = 1.0
    profile_weeks: int = 16
    # A change of weekday shape among those weeks (baseline.shape_change): the statistic's
    # threshold; under no change about 1 account in 200 of 3+ events a day crosses it.
    shape_change_statistic: float | None = 40.0
    # The last one or two of those weeks departing from the weeks before them
    # (baseline.shape_change.recent_weeks_departure), and the judged week carrying the new shape
    # on: a new shape too young for the split, during which windows shorter than a week are not
    # judged.  None: not tested.
    recent_shape_statistic: float | None = 25.0
    # A young account's weekday factors (or those since a change of shape) pulled toward flat by
    # their own noise rather than by their number of weeks (baseline.WeekdayProfile's
    # factor_spread): its short windows have no history of their own to absorb a factor's bias.
    # None: by the number of weeks.
    weekday_factor_spread: float | None = 0.5
    onset_screen_p: float = 0.01
    # A day whose median account's probit is below ``fleet_null_trigger`` moved as a fleet
    # (detect.fleet_null.FleetNull); with ``read_against_fleet`` its p-values are read against it.
    read_against_fleet: bool = False
    fleet_null_trigger: float = -0.5


SCORE_COLUMNS = (
    "account", "status", "p_down", "p_up", "p_level_low", "p_level_high", "p_trend_down", "p_stop",
    "percentile", "percentile_down", "percentile_up", "window_level", "window_baseline", "level", "baseline_level",
    "change_pct", "change_down_pct", "change_up_pct", "window_days",
    "window_down", "window_up", "trend_change_pct", "trend_weeks", "growth_pct_year", "onset_day", "level_before", "level_after",
    "silent_days", "model", "down_kind", "n_reference", "own_weeks", "low_volume", "reference_end_day", "weekday_factors",
    "weekday_shape_since_day",
)
MIN_SEGMENT_DAYS = 7  # a change needs a week of the account before it
MIN_TREND_WEEKS = 6  # fewest whole weeks a trend is told from (the least Mann–Kendall p is then 0.004)
PRIOR_SAMPLE = 1000  # accounts of the fleet sample the window priors are measured on


def _half_event(panel: Panel) -> np.ndarray:
    """Half an event in activity-index units, per account (the index may be per seat or user)."""
    # Counts are NaN exactly where values are: one mask for both sums (half the time of nansum,
    # which copies each array with its NaNs zeroed).
    known = ~np.isnan(panel.values)
    with np.errstate(invalid="ignore", divide="ignore"):
        per_event = np.sum(panel.values, axis=1, where=known) / np.sum(panel.counts, axis=1, where=known)
    return 0.5 * np.where(np.isfinite(per_event) & (per_event > 0), per_event, 1.0)


def _weekday_factors(values, weekdays, hist_end: int, params: ScanParams):
    """Weekday factors (A, D) from the ``profile_weeks`` weeks before the judged window: recent
    enough that a week shape changed months ago does not linger, and only the weeks since a
    change of shape found among them.  Returns ``(profile, factors, shape_since, whole_weeks_only)``:
    ``shape_since`` (A,) the column the account's present weekday shape began, -1 where it
    did not change; ``whole_weeks_only`` (A,) bool where the weekday shape changed among those
    weeks or may be changing in their last one or two."""
    first = max(0, hist_end - 7 * params.profile_weeks)
    following = values[:, hist_end:hist_end + 7] if values.shape[1] - hist_end >= 7 else None
    profile = WeekdayProfile(change_statistic=params.shape_change_statistic,
                             recent_statistic=params.recent_shape_statistic,
                             factor_spread=params.weekday_factor_spread).fit(
        values[:, first:hist_end], int(weekdays[first]), following=following)
    shape_since = np.where(profile.change_start_ >= 0, first + profile.change_start_, -1)
    return profile, profile.factors_[:, weekdays], shape_since, (shape_since >= 0) | profile.recent_change_


def fleet_window_priors(counts, fleet_factor, masked, days, params: ScanParams = ScanParams(),
                        first_full_day=None) -> WindowPriors:
    """The window tests' fleet-wide priors from raw daily totals of a fleet sample (S, D) whose
    columns are the day numbers ``days``, as the scan would see them (days before an account's
    first full day ``first_full_day`` (S,), or its first activity without it, and masked days
    missing, the fleet factor divided out)."""
    rows = np.arange(len(counts))[:: max(1, len(counts) // PRIOR_SAMPLE)][:PRIOR_SAMPLE]
    counts = np.asarray(counts, float)[rows]
    first_full = None if first_full_day is None else np.asarray(first_full_day)[rows] - int(np.asarray(days)[0])
    values = missing_before_first_full_day(counts, first_full)
    values[:, np.asarray(masked, bool)] = np.nan
    values = values / np.asarray(fleet_factor, float)[None, :]
    weekdays = weekday_of(np.asarray(days))
    hist_end = values.shape[1] - params.window_days
    _, factors, _, _ = _weekday_factors(values, weekdays, hist_end, params)
    first = np.where(np.isfinite(values).any(axis=1), np.isfinite(values).argmax(axis=1), values.shape[1])
    settings = dict(reference_days=params.reference_days, history_gap_days=params.history_gap_days)
    priors = window_priors(values, factors, first, np.full(len(values), 0.5), windows=params.windows, **settings)
    second_look = window_priors(cap_heavy_days(values, factors, hist_end, params.heavy_day_multiple), factors, first,
                                np.full(len(values), 0.5), windows=long_windows(params.windows),
                                median_reference_from=params.falling_median_reference_from, **settings)
    return replace(priors, second_look=second_look)


def _own_columns_breakpoints(segment, starts, penalty_factor: float) -> list:
    """:class:`ChangepointSearch` breakpoints of each row of ``segment`` (A, L), searched from the
    row's own first column ``starts`` (A,) on: the columns before a young account's first day
    are no data, and filled in they would shape the search's penalty and segments."""
    starts = np.maximum(np.asarray(starts), 0)
    found = [None] * len(segment)
    # Rows that start on the same column are searched together, on the columns from it.
    for start in np.unique(starts):
        rows = np.flatnonzero(starts == start)
        search = ChangepointSearch(penalty_factor=penalty_factor).fit(segment[rows, int(start):])
        for i, breakpoints in zip(rows, search.breakpoints_):
            found[i] = [int(start) + b for b in breakpoints]
    return found


def history_segments(panel: Panel, params: ScanParams = ScanParams()) -> list[list[tuple[int, int, float]]]:
    """Each account's whole history cut where it changed: per account, ``(first day, last day,
    level)`` tuples (day numbers; level in activity-index units a day, weekday-adjusted), from
    its first activity to the last column.  The cuts are ``changepoint.changepoints`` on the
    log of the weekday-adjusted series, as the scan's onset search sees it."""
    values = adjust_for_fleet(panel)
    weekdays = weekday_of(panel.days)
    _, factors, _, _ = _weekday_factors(values, weekdays, panel.n_days - params.window_days, params)
    z = values / factors
    out = []
    for row, first in zip(z, panel.first_seen):
        first = int(first)
        if first >= len(row):
            out.append([])
            continue
        scale = np.nanmean(row[first:]) if np.isfinite(row[first:]).any() else 1.0
        scale = scale if np.isfinite(scale) and scale > 0 else 1.0
        cuts = [first] + [first + c for c in changepoints(np.log(row[first:] / scale + params.log_offset))] + [len(row)]
        out.append([(panel.start_day + a, panel.start_day + b - 1,
                     float(np.nanmean(row[a:b])) if np.isfinite(row[a:b]).any() else float("nan"))
                    for a, b in zip(cuts[:-1], cuts[1:])])
    return out


def _trends(values, factors, scale, max_weeks: int):
    """Mann–Kendall P(falling) and the Theil–Sen change (%) over each account's last whole weeks,
    at most ``max_weeks`` and at least ``MIN_TREND_WEEKS`` of them: ``(p_down, change_pct,
    weeks)``, each (A,); p 1, change NaN and weeks 0 where there are too few."""
    n_accounts, n_days = values.shape
    p_trend, change, used = np.ones(n_accounts), np.full(n_accounts, np.nan), np.zeros(n_accounts, np.int64)
    weeks = min(max_weeks, n_days // 7)
    if weeks < MIN_TREND_WEEKS:
        return p_trend, change, used
    weekly = weekly_levels(values[:, -7 * weeks:], factors[:, -7 * weeks:]) / scale[:, None]
    # Whole weeks counted back from the last: the first missing one ends the run.
    missing = ~np.isfinite(weekly[:, ::-1])
    run = np.where(missing.any(axis=1), missing.argmax(axis=1), weeks)
    for length in range(MIN_TREND_WEEKS, weeks + 1):
        rows = np.flatnonzero(np.minimum(run, weeks) == length) if length < weeks else np.flatnonzero(run >= weeks)
        if rows.size:
            down, _, rel = trend_test(weekly[rows, -length:])
            p_trend[rows], change[rows], used[rows] = down, 100.0 * rel, length
    return p_trend, change, used


def score_panel(panel: Panel, params: ScanParams = ScanParams()) -> pd.DataFrame:
    """Score the last column of ``panel`` (the as-of day) for every account in it.

    Returns a frame with ``SCORE_COLUMNS``, one row per account; ``status`` is ``judged``,
    ``not_enough_history`` or ``dormant``.  ``p_down``/``p_up`` are per-account p-values, not
    yet corrected across accounts: the window tests combined through their minimum
    (``calibrate.nested_min_p``), with the silence test joined by the Cauchy combination when
    the account has been silent.  Levels are in activity-index units per day, weekday-adjusted.
    """
    W = params.window_days
    values = adjust_for_fleet(panel)
    n_accounts, n_days = values.shape
    if n_days < W + 14:
        raise ValueError(f"need at least {W + 14} days of columns, got {n_days}")
    weekdays = weekday_of(panel.days)
    hist_end = n_days - W
    first_seen = panel.first_seen
    n_history = np.isfinite(values[:, :hist_end]).sum(axis=1)
    enough = n_history >= params.min_history_days

    profile, factors, shape_since, whole_weeks_only = _weekday_factors(values, weekdays, hist_end, params)
    half_event = _half_event(panel)
    # Windows shorter than a week are judged by the weekday shape and calibrated on the account's
    # past: after a change of shape that past is of another shape, so until the change leaves the
    # profile's weeks only whole-week windows (unmoved by how a week is spread) speak.
    tests = WindowTests(windows=params.windows, reference_days=params.reference_days,
                        history_gap_days=params.history_gap_days).fit(
        values, factors, first_seen, half_event, priors=params.window_priors,
        count_dispersion=params.pooled_count_dispersion or 0.0, whole_weeks_only=whole_weeks_only)
    falling_tail_second_look(tests, values, factors, first_seen, half_event, whole_weeks_only, hist_end, params)
    rising_tail_against_median_week(tests, values, factors, first_seen, half_event, whole_weeks_only, params)
    windows = np.asarray(tests.windows_)
    p_level_low = nested_min_p(tests.p_low_.T, tests.windows_, params.reference_days)
    p_level_high = nested_min_p(tests.p_high_.T, tests.windows_, params.reference_days)
    rows = np.arange(n_accounts)
    best_down, best_up = tests.p_low_.argmin(axis=1), tests.p_high_.argmin(axis=1)
    change_down, change_up = tests.change_pct_[rows, best_down], tests.change_pct_[rows, best_up]
    percentile_down, percentile_up = tests.percentile_[rows, best_down], tests.percentile_[rows, best_up]
    week = list(tests.windows_).index(BASE_WINDOW)
    window_down, window_up = windows[best_down], windows[best_up]
    enough &= np.isfinite(tests.z_[:, list(tests.windows_).index(BASE_WINDOW)])

    # Silence is judged against the history up to the last activity, not against itself.
    last_active = last_active_column(values)
    # ... and by the weekday shape the account has now: its quiet days since a change of shape.
    silent_days, p_silence, last_active = silence(values, np.minimum(hist_end, last_active + 1), weekdays,
                                                  np.maximum(first_seen, shape_since), last_active=last_active)
    dormant = silent_days >= params.dormant_days
    silent = silent_days >= SILENT_DAYS
    p_stop = np.where(silent, p_silence, 1.0)
    p_down = falling_p(p_level_low, p_stop, silent_days)
    p_up = p_level_high

    # Onset and levels: a vectorised CUSUM screen, then the exact search on the accounts it picks.
    z = values / factors
    scale = quiet_nanmean(z[:, :hist_end], axis=1)
    scale = np.where(np.isfinite(scale) & (scale > 0), scale, 1.0)
    u = np.divide(z, scale[:, None])  # log(z / scale + offset), in one array
    u += params.log_offset
    np.log(u, out=u)
    span = min(n_days, params.horizon_days + 91)
    segment = u[:, -span:]
    filled = fill_gaps(segment)
    sigma = np.maximum(robust_sigma(u[:, max(0, hist_end - 182):hist_end]), 0.05)
    offset = n_days - span
    own_start = np.maximum(first_seen - offset, 0)  # each account's first column in the segment
    split, statistic = cusum_split(filled, span - params.horizon_days, span - 2, sigma, starts=own_start)
    # Onsets and kinds matter only where an alert is possible: no account whose p-value is above
    # ``onset_screen_p`` (at least the alert threshold, since q >= p) needs the exact search.
    # A change starts within the horizon and after the account's first full week.
    earliest = np.maximum(span - params.horizon_days, first_seen + MIN_SEGMENT_DAYS - offset)
    candidates = np.flatnonzero(enough & ~dormant & (np.abs(statistic) > params.cusum_threshold)
                                & (np.minimum(p_down, p_up) <= params.onset_screen_p))
    onset_col = np.full(n_accounts, -1)
    level_before = np.full(n_accounts, np.nan)
    level_after = np.full(n_accounts, np.nan)
    reference_end = np.full(n_accounts, hist_end)
    if candidates.size:
        found = _own_columns_breakpoints(segment[candidates], own_start[candidates], params.penalty_factor)
        pairs = [(row, b) for row, bkps in zip(candidates, found) for b in bkps[:-1] if b >= earliest[row]]
        if pairs:
            pair_rows, pair_bkps = np.array(pairs, dtype=np.int64).T
            rows_cp, onset, before, after = sustained_changes(values[:, offset:], factors[:, offset:], pair_rows, pair_bkps)
            onset_col[rows_cp] = offset + onset
            reference_end[rows_cp] = np.minimum(hist_end, offset + onset)
            level_before[rows_cp], level_after[rows_cp] = before, after

    # Trend over the last weeks (weekly levels, relative to the account's scale); a young account
    # is tested over the whole weeks it has, if there are at least ``MIN_TREND_WEEKS``.
    p_trend, trend_change, trend_weeks = _trends(values, factors, scale, params.trend_weeks)

    # A stop is a silence unlikely on its own.  Elsewhere, where something changed, is it a ramp
    # (a slide) rather than a step?  A ramp's start then ends the reference history.
    stop = silent & (p_stop <= params.stop_p)
    slide = np.zeros(n_accounts, bool)
    changing = np.zeros(n_accounts, bool)
    changing[candidates] = True
    changing |= (p_trend < params.trend_screen_p) | ((window_down >= 14) & (p_level_low < 0.01))
    maybe = np.flatnonzero(changing & ~stop & enough & ~dormant & (p_down <= params.onset_screen_p))
    if maybe.size:
        sse_step, sse_ramp, ramp_start = step_or_ramp(filled[maybe], earliest[maybe], starts=own_start[maybe])
        ramp = (sse_ramp < params.ramp_advantage * sse_step) & (ramp_start >= 0)
        ramp_rows = maybe[ramp]
        slide[ramp_rows] = True
        onset_col[ramp_rows] = n_days - span + ramp_start[ramp]
        reference_end[ramp_rows] = np.minimum(hist_end, onset_col[ramp_rows])

    # A stop reads as stopped: the change over the silent days, since the last activity.
    level_down = np.where(stop, 0.0, tests.level_[rows, best_down])
    baseline_down = np.where(stop, tests.baseline_[:, week], tests.baseline_[rows, best_down])
    change_down = np.where(stop, -100.0, change_down)
    window_down = np.where(stop, np.maximum(silent_days, 1), window_down)
    onset_col = np.where(stop, last_active + 1, onset_col)
    # Without a changepoint, a clear change starts where its most telling window does.
    unexplained = (onset_col < 0) & (np.minimum(p_down, p_up) < 0.05)
    best_window = np.where(p_down <= p_up, window_down, window_up)
    onset_col = np.where(unexplained, np.maximum(n_days - best_window, first_seen), onset_col)
    down_kind = np.where(stop, "stop", np.where(slide, "slide", "drop")).astype(object)
    status = np.where(~enough, "not_enough_history", np.where(dormant, "dormant", "judged"))
    onset_day = np.where(onset_col >= 0, panel.start_day + onset_col, -1)
    points = tests.history_points_ / 7.0
    return pd.DataFrame({
        "account": panel.accounts,
        "status": status,
        "p_down": p_down,
        "p_up": p_up,
        "p_level_low": p_level_low,
        "p_level_high": p_level_high,
        "p_trend_down": p_trend,
        "p_stop": p_stop,
        "percentile": np.where(p_down <= p_up, percentile_down, percentile_up),
        "percentile_down": percentile_down,
        "percentile_up": percentile_up,
        "window_level": np.where(p_down <= p_up, level_down, tests.level_[rows, best_up]),
        "window_baseline": np.where(p_down <= p_up, baseline_down, tests.baseline_[rows, best_up]),
        "level": tests.level_[:, week],
        "baseline_level": tests.baseline_[:, week],
        "change_pct": np.where(p_down <= p_up, change_down, change_up),
        "change_down_pct": change_down,
        "change_up_pct": change_up,
        "window_days": best_window.astype(np.int64),
        "window_down": window_down.astype(np.int64),
        "window_up": window_up.astype(np.int64),
        "trend_change_pct": trend_change,
        "trend_weeks": trend_weeks,
        "growth_pct_year": 100.0 * np.expm1(365.0 * tests.growth_),
        "onset_day": onset_day,
        "level_before": level_before,
        "level_after": level_after,
        "silent_days": silent_days,
        "model": np.where(points >= tests.prior_windows, "history", "prior").astype(object),
        "down_kind": down_kind,
        "n_reference": tests.history_points_,
        "own_weeks": tests.own_weeks_,
        "low_volume": tests.baseline_[:, week] * 7 < 2 * half_event * tests.count_floor_events,
        "reference_end_day": panel.start_day + reference_end,
        "weekday_factors": list(np.round(profile.factors_, 4)),
        "weekday_shape_since_day": np.where(shape_since >= 0, panel.start_day + shape_since, -1),
    })
