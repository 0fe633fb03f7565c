"""Backtest: replay the daily scan over history and score its alerts against known outcomes.

Pure functions on arrays and frames (the api reads the store).  Each replayed day sees only the
columns up to it — the fleet factor included — so nothing from after a day reaches its alerts.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import date, timedelta

import numpy as np
import pandas as pd

from .alerts import RESOLVE_DAYS, select_alerts
from .baseline.counts import pooled_dispersion
from .detect import ScanParams, fleet_window_priors, score_panel
from .detect.fleet_null import N_BINS, against_fleet, judged_tallies
from .fleet import fleet_factor
from .series import Panel, missing_before_first_full_day

DOWN_OUTCOMES = ("churned", "contracted")
UP_OUTCOMES = ("expanded",)
EPOCH = date(1970, 1, 1)


def _columns(matrix, start: int, end: int, fill):
    """Columns ``start .. end`` (inclusive) of ``matrix``, padded with ``fill`` left of column 0."""
    part = matrix[:, max(start, 0):end + 1]
    if start < 0:
        part = np.concatenate([np.full((matrix.shape[0], -start), fill), part], axis=1)
    return part.copy()


def _slice(panel: Panel, start: int, end: int, factor, masked) -> Panel:
    """Columns ``start .. end`` (inclusive) of ``panel``, exactly as the daily scan would read
    them (days before the history are missing), with the given fleet factor and mask."""
    values = _columns(panel.values, start, end, np.nan)
    counts = _columns(panel.counts, start, end, np.nan)
    values[:, masked] = np.nan
    counts[:, masked] = np.nan
    first = np.minimum(panel.first_seen - start, values.shape[1])
    return Panel(panel.accounts, panel.start_day + start, values, counts, first, masked, factor)


REPLAY_COLUMNS = ["as_of", "account", "direction", "kind", "severity"]


def replay_fleet_factors(sample_counts, panel_start: int, as_of_days, *, history_days: int = 365,
                         params: ScanParams = ScanParams(), first_full_day=None) -> list:
    """Each replayed day's fleet-wide quantities, from a fleet-wide sample.

    ``sample_counts`` (S, D): raw event totals of a sample of accounts over the whole history
    (NaN or 0 where none), column 0 being day ``panel_start``.  Returns per day in
    ``as_of_days`` a tuple ``(factor, masked, count_dispersion, window_priors)`` over the ``history_days``
    columns ending on that day, computed only from columns up to it (the fleet factor and
    data-gap mask of ``fleet.fleet_factor``, the pooled dispersion of
    ``baseline.counts.pooled_dispersion``).  ``first_full_day`` (S,): the sample accounts' first
    full days (``series.first_full_days``; None: histories start at the first activity).
    """
    raw = np.where(np.isnan(sample_counts), 0.0, sample_counts)
    started = missing_before_first_full_day(sample_counts, None if first_full_day is None
                                            else np.asarray(first_full_day) - panel_start)
    out = []
    for day in as_of_days:
        end = day - panel_start
        factor, masked = fleet_factor(_columns(raw, end - history_days + 1, end, 0.0))
        window = _columns(raw, end - history_days + 1, end, 0.0)
        seen = _columns(started, end - history_days + 1, end, np.nan)
        seen[:, masked] = np.nan
        dispersion = pooled_dispersion(seen, window=params.window_days)
        priors = fleet_window_priors(window, factor, masked, np.arange(day - history_days + 1, day + 1), params,
                                     first_full_day=first_full_day)
        out.append((factor, masked, dispersion, priors))
    return out


def churn_days(accounts, outcomes: pd.DataFrame | None) -> np.ndarray:
    """Per account, the day number of its first ``churned`` outcome (int64 max when none)."""
    first = {}
    if outcomes is not None and len(outcomes):
        for row in outcomes[outcomes["outcome"] == "churned"].itertuples():
            day = (row.date - EPOCH).days
            first[row.account] = min(day, first.get(row.account, day))
    return np.array([first.get(a, np.iinfo(np.int64).max) for a in accounts], dtype=np.int64)


def replay_scores(panel: Panel, as_of_days, fleet_factors: list, *, params: ScanParams = ScanParams(),
                  history_days: int = 365, churn=None, fdr: float = 0.01,
                  progress=None) -> tuple[pd.DataFrame, np.ndarray]:
    """Score one block of accounts on each replayed day: the per-block half of :func:`replay`.

    ``panel``: the block's whole history without a fleet factor; ``fleet_factors`` from
    :func:`replay_fleet_factors` (fleet-wide, so every block sees the same ones); ``churn``: per
    account the day of its cancellation (:func:`churn_days`), after which it is not judged.
    Returns ``(candidates, tallies)``: the score rows of judged accounts with a p-value at or
    below ``fdr`` (only those can pass the Benjamini–Hochberg step, and the fleet's null never
    lowers a p-value), with an ``as_of_day`` column; and per replayed day the probit tallies of
    the judged accounts' window tests, falling and rising (``fleet_null.judged_tallies``; int64,
    (len(as_of_days), 2, ``fleet_null.N_BINS``); each sums to the accounts judged), which add up
    over blocks.
    """
    churn = np.full(len(panel.accounts), np.iinfo(np.int64).max) if churn is None else np.asarray(churn)
    found, tallies = [], np.zeros((len(as_of_days), 2, N_BINS), dtype=np.int64)
    for i, (day, (factor, masked, dispersion, priors)) in enumerate(zip(as_of_days, fleet_factors)):
        end = day - panel.start_day
        part = _slice(panel, end - history_days + 1, end, factor, masked)
        keep = np.flatnonzero(churn > day)
        part = Panel([panel.accounts[k] for k in keep], part.start_day, part.values[keep], part.counts[keep],
                     part.first_seen[keep], part.masked, part.fleet_factor)
        scores = score_panel(part, replace(params, pooled_count_dispersion=dispersion, window_priors=priors))
        is_judged = (scores["status"] == "judged").to_numpy()
        tallies[i] = judged_tallies(scores)
        small = np.minimum(scores["p_down"].to_numpy(float), scores["p_up"].to_numpy(float)) <= fdr
        rows = scores[is_judged & small]
        if len(rows):
            found.append(rows.assign(as_of_day=int(day)))
        if progress:
            progress(i + 1, len(as_of_days))
    candidates = pd.concat(found, ignore_index=True) if found else pd.DataFrame(columns=["as_of_day"])
    return candidates, tallies


def select_replayed(candidates: pd.DataFrame, tallies, as_of_days, *, fdr: float = 0.01, min_change_pct: float = 30.0,
                    window_days: int = 7, fleet_null_trigger: float = -0.5,
                    read_against_fleet: bool = False) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The fleet-wide half of :func:`replay`: per day, the alerts among every block's candidates.

    ``tallies``: per day the fleet's probit tallies (the blocks' summed, :func:`replay_scores`), so
    each day's :class:`fleet_null.FleetNull` is the whole fleet's (its p-values read against it with
    ``read_against_fleet``) and its Benjamini–Hochberg family the whole fleet's two p-values per
    account, as in the daily scan.  Returns ``(alerts, exposure)`` as :func:`replay` does;
    ``exposure`` also says the days the fleet moved as a whole (``fleet_null``: ``down``, ``up``,
    ``both`` or empty).
    """
    found, exposure = [], []
    by_day = dict(tuple(candidates.groupby("as_of_day"))) if len(candidates) else {}
    for day, tally in zip(as_of_days, tallies):
        as_of = EPOCH + timedelta(days=int(day))
        rows = by_day.get(int(day))
        rows, nulls = against_fleet(rows if rows is not None else pd.DataFrame({"status": []}), tally,
                                    trigger=fleet_null_trigger, apply=read_against_fleet)
        acted = [d for d in ("down", "up") if nulls[d]["moved"]]
        n_judged = int(tally[0].sum())
        exposure.append({"as_of": as_of, "judged": n_judged,
                         "fleet_null": "both" if len(acted) == 2 else "".join(acted)})
        if not len(rows):
            continue
        alerts = select_alerts(rows.drop(columns="as_of_day"), as_of=as_of, fdr=fdr, max_alerts=None,
                               min_change_pct=min_change_pct, window_days=window_days,
                               family_size=2 * n_judged)
        if len(alerts):
            found.append(alerts[REPLAY_COLUMNS])
    alerts = pd.concat(found, ignore_index=True) if found else pd.DataFrame(columns=REPLAY_COLUMNS)
    alerts["as_of"] = pd.to_datetime(alerts["as_of"]).dt.date
    return alerts, pd.DataFrame(exposure, columns=["as_of", "judged", "fleet_null"])


