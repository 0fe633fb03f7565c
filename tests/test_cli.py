import json
import os
import subprocess
import sys

import pytest

from click.testing import CliRunner

from ebbwatch.cli import main

from .conftest import write_jsonl


def run(*args, input=None):
    return CliRunner().invoke(main, list(args), input=input, catch_exceptions=False)


def test_python_dash_m_help_smoke():
    out = subprocess.run([sys.executable, "-m", "ebbwatch", "--help"], capture_output=True, text=True, check=True)
    assert "ingest" in out.stdout and "scan" in out.stdout


def test_every_command_has_help_and_is_in_the_readme():
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    for name, command in main.commands.items():
        assert command.help, name
        assert f"ebbwatch {name}" in readme, f"README does not show `ebbwatch {name}`"


def test_ingest_json_summary_on_stdout_and_human_summary_on_stderr(tmp_path):
    f = write_jsonl(tmp_path / "e.jsonl", [{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a"}],
                    raw_lines=[b"oops"])
    db = str(tmp_path / "s.duckdb")
    result = run("ingest", str(f), "--db", db, "--format", "json")
    assert result.exit_code == 4  # half the file's lines rejected: more than max_reject_share
    summary = json.loads(result.stdout)
    for key in ("files", "lines", "ingested", "duplicates", "rejected", "unattributed", "skipped_files", "seconds"):
        assert key in summary
    assert summary["rejected"] == {"not_json": 1} and summary["ingested"] == 1
    human = run("ingest", str(f), "--db", db)
    assert human.stdout == ""
    assert "Skipped" in human.stderr and "already ingested" in human.stderr


def test_stdin_with_dash(tmp_path):
    db = str(tmp_path / "s.duckdb")
    line = json.dumps({"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a"}) + "\n"
    result = run("ingest", "-", "--db", db, "--format", "json", input=line)
    assert result.exit_code == 0 and json.loads(result.stdout)["ingested"] == 1


def test_stdin_is_copied_beside_the_store_while_it_is_ingested_and_removed_after(tmp_path):
    import io

    import ebbwatch

    line = json.dumps({"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a"}) + "\n"
    seen = []
    store = tmp_path / "store" / "s.duckdb"
    store.parent.mkdir()
    s = ebbwatch.ingest_files(["-"], db=str(store), stdin=io.BytesIO(line.encode()),
                              progress=lambda *_: seen.extend(p.name for p in store.parent.iterdir()))
    assert s["ingested"] == 1 and s["stdin_copies_left"] == []
    assert any(name.startswith(f".ebbwatch-stdin-{os.getpid()}-") for name in seen)  # beside the store
    assert not any(p.name.startswith(".ebbwatch-stdin-") for p in store.parent.iterdir())  # and gone


def test_an_unreadable_stdin_is_named_as_standard_input_not_by_its_copy(tmp_path):
    import gzip

    cut_short = gzip.compress(b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u"}\n' * 50)[:30]
    result = run("ingest", "-", "--db", str(tmp_path / "s.duckdb"), input=cut_short)
    assert result.exit_code == 3
    assert "<stdin>: cannot read standard input" in result.stderr and ".ebbwatch-stdin-" not in result.stderr


@pytest.mark.skipif(os.name != "posix", reason="whether a process still runs is checked with POSIX kill(pid, 0)")
def test_a_killed_ingests_copy_of_stdin_is_reported_and_kept(tmp_path):
    gone = int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                              text=True, check=True).stdout)  # a process that has ended
    left = tmp_path / f".ebbwatch-stdin-{gone}-k1.jsonl"
    left.write_text(json.dumps({"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a"}) + "\n")
    running = tmp_path / f".ebbwatch-stdin-{os.getpid()}-r1.jsonl"  # this process's: still in use
    running.write_text("")
    f = write_jsonl(tmp_path / "e.jsonl", [{"ts": "2026-03-03T10:00:00Z", "event": "x", "user": "u", "account": "a"}])
    result = run("ingest", str(f), "--db", str(tmp_path / "s.duckdb"), "--format", "json")
    assert result.exit_code == 0 and json.loads(result.stdout)["stdin_copies_left"] == [str(left)]
    human = run("ingest", str(f), "--db", str(tmp_path / "s.duckdb"))
    assert str(left) in human.stderr and "never ingested" in human.stderr and str(running) not in human.stderr
    assert left.exists() and running.exists()  # reported, never removed


def test_exit_code_2_for_usage_and_config_errors(tmp_path):
    assert run("ingest", "--db", str(tmp_path / "s.duckdb")).exit_code == 2  # nothing to ingest
    bad = tmp_path / "bad.toml"
    bad.write_text("[scan]\nwindow_dayz = 7\n")
    f = write_jsonl(tmp_path / "e.jsonl", [])
    result = run("ingest", str(f), "--db", str(tmp_path / "s.duckdb"), "--config", str(bad))
    assert result.exit_code == 2
    assert "unknown key [scan] window_dayz" in result.stderr and str(bad) in result.stderr


def test_exit_code_3_for_unusable_input(tmp_path):
    result = run("ingest", str(tmp_path / "missing.jsonl"), "--db", str(tmp_path / "s.duckdb"))
    assert result.exit_code == 3 and "no such file" in result.stderr
    notdb = tmp_path / "text.duckdb"
    notdb.write_text("hello")
    assert run("status", "--db", str(notdb)).exit_code == 3


def test_status_and_export(tmp_path):
    f = write_jsonl(tmp_path / "e.jsonl", [{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a"}])
    db = str(tmp_path / "s.duckdb")
    run("ingest", str(f), "--db", db)
    status = json.loads(run("status", "--db", db, "--format", "json").stdout)
    assert (status["accounts"], status["events"], status["first_day"], status["last_day"]) == (1, 1, "2026-03-02", "2026-03-02")
    out = tmp_path / "d.parquet"
    result = run("export", "daily", "--db", db, "--format", "parquet", "-o", str(out))
    assert result.exit_code == 0
    import pandas as pd

    assert pd.read_parquet(out).to_dict("records")[0]["events"] == 1


def test_db_from_environment(tmp_path, monkeypatch):
    f = write_jsonl(tmp_path / "e.jsonl", [{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a"}])
    monkeypatch.setenv("EBBWATCH_DB", str(tmp_path / "env.duckdb"))
    assert run("ingest", str(f)).exit_code == 0
    assert (tmp_path / "env.duckdb").exists()


def test_export_index_writes_blocks_and_refuses_a_used_folder(tmp_path):
    rows = [{"ts": f"2026-03-{d:02d}T10:00:00Z", "event": e, "user": "u", "account": a}
            for d in range(1, 20) for a in ("a", "b", "c") for e in ("x", "y")]
    f = write_jsonl(tmp_path / "e.jsonl", rows)
    db = str(tmp_path / "s.duckdb")
    run("ingest", str(f), "--db", db)
    out = tmp_path / "index"
    result = run("export", "index", "--db", db, "-o", str(out), "--accounts-per-part", "2")
    assert result.exit_code == 0 and result.stdout == ""
    assert "3 accounts in 2 block(s)" in result.stderr
    import pandas as pd

    index = pd.read_parquet(out / "rows")
    assert len(index) == 3 * 19 and (index["events"] == 2).all() and (index["value"] == 2).all()
    again = run("export", "index", "--db", db, "-o", str(out))
    assert again.exit_code == 2 and "not an empty folder" in again.stderr
