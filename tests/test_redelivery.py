"""A folder re-sent after a pipeline incident: old events delivered again under a new file name
must not be counted twice, however old they are."""

import json
import random
from collections import Counter, defaultdict
from datetime import datetime, timedelta, timezone

import pytest

from ebbwatch.config import config_from_dict

from .test_ingest import daily, ingest

START = datetime(2026, 1, 1, tzinfo=timezone.utc)


def two_months(tmp_path, rng):
    """Six ten-day files of events with ids on every line; returns the files and all lines."""
    files, lines = [], []
    for part in range(6):
        rows = []
        for i in range(1500):
            ts = START + timedelta(days=10 * part, seconds=rng.randrange(10 * 86400))
            rows.append({"ts": ts.isoformat().replace("+00:00", "Z"), "event": rng.choice(["doc.edit", "doc.view"]),
                         "user": f"u-{rng.randrange(40)}", "account": f"a-{rng.randrange(12)}", "id": f"ev-{part}-{i}"})
        path = tmp_path / f"events-{part}.jsonl"
        path.write_text("".join(json.dumps(r) + "\n" for r in rows))
        files.append(path)
        lines.extend(rows)
    return files, lines


def expected_cells(rows):
    """Plain-Python reference: each id once; events and distinct users per account, UTC day, event."""
    events, users = Counter(), defaultdict(set)
    for r in {r["id"]: r for r in rows}.values():
        key = (r["account"], r["ts"][:10], r["event"])
        events[key] += 1
        users[key].add(r["user"])
    return {k: (n, len(users[k])) for k, n in events.items()}


def test_a_redelivered_folder_leaves_every_cell_exact(tmp_path, db):
    rng = random.Random(11)
    files, lines = two_months(tmp_path, rng)
    ingest(db, files)
    resent = rng.sample(lines, 1996)  # most of them weeks older than the newest event
    again = tmp_path / "resent-under-a-new-name.jsonl"
    again.write_text("".join(json.dumps(r) + "\n" for r in resent))
    s = ingest(db, [again])
    newest = max(r["ts"] for r in lines)
    old = sum(r["ts"] < (datetime.fromisoformat(newest) - timedelta(days=30)).isoformat() for r in resent)
    assert old > 1000  # what the old 30-day window forgot
    assert (s["ingested"], s["duplicates"], s["held_back"]) == (0, 1996, {})
    assert daily(db) == expected_cells(lines)


@pytest.mark.parametrize("accept", [False, True])
def test_a_bounded_window_holds_back_exactly_the_old_redeliveries(tmp_path, db, accept):
    rng = random.Random(12)
    files, lines = two_months(tmp_path, rng)
    config = config_from_dict({"ingest": {"dedupe_window_days": 30, "accept_beyond_dedupe_window": accept}})
    ingest(db, files, config=config)
    resent = rng.sample(lines, 1996)
    again = tmp_path / "resent.jsonl"
    again.write_text("".join(json.dumps(r) + "\n" for r in resent))
    s = ingest(db, [again], config=config)
    cutoff = max(datetime.fromisoformat(r["ts"]) for r in lines) - timedelta(days=30)
    old = [r for r in resent if datetime.fromisoformat(r["ts"]) < cutoff]
    assert len(old) > 1000
    if accept:  # the user asked for them: counted again, as the summary says
        assert (s["ingested"], s["duplicates"], s["held_back"]) == (len(old), 1996 - len(old), {})
        assert daily(db) == expected_cells(lines + [{**r, "id": r["id"] + "/again"} for r in old])
    else:
        assert (s["ingested"], s["duplicates"], s["held_back"]) == (0, 1996 - len(old), {"beyond_dedupe_window": len(old)})
        assert daily(db) == expected_cells(lines)
