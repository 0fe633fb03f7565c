"""The demo end to end on a small size: the planted stories are found and the normal ones not."""

import pandas as pd
from click.testing import CliRunner

from ebbwatch.cli import main


def test_demo_finds_the_planted_stories(tmp_path):
    result = CliRunner().invoke(main, ["demo", "--dir", str(tmp_path), "--accounts", "120", "--days", "300"])
    assert result.exit_code == 0, result.stderr
    stories = pd.read_csv(tmp_path / "stories.csv")
    flagged = {line.split()[0] for line in result.stdout.splitlines() if line.startswith("acct-") and "  " in line}
    table = result.stdout.split("Planted stories")[0]
    alerted = {line.split()[0] for line in table.splitlines() if line.startswith("acct-")}
    expect_alert = set(stories.loc[stories["expect"] == "alert", "account"])
    expect_quiet = set(stories.loc[stories["expect"] == "quiet", "account"])
    assert len(expect_alert) == 7 and flagged
    assert expect_alert <= alerted
    assert not (expect_quiet & alerted)
    assert "The store is" in result.stderr and (tmp_path / "ebbwatch.duckdb").exists()
    assert "ebbwatch backtest" in result.stderr and (tmp_path / "report.html").read_text().count("class=\"card ") == len(alerted)
    assert "Rejected 4 lines" in result.stderr
