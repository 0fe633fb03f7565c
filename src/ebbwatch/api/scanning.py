"""The daily scan: score every account, select and record the day's alerts, add their drivers;
the exported index."""

from __future__ import annotations

import time
from datetime import date, timedelta
from pathlib import Path

import numpy as np

from .. import store as store_mod
from ..alerts import day_to_date
from ..engine import DEFAULT_CHUNK_SIZE
from ..errors import InputError, UsageError
from .common import (
    _clean_value, _config, _fleet_params, _score_chunk, check_as_of, default_as_of, fleet_factor_summary,
    last_complete_day, parse_day,
)
from .loading import PanelLoader, _score_on_dask


def export_index(output: str, *, as_of=None, history_days: int | None = None, accounts_per_part: int = 10_000,
                 db: str | None = None, config=None, today: date | None = None) -> dict:
    """Write the activity index the scan reads (weights and exclusions applied) as a Parquet
    dataset of account blocks in the folder ``output`` (see ``Store.export_index_parts``), for
    a Dask cluster or a notebook.  Returns what was written and the window."""
    cfg = _config(config)
    as_of = parse_day(as_of)
    if accounts_per_part < 1 or (history_days is not None and history_days < 1):
        raise UsageError("accounts per part and history days must be >= 1")
    target = Path(output)
    if target.exists() and (not target.is_dir() or any(target.iterdir())):
        raise UsageError(f"{output} exists and is not an empty folder; give a new folder (nothing was written)")
    with store_mod.open_store(db or cfg.store_path, read_only=True, must_exist=True) as st:
        if as_of is None:  # an export judges nothing: every stored day goes
            as_of = default_as_of(st.last_day(), today)
        check_as_of(st, as_of)
        loader = PanelLoader(st, cfg, as_of, history_days or cfg.scan.history_days)
        info = st.export_index_parts(output, loader.weights, day_to_date(loader.start_day), day_to_date(loader.end_day),
                                     accounts_per_part)
    info.update({"directory": output, "from": day_to_date(loader.start_day).isoformat(), "to": as_of.isoformat(),
                 "accounts_per_part": accounts_per_part})
    return info


