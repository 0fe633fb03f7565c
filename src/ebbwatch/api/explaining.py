"""Explain one account; snoozes and the alert history."""

from __future__ import annotations

from datetime import date, datetime, timedelta, timezone

import numpy as np

from .. import store as store_mod
from ..alerts import day_to_date
from ..errors import InputError, UsageError
from .common import _config, _fleet_params, check_as_of, last_complete_day, parse_day
from .loading import PanelLoader
from .scanning import _find_drivers, scan


def _nearest_ids(st, account: str) -> str:
    """", did you mean …?" with up to three stored account ids close to ``account`` (case aside)."""
    import difflib

    ids = st.account_ids()
    by_folded = {a.casefold(): a for a in ids}
    close = difflib.get_close_matches(account.casefold(), list(by_folded), n=3, cutoff=0.6)
    return f"; did you mean {', '.join(by_folded[c] for c in close)}?" if close else ""


def explain(account: str, *, as_of=None, db: str | None = None, config=None, today: date | None = None) -> dict:
    """Everything the scan knows about one account on ``as_of``, as a JSON-ready dict.

    The account is judged exactly as in the scan (the fleet factor comes from the whole fleet),
    and the result says which baseline model was chosen and why, the weekday factors, the recent
    level with its percentile and tail probabilities, the changepoint, trend, silence, drivers,
    and the daily series behind them (for plotting).
    """
    from ..detect import history_segments, score_panel

    cfg = _config(config)
    as_of = parse_day(as_of)
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        if as_of is None:
            as_of, _ = last_complete_day(st, today)
        check_as_of(st, as_of)
        if not st.has_account(account):
            raise InputError(f"no account {account!r} in the store{_nearest_ids(st, account)}; "
                             "`ebbwatch status` lists what is there")
        accounts = st.account_ids()
        loader = PanelLoader(st, cfg, as_of, cfg.scan.history_days).fit_fleet(accounts)
        panel = loader([account])
        params = _fleet_params(cfg, loader)
        row = score_panel(panel, params).iloc[0]
        segments = history_segments(panel, params)[0]
        reference_end = int(row["reference_end_day"])
        direction = "down" if row["p_down"] <= row["p_up"] else "up"
        drivers = _find_drivers(st, loader, [(account, reference_end, direction, int(row["window_days"]))], as_of)[0]
    today_alerts = _alerts_on(account, as_of, db=db, config=cfg)
    weekday_names = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
    f = lambda v: None if v is None or (isinstance(v, float) and not np.isfinite(v)) else float(v)  # noqa: E731
    points = int(row["n_reference"])
    if row["model"] == "history":
        why = (f"its own history: the same comparisons on {points} earlier days show how much its "
               "activity varies when nothing in particular happens")
    elif row["own_weeks"]:
        why = (f"its own {int(row['own_weeks'])} weeks before the last three, weighed against the fleet's typical "
               f"variation: only {points} earlier days to compare with")
    else:
        why = (f"mostly the fleet's typical variation: only {points} earlier days to compare with, "
               "so its own history is weighted against the fleet's")
    if row["low_volume"]:
        why += "; low volume, so a drop is never more significant than a negative binomial count allows"
    days = panel.days
    return {
        "account": account,
        "name": loader.names.get(account) or account,
        "as_of": as_of.isoformat(),
        "status": row["status"],
        "today": today_alerts,
        "masked_days_in_window": [day_to_date(x).isoformat() for x in days[-cfg.scan.window_days:]
                                  if loader.masked[int(x) - loader.start_day]],
        "baseline": {"model": row["model"], "why": why, "history_days": points, "own_weeks": int(row["own_weeks"]),
                     "growth_pct_year": f(row["growth_pct_year"]), "low_volume": bool(row["low_volume"]),
                     "reference_ends": day_to_date(reference_end).isoformat()},
        "weekday_factors": dict(zip(weekday_names, (round(float(v), 3) for v in row["weekday_factors"]))),
        # The factors and the quiet days a silence is judged by come from this day on, where the
        # account's weekday shape changed within the profile's weeks (None: it did not).
        "weekday_shape_since": (None if row["weekday_shape_since_day"] < 0
                                else day_to_date(row["weekday_shape_since_day"]).isoformat()),
        "recent": {"window_days": int(row["window_days"]), "level": f(row["window_level"]),
                   "usual_level": f(row["window_baseline"]), "change_pct": f(row["change_pct"]),
                   "percentile": f(row["percentile"]), "p_low": f(row["p_level_low"]), "p_high": f(row["p_level_high"])},
        "changepoint": {"onset": None if row["onset_day"] < 0 else day_to_date(row["onset_day"]).isoformat(),
                        "level_before": f(row["level_before"]), "level_after": f(row["level_after"]),
                        "kind_if_down": row["down_kind"]},
        "trend": {"weeks": int(row["trend_weeks"]), "theil_sen_change_pct": f(row["trend_change_pct"]), "mann_kendall_p_down": f(row["p_trend_down"])},
        "segments": [{"start": day_to_date(a).isoformat(), "end": day_to_date(b).isoformat(), "level": f(level)}
                     for a, b, level in segments],
        "silence": {"silent_days": int(row["silent_days"]), "p_silence": f(row["p_stop"])},
        "p_down": f(row["p_down"]), "p_up": f(row["p_up"]),
        "drivers": drivers,
        "series": {"days": [day_to_date(d).isoformat() for d in days],
                   "index": [None if not np.isfinite(v) else round(float(v), 3) for v in panel.values[0] / panel.fleet_factor]},
    }


