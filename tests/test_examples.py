"""The examples stay runnable and in step with the code."""

import json
import subprocess
import sys
from pathlib import Path

from ebbwatch.config import load_config

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"


def test_example_config_parses_and_sets_every_key():
    import dataclasses

    from ebbwatch.config import FieldsConfig, IndexConfig, IngestConfig, ScanConfig

    cfg = load_config(EXAMPLES / "ebbwatch.toml")
    text = (EXAMPLES / "ebbwatch.toml").read_text()
    for cls in (FieldsConfig, IngestConfig, IndexConfig, ScanConfig):
        for f in dataclasses.fields(cls):
            assert f"\n{f.name} = " in text, f"examples/ebbwatch.toml does not explain {f.name}"
    assert cfg.index.weights["booking.create"] == 2.0 and cfg.scan.fdr == 0.01


def test_chat_poster_dry_run_prints_each_message():
    alerts = [{"account": "a1", "message": "Alder Physio: activity down 60%."},
              {"account": "a2", "message": "x" * 5000}]
    out = subprocess.run([sys.executable, str(EXAMPLES / "post_to_chat.py"), "--dry-run"],
                         input="".join(json.dumps(a) + "\n" for a in alerts), capture_output=True, text=True)
    assert out.returncode == 0
    posted = [json.loads(line)["text"] for line in out.stdout.splitlines()]
    assert posted[0] == "Alder Physio: activity down 60%." and len(posted[1]) == 1500


def test_chat_poster_without_webhook_says_so(monkeypatch):
    monkeypatch.delenv("EBBWATCH_CHAT_WEBHOOK", raising=False)
    out = subprocess.run([sys.executable, str(EXAMPLES / "post_to_chat.py")], input="", capture_output=True, text=True)
    assert out.returncode == 2 and "EBBWATCH_CHAT_WEBHOOK" in out.stderr


def test_chat_poster_refuses_input_that_is_not_alerts():
    """Issue 20 item 12: not a traceback, but what it expected; nothing is posted."""
    for text, said in (("Gorsewick: activity down\n", "line 1 is not JSON"),
                       ('{"account": "a"}\n', 'line 1 has no "message" text')):
        out = subprocess.run([sys.executable, str(EXAMPLES / "post_to_chat.py"), "--dry-run"], input=text,
                             capture_output=True, text=True)
        assert out.returncode == 2 and said in out.stderr and "ebbwatch scan --format jsonl" in out.stderr
        assert "Traceback" not in out.stderr and out.stdout == ""


def test_daily_job_posts_each_alert_once_and_skips_the_scan_without_new_files(tmp_path):
    """Issue 20 item 12: run twice, the daily job posts nothing the second time (no new file:
    the scan is skipped and it says so); a new file that changes nothing posts nothing again."""
    import gzip
    import os
    import shutil
    import threading
    from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

    import ebbwatch
    from ebbwatch.datasets import write_demo_scenario

    if shutil.which("bash") is None:
        import pytest

        pytest.skip("needs bash")
    posted = []

    class Receiver(BaseHTTPRequestHandler):
        def do_POST(self):  # noqa: N802 (the http.server name)
            posted.append(json.loads(self.rfile.read(int(self.headers["Content-Length"]))))
            self.send_response(200)
            self.end_headers()

        def log_message(self, *args):
            pass

    scenario = tmp_path / "scenario"
    write_demo_scenario(str(scenario), n_accounts=60, n_days=200)
    db = tmp_path / "store.duckdb"
    ebbwatch.ingest_files([], db=str(db), accounts=str(scenario / "accounts.csv"),
                          identities=str(scenario / "identities.csv"))
    server = ThreadingHTTPServer(("127.0.0.1", 0), Receiver)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    env = {**os.environ, "EBBWATCH_DB": str(db), "EVENTS_DIR": str(scenario / "events"),
           "EBBWATCH_CHAT_WEBHOOK": f"http://127.0.0.1:{server.server_port}/hook",
           "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}"}

    def run():
        out = subprocess.run(["bash", str(EXAMPLES / "daily-scan.sh")], cwd=tmp_path, env=env,
                             capture_output=True, text=True)
        assert out.returncode == 0, out.stderr
        return out

    try:
        run()
        first = len(posted)
        assert first > 0 and all("text" in p for p in posted)
        again = run()
        assert len(posted) == first and "no new file" in again.stdout and "scan skipped" in again.stdout
        # A late file whose one line is already stored (a duplicate): the scan runs, posts nothing new.
        source = sorted((scenario / "events").glob("*.jsonl.gz"))[-1]
        with gzip.open(source, "rt") as handle:
            line = handle.readline()
        (scenario / "events" / "late.jsonl").write_text(line)
        late = run()
        assert "scan skipped" not in late.stdout and len(posted) == first
        assert "already posted" in late.stderr
    finally:
        server.shutdown()