def replay(panel: Panel, as_of_days, *, params: ScanParams = ScanParams(), history_days: int = 365,
           fdr: float = 0.01, min_change_pct: float = 30.0, outcomes: pd.DataFrame | None = None,
           fleet_sample: int = 5000, progress=None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Run the scan's judgement on each day in ``as_of_days`` (day numbers) over ``panel``.

    ``panel`` holds the whole history, without a fleet factor (raw values, NaN before first
    activity).  Accounts with a ``churned`` outcome on or before a day are left out of that day.
    Returns ``(alerts, exposure)``: every alert raised (as_of, account, direction, kind,
    severity), and per day the number of accounts judged.  The api runs the same three steps
    over account blocks (:func:`replay_fleet_factors`, :func:`replay_scores` per block,
    :func:`select_replayed`), so memory is bounded by the block size.
    """
    step = max(1, len(panel.accounts) // fleet_sample)
    factors = replay_fleet_factors(panel.counts[::step], panel.start_day, as_of_days, history_days=history_days,
                                   params=params)
    candidates, tallies = replay_scores(panel, as_of_days, factors, params=params, history_days=history_days,
                                        churn=churn_days(panel.accounts, outcomes), fdr=fdr, progress=progress)
    return select_replayed(candidates, tallies, as_of_days, fdr=fdr, min_change_pct=min_change_pct,
                           window_days=params.window_days, fleet_null_trigger=params.fleet_null_trigger,
                           read_against_fleet=params.read_against_fleet)


def lookback_days(sampled_days, resolve_days: int = RESOLVE_DAYS) -> list[int]:
    """The days to replay for ``sampled_days`` (day numbers): each with the ``resolve_days``
    before it, so whether an alert is new on a sampled day is told as the daily scan tells it,
    whatever the spacing of the samples."""
    return sorted({day - back for day in sampled_days for back in range(resolve_days + 1)})


def new_episodes(alerts: pd.DataFrame, exposure: pd.DataFrame, resolve_days: int = RESOLVE_DAYS) -> pd.DataFrame:
    """The alerts that are new on a sampled day, as the daily scan's lifecycle sees them: an
    alert of an account and direction none of the ``resolve_days`` days before had (a flicker
    in between is the same episode; absent that long, it had resolved).

    ``exposure``: the replayed days (``as_of``) with ``sampled`` (bool; all when missing); the
    days before each sampled one must have been replayed too (:func:`lookback_days`), else an
    alert there is missed and a running episode counts as new.
    """
    if alerts.empty:
        return alerts.assign(as_of=pd.to_datetime(alerts["as_of"]))
    days = pd.to_datetime(alerts["as_of"])
    sampled = set(pd.to_datetime(exposure.loc[exposure["sampled"], "as_of"]) if "sampled" in exposure
                  else pd.to_datetime(exposure["as_of"]))
    seen = set(zip(alerts["account"], alerts["direction"], days))
    keep = [day in sampled and not any((account, direction, day - pd.Timedelta(days=back)) in seen
                                       for back in range(1, resolve_days + 1))
            for account, direction, day in zip(alerts["account"], alerts["direction"], days)]
    return alerts.assign(as_of=days)[keep]


def evaluate(alerts: pd.DataFrame, outcomes: pd.DataFrame, exposure: pd.DataFrame, *, lead_days: int = 30,
             horizon_days: int = 90) -> dict:
    """Recall at a lead time, lead-time distribution, precision, false alerts, alerts per day.

    ``exposure``: per replayed day (``as_of``) the accounts ``judged`` and whether the day is
    ``sampled`` (all when the column is missing; the others are the days before a sampled one,
    replayed to tell new alerts from running ones).

    * recall_at_lead: share of outcomes with a matching alert (down for churned/contracted, up for
      expanded) on a day in [date − horizon, date − lead], over the outcomes with a sampled
      replayed day in that span (``count``); the others (``outside_replay``: before the replay
      could see them, or after it) could not be caught and are not counted.
    * lead times: date minus the first matching alert day in [date − horizon, date], over the
      same outcomes.
    * precision: share of accounts with an alert in that direction that have a matching outcome
      within ``horizon_days`` after one of their alerts.
    * alerts_per_day: alerts new on a sampled day (:func:`new_episodes`) per sampled day: what
      the daily scan would print a day, estimated the same way whatever the sampling step.
    * false alerts per 100 account-months: the new alerts with no matching outcome within the
      horizon, per account-day judged on the sampled days (30.44 days a month).
    """
    alerts = alerts.copy()
    alerts["as_of"] = pd.to_datetime(alerts["as_of"])
    outs = outcomes.copy()
    outs["date"] = pd.to_datetime(outs["date"])
    result = {"outcomes": {}}
    episodes = new_episodes(alerts, exposure)
    judged_days = exposure[exposure["sampled"]] if "sampled" in exposure else exposure
    replayed = np.sort(pd.to_datetime(judged_days["as_of"]).to_numpy(dtype="datetime64[ns]"))
    first_seen = np.searchsorted(replayed, (outs["date"] - pd.Timedelta(days=horizon_days)).to_numpy())
    last_seen = np.searchsorted(replayed, (outs["date"] - pd.Timedelta(days=lead_days)).to_numpy(), side="right")
    within_replay = pd.Series(last_seen > first_seen, index=outs.index)
    for kind in sorted(set(outs["outcome"])):
        direction = "up" if kind in UP_OUTCOMES else "down"
        every = outs[outs["outcome"] == kind]
        rows = every[within_replay[every.index]]
        mine = alerts[alerts["direction"] == direction]
        hits, leads = 0, []
        for o in rows.itertuples():
            a = mine[mine["account"] == o.account]
            window = a[(a["as_of"] >= o.date - pd.Timedelta(days=horizon_days)) & (a["as_of"] <= o.date)]
            if len(window):
                leads.append((o.date - window["as_of"].min()).days)
            early = window[window["as_of"] <= o.date - pd.Timedelta(days=lead_days)]
            hits += bool(len(early))
        alerted = set(mine["account"])
        with_outcome = 0
        for account in alerted:  # an alert followed by its outcome, wherever the outcome falls
            a_days = mine.loc[mine["account"] == account, "as_of"]
            o_days = every.loc[every["account"] == account, "date"]
            if any(((o_days - d).dt.days.between(0, horizon_days)).any() for d in a_days):
                with_outcome += 1
        q = np.percentile(leads, [25, 50, 75]) if leads else [None] * 3
        result["outcomes"][kind] = {
            "count": int(len(rows)), "outside_replay": int(len(every) - len(rows)),
            "recall_at_lead": hits / len(rows) if len(rows) else None,
            "caught_within_horizon": len(leads), "median_lead_days": None if q[1] is None else float(q[1]),
            "lead_days_q1": None if q[0] is None else float(q[0]), "lead_days_q3": None if q[2] is None else float(q[2]),
            "precision": with_outcome / len(alerted) if alerted else None, "alerted_accounts": len(alerted),
        }
    false = 0
    for e in episodes.itertuples() if len(episodes) else []:
        kinds = UP_OUTCOMES if e.direction == "up" else DOWN_OUTCOMES
        o = outs[(outs["account"] == e.account) & outs["outcome"].isin(kinds)]
        if not ((o["date"] - e.as_of).dt.days.between(0, horizon_days)).any():
            false += 1
    account_months = judged_days["judged"].sum() / 30.44 if len(judged_days) else 0.0
    result.update({
        "lead_days": lead_days, "horizon_days": horizon_days, "days_replayed": int(len(judged_days)),
        "alert_episodes": int(len(episodes)), "false_alert_episodes": false,
        "false_alerts_per_100_account_months": 100 * false / account_months if account_months else None,
        "alerts_per_day": len(episodes) / len(judged_days) if len(judged_days) else None,
    })
    return result


def sweep(alerts, outcomes, exposure, thresholds, **kw) -> list[dict]:
    """``evaluate`` with only alerts of severity >= each threshold."""
    out = []
    for t in thresholds:
        metrics = evaluate(alerts[alerts["severity"] >= t], outcomes, exposure, **kw)
        metrics["min_severity"] = float(t)
        out.append(metrics)
    return out


def calibrate(swept: list[dict], *, budget: float | None = None, target_precision: float | None = None):
    """The lowest severity threshold meeting an alert budget (episodes a day) or a precision
    target (over all outcome kinds' alerted accounts); None if none does."""
    for metrics in sorted(swept, key=lambda m: m["min_severity"]):
        if budget is not None and metrics["alerts_per_day"] is not None and metrics["alerts_per_day"] > budget:
            continue
        if target_precision is not None:
            values = [v["precision"] for v in metrics["outcomes"].values() if v["precision"] is not None]
            if not values or min(values) < target_precision:
                continue
        return metrics
    return None
