"""Finding input files, hashing them, and reading their lines for the precise path."""

from __future__ import annotations

import gzip
import hashlib
import os
import shutil
import sys
import tempfile
import zlib
from pathlib import Path
from typing import Iterator

import numpy as np
import xxhash

from ..errors import InputError
from .inflate import INFLATE_ERRORS, gzip_decompressobj, gzip_open
from .line_index import LineIndex, NewlineCounts

JSONL_SUFFIXES = (".jsonl", ".ndjson", ".json", ".jsonl.gz", ".ndjson.gz", ".json.gz")
# Compressions read through a decompressed temporary copy (DuckDB's reader takes gzip itself).
COPIED_COMPRESSIONS = {".bz2": "bz2", ".zst": "zstd"}
EVENT_SUFFIXES = JSONL_SUFFIXES + tuple(
    base + ext for base in (".jsonl", ".ndjson", ".json") for ext in COPIED_COMPRESSIONS) + (".parquet",)
_CSV_SUFFIXES = (".csv", ".csv.gz", ".tsv")
STDIN = "-"


def _skip_reason(path: Path) -> str:
    name = path.name.lower()
    if name.endswith(_CSV_SUFFIXES):
        return ("a CSV file, not events: daily counts go through --daily, accounts through --accounts, "
                "identities through --identities")
    return "not an events file (events are .jsonl, .ndjson, .json or .parquet, optionally .gz, .bz2 or .zst)"


def expand_inputs(inputs: list[str]) -> tuple[list[str], list[dict]]:
    """Files in the order given; directories expand to their JSON-lines and Parquet files,
    recursively, sorted.  Returns ``(files, skipped)``: ``skipped`` the other files found in
    directories, each ``{"file", "reason"}`` (hidden files, starting with a dot, are passed over
    without a word)."""
    files: list[str] = []
    skipped: list[dict] = []
    for item in inputs:
        if item == STDIN:
            files.append(STDIN)
            continue
        path = Path(item)
        if path.is_dir():
            for found in sorted(p for p in path.rglob("*") if p.is_file()):
                if any(part.startswith(".") for part in found.relative_to(path).parts):
                    continue
                if found.name.lower().endswith(EVENT_SUFFIXES):
                    files.append(str(found))
                else:
                    skipped.append({"file": str(found), "reason": _skip_reason(found)})
        elif path.exists():
            files.append(str(path))
        else:
            raise InputError(f"no such file or directory: {item}")
    return files, skipped


