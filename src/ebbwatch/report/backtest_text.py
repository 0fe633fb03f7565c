"""``ebbwatch backtest`` as text."""

from __future__ import annotations


def _pct(v):
    return "-" if v is None else f"{100 * v:.0f}%"


def _days(v):
    return "-" if v is None else f"{v:.0f}"


def render_backtest(r: dict) -> str:
    extra = r.get("lookback_days_replayed", 0)
    lines = [f"Backtest {r['from']} .. {r['to']} every {r['step_days']} day(s): {r['days_replayed']} days judged "
             f"(and {extra} day(s) before them, to tell new alerts from running ones) in {r['seconds']:.0f} s; "
             f"lead >= {r['lead_days']} days within {r['horizon_days']} days", ""]
    lines.append(f"{'outcome':<12}{'count':>7}{'recall@lead':>13}{'caught':>8}{'lead q1/med/q3':>18}{'precision':>11}{'alerted':>9}")
    for kind, m in r["outcomes"].items():
        lead = f"{_days(m['lead_days_q1'])}/{_days(m['median_lead_days'])}/{_days(m['lead_days_q3'])}"
        lines.append(f"{kind:<12}{m['count']:>7}{_pct(m['recall_at_lead']):>13}{m['caught_within_horizon']:>8}{lead:>18}"
                     f"{_pct(m['precision']):>11}{m['alerted_accounts']:>9}")
    for kind, m in r["outcomes"].items():
        if m.get("outside_replay"):
            lines.append(f"  not counted: {m['outside_replay']} {kind} outcome(s) with no replayed day between "
                         f"{r['horizon_days']} and {r['lead_days']} days before them (before or after the replay)")
    unknown = r.get("outcomes_for_unknown_accounts") or {}
    if unknown.get("outcomes"):
        names = ", ".join(unknown["examples"]) + (", ..." if unknown["accounts"] > len(unknown["examples"]) else "")
        lines.append(f"  left out: {unknown['outcomes']} outcome(s) of {unknown['accounts']} account(s) the store "
                     f"does not hold ({names}); a misspelt id?")
    null_days = r.get("fleet_null_days") or {}
    if any(null_days.values()):
        then = ("each account read against the fleet's spread on them" if r.get("read_against_fleet") else
                "[scan] read_against_fleet = true reads each account against the fleet's spread on them")
        lines.append(f"  days the fleet's typical account itself moved: {null_days.get('down', 0)} falling, "
                     f"{null_days.get('up', 0)} rising ({then})")
    fa = r["false_alerts_per_100_account_months"]
    lines += ["", f"new alerts on the days judged {r['alert_episodes']}, {r['alerts_per_day']:.2f} a day; false alerts "
                  f"{'-' if fa is None else f'{fa:.2f}'} per 100 account-months", "",
              "severity sweep (min_severity: alerts/day, false/100 account-months, recall@lead and precision per outcome)"]
    for m in r["sweep"]:
        per = "  ".join(f"{k} {_pct(v['recall_at_lead'])}/{_pct(v['precision'])}" for k, v in m["outcomes"].items())
        fa = m["false_alerts_per_100_account_months"]
        lines.append(f"  >= {m['min_severity']:>5.1f}: {m['alerts_per_day']:.2f}/day, {'-' if fa is None else f'{fa:.2f}'}  {per}")
    cal = r.get("calibration")
    if cal:
        if cal.get("min_severity") is None:
            lines += ["", f"calibration: {cal['note']}"]
        else:
            lines += ["", f"calibration: min_severity {cal['min_severity']} gives {cal['alerts_per_day']:.2f} alerts a day; "
                          "paste into ebbwatch.toml:", cal["config"].rstrip()]
    return "\n".join(lines) + "\n"
