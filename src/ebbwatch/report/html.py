"""The HTML report: one self-contained file (inline CSS and SVG, no scripts, no fetches).

Every value that came from the data goes through ``html.escape``.  Colours are our own and
carry no meaning alone: direction is also a shape (▼ / ▲) and a word, the band is a light fill,
the window a hatched area and the onset a dashed line, so the charts read in greyscale too.
"""

from __future__ import annotations

import html
import math

INK = "#1b2a3a"
SERIES = "#0f5c6e"
BAND = "#dfe7ec"
WINDOW = "#c7a34a"
ONSET = "#5b3f8c"
SEGMENT = "#8c2d04"
MASK = "#9aa5ad"
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


def _scale(values, lo, hi):
    finite = [v for v in values if v is not None and math.isfinite(v)]
    vmin, vmax = (min(finite), max(finite)) if finite else (0.0, 1.0)
    vmin = min(vmin, 0.0)
    if vmax <= vmin:
        vmax = vmin + 1.0
    return lambda v: hi - (v - vmin) / (vmax - vmin) * (hi - lo), vmin, vmax


def series_chart(values, *, band=None, window=7, onset_index=None, masked=(), width=320, height=110,
                 reference=None, segments=()) -> str:
    """An inline SVG line chart of ``values`` (None = missing) with an optional band (lo, hi),
    the last ``window`` points hatched, an onset marker, masked points ticked and the levels of
    ``segments`` — ``(first index, last index, level)`` — as thick horizontal strokes."""
    n = max(len(values), 2)
    pad = 4
    x = lambda i: pad + i * (width - 2 * pad) / (n - 1)  # noqa: E731
    extra = ([band[0], band[1]] if band else []) + [level for _, _, level in segments if level is not None]
    y, vmin, vmax = _scale(list(values) + extra + ([reference] if reference is not None else []), pad, height - pad)
    parts = [f'<svg class="chart" width="{width}" height="{height}" viewBox="0 0 {width} {height}" role="img" '
             f'xmlns="http://www.w3.org/2000/svg">',
             '<defs><pattern id="hatch" width="4" height="4" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
             f'<line x1="0" y1="0" x2="0" y2="4" stroke="{WINDOW}" stroke-width="2"/></pattern></defs>']
    if band:
        parts.append(f'<rect x="{pad}" y="{y(band[1]):.1f}" width="{width - 2 * pad}" height="{max(y(band[0]) - y(band[1]), 1):.1f}" '
                     f'fill="{BAND}"/>')
    if window:
        x0 = x(max(n - window, 0))
        parts.append(f'<rect x="{x0:.1f}" y="{pad}" width="{x(n - 1) - x0:.1f}" height="{height - 2 * pad}" fill="url(#hatch)" opacity="0.6"/>')
    for i in masked:
        parts.append(f'<line x1="{x(i):.1f}" x2="{x(i):.1f}" y1="{height - pad - 8}" y2="{height - pad}" stroke="{MASK}" stroke-width="2"/>')
    if reference is not None:
        parts.append(f'<line x1="{pad}" x2="{width - pad}" y1="{y(reference):.1f}" y2="{y(reference):.1f}" stroke="{INK}" '
                     'stroke-dasharray="2,3" stroke-width="1"/>')
    path, pen_down = [], False
    for i, v in enumerate(values):
        if v is None or not math.isfinite(v):
            pen_down = False
            continue
        path.append(f"{'L' if pen_down else 'M'}{x(i):.1f},{y(v):.1f}")
        pen_down = True
    if not path:
        path = [f"M{pad},{height - pad}L{width - pad},{height - pad}"]
    parts.append(f'<path d="{" ".join(path)}" fill="none" stroke="{SERIES}" stroke-width="1.3"/>')
    for first, last, level in segments:
        if level is not None and math.isfinite(level):
            parts.append(f'<line class="segment" x1="{x(first):.1f}" x2="{x(last):.1f}" y1="{y(level):.1f}" '
                         f'y2="{y(level):.1f}" stroke="{SEGMENT}" stroke-width="2.5"/>')
    if onset_index is not None and 0 <= onset_index < n:
        parts.append(f'<line x1="{x(onset_index):.1f}" x2="{x(onset_index):.1f}" y1="{pad}" y2="{height - pad}" '
                     f'stroke="{ONSET}" stroke-width="1.5" stroke-dasharray="5,3"/>')
    parts.append("</svg>")
    return "".join(parts)


