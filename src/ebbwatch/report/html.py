"""The HTML report: one self-contained file (inline CSS and SVG, no scripts, no fetches).

Every value that came from the data goes through ``html.escape``.  Colours are our own and
carry no meaning alone: direction is also a shape (▼ / ▲) and a word, the band is a light fill,
the window a hatched area and the onset a dashed line, so the charts read in greyscale too.
"""

from __future__ import annotations

import html

from .charts import INK, account_chart, fleet_chart, sparkline
from .tables import fleet_null_sentences

# Direction: a burnt orange for falls and a blue for rises, a pair that colour-blind readers tell
# apart; both reach 4.5:1 on white (WCAG 2.1 text contrast), and the solid/dashed border and the
# ▼/▲ arrow still say the direction in greyscale.
DOWN = "#a6470a"
UP = "#2166ac"

CSS = f"""
body {{ font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: {INK}; margin: 2rem auto;
       max-width: 1100px; padding: 0 1rem; line-height: 1.4; }}
h1 {{ font-size: 1.5rem; margin-bottom: .2rem; }} h2 {{ font-size: 1.15rem; margin-top: 2rem; }}
.muted {{ color: #56636e; }}
.tiles {{ display: flex; flex-wrap: wrap; gap: .8rem; }}
.tile {{ border: 1px solid #c9d2d8; border-radius: 6px; padding: .6rem .9rem; min-width: 9rem; }}
.tile b {{ display: block; font-size: 1.4rem; }}
.cards {{ display: grid; grid-template-columns: repeat(auto-fill, minmax(330px, 1fr)); gap: 1rem; }}
.card {{ border: 1px solid #c9d2d8; border-radius: 6px; padding: .7rem .9rem; }}
.card.down {{ border-left: 5px solid {DOWN}; }} .card.up {{ border-left: 5px dashed {UP}; }}
.card.down .dir {{ color: {DOWN}; }} .card.up .dir {{ color: {UP}; }}
.card h3 {{ font-size: 1rem; margin: 0 0 .3rem 0; }}
.card p {{ margin: .25rem 0; font-size: .9rem; }}
.tag {{ display: inline-block; border: 1px solid {INK}; border-radius: 3px; padding: 0 .35rem; font-size: .8rem; }}
table {{ border-collapse: collapse; font-size: .9rem; }} td, th {{ padding: .2rem .6rem; text-align: left; }}
th {{ border-bottom: 1px solid #c9d2d8; }}
svg {{ display: block; }}
svg.chart {{ width: 100%; height: auto; margin: .3rem 0; }}
.index td {{ vertical-align: middle; }} .index td.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
.index tr:nth-child(even) {{ background: #f4f6f7; }}
"""


def _account_facts(card) -> str:
    """"; MRR 1,250; segment team" from accounts.csv, as far as it gives them."""
    facts = []
    if card.get("mrr") is not None:
        facts.append(f"MRR {card['mrr']:,.0f}")
    if card.get("segment"):
        facts.append(f"segment {esc(card['segment'])}")
    return "".join(f"; {f}" for f in facts)


