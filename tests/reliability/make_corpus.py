"""Writes the committed bad-input corpus (run by hand: python tests/reliability/make_corpus.py).

Each file holds nasty lines of one family, interleaved with good ones; ``expected.json`` says
what ingesting each file must give.  Line-by-line expectations are the reason codes of
``ebbwatch.errors.REJECT_REASONS`` or "ok" (ingested) or "blank" (skipped).
"""

import gzip
import json
from pathlib import Path

HERE = Path(__file__).resolve().parent / "corpus"
GOOD = b'{"ts": "2026-03-02T10:00:00Z", "event": "doc.edit", "user": "u-1", "account": "a-1"}'


def good(i):
    return json.dumps({"ts": f"2026-03-02T10:{i % 60:02d}:00Z", "event": "doc.edit", "user": f"u-{i}", "account": "a-1"}).encode()


FAMILIES = {
    "truncated.jsonl": [(b'{"ts": "2026-03-02T10:00:00Z", "event": "doc.ed', "not_json"), (b'{"ts": ', "not_json"), (b"{", "not_json")],
    "wrong_types.jsonl": [
        (b'{"ts": "2026-03-02T10:00:00Z", "event": 17, "user": "u"}', "wrong_type"),
        (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": {"id": 1}}', "wrong_type"),
        (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": [1]}', "wrong_type"),
        (b'{"ts": true, "event": "x", "user": "u"}', "wrong_type"),
        (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": 1.5}', "wrong_type"),
        (b'["ts", "event"]', "not_object"), (b'"just a string"', "not_object"), (b"42", "not_object"), (b"null", "not_object"),
    ],
    # DuckDB's reader takes nan/inf/infinity (any case) and a trailing comma, so both paths do:
    # a non-finite time is a bad time, and such a token in a field ebbwatch does not read is fine.
    "nan_infinity.jsonl": [
        (b'{"ts": NaN, "event": "x", "user": "u"}', "bad_time"), (b'{"ts": Infinity, "event": "x", "user": "u"}', "bad_time"),
        (b'{"ts": -Infinity, "event": "x", "user": "u"}', "bad_time"),
        (b'{"ts": 1e400, "event": "x", "user": "u"}', "bad_time"),
        (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a-1", "attrs": {"score": -inf, "n": [1, 2,],},}', "ok"),
        (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a-1", "attrs": [,]}', "not_json"),
    ],
    "huge_numbers.jsonl": [
        (b'{"ts": 123456789012345678901234567890, "event": "x", "user": "u"}', "bad_time"),
        (b'{"ts": 1772500000, "event": "x", "user": 123456789012345678901234567890, "account": "a-1"}', "ok"),
        (b'{"ts": 1772500000123, "event": "x", "user": "u", "account": "a-1"}', "ok"),
    ],
    "deep_nesting.jsonl": [(b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "attrs": ' + b"[" * 100000 + b"]" * 100000 + b"}", "not_json"),
                           (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "account": "a-1", "attrs": ' + b"[" * 300 + b"]" * 300 + b"}", "ok")],
    "long_line.jsonl": [(b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "u", "attrs": "' + b"x" * 1_100_000 + b'"}', "too_long")],
    "invalid_utf8.jsonl": [(b'{"ts": "2026-03-02T10:00:00Z", "event": "\xc3\x28", "user": "u"}', "not_utf8"),
                           (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": "\xff\xfe"}', "not_utf8")],
    "bom.jsonl": [(b"\xef\xbb\xbf" + GOOD, "ok")],
    "nul_bytes.jsonl": [(b'{"ts": "2026-03-02T10:00:00Z", "event": "x\x00y", "user": "u"}', "not_json"), (b"\x00\x00\x00", "not_json")],
    "cr_only.jsonl": [(GOOD + b"\r" + GOOD + b"\r" + GOOD, "not_json")],
    "far_times.jsonl": [
        (b'{"ts": "1850-01-01T00:00:00Z", "event": "x", "user": "u"}', "past_time"),
        (b'{"ts": "2999-01-01T00:00:00Z", "event": "x", "user": "u"}', "future_time"),
        (b'{"ts": -99999999999, "event": "x", "user": "u"}', "past_time"),
        (b'{"ts": "2026-13-45T99:00:00Z", "event": "x", "user": "u"}', "bad_time"),
        (b'{"ts": "2026-03-02", "event": "x", "user": "u"}', "bad_time"),
    ],
    "missing_fields.jsonl": [(b'{"event": "x", "user": "u"}', "missing_field"), (b'{"ts": "2026-03-02T10:00:00Z", "user": "u"}', "missing_field"),
                             (b'{"ts": "2026-03-02T10:00:00Z", "event": "", "user": "u"}', "missing_field"),
                             (b'{"ts": "2026-03-02T10:00:00Z", "event": "x", "user": null}', "missing_field"),
                             (b"   ", "blank"), (b"", "blank")],
}


def main():
    HERE.mkdir(exist_ok=True)
    expected = {}
    for name, lines in FAMILIES.items():
        out, per_line = [], []
        for i, (raw, outcome) in enumerate(lines):
            out += [good(i), raw]
            per_line += ["ok", outcome]
        (HERE / name).write_bytes(b"\n".join(out) + b"\n")
        expected[name] = per_line
    (HERE / "empty.jsonl").write_bytes(b"")
    expected["empty.jsonl"] = []
    whole = gzip.compress(b"\n".join(good(i) for i in range(3000)) + b"\n")
    (HERE / "cut_short.jsonl.gz").write_bytes(whole[: len(whole) // 2])
    expected["cut_short.jsonl.gz"] = "unreadable"
    (HERE / "expected.json").write_text(json.dumps(expected, indent=1) + "\n")


if __name__ == "__main__":
    main()
