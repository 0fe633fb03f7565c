"""Outcome rates and the value at risk, in words for the terminal."""

from __future__ import annotations


def _amount(value: float, basis: str) -> str:
    return f"MRR {value:,.0f}" if basis == "mrr" else f"{value:,.0f} events a month"


def at_risk_lines(at_risk: dict) -> list[str]:
    """The scan's closing lines on what today's alerts put at stake, weighted by how often alerts
    like them were followed by a cancellation (downward) or an expansion (upward) in the saved
    replay, with a 90% interval."""
    basis, replay = at_risk["basis"], at_risk["replay"]
    down, up = at_risk["down"], at_risk["up"]
    what = "recurring revenue (MRR)" if basis == "mrr" else "usual activity (no MRR in accounts.csv)"
    lines = [f"At stake, from the outcome rates of the replay {replay['from']} .. {replay['to']} "
             f"(saved {replay['saved_at'][:10]}), in {what}:"]
    lines.append(f"  at risk: {_amount(down['expected'], basis)} expected to cancel within {at_risk['horizon_days']} days "
                 f"(90% interval {down['low']:,.0f}–{down['high']:,.0f}), {down['accounts']} account(s) with downward "
                 "alerts and a rate")
    lines.append(f"  expansion potential: {_amount(up['expected'], basis)} in accounts expected to expand "
                 f"(90% interval {up['low']:,.0f}–{up['high']:,.0f}), {up['accounts']} account(s) with upward alerts "
                 "and a rate")
    return lines


def saved_rates_line(saved: dict) -> str:
    """What ``backtest --save-rates`` kept."""
    return (f"Saved outcome rates: {saved['alert_episodes']:,} alert episodes and {saved['base_accounts']:,} "
            f"account-periods without an alert, replay days {saved['from']} .. {saved['to']} whose "
            f"{saved['horizon_days']}-day horizon had passed by {saved['known_until']}. "
            "`ebbwatch scan` now adds them to its alerts.")
