"""The HTML report: self-contained, escaped, and rendered by a real browser."""

import re
import shutil
import subprocess
from html.parser import HTMLParser

import pytest
from click.testing import CliRunner

import ebbwatch
from ebbwatch.cli import main
from ebbwatch.datasets import make_fleet

HOSTILE = '<script>alert("x")</script><img src=x onerror=alert(1)> & "Co"'
HOSTILE_EVENT = "<b>doc.edit</b>"


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    fleet = make_fleet(80, 200, seed=41, share_changed=0.3)
    daily = fleet.daily_frame()
    daily["event"] = daily["event"].replace({"doc.edit": HOSTILE_EVENT})
    daily.to_parquet(tmp / "daily.parquet")
    accounts = fleet.accounts.copy()
    accounts["name"] = [f"{HOSTILE} {i}" for i in range(len(accounts))]
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
    for account, card in zip(cards, text.split('<div class="card ')[1:]):
        facts = known.loc[account]
        assert f"MRR {facts['mrr']:,.0f}; segment {facts['segment']}</p>" in card


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


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (.ci/run installs Debian's chromium)")
def test_renders_in_headless_chromium(report, tmp_path):
    path, _, alerts = report
    dom = chromium(path.as_uri(), tmp_path, "--dump-dom")
    assert dom.returncode == 0
    assert not console_errors(dom.stderr)
    cards = re.findall(r'<div class="card (?:down|up)"', dom.stdout)
    assert len(cards) == len(alerts)
    charts = re.findall(r'<svg class="chart".*?</svg>', dom.stdout, flags=re.S)
    assert len(charts) == len(alerts) + 1  # one per card and the fleet factor
    for chart in charts:
        d = re.search(r'<path d="([^"]*)"', chart).group(1)
        assert re.match(r"M[\d.]+,[\d.]+(\s*[ML][\d.]+,[\d.]+)+", d), d[:80]
    shot = tmp_path / "report.png"
    assert chromium(path.as_uri(), tmp_path, f"--screenshot={shot}", "--window-size=1200,2000").returncode == 0
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