def esc(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _overview(data: dict) -> list[str]:
    s = data["summary"]
    kinds = ", ".join(f"{esc(k)} {v}" for k, v in sorted(data["by_kind"].items())) or "none"
    states = ", ".join(f"{esc(k)} {v}" for k, v in sorted(data["by_state"].items())) or "none"
    if data["share_basis"] == "mrr":
        stake = (f'<div class="tile">MRR in accounts with open downward alerts<b>{data["down_at_stake"]:,.0f}</b>'
                 f'<span class="muted">{100 * data["down_share"]:.1f}% of MRR, {data["down_accounts"]} account(s)</span></div>')
    else:
        stake = (f'<div class="tile">activity in accounts with open downward alerts<b>{100 * data["down_share"]:.1f}%</b>'
                 f'<span class="muted">of the last 28 days\' activity, {data["down_accounts"]} account(s); '
                 'no MRR in accounts.csv</span></div>')
    return ['<h2>Fleet overview</h2><div class="tiles">',
            f'<div class="tile">accounts judged<b>{s["judged"]:,}</b></div>',
            f'<div class="tile">alerts<b>{data["n_alerts"]}</b><span class="muted">{kinds}</span></div>',
            f'<div class="tile">states<b>{sum(data["by_state"].values())}</b><span class="muted">{states}</span></div>',
            stake, *_risk_tiles(data.get("at_risk")), "</div>", *_risk_note(data.get("at_risk"))]


def _risk_tiles(risk) -> list[str]:
    """MRR at risk and expansion potential, weighted by the saved outcome rates (issue 23)."""
    if not risk:
        return []
    unit = "MRR" if risk["basis"] == "mrr" else "events a month"
    down, up = risk["down"], risk["up"]
    return [f'<div class="tile">{unit} at risk<b>{down["expected"]:,.0f}</b><span class="muted">90%: '
            f'{down["low"]:,.0f}–{down["high"]:,.0f}, {down["accounts"]} account(s)</span></div>',
            f'<div class="tile">{unit} expansion potential<b>{up["expected"]:,.0f}</b><span class="muted">90%: '
            f'{up["low"]:,.0f}–{up["high"]:,.0f}, {up["accounts"]} account(s)</span></div>']


def _risk_note(risk) -> list[str]:
    if not risk:
        return []
    replay = risk["replay"]
    what = "MRR" if risk["basis"] == "mrr" else "usual monthly activity (accounts.csv gives no MRR)"
    return [f'<p class="muted">At risk: the {what} of accounts with downward alerts, each weighted by how often '
            f'replayed alerts of its kind and strength were followed by a cancellation within {risk["horizon_days"]} '
            'days; expansion potential: the same for upward alerts and expansions. The intervals simulate each '
            'account\'s outcome from its rate\'s uncertainty. Accounts whose kind and strength of alert never '
            f'occurred in the replay count in neither. Rates from the replay {esc(replay["from"])} .. '
            f'{esc(replay["to"])}, saved {esc(replay["saved_at"][:10])}: frequencies in this product\'s own history, '
            'not a prediction about any person.</p>']


def _share(cell: dict) -> str:
    mark = " <b>(holds)</b>" if cell["holds"] else ""
    return f'{100 * cell["share"]:.0f}% vs {100 * cell["rest"]:.0f}% (q {cell["q"]:.2g}){mark}'


def _segments(rows: list[dict]) -> list[str]:
    """The segment table: today's alerts against the rest of the fleet, and the replay's rates."""
    if not rows:
        return []
    replayed = any("replay_down" in r for r in rows)

    def replay(cell):
        if not cell:
            return "–"
        rate = "too few" if cell["rate"] is None else f'{100 * cell["rate"]:.0f}%'
        return f'{rate} ({cell["k"]} of {cell["n"]})'

    body = "".join(
        f'<tr><td>{esc(r["segment"])}</td><td class="num">{r["accounts"]:,}</td>'
        f'<td>{esc(", ".join(f"{k} {v}" for k, v in r["alerts"].items()) or "none")}</td>'
        f'<td>{_share(r["down"])}</td><td>{_share(r["up"])}</td>'
        + (f'<td>{replay(r.get("replay_down"))}</td><td>{replay(r.get("replay_up"))}</td>' if replayed else "")
        + "</tr>" for r in rows)
    return ['<h2>Segments</h2>',
            '<p class="muted">Each segment of accounts.csv against the rest of the fleet: the share of its accounts with '
            'open downward and upward alerts, tested with Fisher\'s exact test and Benjamini&ndash;Hochberg across '
            'segments and directions; "holds" marks a difference with q under 0.05. A difference without it may be '
            'chance.' + (' The replay columns: of the segment\'s replayed alert episodes, the share followed by a '
                         'cancellation (downward) or an expansion (upward) within the horizon.' if replayed else "")
            + '</p>',
            '<table class="segments"><thead><tr><th>Segment</th><th>Accounts</th><th>Open alerts</th>'
            '<th>With downward alerts</th><th>With upward alerts</th>'
            + ('<th>Replay: cancelled after a downward alert</th><th>Replay: expanded after an upward alert</th>'
               if replayed else "")
            + f'</tr></thead><tbody>{body}</tbody></table>']


def _fleet_words(fleet: dict) -> str:
    """What the fleet's size let the factor read, or nothing for a fleet that reads it all."""
    if fleet.get("large_moves_only"):
        return (f'<p>With {fleet["voting_accounts"]} voting accounts the factor divides out only the days '
                f'nearly all of them moved on together; {fleet["needed"]} are needed to read smaller moves.</p>')
    if fleet.get("estimated", True):
        return ""
    return (f'<p>No fleet-wide factor: {fleet["voting_accounts"]} account(s) vote, '
            f'{fleet["needed_for_large_moves"]} are needed to tell a holiday from a few '
            "accounts' own changes, so each account is judged on its own.</p>")


def _fleet_section(data: dict) -> list[str]:
    s, fleet = data["summary"], data["fleet"]
    masked = [i for i, m in enumerate(fleet["masked"]) if m]
    dips = [i for i, f in enumerate(fleet["factor"]) if f < 0.9 and not fleet["masked"][i]]
    nulls = [f"<p>{esc(sentence[0].upper() + sentence[1:])}.</p>"
             for sentence in fleet_null_sentences(s.get("fleet_null"))]
    return ['<h3>Fleet-wide daily factor</h3>',
            _fleet_words(s.get("fleet_factor", {})), *nulls,
            '<p class="muted">1 is an ordinary day (the dotted line); grey stripes mark masked data-gap days'
            + (f" ({esc(', '.join(fleet['masked_days']))})" if fleet["masked_days"] else "")
            + (f"; {len(dips)} day(s) under 0.9 were divided out as fleet-wide dips" if dips else "") + ".</p>",
            fleet_chart(fleet["days"], fleet["factor"], masked)]


def _card(number: int, c: dict) -> str:
    arrow = "▼" if c["direction"] == "down" else "▲"
    drivers = "; ".join(esc(d) for d in c["driver_words"]) or "no single driver stands out"
    return (f'<div class="card {esc(c["direction"])}" data-account="{esc(c["account"])}" id="card-{number}">'
            f'<h3><span class="dir">{arrow}</span> {esc(c["name"])} <span class="muted">({esc(c["account"])})</span></h3>'
            f'<p><span class="tag">{esc(c["kind"])}</span> <span class="tag">{esc(c["state"])}</span> '
            f'severity {c["severity"]:.1f}{_account_facts(c)}</p>'
            + account_chart(c["days"], c["raw"], c["level"], band=c["band"], window=c["window"],
                            onset_index=c["onset_index"], masked=c["masked"], segments=c.get("segments", ()))
            + f'<p>Change {esc(c["change"])} vs its usual level; {esc(c["rank"] or "no history of its own to rank against")}; '
            f'onset {esc(c["onset"] or "not dated")}.</p><p>Drivers: {drivers}.</p>'
            + (f'<p class="outcome">{esc(c["outcome_line"])}</p>' if c.get("outcome_line") else "") + '</div>')


def _by_mrr(cards: list[dict]) -> list[str]:
    """The alerts again, largest MRR first, each linking to its card; nothing without MRR."""
    known = sorted((c for c in cards if c.get("mrr") is not None), key=lambda c: -c["mrr"])
    if not known:
        return []
    number = {id(c): i for i, c in enumerate(cards)}
    rows = "".join(
        f'<tr><td class="num">{c["mrr"]:,.0f}</td><td><a href="#card-{number[id(c)]}">{esc(c["name"])}</a> '
        f'<span class="muted">({esc(c["account"])})</span></td><td>{"▼" if c["direction"] == "down" else "▲"} '
        f'{esc(c["kind"])}</td><td class="num">{c["severity"]:.1f}</td><td>{esc(c["change"])}</td></tr>'
        for c in known)
    missing = len(cards) - len(known)
    return ['<h2>The same alerts by MRR</h2>',
            '<table class="by-mrr"><thead><tr><th>MRR</th><th>Account</th><th>Kind</th><th>Severity</th>'
            f'<th>Change</th></tr></thead><tbody>{rows}</tbody></table>'
            + (f'<p class="muted">{missing} alert(s) on accounts without MRR in accounts.csv are not listed here.</p>'
               if missing else "")]


def _index(data: dict) -> list[str]:
    rows = data["index"]
    if not rows:
        return []
    status_words = {"not_enough_history": "not enough history", "dormant": "dormant"}
    has_mrr = any(r["mrr"] is not None for r in rows)
    body = []
    for r in rows:
        state = "; ".join(r["alerts"]) or status_words.get(r["status"], "no alert")
        level = "–" if r["level"] is None else f"{r['level']:,.1f}"
        usual = "–" if r["usual"] is None else f"{r['usual']:,.1f}"
        change = "–" if r["change_pct"] is None else f"{r['change_pct']:+.0f}%"
        mrr = f'<td class="num">{"–" if r["mrr"] is None else format(r["mrr"], ",.0f")}</td>' if has_mrr else ""
        body.append(f'<tr data-account="{esc(r["account"])}"><td>{esc(r["account"])}</td><td>{esc(r["name"] or "")}</td>'
                    f'<td>{esc(state)}</td><td class="num">{level}</td><td class="num">{usual}</td>'
                    f'<td class="num">{change}</td>{mrr}<td>{sparkline(r["spark"])}</td></tr>')
    more = data["index_total"] - len(rows)
    return ['<h2>Account index</h2>',
            '<p class="muted">Every account the scan judged, by id: its open alerts (or why it was not judged), its '
            '7-day level against its usual level (activity a day, weekday-adjusted) and the last days of that level.'
            + (f' The first {len(rows):,} of {data["index_total"]:,} are listed; <code>ebbwatch scan --all --format '
               'csv</code> gives every one.' if more > 0 else "") + '</p>',
            '<table class="index"><thead><tr><th>Account</th><th>Name</th><th>State</th><th>7-day level</th>'
            f'<th>Usual</th><th>Change</th>{"<th>MRR</th>" if has_mrr else ""}<th>Last {len(rows[0]["spark"])} days</th>'
            f'</tr></thead><tbody>{"".join(body)}</tbody></table>']


def render_report(data: dict) -> str:
    """The whole report from ``api.report_data``'s dict."""
    s = data["summary"]
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>ebbwatch report {esc(s['as_of'])}</title>",
           f"<style>{CSS}</style></head><body>",
           f"<h1>Account activity report, {esc(s['as_of'])}</h1>",
           f'<p class="muted">{s["judged"]:,} accounts judged against their own history; '
           f'{len(s["not_enough_history"]):,} with not enough history; {s["dormant"]:,} dormant. Generated by ebbwatch.'
           + (' Alerts below are most severe first; <a href="#by-mrr">the same alerts by MRR</a> and '
              '<a href="#index">an index of every account</a> follow.' if data["cards"] else "") + '</p>',
           *_overview(data), *_fleet_section(data),
           "<h2>Alerts, most severe first</h2>"]
    if not data["cards"]:
        out.append("<p>No alerts.</p>")
    out.append('<div class="cards">')
    out.extend(_card(i, c) for i, c in enumerate(data["cards"]))
    out.append("</div>")
    out.append('<div id="by-mrr"></div>')
    out.extend(_by_mrr(data["cards"]))
    out.extend(_segments(data.get("segments") or []))
    out.append('<div id="index"></div>')
    out.extend(_index(data))
    out.append("""<h2>How to read this, and what it cannot tell you</h2>
<p>Each account is compared with its own history: the last days, two weeks and four weeks against the
half-year before them, judged by how much the same comparison varied on every earlier day of the account, with
its weekday rhythm, growth and usual silences taken into account. On a card's chart the dark line is the
account's 7-day level, weekday-adjusted (each day's activity against what that weekday usually brings, so a
quiet weekend is not a dip), with the single days faint behind it; the shaded band is the middle half of the
same 7-day levels over the half-year the account is judged against, on the same scale; the hatched area marks
the days judged, the dashed line the estimated onset, the thick strokes the level of each segment its history
falls into where it changed, and pale stripes the masked data-gap days. Values are activity a day.
Benjamini&ndash;Hochberg control keeps the share of false alerts among those raised near a fixed rate however
large the fleet.</p>
<ul>
<li><b>An alert is a statistical signal about an account, not a verdict about people.</b> It says the account's
recent activity is unusual for it; it does not say why. Treat it as a reason to look, and ask the customer.</li>
<li>The baseline learns from history: a change that began before the history, a product change that moves
every account, or telemetry missing in a way the fleet factor cannot see can hide or fake a change. Late
events change days already judged.</li>
<li><b>Telemetry can be personal data.</b> User ids and activity may identify people; privacy law and your
data-processing agreements govern who may read this report and how long it is kept. User ids appear here
only as stored.</li>
</ul>
</body></html>""")
    return "\n".join(out) + "\n"
