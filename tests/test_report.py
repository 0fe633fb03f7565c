"""The HTML report: self-contained, escaped, and rendered by a real browser."""

import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest
from click.testing import CliRunner

import ebbwatch
from ebbwatch.cli import main
from ebbwatch.datasets import make_fleet

HOSTILE = '<script>alert("x")</script><img src=x onerror=alert(1)> & "Co"'
HOSTILE_EVENT = "<b>doc.edit</b>"
HOSTILE_SEGMENT = "<i>team</i> & co"
# Where the browser test keeps its screenshot after the run (a test artifact to look at).
ARTIFACTS = Path(os.environ.get("EBBWATCH_TEST_ARTIFACTS", Path(__file__).resolve().parents[1] / "build" / "test-artifacts"))


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    fleet = make_fleet(80, 200, seed=41, share_changed=0.3)
    daily = fleet.daily_frame()
    daily["event"] = daily["event"].replace({"doc.edit": HOSTILE_EVENT})
    daily.to_parquet(tmp / "daily.parquet")
    accounts = fleet.accounts.copy()
    accounts["name"] = [f"{HOSTILE} {i}" for i in range(len(accounts))]
    accounts.loc[accounts["segment"] == "team", "segment"] = HOSTILE_SEGMENT
    accounts.to_csv(tmp / "accounts.csv", index=False)
    db = str(tmp / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp / "daily.parquet"), accounts=str(tmp / "accounts.csv"))
    path = tmp / "report.html"
    result = CliRunner().invoke(main, ["report", "--db", db, "--html", str(path), "--limit", "12"])
    assert result.exit_code == 0, result.stderr
    alerts = ebbwatch.scan(db=db, max_alerts=12)
    return path, path.read_text(), alerts


class Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.scripts, self.text = [], 0, []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self.scripts += tag == "script"

    def handle_data(self, data):
        self.text.append(data)


def test_self_contained_no_scripts_no_fetches(report):
    _, text, _ = report
    parsed = Collect()
    parsed.feed(text)
    assert parsed.scripts == 0
    for tag, attrs in parsed.tags:
        for name in ("src", "href"):
            assert name not in attrs or attrs[name].startswith("#"), (tag, attrs)
    assert "@import" not in text and "url(http" not in text


def test_data_values_are_escaped(report):
    _, text, _ = report
    assert HOSTILE not in text and "<script>" not in text and "<img" not in text and "<b>doc.edit" not in text
    parsed = Collect()
    parsed.feed(text)
    body = "".join(parsed.text)
    assert HOSTILE in body  # it is shown, as text
    assert HOSTILE_EVENT in body
    assert HOSTILE_SEGMENT not in text and f"segment {HOSTILE_SEGMENT}" in body
    # The index shows every account's name, as text.
    index = text.split('<table class="index">')[1]
    assert HOSTILE not in index and "&lt;script&gt;" in index


def test_one_card_per_alert_ranked(report):
    _, text, alerts = report
    cards = re.findall(r'<div class="card (?:down|up)" data-account="([^"]+)"', text)
    assert len(cards) == len(alerts) > 0
    assert cards == [a.replace("&", "&amp;") for a in alerts["account"]]
    assert "not a verdict about people" in text and "personal data" in text
    # Each card's chart draws the segments of the account's history (at least one level each).
    for card in text.split('<div class="card ')[1:]:
        assert '<line class="segment"' in card.split("</svg>")[0]
    # Each card gives the account's MRR and segment from accounts.csv (issue 24).
    known = make_fleet(80, 200, seed=41, share_changed=0.3).accounts.set_index("account")
    known.loc[known["segment"] == "team", "segment"] = HOSTILE_SEGMENT
    for account, card in zip(cards, text.split('<div class="card ')[1:]):
        facts = known.loc[account]
        segment = facts["segment"].replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
        assert f"MRR {facts['mrr']:,.0f}; segment {segment}</p>" in card


