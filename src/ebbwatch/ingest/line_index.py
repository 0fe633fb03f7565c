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

    def _first_lines(self) -> np.ndarray:
        """The index of each block's first line, and the line count at the end."""
        return np.concatenate([[0], np.cumsum([rel.size for rel in self._relative], dtype=np.int64)])

    def _line_starts(self, lines: np.ndarray) -> np.ndarray:
        """Byte offsets of the given 0-based line indices (ascending or not)."""
        first_line = self._first_lines()
        block = np.searchsorted(first_line, lines, side="right") - 1
        out = np.empty(lines.size, dtype=np.int64)
        for b in np.unique(block):
            here = block == b
            out[here] = self._relative[b][lines[here] - first_line[b]].astype(np.int64) + self._bases[b]
        return out

    def _line_of_start(self, offsets: np.ndarray) -> np.ndarray:
        """0-based line indices of lines starting at the given byte offsets."""
        first_line = self._first_lines()
        block = np.searchsorted(np.array(self._bases, dtype=np.int64), offsets, side="right") - 1
        out = np.empty(offsets.size, dtype=np.int64)
        for b in np.unique(block):
            here = block == b
            out[here] = first_line[b] + np.searchsorted(self._relative[b].astype(np.int64), offsets[here] - self._bases[b])
        return out

    @property
    def line_count(self) -> int:
        return int(self._first_lines()[-1])

    def _spans(self, lines: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        starts = self._line_starts(lines)
        last = lines == self.line_count - 1
        # A line ends before the next one's newline, or at the stream's end (less a final newline).
        ends = np.where(last, self.size - 1 if self._line_pending else self.size,
                        self._line_starts(np.where(last, 0, lines + 1)) - 1)
        return starts, ends

    def blank_lines(self, path: str) -> np.ndarray:
        """0-based indices of the blank lines (only ``lines.LINE_SPACE``), ascending; reads only
        the lines whose first byte is whitespace."""
        maybe = np.concatenate(self._maybe_blank) if self._maybe_blank else np.zeros(0, dtype=np.int64)
        if not maybe.size:
            return maybe
        lines = self._line_of_start(maybe)
        starts, ends = self._spans(lines)
        blank = [not raw.strip(LINE_SPACE.encode()) for raw in read_spans(path, starts, ends)]
        return lines[np.array(blank, dtype=bool)]

    def nonblank_lines(self, path: str, ordinals: np.ndarray) -> tuple[int, np.ndarray, np.ndarray, np.ndarray]:
        """For the ``ordinals`` (0-based among non-blank lines, ascending): ``(nonblank_count,
        line_numbers, starts, ends)``, the number of non-blank lines in all, the lines' 1-based
        numbers, and the byte offsets in the (decompressed) text of each line's first byte and
        of its end (before ``\\n``).  Ordinals at or past the count (the reader saw more lines
        than the index, as in a gzip stream cut short) get no lines: three empty arrays."""
        blank = self.blank_lines(path)
        ordinals = np.asarray(ordinals, dtype=np.int64)
        nonblank = self.line_count - blank.size
        if ordinals.size and ordinals.max() >= nonblank:
            nothing = np.zeros(0, dtype=np.int64)
            return nonblank, nothing, nothing, nothing
        # The line index of ordinal k: k plus the blank lines at or before it (a fixed point).
        lines = ordinals.copy()
        while True:
            moved = ordinals + np.searchsorted(blank, lines, side="right")
            if np.array_equal(moved, lines):
                break
            lines = moved
        starts, ends = self._spans(lines) if lines.size else (lines, lines)
        return nonblank, lines + 1, starts, ends


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
