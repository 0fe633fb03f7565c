"""The native reader keeps a file's good lines whatever its strings look like; only the lines it
doubts go to the precise parser, found again by their place in the file."""

import gzip
import json
import random

import numpy as np
import pytest

from ebbwatch import tasks
from ebbwatch.ingest.line_index import LineIndex, NewlineCounts, read_spans
from ebbwatch.ingest.readers import line_run_width, scan_file

from .conftest import write_jsonl
from .test_ingest import daily, ev, ingest, ingest_precisely


def lines_of(path):
    return [json.loads(line) for line in open(path, encoding="utf-8") if line.strip()]


@pytest.mark.parametrize("gz", [False, True])
def test_hex_ids_that_read_like_numbers_stay_on_the_native_reader(tmp_path, gz):
    # 16 hex digits: some happen to read as a float ("0000000000000e10"), one such line once
    # sent a whole file line by line.  Mixed with decimal-digit ids and integer ids.
    rng = random.Random(3)
    rows = []
    for i in range(3000):
        ident = "%016x" % rng.getrandbits(64)
        if i % 500 == 7:
            ident = "00000000000%02de10" % (i // 500)
        elif i % 3 == 0:
            ident = "%016d" % i
        rows.append(ev(f"2026-03-{1 + i % 28:02d}T10:{i % 60:02d}:00Z", user=f"u-{i % 50}", account=f"a-{i % 7}", id=ident))
    rows.append(ev("2026-03-02T11:00:00Z", id=123456))
    path = write_jsonl(tmp_path / ("e.jsonl.gz" if gz else "e.jsonl"), rows, gz=gz)
    s = ingest(str(tmp_path / "1.duckdb"), [path])
    ref = ingest_precisely(str(tmp_path / "2.duckdb"), [path])
    assert s["paths"] == {"fast": 1, "precise": 0}
    assert 0 < s["lines_rechecked"] <= 10  # the float-looking ids, decided by the precise parser
    assert (s["ingested"], s["duplicates"], s["rejected"]) == (ref["ingested"], ref["duplicates"], ref["rejected"]) == (3001, 0, {})
    assert daily(str(tmp_path / "1.duckdb")) == daily(str(tmp_path / "2.duckdb"))


def test_digit_ids_and_users_are_judged_as_the_precise_parser_judges_them(tmp_path):
    # Text read as VARCHAR hides whether it was a string: digit-led values of every length and
    # form, as strings and as JSON numbers, in the id and the user (a float or a 20-digit number
    # is not an id; a string of any digits is).
    values = ["0000000000000001", "1234567890123456789", "12345678901234567890", "0012e45", "12.5", "7",
              "9" * 19, "1" * 25, "18446744073709551616", "-12", "-1e3", "1e-7", "3e512", "3f2a0000000000e1"]
    raw = []
    for i, text in enumerate(values):
        for value in (json.dumps(text), text):  # the string, then the bare JSON number
            ts = f"2026-03-0{1 + i % 9}T10:00:00Z"
            raw.append(f'{{"ts": "{ts}", "event": "doc.edit", "user": "u-{i}", "account": "a-1", "id": {value}}}'.encode())
            raw.append(f'{{"ts": "{ts}", "event": "doc.edit", "user": {value}, "account": "a-1", "id": "k-{len(raw)}"}}'.encode())
    path = write_jsonl(tmp_path / "e.jsonl", [ev("2026-03-02T09:00:00Z", id="first")], raw_lines=raw)
    s = ingest(str(tmp_path / "1.duckdb"), [path])
    ref = ingest_precisely(str(tmp_path / "2.duckdb"), [path])
    assert s["paths"]["fast"] == 1
    assert (s["ingested"], s["duplicates"], s["rejected"]) == (ref["ingested"], ref["duplicates"], ref["rejected"])
    assert ref["rejected"]  # some of the bare numbers are not ids or users: the check has work to do
    assert daily(str(tmp_path / "1.duckdb")) == daily(str(tmp_path / "2.duckdb"))


def test_a_file_of_float_looking_string_ids_is_read_typed(tmp_path, db):
    # Every id reads like a number: too many lines to check one by one, so DuckDB reads the file
    # again with the fields typed, and nothing is left to the precise parser.
    rows = [ev(f"2026-03-{1 + i % 28:02d}T10:00:00Z", id=f"{i}e{i % 9}", user=f"{i % 40}.5") for i in range(tasks.RECHECK_LINES + 500)]
    path = write_jsonl(tmp_path / "e.jsonl", rows)
    s = ingest(db, [path])
    ref = ingest_precisely(str(tmp_path / "ref.duckdb"), [path])
    assert s["paths"] == {"fast": 1, "precise": 0} and s["lines_rechecked"] == 0
    assert s["ingested"] == ref["ingested"] == len(rows) and daily(db) == daily(str(tmp_path / "ref.duckdb"))


def test_many_numeric_times_after_a_text_time_are_read_the_general_way(tmp_path, db):
    rows = [ev("2026-03-02T10:00:00Z")] + [ev(1_772_500_000 + 60 * i) for i in range(tasks.RECHECK_LINES + 100)]
    path = write_jsonl(tmp_path / "e.jsonl", rows)
    s = ingest(db, [path])
    assert s["paths"] == {"fast": 1, "precise": 0} and s["lines_rechecked"] == 0 and s["ingested"] == len(rows)


@pytest.mark.parametrize("gz", [False, True])
def test_bad_lines_among_many_keep_the_rest_on_the_native_reader(tmp_path, gz):
    rng = random.Random(5)
    raw, expected_bad = [], []
    for i in range(5000):
        if rng.random() < 0.002:
            raw.append(b'{"ts": "2026-03-02T10:00:00Z", "event": "x"')  # cut short
            expected_bad.append((len(raw), "not_json"))
        elif rng.random() < 0.002:
            raw.append(json.dumps(ev("yesterday")).encode())
            expected_bad.append((len(raw), "bad_time"))
        elif rng.random() < 0.01:
            raw.append(rng.choice([b"", b"   ", b"\t\r", b"\x0c"]))  # blank: no row in DuckDB
        else:
            raw.append(json.dumps(ev(f"2026-03-{1 + i % 28:02d}T10:00:00Z", user=f"u-{i % 30}", id=f"e-{i}")).encode())
    path = write_jsonl(tmp_path / ("e.jsonl.gz" if gz else "e.jsonl"), [], raw_lines=raw, gz=gz)
    rejects = tmp_path / "rejects.jsonl"
    s = ingest(str(tmp_path / "1.duckdb"), [path], rejects_path=str(rejects))
    ref = ingest_precisely(str(tmp_path / "2.duckdb"), [path], rejects_path=str(tmp_path / "ref-rejects.jsonl"))
    assert s["paths"] == {"fast": 1, "precise": 0} and s["lines_rechecked"] == len(expected_bad)
    assert [(r["line"], r["reason"]) for r in lines_of(rejects)] == expected_bad
    assert lines_of(rejects) == lines_of(tmp_path / "ref-rejects.jsonl")
    assert (s["lines"], s["ingested"]) == (ref["lines"], ref["ingested"])
    assert daily(str(tmp_path / "1.duckdb")) == daily(str(tmp_path / "2.duckdb"))


def test_many_bad_lines_are_each_given_their_reason(tmp_path, db):
    rows = [ev(f"2026-03-0{1 + i % 9} 10:00") if i % 2 else ev("2026-03-02T10:00:00Z", user=f"u-{i}") for i in range(6000)]
    path = write_jsonl(tmp_path / "e.jsonl", rows)
    s = ingest(db, [path])
    ref = ingest_precisely(str(tmp_path / "ref.duckdb"), [path])
    assert s["paths"] == {"fast": 1, "precise": 0} and s["lines_rechecked"] == 3000
    assert s["rejected"] == ref["rejected"] == {"bad_time": 3000} and s["ingested"] == ref["ingested"] == 3000


def test_first_delivery_wins_when_it_was_a_rechecked_line(tmp_path, db):
    # Line 1 is doubted (a user that reads like a number) but valid; line 2 repeats its id.
    path = write_jsonl(tmp_path / "e.jsonl", [
        ev("2026-03-02T10:00:00Z", event="first", user="1.5", id="k"),
        ev("2026-03-02T10:00:01Z", event="second", user="u-2", id="k"),
        ev("2026-03-02T10:00:02Z", event="other", user="u-3", id="j"),
    ])
    s = ingest(db, [path])
    assert s["lines_rechecked"] == 1 and (s["ingested"], s["duplicates"]) == (2, 1)
    assert daily(db) == {("a-1", "2026-03-02", "first"): (1, 1), ("a-1", "2026-03-02", "other"): (1, 1)}


def test_a_line_the_reader_and_the_index_count_differently_sends_the_file_line_by_line(tmp_path, db):
    # A byte-order mark alone on a line: DuckDB reads a row (not JSON), the precise parser a
    # blank line.  Whichever way, the file's result is the precise parser's.
    path = write_jsonl(tmp_path / "e.jsonl", [ev("2026-03-02T10:00:00Z")], raw_lines=[b"\xef\xbb\xbf", json.dumps(ev("2026-03-03T10:00:00Z")).encode()])
    s = ingest(db, [path])
    assert (s["lines"], s["ingested"], s["rejected"]) == (2, 2, {})


@pytest.mark.parametrize("block", [1, 2, 3, 7, 64, 1 << 20])
@pytest.mark.parametrize("final_newline", [True, False])
def test_line_index_finds_every_non_blank_line(tmp_path, block, final_newline):
    lines = [b'{"a": 1}', b"", b"  ", b'{"b": 22}\r', b"\t", b"x", b"\x0c", b" y", b"", b"zz"]
    data = b"\n".join(lines) + (b"\n" if final_newline else b"")
    path = tmp_path / "f.txt"
    path.write_bytes(data)
    index = LineIndex()
    for i in range(0, len(data), block):
        chunk = data[i:i + block]
        index.feed(chunk, np.flatnonzero(np.frombuffer(chunk, dtype=np.uint8) == 10))
    count, numbers, starts, ends = index.nonblank_lines(str(path), np.arange(5))
    assert count == 5 and numbers.tolist() == [1, 4, 6, 8, 10]
    assert read_spans(str(path), starts, ends) == [b'{"a": 1}', b'{"b": 22}', b"x", b" y", b"zz"]
    _, numbers, starts, ends = index.nonblank_lines(str(path), np.array([1, 4]))
    assert numbers.tolist() == [4, 10] and read_spans(str(path), starts, ends) == [b'{"b": 22}', b"zz"]


def test_line_index_asked_past_its_lines_gives_no_spans(tmp_path):
    # The native reader saw more rows than the index has lines: the caller then reads the file
    # line by line; asking must not fail.
    path = tmp_path / "f.txt"
    path.write_bytes(b'{"a": 1}\n{"b": 2}\n')
    index = LineIndex()
    index.feed(path.read_bytes(), np.array([8, 17]))
    count, numbers, starts, ends = index.nonblank_lines(str(path), np.array([1, 2]))
    assert count == 2 and numbers.size == starts.size == ends.size == 0


@pytest.mark.parametrize("cut", [30, 200])
@pytest.mark.parametrize("name", ["e.jsonl.gz", "e.jsonl"])
def test_a_gzip_stream_cut_short_is_an_error_whatever_the_file_is_called(tmp_path, name, cut):
    whole = b"".join(json.dumps(ev(f"2026-03-02T10:{i % 60:02d}:00Z", id=f"e-{i}")).encode() + b"\n" for i in range(500))
    path = tmp_path / name
    path.write_bytes(gzip.compress(whole)[:cut])
    s = ingest(str(tmp_path / "s.duckdb"), [path])
    assert s["files"] == 0 and s["ingested"] == 0
    assert [e["file"] for e in s["errors"]] == [str(path)] and "to its end" in s["errors"][0]["error"]


def test_scan_file_builds_the_same_index_for_a_gzip_file(tmp_path):
    data = b"".join(b'{"n": %d}\n' % i if i % 13 else b"\n" for i in range(200_000))
    plain, packed = tmp_path / "f.jsonl", tmp_path / "f.jsonl.gz"
    plain.write_bytes(data)
    packed.write_bytes(gzip.compress(data))
    found = []
    for path in (plain, packed):
        index = LineIndex()
        scan_file(str(path), index=index)
        count = index.nonblank_lines(str(path), np.zeros(0, dtype=np.int64))[0]
        count, numbers, starts, ends = index.nonblank_lines(str(path), np.arange(count))
        found.append((numbers.tolist(), read_spans(str(path), starts[-3:], ends[-3:])))
    assert found[0] == found[1]
    assert len(found[0][0]) == 200_000 - len(range(0, 200_000, 13))
    assert found[0][1] == [b'{"n": 199997}', b'{"n": 199998}', b'{"n": 199999}']


def _exact_lines(data: bytes):
    """Longest line and the most opening brackets on a line of 1,000+ bytes, by splitting."""
    lines = data.split(b"\n")
    longest = max(len(line) for line in lines)
    deepest = max([line.count(b"[") + line.count(b"{") for line in lines if len(line) >= 1000], default=0)
    return longest, deepest


@pytest.mark.parametrize("length", [999, 1000, 1001, 1100])
@pytest.mark.parametrize("where", [3, 250_123, (1 << 20) - 600, (1 << 20) - 1])
def test_scan_file_measures_long_lines_exactly_without_finding_every_newline(tmp_path, length, where):
    # Most blocks hold only short lines and are measured at their edges alone; one line of
    # about 1,000 bytes of brackets anywhere (across the 1 MiB blocks' edge too) must still be
    # measured exactly, and its brackets counted from 1,000 bytes up.
    short = b'{"n": 1, "pad": "xxxxxxxxxxxxxxxxxxxxxxxxx"}\n'
    pad = where % len(short)
    data = short * (where // len(short)) + (b"a" * (pad - 1) + b"\n" if pad else b"")
    data += b"[" * length + b"\n" + short * 30_000
    path = tmp_path / "f.jsonl"
    path.write_bytes(data)
    longest, deepest = _exact_lines(data)
    assert (longest, deepest) == (length, length if length >= 1000 else 0)
    assert scan_file(str(path))[1:] == (longest, deepest)
    assert scan_file(str(path), index=LineIndex())[1:] == (longest, deepest)
    # A limit below the depth check's 1,000 bytes: lines over it are measured exactly too.
    path.write_bytes(short * 1000 + b"a" * 301 + b"\n" + short * 1000)
    assert scan_file(str(path), short_line=301)[1] == 301


def test_a_line_of_1000_bytes_is_measured_wherever_it_starts(tmp_path):
    # Every offset against the runs the blocks are checked in: a run of 500 bytes is the
    # widest that no line of 1,000 bytes can miss covering whole.
    path = tmp_path / "f.jsonl"
    for length in (1000, 1001):
        for start in range(0, 1100, 1):
            rest = start % 100
            data = (b"a" * 99 + b"\n") * (start // 100) + (b"a" * (rest - 1) + b"\n" if rest else b"")
            data += b"{" * length + b"\n" + b"b\n" * 2000
            path.write_bytes(data)
            assert scan_file(str(path))[1:] == (length, length), (length, start)


@pytest.mark.parametrize("final_newline", [True, False])
@pytest.mark.parametrize("width", [1, 7, 500])
def test_newline_counts_find_the_same_lines_as_the_line_index(tmp_path, final_newline, width):
    rng = random.Random(width)
    lines = [b'{"n": %d, "pad": "%s"}\r' % (i, b"x" * rng.randint(0, 900)) if i % 5 == 0 else b'{"n": %d}' % i
             for i in range(3000)]
    data = b"\n".join(lines) + (b"\n" if final_newline else b"")
    path = tmp_path / "f.jsonl"
    path.write_bytes(data)
    counts, index = NewlineCounts(width), LineIndex()
    for i in range(0, len(data), 4096):
        block = data[i:i + 4096]
        counts.feed(block, NewlineCounts.of_block(block, width))
        index.feed(block, np.flatnonzero(np.frombuffer(block, dtype=np.uint8) == 10))
    rows = np.array([0, 1, 5, 999, 2998, 2999])
    numbers, starts, ends = counts.spans(str(path), rows, 3000)
    assert [numbers.tolist(), starts.tolist(), ends.tolist()] == [a.tolist() for a in index.nonblank_lines(str(path), rows)[1:]]
    assert read_spans(str(path), starts, ends)[:2] == [lines[0][:-1], lines[1]]
    # Rows that are not as many as the lines (a blank line, or another reader's lines): no spans.
    assert counts.spans(str(path), rows, 2999) is None


def test_a_blank_line_among_doubted_rows_still_finds_their_lines(tmp_path):
    # A blank line makes the reader's rows fewer than the file's lines: the lines are then
    # indexed by a pass of their own, and the doubted rows still get their own reasons.
    rows = [ev(f"2026-03-02T10:{i % 60:02d}:00Z", id=f"e-{i}") for i in range(200)]
    text = [json.dumps(r) for r in rows]
    text[50] = "not json"
    text.insert(120, "   ")
    path = tmp_path / "e.jsonl"
    path.write_text("\n".join(text) + "\n")
    rejects = tmp_path / "rejects.jsonl"
    s = ingest(str(tmp_path / "s.duckdb"), [path], rejects_path=str(rejects))
    assert s["paths"] == {"fast": 1, "precise": 0} and s["ingested"] == 199
    assert [(r["line"], r["reason"]) for r in lines_of(rejects)] == [(51, "not_json")]


@pytest.mark.parametrize("limit", [76, 200, 1_048_576])
def test_doubted_lines_are_found_whatever_the_line_limit(tmp_path, limit):
    # Under a short line limit the lines' starts are all kept (newline counts per run of half
    # the limit would outgrow the text); otherwise the counts find them.  Either way the
    # doubted lines get their own reasons and line numbers.
    from ebbwatch.config import Config, IngestConfig

    text = [json.dumps({"ts": f"2026-03-02T10:{i % 60:02d}:00Z", "event": "e", "user": f"u{i % 9}", "account": "a"})
            for i in range(300)]
    assert max(map(len, text)) <= 76 and line_run_width(77) < 40 <= line_run_width(201)
    text[40], text[250] = "not json", '{"ts": 5, "event": "e"}'
    path = tmp_path / "e.jsonl"
    path.write_text("\n".join(text) + "\n")
    rejects = tmp_path / "rejects.jsonl"
    cfg = Config(ingest=IngestConfig(max_line_bytes=limit))
    s = ingest(str(tmp_path / "s.duckdb"), [path], rejects_path=str(rejects), config=cfg)
    assert s["paths"] == {"fast": 1, "precise": 0} and s["ingested"] == 298
    assert [(r["line"], r["reason"]) for r in lines_of(rejects)] == [(41, "not_json"), (251, "missing_field")]


def test_gzip_reads_the_same_with_the_standard_library_as_with_isal(tmp_path, monkeypatch):
    # ISA-L is a dependency only where it has wheels; elsewhere zlib inflates the same streams.
    import zlib

    from ebbwatch.ingest import inflate

    rows = [json.dumps(ev(f"2026-03-02T10:{i % 60:02d}:00Z", id=f"e-{i}")) for i in range(3000)]
    rows[1234] = "not json"
    path = tmp_path / "e.jsonl.gz"
    path.write_bytes(gzip.compress(("\n".join(rows) + "\n").encode()[:40_000]) + gzip.compress(
        ("\n".join(rows) + "\n").encode()[40_000:]))  # two members, a line split between them
    found = []
    for modules in ((inflate._gzip, inflate._zlib), (gzip, zlib)):
        monkeypatch.setattr(inflate, "_gzip", modules[0])
        monkeypatch.setattr(inflate, "_zlib", modules[1])
        rejects = tmp_path / f"rejects-{len(found)}.jsonl"
        s = ingest(str(tmp_path / f"{len(found)}.duckdb"), [path], rejects_path=str(rejects))
        found.append((s["ingested"], s["paths"], [(r["line"], r["reason"]) for r in lines_of(rejects)],
                      scan_file(str(path))))
    assert found[0] == found[1]
    assert found[0][:3] == (2999, {"fast": 1, "precise": 0}, [(1235, "not_json")])