def scan(
    *,
    as_of=None,
    db: str | None = None,
    config=None,
    kinds=None,
    max_alerts: int | None = None,
    chunk_size: int = DEFAULT_CHUNK_SIZE,
    progress=None,
    today: date | None = None,
    record: bool = False,
    show: str = "all",
    drivers: bool = True,
    engine: str = "local",
    scheduler: str | None = None,
    shared_dir: str | None = None,
    threads: int | None = None,
):
    """Judge every account at ``as_of`` (default: the last complete day) and return the alerts.

    Returns a DataFrame with ``frames.ALERT_COLUMNS`` ranked by severity; ``.attrs["summary"]``
    holds the counts (accounts judged, not enough history, dormant, masked days) and
    ``.attrs["scores"]`` the per-account scores.  ``record`` writes the day's alert states to
    the store (the daily job does; a look at a past day does not).  ``show``: ``all`` open
    alerts, or only ``new`` and escalated ones; snoozed accounts are never shown.  ``engine``:
    ``local`` (chunks in this process) or ``dask`` (chunks on a cluster: ``scheduler`` is
    ``local[:N]`` or a scheduler address; workers read a Parquet export of the store, written
    into a temporary folder inside ``shared_dir``, which every worker must be able to read).
    ``threads``: chunks scored at once by the local engine (default: one per core, at most 4).
    """
    if engine not in ("local", "dask"):
        raise UsageError(f"unknown engine {engine!r}; expected local or dask")
    from ..alerts import advance_lifecycle, select_alerts, still_changed
    import functools

    import pandas as pd

    from ..engine import default_threads, run_local

    if show not in ("all", "new"):
        raise UsageError(f"show must be all or new, got {show!r}")
    from ..frames import ALERT_KINDS

    unknown = set(kinds or ()) - set(ALERT_KINDS)
    if unknown:
        raise UsageError(f"unknown alert kind(s) {', '.join(sorted(unknown))}; expected {', '.join(ALERT_KINDS)}")
    cfg = _config(config)
    started = time.perf_counter()
    as_of = parse_day(as_of)
    with store_mod.open_store(db or cfg.store_path, read_only=not record, must_exist=True) as st:
        if as_of is None:
            as_of, as_of_reason = last_complete_day(st, today)
        else:
            as_of_reason = "given (--as-of)"
        check_as_of(st, as_of)
        accounts = st.account_ids()
        if not accounts:
            raise InputError("the store has no accounts yet; ingest events or --daily first")
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days)
        if engine == "dask":
            loader.fit_fleet(accounts)
            scores = _score_on_dask(st, loader, accounts, _fleet_params(cfg, loader), chunk_size, scheduler,
                                    progress, shared_dir)
        else:
            # The fleet fit (about 1 s on 100k accounts) overlaps the reading of the first
            # chunks; each chunk's scoring waits for it (_score_chunk).
            loader.fit_fleet_in_background(accounts)
            try:
                parts = run_local(accounts, loader.read, functools.partial(_score_chunk, cfg=cfg, loader=loader),
                                  chunk_size=chunk_size, progress=progress, threads=threads or default_threads())
            finally:
                loader.wait_for_fleet()
            scores = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
        # On a day the fleet's typical account moves, each account may be read against the fleet.
        fleet_null = None
        if len(scores):
            from ..detect.fleet_null import against_fleet, judged_tallies

            params = _fleet_params(cfg, loader)
            scores, fleet_null = against_fleet(scores, judged_tallies(scores), trigger=params.fleet_null_trigger,
                                               apply=params.read_against_fleet)
        # The day's judgement is the whole fleet's, whatever is printed: --kind, --max-alerts and
        # the output format choose what is shown, never what is recorded.
        alerts = select_alerts(
            scores, as_of=as_of, names=loader.names, window_days=cfg.scan.window_days, fdr=cfg.scan.fdr,
            max_alerts=None, min_change_pct=cfg.scan.min_change_pct, min_severity=cfg.scan.min_severity,
        )
        lifecycle = advance_lifecycle(st.alert_states_before(as_of), alerts, as_of,
                                      holding=still_changed(scores, cfg.scan.min_change_pct))
        snoozed = st.snoozed_accounts(as_of)
        history_changed = st.history_changes_since_last_record()
        if record:
            with st.transaction():
                st.record_alert_day(as_of, lifecycle)
        state_of = dict(zip(zip(lifecycle["account"].tolist(), lifecycle["direction"].tolist()),
                            lifecycle["state"].tolist()))
        alerts["state"] = [state_of.get((a, d), "new") for a, d in zip(alerts["account"], alerts["direction"])]
        hidden = alerts["account"].isin(list(snoozed))
        wanted = ~hidden if show == "all" else ~hidden & alerts["state"].isin(["new", "escalated"])
        if kinds:
            wanted &= alerts["kind"].isin(list(kinds))
        limit = cfg.scan.max_alerts if max_alerts is None else max_alerts
        shown = alerts[wanted].head(limit).reset_index(drop=True)  # alerts come most severe first
        if drivers and len(shown):
            _add_drivers(st, loader, scores, shown, as_of)
        known = st.accounts().set_index("account")
        # What accounts.csv says of the shown accounts (MRR, segment), for the tables people read.
        details = {a: {"mrr": _clean_value(known.at[a, "mrr"]), "segment": _clean_value(known.at[a, "segment"])}
                   for a in shown["account"] if a in known.index}
        saved = st.saved_outcome_counts()
    at_risk = None
    if saved is not None:
        shown, at_risk = _with_outcome_rates(shown, alerts, scores, known, *saved)
    masked_days = [
        (date(1970, 1, 1) + timedelta(days=loader.start_day + int(i))).isoformat()
        for i in np.flatnonzero(loader.masked)
    ]
    counts = scores["status"].value_counts().to_dict() if len(scores) else {}
    shown.attrs["summary"] = {
        "as_of": as_of.isoformat(),
        "as_of_reason": as_of_reason,
        "accounts": len(scores),
        "judged": int(counts.get("judged", 0)),
        "not_enough_history": sorted(scores.loc[scores["status"] == "not_enough_history", "account"].tolist()),
        "dormant": int(counts.get("dormant", 0)),
        "alerts": len(shown),
        "open_alerts": len(alerts),
        "snoozed": int(hidden.sum()),
        "resolved_today": int((lifecycle["state"] == "resolved").sum()) if len(lifecycle) else 0,
        "recorded": bool(record),
        "history_changed": history_changed,
        "masked_days": masked_days,
        "fleet_factor": fleet_factor_summary(loader.fleet_voters),
        "fleet_null": fleet_null,
        "seconds": round(time.perf_counter() - started, 3),
    }
    if at_risk is not None:
        shown.attrs["summary"]["at_risk"] = at_risk
    shown.attrs["scores"] = scores
    shown.attrs["lifecycle"] = lifecycle  # the day's whole judgement: every open alert's state
    shown.attrs["snoozed"] = {a: (u.isoformat(), r) for a, (u, r, _) in snoozed.items()}
    shown.attrs["fleet_factor"] = loader.fleet_factor
    shown.attrs["masked"] = loader.masked
    shown.attrs["start_day"] = loader.start_day
    shown.attrs["account_details"] = details
    return shown


