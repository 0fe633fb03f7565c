"""Detection: judge each account's recent days against its own history.

:func:`score_panel` composes the baselines and detectors over one block of accounts and returns
one row per account; ``alerts`` turns those rows into ranked alerts across the whole fleet.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..baseline import LevelDistribution, WeekdayProfile, WindowCountModel
from ..series import Panel, adjust_for_fleet, quiet_nanmean, weekday_of
from .changepoint import ChangepointSearch, cusum_split, fill_gaps, robust_sigma
from .silence import last_active_column, silence
from .tail import reference_mask, rolling_window
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

    Days are calendar days; ``low_volume_events`` is events per window.
    """

    window_days: int = 7
    min_history_days: int = 42
    horizon_days: int = 91
    level_model: str = "auto"
    low_volume_events: float = 60.0
    cusum_threshold: float = 5.0
    penalty_factor: float = 3.0
    trend_weeks: int = 12
    dormant_days: int = 91
    # The fleet's count dispersion (baseline.counts.pooled_dispersion); None pools per block.
    pooled_count_dispersion: float | None = None
    log_offset: float = 0.1
    stop_p: float = 1e-3
    trend_screen_p: float = 0.01
    ramp_advantage: float = 1.0


SCORE_COLUMNS = (
    "account", "status", "p_down", "p_up", "p_level_low", "p_level_high", "p_trend_down", "p_stop",
    "percentile", "level", "baseline_level", "change_pct", "trend_change_pct", "onset_day",
    "level_before", "level_after", "silent_days", "model", "down_kind", "n_reference", "low_volume",
    "reference_end_day", "bic_lognormal", "bic_mixture", "weekday_factors",
)


def _level_tails(values, factors, first_seen, reference_end, window, params):
    """Tail probabilities of each account's last ``window``-day level against its reference
    windows of the same length: empirical in the bulk, log-normal / mixture beyond it, and a
    negative binomial on totals for low-volume accounts.

    Returns ``(p_low, p_high, percentile, baseline_level, model, n_reference, low_volume,
    current, bic)``, each (A,) but ``bic`` (A, 2): one peak, two peaks (inf where not fitted).
    """
    levels, totals = rolling_window(values, window, factors, period=7)
    n_windows = levels.shape[1]
    in_reference = reference_mask(n_windows, window, first_seen, reference_end) & np.isfinite(levels)
    n_reference = in_reference.sum(axis=1)
    sample = np.where(in_reference, levels, np.nan)
    current = np.nan_to_num(levels[:, -1])
    level = LevelDistribution(model=params.level_model, window=window).fit(sample, current)
    percentile, n_low, n_high = level.empirical(current)
    p_low, p_high = level.tails(current, counts=(n_low, n_high))
    baseline_level = level.median()
    model = level.model_.astype(object)
    # The mean reference total: totals are finite wherever levels are, so the reference
    # windows are exactly the valid ones (the mean of np.where(in_reference, totals, nan)).
    with np.errstate(invalid="ignore", divide="ignore"):
        usual_total = np.where(in_reference, totals, 0.0).sum(axis=1) / n_reference * 7.0 / window
    low_volume = np.nan_to_num(usual_total) < params.low_volume_events
    if low_volume.any():
        total_sample = np.where(in_reference[low_volume], totals[low_volume], np.nan)
        count_model = WindowCountModel(window=window, pooled=params.pooled_count_dispersion).fit(total_sample)
        nb_low, nb_high = count_model.tails(np.nan_to_num(totals[low_volume, -1]))
        n = np.maximum(n_reference[low_volume], 1)
        p_low[low_volume] = np.where(n_low[low_volume] >= window, n_low[low_volume] / n, nb_low)
        p_high[low_volume] = np.where(n_high[low_volume] >= window, n_high[low_volume] / n, nb_high)
        model[low_volume] = "negbin"
    return p_low, p_high, percentile, baseline_level, model, n_reference, low_volume, current, level.bic_


