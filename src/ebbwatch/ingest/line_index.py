"""Finding the n-th non-blank line of a file again without reading the lines before it.

DuckDB's JSON reader gives one row per non-blank line, in file order, but not the line's
number.  When it doubts a few rows, the precise parser takes just those lines; this index,
built in the same pass that hashes the file, says where they are.
"""

from __future__ import annotations

import gzip

import numpy as np

from .lines import LINE_SPACE

# First bytes of a line that may be blank (only whitespace: ``lines.LINE_SPACE``) or empty;
# such lines are rare, so each is checked on its own when the index is used.
_MAYBE_BLANK_FIRST_BYTES = np.array([9, 10, 11, 12, 13, 32], dtype=np.uint8)


class LineIndex:
    """Where each line starts in a stream (the decompressed text for gzip), fed block by block.

    Per block: its offset and the starts of the lines that begin in it, relative to the block
    (``uint32``, 4 bytes per line), and the few lines whose first byte is whitespace.
    """

    def __init__(self):
        self._bases: list[int] = []
        self._relative: list[np.ndarray] = []
        self._maybe_blank: list[np.ndarray] = []
        self._line_pending = True  # a line starts at self.size (the stream's start, at first)
        self.size = 0

    def feed(self, block: bytes, newlines: np.ndarray):
        """``newlines``: positions of ``\\n`` in ``block`` (ascending)."""
        if not block:
            return
        starts = newlines + 1
        if self._line_pending:
            starts = np.concatenate([[0], starts])
        # A newline as the block's last byte: the next line starts in the next block (or the
        # stream ends there, and there is no next line).
        self._line_pending = bool(starts.size) and int(starts[-1]) == len(block)
        if self._line_pending:
            starts = starts[:-1]
        first_bytes = np.frombuffer(block, dtype=np.uint8)[starts]
        maybe_blank = starts[np.isin(first_bytes, _MAYBE_BLANK_FIRST_BYTES)]
        self._bases.append(self.size)
        self._relative.append(starts.astype(np.uint32))
        self._maybe_blank.append(maybe_blank.astype(np.int64) + self.size)
        self.size += len(block)

    def _starts(self) -> np.ndarray:
        if not self._relative:
            return np.zeros(0, dtype=np.int64)
        return np.concatenate([rel.astype(np.int64) + base for base, rel in zip(self._bases, self._relative)])

    def nonblank_lines(self, path: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(line_numbers, starts, ends)`` of the non-blank lines, in order: 1-based line
        numbers, and byte offsets in the (decompressed) text of each line's first byte and of
        its end (before ``\\n``).  Reads only the lines that may be blank."""
        starts = self._starts()
        ends = np.empty_like(starts)
        ends[:-1] = starts[1:] - 1
        if starts.size:
            # The last line ends at the stream's end, or before a final newline.
            ends[-1] = self.size - 1 if self._line_pending else self.size
        keep = np.ones(starts.size, dtype=bool)
        maybe = np.concatenate(self._maybe_blank) if self._maybe_blank else np.zeros(0, dtype=np.int64)
        if maybe.size:
            positions = np.searchsorted(starts, maybe)
            for position, raw in zip(positions, read_spans(path, starts[positions], ends[positions])):
                if not raw.strip(LINE_SPACE.encode()):
                    keep[position] = False
        numbers = np.flatnonzero(keep) + 1
        return numbers, starts[keep], ends[keep]


def read_spans(path: str, starts: np.ndarray, ends: np.ndarray) -> list[bytes]:
    """The bytes ``[start, end)`` of the (decompressed) file for each span, in the order given;
    a trailing ``\\r`` is dropped, as ``readers.iter_lines`` drops it.  Spans are read in
    ascending order (a gzip file is decompressed once, forwards)."""
    order = np.argsort(starts, kind="stable")
    out: list[bytes] = [b""] * len(order)
    with open(path, "rb") as probe:
        gz = probe.read(2) == b"\x1f\x8b"
    with (gzip.open if gz else open)(path, "rb") as handle:
        for i in order:
            handle.seek(int(starts[i]))
            raw = handle.read(int(ends[i] - starts[i]))
            out[i] = raw[:-1] if raw.endswith(b"\r") else raw
    return out
