"""The backtest: replay the daily judgement over history against known outcomes."""

from __future__ import annotations

import time
from datetime import date, timedelta

import numpy as np

from .. import store as store_mod
from ..alerts import EPOCH
from ..errors import InputError, UsageError
from .common import _config, _scan_params, check_as_of, last_complete_day, parse_day
from .loading import PanelLoader, _blocks, _exchange, _on_dask, _seats, fleet_sample


def backtest(outcomes: str, *, start=None, end=None, step: int = 1, lead_days: int = 30, horizon_days: int = 90,
             budget: float | None = None, target_precision: float | None = None, db: str | None = None,
             config=None, progress=None, today: date | None = None, chunk_size: int = 10_000,
             engine: str = "local", scheduler: str | None = None, shared_dir: str | None = None,
             threads: int | None = None, save_rates: bool = False) -> dict:
    """Replay the daily scan from ``start`` to ``end`` every ``step`` days against ``outcomes``
    (a CSV ``account,date,outcome``) and return the metrics, a severity sweep and a calibration.

    Accounts are replayed in blocks of ``chunk_size`` (memory is bounded by the block), in this
    process or, with ``engine="dask"``, on a cluster as in :func:`scan`.  Each day's fleet factor
    comes from one fleet-wide sample and each day's Benjamini–Hochberg step sees the whole
    fleet, so the blocks give the same alerts as one pass over every account.

    ``save_rates``: keep in the store what the replay's alerts led to (``outcomes.outcome_counts``:
    per alert kind and severity band, how many episodes were followed by each outcome within
    the horizon, and the base rate of accounts with no alert), counting only replay days whose
    whole horizon had passed by the store's last complete day; ``scan`` then adds the rates to
    its alerts.
    """
    import functools

    from ..backtest import (calibrate, churn_days, evaluate, lookback_days, replay_fleet_factors, select_replayed,
                           sweep)
    from ..detect.fleet_null import N_BINS
    from ..engine import default_threads
    from ..ingest.csvs import read_outcomes

    if engine not in ("local", "dask"):
        raise UsageError(f"unknown engine {engine!r}; expected local or dask")
    if step < 1 or lead_days < 0 or horizon_days < max(lead_days, 1):
        raise UsageError("need --step >= 1, --lead-days >= 0 and --horizon-days >= max(--lead-days, 1)")
    if chunk_size < 1:
        raise UsageError(f"chunk size must be >= 1, got {chunk_size}")
    cfg = _config(config)
    started = time.perf_counter()
    outcome_frame = read_outcomes(outcomes)
    start, end = parse_day(start, "--from"), parse_day(end, "--to")
    params = _scan_params(cfg)
    history_days = cfg.scan.history_days
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        first_day = st.status()["first_day"]
        if first_day is None:
            raise InputError("the store has no activity yet; ingest events or --daily first")
        known_until = last_complete_day(st, today)[0]
        end = end or known_until
        check_as_of(st, end, "--to")
        start = start or first_day + timedelta(days=cfg.scan.min_history_days + cfg.scan.window_days)
        if start > end:
            raise UsageError(f"--from {start} is after --to {end}")
        accounts = st.account_ids()
        # An outcome for an account the store does not hold (a misspelt id, another product's
        # customer) could only ever count as missed: it is left out, and said so.
        held = outcome_frame["account"].isin(set(accounts))
        unknown = sorted(set(outcome_frame.loc[~held, "account"]))
        outcome_frame = outcome_frame[held]
        segments = st.accounts().set_index("account")["segment"].dropna().to_dict()
        history = max((end - first_day).days + 1, cfg.scan.window_days + 14)
        loader = PanelLoader(st, cfg, end, history)
        sampled = list(range((start - EPOCH).days, (end - EPOCH).days + 1, step))
        # Each sampled day with the days before it, so an alert new on it is told as the daily
        # scan tells it and the rates estimated do not depend on the step.
        days = lookback_days(sampled)
        sample_counts = loader.sample_counts(accounts)
        factors = replay_fleet_factors(sample_counts, loader.start_day, days, history_days=history_days,
                                       params=params, first_full_day=loader.first_full_of(fleet_sample(accounts)[0]))
        never = np.iinfo(np.int64).max
        churn = {a: int(c) for a, c in zip(accounts, churn_days(accounts, outcome_frame)) if c != never}
        replay = dict(as_of_days=days, fleet_factors=factors, churn=churn, params=params, history_days=history_days,
                      fdr=cfg.scan.fdr)
        if engine == "dask":
            from ..tasks import replay_part

            blocks = _blocks(accounts, chunk_size)
            with _exchange(st, loader, chunk_size, shared_dir) as directory:
                task = functools.partial(replay_part, directory=directory, start_day=loader.start_day,
                                         end_day=loader.end_day, normalise=cfg.index.normalise, seats=_seats(loader),
                                         first_full=loader.first_full(), **replay)
                results = _on_dask(scheduler, task, blocks, progress, chunk_size, len(accounts))
        else:
            from ..engine import run_local
            from ..tasks import replay_block

            results = run_local(accounts, loader, functools.partial(replay_block, **replay), chunk_size=chunk_size,
                                progress=progress, threads=threads or default_threads())
    import pandas as pd

    found = [candidates for candidates, _ in results if len(candidates)]
    candidates = pd.concat(found, ignore_index=True) if found else pd.DataFrame(columns=["as_of_day"])
    tallies = np.sum([t for _, t in results], axis=0) if results else np.zeros((len(days), 2, N_BINS), dtype=np.int64)
    alerts, exposure = select_replayed(candidates, tallies, days, fdr=cfg.scan.fdr,
                                       min_change_pct=cfg.scan.min_change_pct, window_days=params.window_days,
                                       fleet_null_trigger=params.fleet_null_trigger,
                                       read_against_fleet=params.read_against_fleet)
    exposure["sampled"] = np.isin(days, sampled)
    kw = dict(lead_days=lead_days, horizon_days=horizon_days)
    result = evaluate(alerts[alerts["severity"] >= cfg.scan.min_severity], outcome_frame, exposure, **kw)
    thresholds = sorted({0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 7.5, 10.0, 15.0, 20.0, 30.0})
    swept = sweep(alerts, outcome_frame, exposure, thresholds, **kw)
    chosen = calibrate(swept, budget=budget, target_precision=target_precision) if (budget or target_precision) else None
    result.update({
        "from": start.isoformat(), "to": end.isoformat(), "step_days": step, "lookback_days_replayed": len(days) - len(sampled),
        "sweep": [{"min_severity": m["min_severity"], "alerts_per_day": m["alerts_per_day"],
                   "false_alerts_per_100_account_months": m["false_alerts_per_100_account_months"],
                   "outcomes": {k: {"recall_at_lead": v["recall_at_lead"], "precision": v["precision"],
                                    "median_lead_days": v["median_lead_days"]} for k, v in m["outcomes"].items()}}
                  for m in swept],
        "calibration": None if chosen is None else {
            "min_severity": chosen["min_severity"], "budget": budget, "target_precision": target_precision,
            "alerts_per_day": chosen["alerts_per_day"],
            "config": f"[scan]\nmin_severity = {chosen['min_severity']}\n"},
        "fleet_null_days": {d: int((exposure["sampled"] & exposure["fleet_null"].isin([d, "both"])).sum())
                            for d in ("down", "up")},
        "read_against_fleet": params.read_against_fleet,
        "seconds": round(time.perf_counter() - started, 3),
        "outcomes_for_unknown_accounts": {"outcomes": int((~held).sum()), "accounts": len(unknown),
                                          "examples": unknown[:5]},
    })
    if (budget or target_precision) and chosen is None:
        result["calibration"] = {"min_severity": None, "budget": budget, "target_precision": target_precision,
                                 "note": "no severity threshold in the sweep meets it"}
    if save_rates:
        result["saved_rates"] = _save_rates(db or cfg.store_path, alerts, exposure, outcome_frame, loader, churn, cfg,
                                            horizon_days=horizon_days, known_until=known_until, segments=segments,
                                            replay={"from": start, "to": end, "step_days": step})
    result["_lead_times"] = _lead_list(alerts, outcome_frame, horizon_days)
    result["_alerts"], result["_exposure"] = alerts, exposure  # every replayed alert, for programs
    return result