def render_report(data: dict) -> str:
    """The whole report from ``api.report_data``'s dict."""
    s = data["summary"]
    kinds = ", ".join(f"{esc(k)} {v}" for k, v in sorted(data["by_kind"].items())) or "none"
    states = ", ".join(f"{esc(k)} {v}" for k, v in sorted(data["by_state"].items())) or "none"
    share_label = "of MRR" if data["share_basis"] == "mrr" else "of activity"
    fleet = data["fleet"]
    fleet_masked = [i for i, m in enumerate(fleet["masked"]) if m]
    dips = [i for i, f in enumerate(fleet["factor"]) if f < 0.9 and not fleet["masked"][i]]
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>ebbwatch report {esc(s['as_of'])}</title>",
           f"<style>{CSS}</style></head><body>",
           f"<h1>Account activity report, {esc(s['as_of'])}</h1>",
           f'<p class="muted">{s["judged"]:,} accounts judged against their own history; '
           f'{len(s["not_enough_history"]):,} with not enough history; {s["dormant"]:,} dormant. Generated by ebbwatch.</p>',
           '<h2>Fleet overview</h2><div class="tiles">',
           f'<div class="tile">accounts judged<b>{s["judged"]:,}</b></div>',
           f'<div class="tile">alerts<b>{data["n_alerts"]}</b><span class="muted">{kinds}</span></div>',
           f'<div class="tile">states<b>{sum(data["by_state"].values())}</b><span class="muted">{states}</span></div>',
           f'<div class="tile">{share_label} in accounts with open downward alerts<b>{100 * data["down_share"]:.1f}%</b></div>',
           "</div>",
           '<h3>Fleet-wide daily factor</h3>',
           ("" if s.get("fleet_factor", {}).get("estimated", True) else
            f'<p>No fleet-wide factor: {s["fleet_factor"]["voting_accounts"]} account(s) vote, '
            f'{s["fleet_factor"]["needed"]} are needed to tell a holiday from a few accounts\' own changes, '
            'so each account is judged on its own.</p>'),
           '<p class="muted">1 is an ordinary day; the dotted line marks 1, ticks at the bottom mark masked data-gap days'
           + (f" ({esc(', '.join(fleet['masked_days']))})" if fleet["masked_days"] else "")
           + (f"; {len(dips)} day(s) under 0.9 were divided out as fleet-wide dips" if dips else "") + ".</p>",
           series_chart(fleet["factor"], window=0, masked=fleet_masked, width=900, height=120, reference=1.0),
           "<h2>Alerts, most severe first</h2>"]
    if not data["cards"]:
        out.append("<p>No alerts.</p>")
    out.append('<div class="cards">')
    for c in data["cards"]:
        arrow = "▼" if c["direction"] == "down" else "▲"
        drivers = "; ".join(esc(d) for d in c["driver_words"]) or "no single driver stands out"
        out.append(
            f'<div class="card {esc(c["direction"])}" data-account="{esc(c["account"])}">'
            f'<h3><span class="dir">{arrow}</span> {esc(c["name"])} <span class="muted">({esc(c["account"])})</span></h3>'
            f'<p><span class="tag">{esc(c["kind"])}</span> <span class="tag">{esc(c["state"])}</span> '
            f'severity {c["severity"]:.1f}{_account_facts(c)}</p>'
            + series_chart(c["series"], band=c["band"], window=c["window"], onset_index=c["onset_index"], masked=c["masked"],
                           segments=c.get("segments", ()))
            + f'<p>Change {esc(c["change"])} vs its usual level; {esc(c["rank"] or "no history of its own to rank against")}; '
            f'onset {esc(c["onset"] or "not dated")}.</p><p>Drivers: {drivers}.</p></div>')
    out.append("</div>")
    out.append("""<h2>How to read this, and what it cannot tell you</h2>
<p>Each account is compared with its own history: the last days, two weeks and four weeks against the
half-year before them, judged by how much the same comparison varied on every earlier day of the account, with
its weekday rhythm, growth and usual silences taken into account. The shaded band on a chart is the middle half
of the account's usual 7-day levels, the hatched area the days judged, the dashed line the estimated onset, and
the thick strokes the level of each segment its history falls into where it changed.
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
