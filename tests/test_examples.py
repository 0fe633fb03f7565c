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