def score_panel(panel: Panel, params: ScanParams = ScanParams()) -> pd.DataFrame:
    """Score the last column of ``panel`` (the as-of day) for every account in it.

    Returns a frame with ``SCORE_COLUMNS``, one row per account; ``status`` is ``judged``,
    ``not_enough_history`` or ``dormant``.  ``p_down``/``p_up`` are
    per-account p-values (Bonferroni over the downward tests: level, trend, silence), not yet
    corrected across accounts.  Levels are in activity-index units per day, deseasonalised.
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

    profile = WeekdayProfile().fit(values[:, :hist_end], int(weekdays[0]))
    factors = profile.factors_[:, weekdays]
    z = values / factors
    scale = quiet_nanmean(z[:, :hist_end], axis=1)
    scale = np.where(np.isfinite(scale) & (scale > 0), scale, 1.0)
    u = np.divide(z, scale[:, None])  # log(z / scale + offset), in one array
    u += params.log_offset
    np.log(u, out=u)

    # Silence is judged against the history up to the last activity, not against itself.
    last_active = last_active_column(values)
    silent_days, p_silence, last_active = silence(values, np.minimum(hist_end, last_active + 1), weekdays, first_seen,
                                                  last_active=last_active)
    dormant = silent_days >= params.dormant_days
    p_stop = np.where(silent_days >= 2, p_silence, 1.0)

    # Changepoint: a vectorised CUSUM screen, then the exact search on the accounts it picks.
    span = min(n_days, params.horizon_days + 91)
    segment = u[:, -span:]
    filled = fill_gaps(segment)
    sigma = np.maximum(robust_sigma(u[:, max(0, hist_end - 182):hist_end]), 0.05)
    split, statistic = cusum_split(filled, span - params.horizon_days, span - 2, sigma)
    candidates = np.flatnonzero(enough & ~dormant & (np.abs(statistic) > params.cusum_threshold))
    onset_col = np.full(n_accounts, -1)
    level_before = np.full(n_accounts, np.nan)
    level_after = np.full(n_accounts, np.nan)
    reference_end = np.full(n_accounts, hist_end)
    if candidates.size:
        search = ChangepointSearch(penalty_factor=params.penalty_factor).fit(segment[candidates])
        offset = n_days - span
        earliest_allowed = span - params.horizon_days
        pairs = [(row, b) for row, bkps in zip(candidates, search.breakpoints_) for b in bkps[:-1]
                 if b >= earliest_allowed]
        if pairs:
            pair_rows, pair_bkps = np.array(pairs, dtype=np.int64).T
            rows, onset, before, after = sustained_changes(values[:, offset:], factors[:, offset:], pair_rows, pair_bkps)
            onset_col[rows] = offset + onset
            reference_end[rows] = np.minimum(hist_end, offset + onset)
            level_before[rows], level_after[rows] = before, after

    # Trend over the last weeks (weekly levels, relative to the account's scale).
    weeks = params.trend_weeks
    p_trend = np.ones(n_accounts)
    trend_change = np.full(n_accounts, np.nan)
    if n_days >= 7 * weeks:
        weekly = rolling_window(values[:, -7 * weeks:], 7, factors[:, -7 * weeks:], period=7)[0][:, ::7] / scale[:, None]
        complete = np.isfinite(weekly).all(axis=1)
        if complete.any():
            down, _, rel = trend_test(weekly[complete])
            p_trend[complete] = down
            trend_change[complete] = 100.0 * rel

    # A stop is a silence unlikely on its own.  Elsewhere, where something changed, is it a ramp
    # (a slide) rather than a step?  A ramp's start then ends the reference history.
    stop = (silent_days >= 2) & (p_stop <= params.stop_p)
    slide = np.zeros(n_accounts, bool)
    changing = np.zeros(n_accounts, bool)
    changing[candidates] = True
    changing |= p_trend < params.trend_screen_p
    maybe = np.flatnonzero(changing & ~stop & enough & ~dormant)
    if maybe.size:
        sse_step, sse_ramp, ramp_start = step_or_ramp(filled[maybe], span - params.horizon_days)
        ramp = sse_ramp < params.ramp_advantage * sse_step
        rows = maybe[ramp]
        slide[rows] = True
        onset_col[rows] = n_days - span + ramp_start[ramp]
        reference_end[rows] = np.minimum(hist_end, onset_col[rows])

    # Level distribution of window levels over the reference history (before a recent change).
    tails = _level_tails(values, factors, first_seen, reference_end, W, params)
    p_low, p_high, percentile, baseline_level, model, n_reference, low_volume, current, bic = tails
    # A change inside the window is judged on the days since it, against windows of that length.
    inside = (onset_col > n_days - W) & (onset_col <= n_days - 2) & ~stop
    for k in np.unique(n_days - onset_col[inside]):
        rows = np.flatnonzero(inside & (n_days - onset_col == k))
        part = _level_tails(values[rows], factors[rows], first_seen[rows],
                            reference_end[rows], int(k), params)
        for target, value in zip((p_low, p_high, percentile, baseline_level, model, n_reference, low_volume, current, bic), part):
            target[rows] = value
    enough &= n_reference >= max(params.min_history_days - W + 1, 1) // 2

    p_down = np.minimum(1.0, 3.0 * np.minimum.reduce([p_low, p_trend, p_stop]))
    p_up = np.minimum(1.0, p_high)
    with np.errstate(all="ignore"):
        change_pct = 100.0 * (current / baseline_level - 1.0)
    down_kind = np.where(stop, "stop", np.where(slide, "slide", "drop")).astype(object)
    onset_col = np.where(stop, last_active + 1, onset_col)

    status = np.where(~enough, "not_enough_history", np.where(dormant, "dormant", "judged"))
    onset_day = np.where(onset_col >= 0, panel.start_day + onset_col, -1)
    return pd.DataFrame({
        "account": panel.accounts,
        "status": status,
        "p_down": p_down,
        "p_up": p_up,
        "p_level_low": p_low,
        "p_level_high": p_high,
        "p_trend_down": p_trend,
        "p_stop": p_stop,
        "percentile": percentile,
        "level": current,
        "baseline_level": baseline_level,
        "change_pct": change_pct,
        "trend_change_pct": trend_change,
        "onset_day": onset_day,
        "level_before": level_before,
        "level_after": level_after,
        "silent_days": silent_days,
        "model": model,
        "down_kind": down_kind,
        "n_reference": n_reference,
        "low_volume": low_volume,
        "reference_end_day": panel.start_day + reference_end,
        "bic_lognormal": bic[:, 0],
        "bic_mixture": bic[:, 1],
        "weekday_factors": list(np.round(profile.factors_, 4)),
    })
