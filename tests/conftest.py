import gzip
import json
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
SHARED_DATA = REPO.parent / "shared" / "data"


def write_jsonl(path: Path, rows, *, gz: bool = False, raw_lines=()) -> Path:
    """Write dict rows (and then raw byte lines) as JSON lines."""
    data = b"".join(json.dumps(r).encode() + b"\n" for r in rows) + b"".join(l + b"\n" for l in raw_lines)
    path.parent.mkdir(parents=True, exist_ok=True)
    if gz:
        with gzip.open(path, "wb") as handle:
            handle.write(data)
    else:
        path.write_bytes(data)
    return path


@pytest.fixture
def db(tmp_path):
    return str(tmp_path / "store.duckdb")


@pytest.fixture(autouse=True)
def _no_env_store(monkeypatch):
    monkeypatch.delenv("EBBWATCH_DB", raising=False)
