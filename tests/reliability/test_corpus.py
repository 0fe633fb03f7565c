"""The committed bad-input corpus and fuzzing of the line parser: never a crash, every bad line
rejected with its reason, every good line ingested."""

import json
from datetime import datetime, timezone
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import ebbwatch
from ebbwatch.errors import REJECT_REASONS
from ebbwatch.ingest.lines import LineRejected, LineRules, parse_line

CORPUS = Path(__file__).resolve().parent / "corpus"
EXPECTED = json.loads((CORPUS / "expected.json").read_text())
NOW = datetime(2026, 6, 1, tzinfo=timezone.utc)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_corpus_file(name, tmp_path):
    expected = EXPECTED[name]
    rejects = tmp_path / "rejects.jsonl"
    summary = ebbwatch.ingest_files([str(CORPUS / name)], db=str(tmp_path / "s.duckdb"), now=NOW,
                                    rejects_path=str(rejects))
    if expected == "unreadable":
        assert [e["file"] for e in summary["errors"]] == [str(CORPUS / name)] and summary["ingested"] == 0
        return
    reasons = {}
    for outcome in expected:
        if outcome not in ("ok", "blank"):
            reasons[outcome] = reasons.get(outcome, 0) + 1
    assert summary["rejected"] == reasons
    assert summary["ingested"] == expected.count("ok")
    assert summary["lines"] == len(expected) - expected.count("blank")
    if reasons:
        logged = [json.loads(line) for line in rejects.read_text().splitlines()]
        bad_lines = [i + 1 for i, o in enumerate(expected) if o not in ("ok", "blank")]
        assert [r["line"] for r in logged] == bad_lines
        assert [r["reason"] for r in logged] == [o for o in expected if o not in ("ok", "blank")]
        assert all(len(r["excerpt"]) <= 120 for r in logged)


RULES = LineRules(earliest_us=0, latest_us=int(NOW.timestamp() * 1e6))
json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=20),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=8), children, max_size=4),
    max_leaves=12,
)
record = st.fixed_dictionaries({}, optional={"ts": json_values | st.just("2026-03-02T10:00:00Z") | st.integers(0, 2 * 10**12),
                                             "event": json_values | st.just("doc.edit"), "user": json_values | st.just("u-1"),
                                             "account": json_values, "id": json_values})


@settings(max_examples=400, deadline=None)
@given(st.binary(max_size=200))
def test_fuzz_raw_bytes_never_crash(raw):
    try:
        parse_line(raw, RULES)
    except LineRejected as exc:
        assert exc.reason in REJECT_REASONS


@settings(max_examples=400, deadline=None)
@given(record)
def test_fuzz_json_objects_are_accepted_or_rejected_for_a_reason(obj):
    raw = json.dumps(obj).encode()
    try:
        parsed = parse_line(raw, RULES)
    except LineRejected as exc:
        assert exc.reason in REJECT_REASONS
        return
    ts, event, user, account, event_id = parsed
    assert isinstance(event, str) and event and isinstance(user, str) and user
    assert 0 <= ts <= RULES.latest_us


@settings(max_examples=30, deadline=None)
@given(st.lists(record, min_size=1, max_size=15))
def test_fuzz_files_every_line_is_accounted_for(tmp_path_factory, rows):
    """Whole files through ingest (either path): lines = ingested + duplicates + rejected +
    unattributed, with no line unexplained."""
    tmp = tmp_path_factory.mktemp("fuzz")
    path = tmp / "f.jsonl"
    path.write_bytes(b"".join(json.dumps(r).encode() + b"\n" for r in rows))
    s = ebbwatch.ingest_files([str(path)], db=str(tmp / "s.duckdb"), now=NOW, rejects_path=str(tmp / "r.jsonl"))
    assert s["lines"] == s["ingested"] + s["duplicates"] + sum(s["rejected"].values()) + sum(s["unattributed"].values())


def mutated_lines(n, seed):
    """Good lines with random byte flips, deletions and insertions (a cheap mutation fuzzer)."""
    import random

    rng = random.Random(seed)
    base = [json.dumps({"ts": f"2026-03-0{1 + i % 9}T10:00:{i % 60:02d}Z", "event": "doc.edit", "user": f"u{i}",
                        "account": "a-1", "id": f"e{i}"}).encode() for i in range(50)]
    out = []
    for _ in range(n):
        line = bytearray(rng.choice(base))
        for _ in range(rng.randint(1, 3)):
            op, pos = rng.random(), rng.randrange(len(line))
            if op < 0.4:
                line[pos] = rng.randrange(256)
            elif op < 0.7:
                del line[pos]
            else:
                line.insert(pos, rng.choice(b'{}[]",:\\0aZ\x00\xff.-e'))
        out.append(bytes(line).replace(b"\n", b" "))
    return out


def fuzz_report(n, seed, tmp_path):
    """Lines tried, unexplained outcomes (a crash, or a reason we do not know), and files on
    which the fast and precise paths disagree."""
    unexplained = 0
    lines = mutated_lines(n, seed)
    for raw in lines:
        try:
            parse_line(raw, RULES)
        except LineRejected as exc:
            unexplained += exc.reason not in REJECT_REASONS
        except Exception:  # noqa: BLE001 - counting exactly what must not happen
            unexplained += 1
    # The same lines as files, 200 a file: the store's totals must equal the precise path's.
    disagreements = 0
    for k in range(0, len(lines), 200):
        path = tmp_path / f"m{k}.jsonl"
        path.write_bytes(b"\n".join(lines[k:k + 200]) + b"\n")
        s = ebbwatch.ingest_files([str(path)], db=str(tmp_path / f"m{k}.duckdb"), now=NOW, rejects_path=str(tmp_path / "r.jsonl"))
        accepted = 0
        for raw in lines[k:k + 200]:
            try:
                accepted += parse_line(raw, RULES) is not None
            except LineRejected:
                pass
        disagreements += (s["ingested"] + s["duplicates"] + sum(s["unattributed"].values())) != accepted
    return len(lines), unexplained, disagreements


def test_mutation_fuzz_small(tmp_path):
    tried, unexplained, disagreements = fuzz_report(2000, 1, tmp_path)
    assert (unexplained, disagreements) == (0, 0)


@pytest.mark.slow
def test_mutation_fuzz_long_run(tmp_path):
    tried, unexplained, disagreements = fuzz_report(50_000, 2, tmp_path)
    print(f"\nfuzz: {tried} mutated lines tried, {unexplained} unexplained outcomes, {disagreements} file disagreements")
    assert (unexplained, disagreements) == (0, 0)