def test_alerts_also_ordered_by_mrr_and_the_overview_gives_mrr_at_stake(report):
    _, text, alerts = report
    known = make_fleet(80, 200, seed=41, share_changed=0.3).accounts.set_index("account")
    table = text.split('<table class="by-mrr">')[1].split("</table>")[0]
    listed = re.findall(r'\(([^)]+)\)</span></td>', table)
    assert sorted(listed) == sorted(alerts["account"])
    mrr = [known.loc[a, "mrr"] for a in listed]
    assert mrr == sorted(mrr, reverse=True)
    # Each row links to its card.
    for number in re.findall(r'href="#card-(\d+)"', table):
        assert f'id="card-{number}"' in text
    # The overview's MRR at stake: the MRR of accounts with open downward alerts, shown or not.
    open_ = alerts.attrs["lifecycle"]
    down = sorted(set(open_.loc[(open_["direction"] == "down") & (open_["state"] != "resolved"), "account"]))
    stake = known.loc[down, "mrr"].sum()
    assert f"MRR in accounts with open downward alerts<b>{stake:,.0f}</b>" in text


def test_index_lists_every_account_the_scan_saw(report):
    path, text, alerts = report
    scores = alerts.attrs["scores"]
    index = text.split('<table class="index">')[1].split("</table>")[0]
    rows = re.findall(r'<tr data-account="([^"]+)">(.*?)</tr>', index)
    assert [a for a, _ in rows] == sorted(scores["account"])
    states = dict(rows)
    for account, kind in zip(alerts["account"], alerts["kind"]):
        assert f"{kind} (new)" in states[account]
    judged = scores.loc[scores["status"] == "judged", "account"]
    assert all("<svg class=\"spark\"" in states[a] for a in judged)


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]


def chromium(url, tmp_path, *extra):
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={tmp_path / 'profile'}", *extra, url],
                          capture_output=True, text=True, timeout=120)


