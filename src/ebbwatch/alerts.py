"""From per-account scores to ranked alerts: multiple-testing control, effect size, budget,
kinds, severity and the one-line message."""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
from scipy import stats

from .frames import ALERT_COLUMNS, ALERT_KINDS
from .textsafe import plain_text

SCHEMA_VERSION = 2
EPOCH = date(1970, 1, 1)
MAX_SEVERITY = 99.0


def day_to_date(day: int) -> date:
    return EPOCH + timedelta(days=int(day))


def benjamini_hochberg(p_values, family_size: int | None = None) -> np.ndarray:
    """BH-adjusted p-values (q-values), Benjamini & Hochberg (1995).

    ``family_size``: the number of hypotheses in the family when ``p_values`` holds only part of
    it.  Every p-value of the family at or below a level ``alpha`` must be present; then each
    q-value at or below ``alpha`` is exact (a left-out p-value above ``alpha`` cannot lower it),
    which lets account blocks pass on only their small p-values.  Without it the whole family is
    given and scipy's ``false_discovery_control`` computes the q-values.
    """
    p = np.clip(np.asarray(p_values, float), 0.0, 1.0)
    if p.size == 0:
        return p
    if family_size is None:
        return stats.false_discovery_control(p, method="bh")
    if family_size < p.size:
        raise ValueError(f"family_size {family_size} is smaller than the {p.size} p-values given")
    # The same steps as scipy's implementation, with the family's size in place of len(p).
    order = np.argsort(p)
    ranked = p[order] * (family_size / np.arange(1, p.size + 1))
    ranked = np.minimum.accumulate(ranked[::-1])[::-1]
    q = np.empty_like(p)
    q[order] = np.clip(ranked, 0.0, 1.0)
    return q


# The score columns select_alerts reads (score frames from before the window tests lack some).
_SELECTION_COLUMNS = ("account", "p_down", "p_up", "change_pct", "change_down_pct", "change_up_pct", "window_down",
                      "window_up", "trend_change_pct", "percentile", "percentile_down", "percentile_up", "down_kind",
                      "onset_day", "level", "baseline_level", "model", "silent_days")


def select_alerts(
    scores: pd.DataFrame,
    *,
    as_of: date,
    names: dict | None = None,
    window_days: int = 7,
    fdr: float = 0.01,
    max_alerts: int | None = 50,
    min_change_pct: float = 30.0,
    kinds=None,
    min_severity: float = 0.0,
    family_size: int | None = None,
) -> pd.DataFrame:
    """Alerts for the accounts in ``scores`` (``detect.SCORE_COLUMNS``, the whole fleet).

    Each judged account contributes two p-values (down, up) to one Benjamini–Hochberg family, so
    the expected share of false alerts among those raised stays at ``fdr`` however large the fleet.
    An alert also needs a change of at least ``min_change_pct`` (a stop always qualifies), and at
    most ``max_alerts`` are kept, most severe first.  Returns a frame with ``frames.ALERT_COLUMNS``.
    ``family_size``: when ``scores`` holds only the accounts with a p-value at or below ``fdr``,
    the whole family's size (twice the fleet's judged accounts); see :func:`benjamini_hochberg`.
    """
    if kinds:
        unknown = set(kinds) - set(ALERT_KINDS)
        if unknown:
            raise ValueError(f"unknown alert kind(s) {', '.join(sorted(unknown))}; expected {', '.join(ALERT_KINDS)}")
    names = names or {}
    # Only the columns read here are copied (the per-account weekday factors are Python objects:
    # copying them for 100,000 accounts cost more than the rest of this function's pandas work).
    used = [name for name in _SELECTION_COLUMNS if name in scores.columns]
    judged = scores.loc[(scores["status"] == "judged").to_numpy(), used].reset_index(drop=True)
    n = len(judged)
    q = benjamini_hochberg(np.concatenate([judged["p_down"].to_numpy(float), judged["p_up"].to_numpy(float)]),
                           family_size=family_size)
    q_down, q_up = q[:n], q[n:]
    # Each direction's change is the one its own most telling window saw (score frames from
    # before the window tests carry one change_pct for both).
    change_down = judged.get("change_down_pct", judged["change_pct"]).to_numpy(float)
    change_up = judged.get("change_up_pct", judged["change_pct"]).to_numpy(float)
    window_down = judged.get("window_down", pd.Series(window_days, index=judged.index)).to_numpy()
    window_up = judged.get("window_up", pd.Series(window_days, index=judged.index)).to_numpy()
    trend = judged["trend_change_pct"].to_numpy(float)
    # The percentile of the window each direction's alert reports (older score frames: one).
    percentile_down = judged.get("percentile_down", judged["percentile"]).to_numpy(float)
    percentile_up = judged.get("percentile_up", judged["percentile"]).to_numpy(float)
    kind_down = judged["down_kind"].to_numpy(object)
    big_drop = (change_down <= -min_change_pct) | ((kind_down == "slide") & (np.nan_to_num(trend) <= -min_change_pct))
    effect_down = np.where(kind_down == "stop", True, big_drop)
    effect_up = change_up >= min_change_pct
    down = (q_down <= fdr) & effect_down
    up = (q_up <= fdr) & effect_up
    both = down & up
    down &= ~both | (q_down <= q_up)
    up &= ~down
    rows = []
    # Columns as plain arrays: a row lookup per alert (DataFrame.iloc) costs ~0.25 ms, which
    # adds up over thousands of alerts.
    col = {name: judged[name].to_numpy() for name in ("account", "down_kind", "onset_day", "percentile",
                                                      "level", "baseline_level", "model",
                                                      "silent_days", "trend_change_pct")}
    for direction, mask, qv, pv in (("down", down, q_down, judged["p_down"].to_numpy(float)),
                                    ("up", up, q_up, judged["p_up"].to_numpy(float))):
        for i in np.flatnonzero(mask):
            kind = col["down_kind"][i] if direction == "down" else "surge"
            if kinds and kind not in kinds:
                continue
            severity = float(min(MAX_SEVERITY, -np.log10(max(qv[i], 1e-300))))
            if severity < min_severity:
                continue
            account, onset_day = col["account"][i], col["onset_day"][i]
            change = change_down[i] if direction == "down" else change_up[i]
            window = int(window_down[i] if direction == "down" else window_up[i])
            baseline_level, trend = col["baseline_level"][i], col["trend_change_pct"][i]
            alert = {
                "account": account,
                "name": names.get(account) or account,
                "kind": kind,
                "direction": direction,
                "as_of": as_of.isoformat(),
                "severity": round(severity, 2),
                "p_value": float(pv[i]),
                "q_value": float(qv[i]),
                "percentile": _rounded(percentile_down[i] if direction == "down" else percentile_up[i], 2),
                "change_pct": round(float(change), 1) if np.isfinite(change) else None,
                "level": round(float(col["level"][i]), 3),
                "baseline_level": round(float(baseline_level), 3) if np.isfinite(baseline_level) else None,
                "onset": None if onset_day < 0 else day_to_date(onset_day).isoformat(),
                "baseline": col["model"][i],
                "silent_days": int(col["silent_days"][i]),
                "trend_change_pct": None if not np.isfinite(trend) else round(float(trend), 1),
                "window_days": window,
            }
            alert["state"] = "new"
            alert["drivers"] = []
            alert["message"] = alert_message(alert, window)
            rows.append(alert)
    columns = list(ALERT_COLUMNS) + ["silent_days", "trend_change_pct"]
    alerts = pd.DataFrame(rows, columns=columns)
    if len(alerts):
        alerts["_abs"] = alerts["change_pct"].abs().fillna(0)
        alerts = alerts.sort_values(["severity", "_abs", "account"], ascending=[False, False, True]).drop(columns="_abs")
        if max_alerts is not None:
            alerts = alerts.head(max_alerts)
    return alerts.reset_index(drop=True)