def _period_days(start_day: int, end_day: int, masked, panel_start: int) -> np.ndarray:
    """Day numbers from ``start_day`` to ``end_day`` (inclusive) that are not masked."""
    days = np.arange(start_day, end_day + 1)
    column = days - panel_start
    inside = (column >= 0) & (column < len(masked))
    hidden = np.zeros(days.size, bool)
    hidden[inside] = np.asarray(masked, bool)[column[inside]]
    return days[~hidden]


BASELINE_DRIVER_DAYS = 56


def _find_drivers(st, loader, targets, as_of, max_events=None) -> list[list[dict]]:
    """Drivers for each ``(account, reference_end_day, direction, window_days)`` in ``targets``:
    the window is the alert's own last ``window_days`` days (a stop's silent days, a slide's
    telling window), so the drivers explain the change the alert states; the baseline the 8
    weeks before the reference history ends (from the account's first full day if later),
    masked days left out of both; event totals are summed in the store, and user rows (where
    the store has them) read in one query."""
    import pandas as pd

    from ..explain import drivers_from_sums, user_drivers

    end = (as_of - date(1970, 1, 1)).days
    first_needed = max(min(ref for _, ref, _, _ in targets) - BASELINE_DRIVER_DAYS, loader.start_day)
    accounts = [account for account, _, _, _ in targets]
    window_first = [end - int(days) + 1 for _, _, _, days in targets]
    windows = [_period_days(first, end, loader.masked, loader.start_day) for first in window_first]
    # A young account's baseline starts at its first full day, not on days it did not exist.
    first_full = loader.first_full_of(accounts)
    baseline_first = [max(reference_end - BASELINE_DRIVER_DAYS, loader.start_day, int(first))
                      for (_, reference_end, _, _), first in zip(targets, first_full)]
    baselines = [_period_days(first, reference_end - 1, loader.masked, loader.start_day)
                 for first, (_, reference_end, _, _) in zip(baseline_first, targets)]
    periods = pd.DataFrame({"place": np.arange(len(targets)), "account": accounts, "first": baseline_first,
                            "last": [reference_end - 1 for _, reference_end, _, _ in targets],
                            "window_first": window_first, "window_last": end})
    masked_days = loader.start_day + np.flatnonzero(loader.masked)
    sums = st.event_period_sums(loader.weights, periods, masked_days)
    found = [drivers[:max_events] for drivers in
             drivers_from_sums(sums, loader.weights, [len(days) for days in baselines], [len(days) for days in windows])]
    users = st.accounts_user_activity(accounts, date(1970, 1, 1) + timedelta(days=first_needed), as_of)
    users_by = dict(list(users.groupby("account")))
    for drivers, account, baseline, window, (_, _, direction, _) in zip(found, accounts, baselines, windows, targets):
        if account in users_by:
            drivers += user_drivers(users_by[account], loader.weights, baseline, window, direction)
    return found