def console_errors(stderr: str) -> list:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (.ci/run installs Debian's chromium)")
def test_console_check_catches_errors(tmp_path):
    # The check below is only worth something if it sees a broken page.
    bad = tmp_path / "bad.html"
    bad.write_text("<html><body><script>undefinedFunction()</script></body></html>")
    assert console_errors(chromium(bad.as_uri(), tmp_path, "--dump-dom").stderr)


# Run in the browser on a copy of the report (the report itself has no scripts): where each
# card's title, chart and tick labels were laid out, written into the page for --dump-dom.
LAYOUT_PROBE = """<script>
const box = e => { const r = e.getBoundingClientRect(); return [r.left, r.top, r.right, r.bottom]; };
const out = {cards: [], fleet: null, index_rows: document.querySelectorAll("table.index tbody tr").length};
const chart = svg => ({svg: box(svg), ticks: [...svg.querySelectorAll("text.tick")].map(t => ({
  axis: t.classList.contains("x") ? "x" : "y", text: t.textContent, box: box(t)}))});
for (const card of document.querySelectorAll("div.card")) {
  out.cards.push({title: box(card.querySelector("h3")), ...chart(card.querySelector("svg.chart"))});
}
out.fleet = chart(document.querySelector("svg.fleet"));
const pre = document.createElement("pre"); pre.id = "layout"; pre.textContent = JSON.stringify(out);
document.body.appendChild(pre);
</script>"""


def _overlap(a, b) -> bool:
    return a[0] < b[2] - 0.5 and b[0] < a[2] - 0.5 and a[1] < b[3] - 0.5 and b[1] < a[3] - 0.5


def _check_chart(chart, what):
    ticks = chart["ticks"]
    assert sum(t["axis"] == "x" for t in ticks) >= 2 and sum(t["axis"] == "y" for t in ticks) >= 2, (what, ticks)
    for t in ticks:
        left, top, right, bottom = t["box"]
        assert right - left > 2 and bottom - top > 2, (what, t)  # rendered, with a size
        svg = chart["svg"]
        assert left >= svg[0] - 0.5 and right <= svg[2] + 0.5 and top >= svg[1] - 0.5 and bottom <= svg[3] + 0.5, (what, t)
    for i, a in enumerate(ticks):
        for b in ticks[i + 1:]:
            assert not _overlap(a["box"], b["box"]), (what, a, b)
    x_labels = [t["text"] for t in ticks if t["axis"] == "x"]
    assert all(re.fullmatch(r"(Jan|Feb|Mar|Apr|May|Jun|Jul|Aug|Sep|Oct|Nov|Dec) \d{1,2}( \d{4})?", x) for x in x_labels), x_labels


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (.ci/run installs Debian's chromium)")
def test_renders_in_headless_chromium(report, tmp_path):
    path, text, alerts = report
    dom = chromium(path.as_uri(), tmp_path, "--dump-dom")
    assert dom.returncode == 0
    assert not console_errors(dom.stderr)
    cards = re.findall(r'<div class="card (?:down|up)"', dom.stdout)
    assert len(cards) == len(alerts)
    charts = re.findall(r'<svg class="chart[^"]*".*?</svg>', dom.stdout, flags=re.S)
    assert len(charts) == len(alerts) + 1  # one per card and the fleet factor
    for chart in charts:
        d = re.search(r'<path class="level" d="([^"]*)"', chart).group(1)
        assert re.match(r"M[\d.]+,[\d.]+(\s*[ML][\d.]+,[\d.]+)+", d), d[:80]

    # Layout as the browser drew it: axis labels present, inside their chart, not on top of each
    # other, and each card's title above its chart, not over it.
    probed = tmp_path / "probed.html"
    probed.write_text(text.replace("</body>", LAYOUT_PROBE + "</body>"))
    layout_dom = chromium(probed.as_uri(), tmp_path, "--dump-dom", "--window-size=1200,2000")
    layout = json.loads(re.search(r'<pre id="layout">(.*?)</pre>', layout_dom.stdout, flags=re.S).group(1)
                        .replace("&quot;", '"').replace("&amp;", "&").replace("&lt;", "<").replace("&gt;", ">"))
    assert len(layout["cards"]) == len(alerts)
    for n, card in enumerate(layout["cards"]):
        assert card["title"][3] <= card["svg"][1] + 0.5, f"card {n}: title runs into its chart"
        _check_chart(card, f"card {n}")
    _check_chart(layout["fleet"], "fleet chart")
    assert layout["index_rows"] == len(alerts.attrs["scores"])

    # A screenshot kept as an artifact of the run, for a person to look at.
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shot = ARTIFACTS / "report.png"
    assert chromium(path.as_uri(), tmp_path, f"--screenshot={shot}", "--window-size=1200,2400").returncode == 0
    assert shot.stat().st_size > 10_000


def _relative_luminance(hex_colour: str) -> float:
    # WCAG 2.1, "relative luminance" (sRGB channels linearised, then 0.2126 R + 0.7152 G + 0.0722 B).
    def linear(c):
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4
    r, g, b = (int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5))
    return 0.2126 * linear(r) + 0.7152 * linear(g) + 0.0722 * linear(b)


def _contrast(a: str, b: str) -> float:
    # WCAG 2.1, "contrast ratio": (L1 + 0.05) / (L2 + 0.05), L1 the lighter.
    high, low = sorted((_relative_luminance(a), _relative_luminance(b)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_up_and_down_have_their_own_colours_that_pass_wcag_contrast(report):
    # Issue 24: colour shows direction, beside the shapes (solid/dashed border, ▼/▲) that serve
    # greyscale and colour-blind readers.  Checked against WCAG 2.1 SC 1.4.3 (4.5:1 for text, as
    # the arrows are text) on the page's white, which also covers SC 1.4.11 (3:1 for the borders).
    from ebbwatch.report.html import CSS, DOWN, UP

    assert _contrast("#000000", "#ffffff") == pytest.approx(21.0)  # the formula's known extreme
    assert DOWN != UP
    for colour in (DOWN, UP):
        assert _contrast(colour, "#ffffff") >= 4.5
    assert f"border-left: 5px solid {DOWN}" in CSS and f"border-left: 5px dashed {UP}" in CSS
    _, text, alerts = report
    directions = set(alerts["direction"])
    assert all(f'<div class="card {d}"' in text for d in directions)
    assert '<span class="dir">' in text


def test_the_fleet_section_says_what_the_fleet_size_let_the_factor_read():
    """20+ voting accounts: nothing to say; 8-19: only the days nearly all moved on together;
    fewer: no factor, each account on its own (the scan summary's ``fleet_factor``)."""
    from ebbwatch.api.common import fleet_factor_summary
    from ebbwatch.report.html import _fleet_words

    assert _fleet_words(fleet_factor_summary(300)) == ""
    assert "12 voting accounts the factor divides out only the days nearly all of them moved on" in \
        _fleet_words(fleet_factor_summary(12))
    words = _fleet_words(fleet_factor_summary(3))
    assert "No fleet-wide factor: 3 account(s) vote, 8 are needed" in words and "judged on its own" in words