def copied_compression(path: str) -> str | None:
    """"bz2" or "zstd" when ``path`` holds such a stream (by its magic bytes), else None."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(4)
    except OSError:
        return None
    if head[:3] == b"BZh":
        return "bz2"
    if head == b"\x28\xb5\x2f\xfd":
        return "zstd"
    return None


def decompressed_copy(path: str, compression: str) -> str:
    """A temporary file holding ``path`` decompressed (the caller removes it).  zstd needs the
    zstandard package (``pip install 'ebbwatch[zstd]'``)."""
    if compression == "bz2":
        import bz2

        opener = bz2.open
    else:
        try:
            import zstandard
        except ImportError:
            raise InputError(f"{path} is zstd-compressed; reading it needs the zstandard package "
                             "(pip install 'ebbwatch[zstd]'), or decompress it first") from None

        def opener(name, mode):
            return zstandard.open(name, mode)
    handle = tempfile.NamedTemporaryFile(prefix="ebbwatch-unpacked-", suffix=".jsonl", delete=False)
    try:
        with handle, opener(path, "rb") as source:
            shutil.copyfileobj(source, handle, 1 << 20)
    except Exception as exc:  # noqa: BLE001 - OSError, EOFError, or zstandard's own error type
        remove_quietly(handle.name)
        raise InputError(f"cannot read {path} to its end: {exc}") from exc
    return handle.name


def looks_like_csv(path: str, peek_bytes: int = 1 << 16) -> str | None:
    """The first line when the (decompressed) file reads as comma-separated text rather than
    JSON lines (a header and a row with the same number of commas, not JSON), else None."""
    import json

    try:
        with (gzip.open if is_gzip(path) else open)(path, "rb") as handle:
            head = handle.read(peek_bytes)
    except (EOFError, OSError, zlib.error):
        return None
    lines = [line.strip() for line in head.split(b"\n")[:3] if line.strip()]
    # Any line that opens a JSON object or array makes it JSON lines (with some bad lines: the
    # same fields give JSON lines equal comma counts too, so those alone do not decide).
    if len(lines) < 2 or any(line.lstrip(b"\xef\xbb\xbf").startswith((b"{", b"[")) for line in lines):
        return None
    try:
        json.loads(lines[0])
        return None
    except ValueError:
        pass
    commas = lines[0].count(b",")
    if commas and lines[1].count(b",") == commas:
        return lines[0][:80].decode("utf-8", errors="replace")
    return None


STDIN_SPOOL_PREFIX = ".ebbwatch-stdin-"


def spool_stdin(stream=None, directory: str | None = None) -> str:
    """Copy standard input to a file so it can be hashed and read twice, and return its path.

    The copy is a hidden file in ``directory`` (the store's, beside its rejects file; the
    system's temporary directory without one) whose name carries this process's id: events can
    be personal data, and a copy left by an ingest killed before it could remove it then stays
    beside the store, where :func:`left_spools` finds it, not in a shared temporary directory.
    """
    stream = stream if stream is not None else sys.stdin.buffer
    prefix = f"{STDIN_SPOOL_PREFIX}{os.getpid()}-"
    try:
        handle = tempfile.NamedTemporaryFile(prefix=prefix, suffix=".jsonl", dir=directory, delete=False)
    except OSError:  # a store directory this process may not create files in
        handle = tempfile.NamedTemporaryFile(prefix=prefix, suffix=".jsonl", delete=False)
    with handle:
        shutil.copyfileobj(stream, handle, 1 << 20)
    return handle.name


def _process_gone(pid: int) -> bool:
    try:
        os.kill(pid, 0)  # signal 0: a check, nothing sent
    except ProcessLookupError:
        return True
    except OSError:
        return False  # alive, another user's
    return False


def left_spools(directory: str) -> list[str]:
    """Copies of standard input in ``directory`` whose ingest is no longer running (it was killed
    before it could remove its copy), oldest first.  They may hold events that were never
    ingested, so they are reported, never removed.  Empty where a process cannot be checked
    without side effects (Windows, where ``os.kill`` would end it)."""
    if os.name != "posix":
        return []
    left = []
    for path in Path(directory).glob(f"{STDIN_SPOOL_PREFIX}*.jsonl"):
        pid = path.name[len(STDIN_SPOOL_PREFIX):].split("-", 1)[0]
        if pid.isdigit() and _process_gone(int(pid)):
            try:
                left.append((path.stat().st_mtime, str(path)))
            except OSError:
                pass  # removed meanwhile
    return [name for _, name in sorted(left)]


# A line nesting deeper than N needs at least 2N bytes, so only lines this long are counted.
_DEPTH_CHECK_BYTES = 1000


def _opens(data: bytes) -> int:
    return data.count(b"[") + data.count(b"{")


def line_run_width(short_line: int = _DEPTH_CHECK_BYTES) -> int:
    """The run of bytes every one of which must hold a newline for a block to have no line of
    ``short_line`` bytes (a line that long covers a whole run), whatever ``short_line`` asks,
    no line long enough to nest deeply."""
    return max(1, (min(short_line, _DEPTH_CHECK_BYTES) + 1) // 2)


class _LongestLine:
    """Tracks the longest line (bytes, without its terminator) and, for lines long enough to
    nest deeply, the most opening brackets on one line — an upper bound of the nesting depth —
    across blocks of a stream.

    Lines shorter than ``short_line`` bytes (at most ``_DEPTH_CHECK_BYTES``) need not be
    measured: a block in which every aligned run of ``line_run_width(short_line)`` bytes holds
    a newline has no line of ``short_line`` bytes inside it (a longer one would cover such a run
    whole), so only its first and last lines, which continue across blocks, are measured.
    ``result()`` is then exact from ``short_line`` bytes up and below it only a lower bound.
    Finding every newline costs twice as much as that check, in a thread that competes with
    DuckDB's parse for the same two cores.
    """

    def __init__(self, short_line: int = _DEPTH_CHECK_BYTES):
        self.longest = 0
        self.current = 0  # length of the unfinished line carried into the next block
        self.deepest = 0
        self.opens = 0  # opening brackets of the unfinished line, if it is long
        self.chunk = line_run_width(short_line)

    def feed_edges(self, block: bytes):
        """Feed a block in which every whole run of ``chunk`` bytes holds a newline (so all the
        lines that begin and end in it are short): only its first and last lines are measured."""
        first, last = block.find(b"\n"), block.rfind(b"\n")
        line = self.current + first
        self.longest = max(self.longest, line)
        if line >= _DEPTH_CHECK_BYTES:
            self.deepest = max(self.deepest, self.opens + _opens(block[:first]))
        tail = block[last + 1:]
        self.current = len(tail)
        self.opens = _opens(tail)

    def feed(self, block: bytes, newlines: np.ndarray):
        """``newlines``: positions of ``\\n`` in ``block`` (ascending)."""
        if not block:
            return
        if newlines.size == 0:
            self.current += len(block)
            self.opens += _opens(block)
            self.deepest = max(self.deepest, self.opens)
            return
        starts = np.concatenate([[0], newlines[:-1] + 1])
        lengths = newlines - starts
        first = self.current + int(lengths[0])
        self.longest = max(self.longest, first, int(lengths[1:].max()) if lengths.size > 1 else 0)
        if first >= _DEPTH_CHECK_BYTES:
            self.deepest = max(self.deepest, self.opens + _opens(block[: newlines[0]]))
        for i in np.flatnonzero(lengths[1:] >= _DEPTH_CHECK_BYTES) + 1:
            self.deepest = max(self.deepest, _opens(block[starts[i]: newlines[i]]))
        tail = block[newlines[-1] + 1:]
        self.current = len(tail)
        self.opens = _opens(tail)

    def result(self) -> int:
        return max(self.longest, self.current)


CONTENT_HASH = "xxh3-128"
LEGACY_CONTENT_HASH = "sha256"


def _text_blocks(path: str, on_stored=None) -> Iterator[bytes]:
    """The file's text in blocks of about 1 MiB, decompressed for gzip (concatenated members
    too); ``on_stored(block)`` sees each block of the bytes as stored first.  Raises
    :class:`InputError` when the file cannot be read to its end."""
    try:
        gz = is_gzip(path)
        inflater = gzip_decompressobj() if gz else None
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                if on_stored is not None:
                    on_stored(block)
                if inflater is None:
                    yield block
                    continue
                while block:
                    yield inflater.decompress(block, 1 << 24)
                    block = inflater.unconsumed_tail
                    if inflater.eof and inflater.unused_data:
                        # A second gzip member follows (concatenated files are valid gzip).
                        rest = inflater.unused_data
                        inflater = gzip_decompressobj()
                        block = rest
        if inflater is not None and not inflater.eof:
            # The precise path's reader says the same of such a file (``iter_lines``); DuckDB
            # would read one named .jsonl as raw bytes.
            raise InputError(f"cannot read {path} to its end: the gzip stream stops before its end-of-stream marker")
    except INFLATE_ERRORS as exc:
        raise InputError(f"cannot read {path}: not a valid gzip file ({exc})") from exc
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror or exc}") from exc


def _newlines(block: bytes) -> np.ndarray:
    return np.flatnonzero(np.frombuffer(block, dtype=np.uint8) == 10)


def scan_file(path: str, legacy: bool = False, index: LineIndex | NewlineCounts | None = None,
              measure_lines: bool = True, short_line: int = _DEPTH_CHECK_BYTES) -> tuple[list[str], int, int]:
    """One pass over a file: its content hashes (of the bytes as stored), its longest line in
    bytes and an upper bound of its deepest bracket nesting (of the decompressed text for gzip).
    DuckDB's reader enforces neither a per-line size limit nor Python's nesting limit, so the
    fast path relies on these to send such files to the precise path.

    The hashes are ``"xxh3-128:<hex>"`` and, with ``legacy`` (a store that logged files under
    SHA-256 before schema 3), ``"sha256:<hex>"`` as well, so a file ingested then is still
    recognised.  XXH3-128 rather than SHA-256: the hash only tells a re-delivered file from a
    new one, and on the ingest benchmark's 285 MB it takes 0.012 s against 0.17 s, in a thread
    that competes with DuckDB for the same two cores.  It is not a cryptographic hash: whoever
    can write the input files could craft one to be skipped (they could as well remove lines).
    The longest line is exact from ``short_line`` bytes up (below, a lower bound: see
    ``_LongestLine``).  The same pass fills ``index``: ``NewlineCounts`` (of width
    ``line_run_width(short_line)``) or, slower, a ``LineIndex`` (:func:`index_lines` builds one
    on its own); without ``measure_lines`` (a Parquet file has no lines) it only hashes, and
    returns 0 and 0.
    """
    hashers = [(CONTENT_HASH, xxhash.xxh3_128())]
    if legacy:
        hashers.append((LEGACY_CONTENT_HASH, hashlib.sha256()))
    longest = _LongestLine(short_line)
    counts = index if isinstance(index, NewlineCounts) else None
    starts = index if isinstance(index, LineIndex) else None
    if counts is not None and counts.width != longest.chunk:
        raise ValueError(f"counts of runs of {counts.width} bytes, not {longest.chunk}")

    def hash_block(block: bytes):
        for _, hasher in hashers:
            hasher.update(block)

    for text in _text_blocks(path, hash_block):
        if not measure_lines or not text:
            continue
        if starts is None:
            per_run = NewlineCounts.of_block(text, longest.chunk)
            if counts is not None:
                counts.feed(text, per_run)
            whole_runs = len(text) // longest.chunk
            if whole_runs and per_run[:whole_runs].all():
                longest.feed_edges(text)
                continue
        newlines = _newlines(text)
        longest.feed(text, newlines)
        if starts is not None:
            starts.feed(text, newlines)
    return [f"{name}:{hasher.hexdigest()}" for name, hasher in hashers], longest.result(), longest.deepest


def index_lines(path: str) -> LineIndex:
    """Where each line of the (decompressed) file starts: a pass of its own, for a file whose
    hashing pass did not record it (:func:`scan_file`)."""
    index = LineIndex()
    for text in _text_blocks(path):
        index.feed(text, _newlines(text))
    return index


def first_value_is_text(path: str, field: str, peek_bytes: int = 1 << 16) -> bool:
    """Whether the first JSON object in the first ``peek_bytes`` of the (decompressed) file has
    a string under ``field``; False when none is found there or the file cannot be read (the
    caller then takes the general route).  The fast path reads a file whose times are strings
    as text, skipping a JSON value per line."""
    import json

    try:
        with (gzip.open if is_gzip(path) else open)(path, "rb") as handle:
            head = handle.read(peek_bytes)
    except (EOFError, OSError, zlib.error):
        return False
    lines = head.split(b"\n")
    if len(head) == peek_bytes:
        lines = lines[:-1]  # the last piece may be cut short
    for raw in lines:
        try:
            value = json.loads(raw)
        except ValueError:
            continue
        if isinstance(value, dict):
            return isinstance(value.get(field), str)
    return False


def is_parquet(path: str) -> bool:
    """Whether ``path`` starts with Parquet's magic bytes (the name does not decide)."""
    try:
        with open(path, "rb") as handle:
            return handle.read(4) == b"PAR1"
    except OSError:
        return False


def is_gzip(path: str) -> bool:
    with open(path, "rb") as handle:
        return handle.read(2) == b"\x1f\x8b"


def iter_lines(path: str) -> Iterator[tuple[int, bytes]]:
    """``(line_number, raw_bytes)`` for each ``\\n``-terminated line; a trailing ``\\r`` is dropped.

    Raises :class:`InputError` when the file cannot be read to its end (a gzip file cut short).
    """
    opener = gzip_open if is_gzip(path) else open
    try:
        with opener(path, "rb") as handle:
            for number, raw in enumerate(handle, start=1):
                if raw.endswith(b"\n"):
                    raw = raw[:-1]
                if raw.endswith(b"\r"):
                    raw = raw[:-1]
                yield number, raw
    except (EOFError, gzip.BadGzipFile, OSError, *INFLATE_ERRORS) as exc:
        raise InputError(f"cannot read {path} to its end: {exc}") from exc


def remove_quietly(path: str):
    try:
        os.unlink(path)
    except OSError:
        pass