def _add_drivers(st, loader, scores, alerts, as_of):
    """Fill the ``drivers`` column and extend each ``message`` with a short clause."""
    from ..alerts import alert_message
    from ..explain import drivers_phrase
    from ..textsafe import plain_text

    # A dict rather than scores.set_index(...): that copied every column of the whole fleet's scores.
    reference_end = dict(zip(scores["account"].tolist(), scores["reference_end_day"].tolist()))
    targets = [(a, int(reference_end[a]), d, int(w))
               for a, d, w in zip(alerts["account"], alerts["direction"], alerts["window_days"])]
    driver_lists = _find_drivers(st, loader, targets, as_of, max_events=5)
    alerts["drivers"] = driver_lists
    # Records from column lists: DataFrame.to_dict("records") boxes every cell (~0.15 s for
    # ~5,000 alerts).
    fields = ("account", "name", "kind", "direction", "change_pct", "onset", "silent_days",
              "trend_change_pct", "percentile", "severity", "window_days")
    columns = [alerts[name].tolist() for name in fields]
    records = [dict(zip(fields, values)) for values in zip(*columns)]
    alerts["message"] = [alert_message(record, record["window_days"], drivers_phrase(found, plain_text))
                         for record, found in zip(records, driver_lists)]


def _with_outcome_rates(shown, alerts, scores, known, counts, replay):
    """The shown alerts with what alerts like them led to in the saved replay (an
    ``outcome_rates`` column and a sentence in the message), and the recurring revenue — or,
    without MRR, the usual monthly activity — in all of today's alerted accounts weighted by
    those rates: ``(shown, at_risk)``."""
    from ..outcomes import DIRECTION_OUTCOME, rate_lookup, rate_sentence, rates_table, value_at_risk

    lookup = rate_lookup(rates_table(counts))
    horizon = int(replay["horizon_days"])
    shown = shown.copy()
    rates = [lookup(kind, severity) for kind, severity in zip(shown["kind"], shown["severity"])]
    shown["outcome_rates"] = rates
    shown["message"] = [m if (extra := rate_sentence(kind, direction, r, horizon)) is None else f"{m} {extra}"
                        for m, kind, direction, r in zip(shown["message"], shown["kind"], shown["direction"], rates)]
    mrr = known["mrr"] if "mrr" in known else None
    use_mrr = mrr is not None and mrr.notna().any()
    usual = scores.set_index("account")["baseline_level"]
    at_risk = {"basis": "mrr" if use_mrr else "activity", "horizon_days": horizon, "replay": replay}
    for direction in ("down", "up"):
        values, k, n = [], [], []
        outcome = DIRECTION_OUTCOME[direction]
        mine = alerts.loc[alerts["direction"] == direction, ["account", "kind", "severity"]]
        for account, kind, severity in mine.itertuples(index=False):
            r = lookup(kind, severity).get(outcome)
            value = (mrr.get(account) if use_mrr else 30.44 * usual.get(account, np.nan))
            if r is None or r["rate"] is None or value is None or not np.isfinite(value):
                continue
            values.append(float(value))
            k.append(r["k"])
            n.append(r["n"])
        at_risk[direction] = value_at_risk(values, k, n)
    shown.attrs["outcome_rates"] = lookup  # (kind, severity) -> rates, for explain
    return shown, at_risk