def _alerts_on(account: str, as_of: date, *, db, config) -> dict:
    """Whether ``account`` is alerted on ``as_of`` in the whole fleet's judgement (the scan's,
    not recorded): ``{"alerted", "alerts": [{direction, kind, state, severity, opened}],
    "snoozed_until", "snooze_reason"}``.  An open alert no longer significant but still changed
    is listed with its state and no severity."""
    judged = scan(as_of=as_of, db=db, config=config, drivers=False, max_alerts=0)
    lifecycle = judged.attrs["lifecycle"]
    mine = lifecycle[lifecycle["account"] == account] if len(lifecycle) else lifecycle
    rows = [{"direction": r.direction, "kind": r.kind, "state": r.state,
             "severity": None if r.severity is None or r.severity != r.severity else float(r.severity),
             "opened": r.opened.isoformat() if hasattr(r.opened, "isoformat") else str(r.opened)}
            for r in mine.itertuples() if r.state != "resolved"]
    lookup = judged.attrs.get("outcome_rates")
    if lookup is not None:
        # What alerts like these led to in the saved replay, as the scan adds to its alerts.
        from ..outcomes import rate_sentence

        horizon = judged.attrs["summary"]["at_risk"]["horizon_days"]
        for r in rows:
            if r["severity"] is not None:
                r["outcome_rates"] = lookup(r["kind"], r["severity"])
                r["outcome_sentence"] = rate_sentence(r["kind"], r["direction"], r["outcome_rates"], horizon)
    until, reason = judged.attrs["snoozed"].get(account, (None, None))
    return {"alerted": any(r["severity"] is not None for r in rows), "alerts": rows,
            "snoozed_until": until, "snooze_reason": reason}


SNOOZE_LONGEST_DAYS = 366


def snooze(account: str, until, *, reason: str | None = None, force: bool = False, db: str | None = None,
           config=None, today: date | None = None) -> dict:
    """Hide ``account``'s alerts until ``until`` (inclusive); the latest snooze of an account
    wins, so a shorter one shortens it.  An end before ``today`` or more than a year after it
    is refused unless ``force`` (a typo would otherwise hide an account for good, or not at all)."""
    cfg = _config(config)
    until = parse_day(until, "--until")
    today = today or datetime.now(timezone.utc).date()
    if not force and until < today:
        raise UsageError(f"--until {until} is in the past (today is {today}); to end a snooze use --lift, "
                         "or give --force to record it anyway")
    if not force and until > today + timedelta(days=SNOOZE_LONGEST_DAYS):
        raise UsageError(f"--until {until} is more than a year away; give --force if that is meant")
    with store_mod.open_store(db or cfg.store_path, must_exist=True) as st:
        if not st.has_account(account):
            raise InputError(f"no account {account!r} in the store{_nearest_ids(st, account)}")
        st.add_snooze(account, until, reason)
    return {"account": account, "until": until.isoformat(), "reason": reason}


def lift_snooze(account: str, *, db: str | None = None, config=None) -> dict:
    """Show ``account``'s alerts again: its snoozes are removed."""
    cfg = _config(config)
    with store_mod.open_store(db or cfg.store_path, must_exist=True) as st:
        removed = st.lift_snooze(account)
    if not removed:
        raise InputError(f"{account!r} has no snooze to lift; `ebbwatch snooze --list` shows the snoozes")
    return {"account": account, "lifted": removed}


def snoozes(*, db: str | None = None, config=None, today: date | None = None):
    """The snoozes in force on ``today``: a frame ``account, until, reason, set_at``."""
    import pandas as pd

    cfg = _config(config)
    today = today or datetime.now(timezone.utc).date()
    with store_mod.open_store(db or cfg.store_path, read_only=True, must_exist=True) as st:
        found = st.snoozed_accounts(today)
    rows = [(a, u.isoformat(), r, c.isoformat(timespec="seconds") if c else None) for a, (u, r, c) in sorted(found.items())]
    return pd.DataFrame(rows, columns=["account", "until", "reason", "set_at"])


def alert_history(*, states=None, accounts=None, start=None, end=None, db: str | None = None, config=None,
                  today: date | None = None):
    """The recorded alert log (one row per recorded scan day and open alert), newest first,
    narrowed to ``states``, ``accounts`` and the days ``start`` .. ``end``; the columns
    ``snoozed_until`` and ``snooze_reason`` say which accounts are snoozed ``today``."""
    from ..alerts import LIFECYCLE_STATES

    unknown = set(states or ()) - set(LIFECYCLE_STATES)
    if unknown:
        raise UsageError(f"unknown state(s) {', '.join(sorted(unknown))}; expected {', '.join(LIFECYCLE_STATES)}")
    start, end = parse_day(start, "--from"), parse_day(end, "--to")
    cfg = _config(config)
    today = today or datetime.now(timezone.utc).date()
    with store_mod.open_store(db or cfg.store_path, read_only=True) as st:
        log = st.alert_log(states, accounts, start, end)
        snoozed = st.snoozed_accounts(today)
    log["snoozed_until"] = [snoozed[a][0].isoformat() if a in snoozed else None for a in log["account"]]
    log["snooze_reason"] = [snoozed[a][1] if a in snoozed else None for a in log["account"]]
    return log
