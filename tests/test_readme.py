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


def _help_texts():
    import click
    from click.testing import CliRunner

    from ebbwatch.cli import main

    def walk(group, path):
        for name, command in group.commands.items():
            yield [*path, name], command
            if isinstance(command, click.Group):
                yield from walk(command, [*path, name])

    for path, _ in walk(main, []):
        yield path, CliRunner().invoke(main, [*path, "--help"]).output


def test_every_command_help_has_an_example():
    """Issue 20 item 16: the README promises an example in every command's --help."""
    missing = [" ".join(path) for path, text in _help_texts() if "Examples:" not in text]
    assert not missing, missing


def test_account_ids_in_the_readme_and_help_exist_in_the_demo():
    """The README's and --help's examples name accounts a new user can try on `ebbwatch demo`."""
    import inspect

    from ebbwatch import datasets

    n_accounts = inspect.signature(datasets.demo_fleet).parameters["n_accounts"].default
    width = len(str(n_accounts))
    demo_ids = {f"acct-{i:0{width}d}" for i in range(n_accounts)}
    texts = [(REPO / "README.md").read_text()] + [text for _, text in _help_texts()]
    named = {m for text in texts for m in re.findall(r"\bacct-\d+\b", text)}
    assert named and named <= demo_ids, sorted(named - demo_ids)
