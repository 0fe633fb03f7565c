"""The HTML report's data: the fleet overview, the alert cards' charts, the account index."""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd

from .. import store as store_mod
from ..alerts import day_to_date
from .common import _clean_value, _config, _finite, _finite_list, _scan_params, parse_day
from .loading import PanelLoader
from .scanning import scan


SHOWN_DAYS = 120  # days a card's chart and an index sparkline show
INDEX_LIMIT = 5_000  # accounts the report's index lists at most (a larger fleet: see ``scan --all``)


def _chart_levels(panel, scores, window: int):
    """The panel's daily values (fleet factor divided out) and their weekday-adjusted trailing
    ``window``-day levels, both (A, D), with each account's weekday factors from ``scores``."""
    from ..detect.tail import trailing_levels
    from ..series import weekday_of

    values = panel.values / panel.fleet_factor
    # Every panel account was scored, with 7 factors (flat where its history is too short).
    own = np.array(scores.loc[list(panel.accounts), "weekday_factors"].tolist(), dtype=float).reshape(-1, 7)
    factors = np.where(np.isfinite(own).all(axis=1, keepdims=True), own, 1.0)
    return values, trailing_levels(values, factors, weekday_of(panel.days), window)


def report_data(*, as_of=None, limit: int = 50, index_limit: int = INDEX_LIMIT, db: str | None = None, config=None,
                today: date | None = None) -> dict:
    """What the HTML report shows: the fleet overview; per alert (at most ``limit``) the account's
    last days, their weekday-adjusted 7-day level, its usual band, onset and segments; and an
    index of every account the scan saw (at most ``index_limit``, by id) with its state, level
    and a sparkline.  Levels are in activity-index units a day."""
    from ..alerts import history_rank
    from ..detect import history_segments
    from ..explain import drivers_phrase
    from ..outcomes import rate_sentence

    cfg = _config(config)
    alerts = scan(as_of=as_of, db=db, config=config, max_alerts=limit, today=today)
    summary = alerts.attrs["summary"]
    scores = alerts.attrs["scores"].set_index("account")
    masked = alerts.attrs["masked"]
    as_of = parse_day(summary["as_of"])
    lifecycle = alerts.attrs["lifecycle"]
    open_alerts = lifecycle[lifecycle["state"] != "resolved"] if len(lifecycle) else lifecycle
    index_accounts = sorted(scores.index)[:index_limit]
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days)
        loader.fleet_factor, loader.masked = alerts.attrs["fleet_factor"], masked
        meta = st.accounts().set_index("account")
        panel = loader(list(alerts["account"])) if len(alerts) else None
        index_panel = loader(index_accounts) if index_accounts else None
        states = st.alert_log()
        saved = st.saved_outcome_counts()
        totals = st.weighted_daily(loader.weights, st.account_ids(), as_of - timedelta(days=27), as_of)
        all_accounts = st.account_ids()
    window = cfg.scan.window_days
    reference_days = _scan_params(cfg).reference_days
    shown = slice(-SHOWN_DAYS, None)
    days = [day_to_date(d).isoformat() for d in range(loader.end_day - SHOWN_DAYS + 1, loader.end_day + 1)]
    cards = []
    first_shown = loader.end_day - SHOWN_DAYS + 1
    if panel is not None:
        all_segments = history_segments(panel, _scan_params(cfg))
        values, levels = _chart_levels(panel, scores, window)
    for i, alert in enumerate(alerts.to_dict(orient="records")):
        row = scores.loc[alert["account"]]
        # The band: the middle half of the 7-day levels over the account's reference half-year,
        # on the scale of the level line drawn over it.
        reference_end = int(row["reference_end_day"]) - panel.start_day
        ref = levels[i, max(reference_end - reference_days + window - 1, 0): max(reference_end, 0)]
        ref = ref[np.isfinite(ref)]
        band = (float(np.percentile(ref, 25)), float(np.percentile(ref, 75))) if ref.size else None
        onset_index = None
        alert["onset"] = alert["onset"] if isinstance(alert["onset"], str) else None
        if alert["change_pct"] is not None and not np.isfinite(alert["change_pct"]):
            alert["change_pct"] = None
        if alert["onset"]:
            onset_index = (date.fromisoformat(alert["onset"]) - as_of).days + SHOWN_DAYS - 1
        events = [d for d in alert["drivers"] if d["type"] == "event"][:2]
        words = [f"{d['event']} {d['expected']:.0f} expected, {d['observed']:.0f} seen" for d in events]
        users = [d for d in alert["drivers"] if d["type"] == "user"]
        if users:
            words.append(drivers_phrase(users, str))
        rates = alert.get("outcome_rates")
        risk = summary.get("at_risk")
        outcome_line = (rate_sentence(alert["kind"], alert["direction"], rates, risk["horizon_days"])
                        if isinstance(rates, dict) and risk else None)
        cards.append({
            "outcome_line": outcome_line,
            "account": alert["account"], "name": alert["name"], "kind": alert["kind"], "direction": alert["direction"],
            "state": alert["state"], "severity": alert["severity"], "percentile": _finite(alert["percentile"]),
            "rank": history_rank(_finite(alert["percentile"]), alert["direction"]),
            "change": "of unknown size" if alert["change_pct"] is None else f"{alert['change_pct']:+.0f}%",
            "onset": alert["onset"], "days": days, "raw": _finite_list(values[i, shown]),
            "level": _finite_list(levels[i, shown]), "band": band, "window": window,
            "onset_index": onset_index, "driver_words": words,
            "masked": [j for j, m in enumerate(masked[shown]) if m],
            "segments": [(max(a, first_shown) - first_shown, b - first_shown, level)
                         for a, b, level in all_segments[i] if b >= first_shown],
            **alerts.attrs.get("account_details", {}).get(alert["account"], {"mrr": None, "segment": None}),
        })
    idx, _, value, _, _ = totals
    activity = np.bincount(idx, weights=value, minlength=len(all_accounts))
    down = set(open_alerts.loc[open_alerts["direction"] == "down", "account"]) if len(open_alerts) else set()
    mrr = meta["mrr"].dropna() if "mrr" in meta else None
    if mrr is not None and len(mrr) and mrr.sum() > 0:
        at_stake = float(mrr[mrr.index.isin(down)].sum())
        basis, share = "mrr", at_stake / float(mrr.sum())
    else:
        in_down = np.array([a in down for a in all_accounts])
        at_stake = float(activity[in_down].sum())
        basis, share = "activity", at_stake / max(float(activity.sum()), 1e-9)
    latest = states[states["as_of"] == states["as_of"].max()] if len(states) else states
    by_state = latest["state"].value_counts().to_dict() if len(latest) else alerts["state"].value_counts().to_dict()
    return {
        "summary": summary, "n_alerts": len(alerts), "by_kind": alerts["kind"].value_counts().to_dict(),
        "by_state": by_state, "share_basis": basis, "down_share": share, "down_at_stake": at_stake,
        "down_accounts": len(down), "cards": cards,
        "index": _index_rows(index_panel, scores, open_alerts, meta, window) if index_panel is not None else [],
        "index_total": len(scores),
        "at_risk": summary.get("at_risk"),
        "segments": _segments(meta, open_alerts, saved[0] if saved else None),
        "fleet": {"days": [day_to_date(d).isoformat() for d in range(loader.start_day, loader.end_day + 1)],
                  "factor": [float(f) for f in alerts.attrs["fleet_factor"]], "masked": [bool(m) for m in masked],
                  "masked_days": summary["masked_days"]},
    }


