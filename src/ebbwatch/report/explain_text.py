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


def render_explanation(info: dict) -> str:
    r, cp, tr, si, b = info["recent"], info["changepoint"], info["trend"], info["silence"], info["baseline"]
    lines = [
        f"{plain_text(info['name'])} ({plain_text(info['account'])}) as of {info['as_of']}: {info['status'].replace('_', ' ')}",
        f"  baseline       {b['model']}: {b['why']}",
        f"                 reference ends {b['reference_ends']}; steady growth {_num(b['growth_pct_year'], '{:+.0f}')}% a year",
        "  weekday        " + "  ".join(f"{d} {v:.2f}" for d, v in info["weekday_factors"].items()),
        f"  last {r['window_days']} days   level {_num(r['level'])}/day vs usual {_num(r['usual_level'])}/day "
        f"({_num(r['change_pct'], '{:+.0f}')}%), percentile {_num(r['percentile'], '{:.1f}')}, "
        f"P(this low) {_num(r['p_low'])}, P(this high) {_num(r['p_high'])}",
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
            f"{plain_text(d['event'])} {d['expected']:.0f} expected, {d['observed']:.0f} seen"
            + ("" if d["share"] is None else f" ({100 * d['share']:.0f}% of the change)") for d in events))
    if users:
        lines.append("  users          " + "; ".join(
            f"{plain_text(d['user'])} {d['change']} ({100 * d['baseline_share']:.0f}% of usual activity)" for d in users))
    return "\n".join(lines) + "\n"