def _lead_list(alerts, outcomes, horizon_days) -> list:
    import pandas as pd

    from ..backtest import UP_OUTCOMES

    leads = []
    a = alerts.assign(as_of=pd.to_datetime(alerts["as_of"]))
    for o in outcomes.itertuples():
        direction = "up" if o.outcome in UP_OUTCOMES else "down"
        d = pd.Timestamp(o.date)
        mine = a[(a["account"] == o.account) & (a["direction"] == direction) & (a["as_of"] <= d)
                 & (a["as_of"] >= d - pd.Timedelta(days=horizon_days))]
        if len(mine):
            leads.append(int((d - mine["as_of"].min()).days))
    return leads


def _save_rates(path, alerts, exposure, outcome_frame, loader, churn, cfg, *, horizon_days, known_until, segments,
                replay) -> dict:
    """Count what the replay's alerts led to and save it in the store; returns what was saved."""
    import pandas as pd

    from ..outcomes import NO_ALERT, outcome_counts

    first_judged = {a: d + cfg.scan.min_history_days for a, d in loader.first_full().items()}
    last_day = (known_until - EPOCH).days
    eligible = pd.DataFrame({
        "account": list(first_judged),
        "first_day": [EPOCH + timedelta(days=int(d)) for d in first_judged.values()],
        "last_day": [EPOCH + timedelta(days=int(min(churn.get(a, last_day + 1) - 1, last_day))) for a in first_judged],
    })
    counts = outcome_counts(alerts, exposure, outcome_frame, horizon_days=horizon_days, known_until=known_until,
                            eligible=eligible, segments=segments)
    settings = {"fdr": cfg.scan.fdr, "min_change_pct": cfg.scan.min_change_pct, "min_severity": cfg.scan.min_severity}
    saved = {**{k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in replay.items()},
             "horizon_days": horizon_days, "known_until": known_until.isoformat(), "settings": settings}
    with store_mod.open_store(path) as st:
        st.save_outcome_counts(counts, saved)
    per_outcome = counts[counts["outcome"] == "churned"] if len(counts) else counts
    return {**saved, "alert_episodes": int(per_outcome.loc[per_outcome["kind"] != NO_ALERT, "n"].sum()) if len(counts) else 0,
            "base_accounts": int(per_outcome.loc[per_outcome["kind"] == NO_ALERT, "n"].sum()) if len(counts) else 0}
