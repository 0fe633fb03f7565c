"""``ebbwatch explain`` as text for a person."""

from __future__ import annotations

from ..textsafe import plain_text


def _num(value, fmt="{:.3g}"):
    return "-" if value is None else fmt.format(value)


def _changepoint(cp: dict) -> str:
    if not cp["onset"]:
        return "none in the last 13 weeks"
    if cp["level_before"] is None or cp["level_after"] is None:
        return f"onset {cp['onset']} (where the most telling window starts; no single step found)"
    return f"onset {cp['onset']}, level {_num(cp['level_before'])} -> {_num(cp['level_after'])}/day"


def _recent(r: dict) -> str:
    level = f"level {_num(r['level'])}/day" if r["level"] is not None else "no level (days missing)"
    if r["usual_level"] is None:
        usual = "no usual level yet"
    else:
        change = "" if r["change_pct"] is None else f" ({r['change_pct']:+.0f}%)"
        usual = f"usual {_num(r['usual_level'])}/day{change}"
    rank = "no history of its own to rank against" if r["percentile"] is None else \
        f"percentile {r['percentile']:.1f} of its history"
    return (f"{level} vs {usual}, {rank}; over every window P(this low) {_num(r['p_low'])}, "
            f"P(this high) {_num(r['p_high'])}")


def _share(d: dict) -> str:
    """An event driver's share of the change, in plain words."""
    share = d["share"]
    if share is None:
        return ""
    if share < 0:
        return " (moved against the change)"
    if share > 1:
        return " (more than the whole change: other events moved the other way)"
    return f" ({100 * share:.0f}% of the change)"


def _today(today: dict) -> str:
    parts = []
    for a in today["alerts"]:
        if a["severity"] is None:
            parts.append(f"{a['kind']} alert open since {a['opened']}, {a['state']} (no longer significant "
                         "today, still far from its usual level)")
        else:
            parts.append(f"{a['kind']}, severity {a['severity']:.1f}, {a['state']} (open since {a['opened']})"
                         + (f". {a['outcome_sentence']}" if a.get("outcome_sentence") else ""))
    text = ("alerted: " if today["alerted"] else "not alerted" + ("; " if parts else "")) + "; ".join(parts)
    if today["snoozed_until"]:
        reason = f": {plain_text(today['snooze_reason'])}" if today["snooze_reason"] else ""
        text += f"; snoozed until {today['snoozed_until']}{reason} (hidden from the scan)"
    return text


def render_explanation(info: dict) -> str:
    r, cp, tr, si, b = info["recent"], info["changepoint"], info["trend"], info["silence"], info["baseline"]
    lines = [
        f"{plain_text(info['name'])} ({plain_text(info['account'])}) as of {info['as_of']}: {info['status'].replace('_', ' ')}",
        f"  today          {_today(info['today'])}",
        f"  baseline       {b['why']} [{b['model']}]",
        f"                 reference ends {b['reference_ends']}; steady growth {_num(b['growth_pct_year'], '{:+.0f}')}% a year",
        "  weekday        " + "  ".join(f"{d} {v:.2f}" for d, v in info["weekday_factors"].items())
        + (f" (this shape since {info['weekday_shape_since']})" if info.get("weekday_shape_since") else ""),
        f"  last {r['window_days']} days".ljust(17) + _recent(r),
        "  changepoint    " + _changepoint(cp),
        "  segments       " + ("; ".join(f"{s['start']} to {s['end']} at {_num(s['level'])}/day" for s in info["segments"])
                               or "-"),
        "  trend          " + (f"Theil-Sen {_num(tr['theil_sen_change_pct'], '{:+.0f}')}% over {tr['weeks']} weeks, "
                               f"Mann-Kendall P(falling by chance) {_num(tr['mann_kendall_p_down'])}" if tr["weeks"]
                               else "too few whole weeks to tell a trend"),
        f"  silence        {si['silent_days']} day(s) since last activity (P {_num(si['p_silence'])})",
        f"  p-values       down {_num(info['p_down'])}, up {_num(info['p_up'])} (before fleet-wide correction)",
    ]
    if info["masked_days_in_window"]:
        lines.append(f"  masked         data-gap days in the window: {', '.join(info['masked_days_in_window'])}")
    events = [d for d in info["drivers"] if d["type"] == "event"][:5]
    users = [d for d in info["drivers"] if d["type"] == "user"]
    if events:
        lines.append("  events         " + "; ".join(
            f"{plain_text(d['event'])} {d['expected']:.0f} expected, {d['observed']:.0f} seen" + _share(d)
            for d in events))
    if users:
        lines.append("  users          " + "; ".join(
            f"{plain_text(d['user'])} {d['change']} ({100 * d['baseline_share']:.0f}% of usual activity)" for d in users))
    return "\n".join(lines) + "\n"
