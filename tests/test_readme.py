import re
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def test_ci_runs_the_readme_test_command():
    readme = (REPO / "README.md").read_text()
    ci = (REPO / ".ci" / "run").read_text()
    command = re.search(r'TEST_COMMAND="(.+)"', ci).group(1)
    assert command in readme


def test_readme_has_the_demo_command_and_the_cautions():
    readme = (REPO / "README.md").read_text().lower()
    assert "ebbwatch demo" in readme
    assert "personal data" in readme and "not a verdict" in readme


def test_top_level_holds_exactly_the_agreed_entries():
    names = {p.name for p in REPO.iterdir() if not p.name.startswith(".")}
    ignorable = {"ebbwatch.duckdb", "ebbwatch.rejects.jsonl", "build", "dist"}
    names = {n for n in names if n not in ignorable and not n.endswith(".egg-info")}
    assert names == {"README.md", "DEVELOPERS.md", "pyproject.toml", "src", "tests", "demo_data", "examples"}