def _rounded(value, digits: int):
    """``value`` rounded, or None when it is not a finite number."""
    return round(float(value), digits) if value is not None and np.isfinite(value) else None


def _given(value):
    """``value``, or None when it is missing (None, or the NaN a DataFrame keeps instead)."""
    return None if value is None or value != value else value


def _last_days(days: int) -> str:
    return "the last day" if int(days) == 1 else f"the last {int(days)} days"


def alert_message(alert: dict, window_days: int, drivers: str = "") -> str:
    """One plain sentence for a chat channel; data values are made safe for plain text.
    ``drivers``: a short clause naming what moved (already made plain).  A missing change,
    onset or trend may be None or NaN (a row read back from the alerts frame)."""
    who = plain_text(alert["name"])
    if alert["name"] != alert["account"]:
        who = f"{who} ({plain_text(alert['account'])})"
    change = _given(alert["change_pct"])
    onset = _given(alert["onset"])
    since = f" since {onset}" if onset else ""
    if alert["kind"] == "stop":
        text = f"{who}: no activity for {alert['silent_days']} days{since}, unusual for this account"
    elif alert["kind"] == "slide":
        slid = _given(alert.get("trend_change_pct"))
        amount = f"{abs(change):.0f}%" if change is not None else "steadily"
        text = f"{who}: activity has slid {amount} below its usual level{since}"
        if slid is not None:
            text += f" (trend {slid:+.0f}% over recent weeks)"
    elif alert["kind"] == "drop":
        amount = f"{abs(change):.0f}%" if change is not None else "sharply"
        text = f"{who}: activity down {amount} over {_last_days(window_days)} vs its usual level{since}"
    else:
        amount = f"{change:.0f}%" if change is not None else "from almost nothing"
        text = f"{who}: activity up {amount} over {_last_days(window_days)} vs its usual level{since}"
    rank = history_rank(_given(alert["percentile"]), alert["direction"])
    rank = f"; {rank}" if rank else ""
    tail = f"; {drivers}" if drivers else ""
    return f"{text}{rank} (severity {alert['severity']:.1f}){tail}."


