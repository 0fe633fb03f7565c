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


def test_demo_closing_lines_name_the_next_commands_the_alerts_outside_stories_and_the_temp_folder(
        tmp_path, monkeypatch):
    # Issue 24: one command a line; an alert with no planted story says so; without --dir the run
    # says where its files went and how to remove them.
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    result = CliRunner().invoke(main, ["demo", "--accounts", "120", "--days", "300"])
    assert result.exit_code == 0, result.stderr
    lines = result.stderr.splitlines()
    start = next(i for i, line in enumerate(lines) if line.endswith("Try next:"))
    assert [line.split()[1] for line in lines[start + 1:start + 5]] == ["explain", "backtest", "scan", "status"]
    folder = next(p for p in tmp_path.iterdir() if p.name.startswith("ebbwatch-demo-"))
    assert f"rm -r {folder}" in result.stderr
    stories = set(pd.read_csv(folder / "stories.csv")["account"])
    alerted = {line.split()[0] for line in result.stdout.split("Planted stories")[0].splitlines()
               if line.startswith("acct-")}
    if alerted - stories:
        outside = result.stdout.split("Alerts outside the planted stories")[1]
        assert all(account in outside for account in alerted - stories)
    else:
        assert "Alerts outside the planted stories" not in result.stdout