def _index_rows(panel, scores, open_alerts, meta, window: int) -> list[dict]:
    """The report's account index: per account of ``panel`` its status, open alerts, 7-day level
    against its usual level, MRR and segment, and the last days' levels for a sparkline."""
    _, levels = _chart_levels(panel, scores, window)
    alerts_of = {}
    for r in open_alerts.itertuples():
        alerts_of.setdefault(r.account, []).append(f"{r.kind} ({r.state})")
    accounts = list(panel.accounts)
    mine = scores.loc[accounts, ["status", "level", "baseline_level"]]
    facts = meta.reindex(accounts)
    column = lambda name: facts[name].tolist() if name in facts else [None] * len(accounts)  # noqa: E731
    rows = []
    for i, (account, status, level, usual, name, mrr, segment) in enumerate(zip(
            accounts, mine["status"], mine["level"], mine["baseline_level"], column("name"), column("mrr"),
            column("segment"))):
        level, usual = _finite(level), _finite(usual)
        rows.append({
            "account": account, "name": _clean_value(name), "status": status, "alerts": alerts_of.get(account, []),
            "level": level, "usual": usual,
            "change_pct": 100.0 * (level / usual - 1.0) if level is not None and usual else None,
            "mrr": _clean_value(mrr), "segment": _clean_value(segment),
            "spark": _finite_list(levels[i, -SHOWN_DAYS:]),
        })
    return rows


def write_report(path: str, **kwargs) -> dict:
    """Write the self-contained HTML report to ``path``; returns ``report_data``'s dict."""
    from ..report.html import render_report

    data = report_data(**kwargs)
    Path(path).write_text(render_report(data), encoding="utf-8")
    return data


def _segments(meta, open_alerts, counts) -> list[dict]:
    """The report's segment table (``outcomes.segment_table``), as records; empty without segments."""
    from ..outcomes import segment_table

    if "segment" not in meta or meta["segment"].dropna().empty:
        return []
    accounts = meta.reset_index()[["account", "segment"]]
    alerts = open_alerts[["account", "direction", "kind"]] if len(open_alerts) else \
        pd.DataFrame(columns=["account", "direction", "kind"])
    return segment_table(accounts, alerts, counts).to_dict(orient="records")