def history_rank(percentile, direction: str) -> str:
    """Where the alert's window falls in the account's history, in words: "the lowest in its
    history", "lower than 97% of its history"; empty without a history to rank against.
    ``percentile``: the window's percentile (0-100, ``WindowTests.percentile_``)."""
    if percentile is None:
        return ""
    beyond = 100.0 - percentile if direction == "down" else percentile
    if beyond >= 100.0:
        return f"the {'lowest' if direction == 'down' else 'highest'} in its history"
    amount = f"{beyond:.1f}" if beyond >= 99.5 else f"{beyond:.0f}"
    return f"{'lower' if direction == 'down' else 'higher'} than {amount}% of its history"


# -- lifecycle -------------------------------------------------------------------------------
LIFECYCLE_STATES = ("new", "ongoing", "escalated", "clearing", "resolved")
RESOLVE_DAYS = 3  # an open alert absent this many recorded days is resolved; the next one is new
OPEN_STATES = ("new", "ongoing", "escalated", "clearing")


def still_changed(scores: pd.DataFrame, min_change_pct: float = 30.0) -> set:
    """``(account, direction)`` pairs whose last week is still beyond its baseline by at least
    ``min_change_pct`` in that direction (``level`` against ``baseline_level``, both
    weekday-adjusted, of ``detect.SCORE_COLUMNS``), or that are still silent after a stop.

    An alert whose p-value has faded is not over while the account stays this far from its
    usual level: as days pass the tests lose the contrast (the reference fills with the new
    level) long before the account recovers.
    """
    if not len(scores):
        return set()
    judged = scores.loc[(scores["status"] == "judged").to_numpy(),
                        ["account", "level", "baseline_level", "down_kind", "silent_days"]]
    level = judged["level"].to_numpy(float)
    baseline = judged["baseline_level"].to_numpy(float)
    with np.errstate(invalid="ignore"):
        down = (level <= (1 - min_change_pct / 100.0) * baseline) & (baseline > 0)
        down |= (judged["down_kind"].to_numpy(object) == "stop") & (judged["silent_days"].to_numpy(float) >= 2)
        up = (level >= (1 + min_change_pct / 100.0) * baseline) & (baseline > 0)
    accounts = judged["account"].to_numpy(object)
    return {(a, "down") for a in accounts[down]} | {(a, "up") for a in accounts[up]}


def advance_lifecycle(previous: pd.DataFrame, alerts: pd.DataFrame, as_of: date, *,
                      escalate_step: float = 3.0, resolve_days: int = RESOLVE_DAYS,
                      holding: set = frozenset()) -> pd.DataFrame:
    """Each open alert's state on ``as_of`` from its state on the last recorded day before it.

    ``previous``: latest rows per account and direction (columns of the alert log); ``alerts``:
    today's alerts; ``holding``: ``(account, direction)`` pairs still changed (:func:`still_changed`).
    An alert is ``new`` the first day, ``ongoing`` while it holds, ``escalated`` on a day its
    severity exceeds its previous peak by ``escalate_step``.  An open alert not raised today stays
    ``ongoing`` (no severity) while the account is still changed; once it is back within its
    baseline it is ``clearing`` until it has been so ``resolve_days`` recorded days, then
    ``resolved`` (and a later alert is new again).  Returns the rows to log for ``as_of``.
    """
    rows = []
    prev = {(r.account, r.direction): r for r in previous.itertuples()} if len(previous) else {}
    seen = set()
    for alert in alerts.itertuples():
        key = (alert.account, alert.direction)
        seen.add(key)
        before = prev.get(key)
        if before is None or before.state == "resolved":
            state, opened, peak = "new", as_of, alert.severity
        else:
            peak_before = before.peak_severity if before.peak_severity == before.peak_severity else 0.0
            state = "escalated" if alert.severity >= peak_before + escalate_step else "ongoing"
            opened, peak = before.opened, max(peak_before, alert.severity)
        rows.append({"as_of": as_of, "account": alert.account, "direction": alert.direction, "kind": alert.kind,
                     "state": state, "severity": alert.severity, "peak_severity": peak, "opened": opened,
                     "quiet_days": 0, "message": alert.message})
    for key, before in prev.items():
        if key in seen or before.state == "resolved":
            continue
        if key in holding:
            rows.append({"as_of": as_of, "account": before.account, "direction": before.direction,
                         "kind": before.kind, "state": "ongoing", "severity": None,
                         "peak_severity": before.peak_severity, "opened": before.opened, "quiet_days": 0,
                         "message": before.message})
            continue
        quiet = int(before.quiet_days or 0) + 1
        rows.append({"as_of": as_of, "account": before.account, "direction": before.direction, "kind": before.kind,
                     "state": "resolved" if quiet >= resolve_days else "clearing", "severity": None,
                     "peak_severity": before.peak_severity, "opened": before.opened, "quiet_days": quiet,
                     "message": before.message})
    columns = ["as_of", "account", "direction", "kind", "state", "severity", "peak_severity", "opened",
               "quiet_days", "message"]
    return pd.DataFrame(rows, columns=columns)
