"""Finding the n-th non-blank line of a file again without reading the lines before it.

DuckDB's JSON reader gives one row per non-blank line, in file order, but not the line's
number.  When it doubts a few rows, the precise parser takes just those lines; the newline
counts kept in the pass that hashes the file (:class:`NewlineCounts`) say where they are, or,
where some lines are blank, an index of every line's start (:class:`LineIndex`).
"""

from __future__ import annotations

import numpy as np

from .inflate import gzip_open
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


class NewlineCounts:
    """How many newlines each run of ``width`` bytes of a stream holds (the decompressed text for
    gzip), fed block by block: 2 bytes per ``width`` bytes of text, where :class:`LineIndex`
    keeps 4 per line, and counted by the same comparison that measures the lines
    (``readers.scan_file``) instead of finding every newline.  When the native reader's rows
    are as many as the stream's lines (so no line was blank), row ``k`` is line ``k`` and its
    span is found by reading the one or two runs that hold its newlines again.
    """

    def __init__(self, width: int):
        self.width = width
        self._bases: list[int] = []
        self._counts: list[np.ndarray] = []
        self.size = 0
        self._ends_with_newline = False

    @staticmethod
    def of_block(block: bytes, width: int) -> np.ndarray:
        """Newlines in each run of ``width`` bytes of ``block`` (the last run may be shorter)."""
        is_newline = np.frombuffer(block, dtype=np.uint8) == 10
        whole = len(block) - len(block) % width
        counts = is_newline[:whole].reshape(-1, width).sum(axis=1, dtype=np.uint16)
        if whole < len(block):
            counts = np.append(counts, np.uint16(np.count_nonzero(is_newline[whole:])))
        return counts

    def feed(self, block: bytes, counts: np.ndarray):
        """``counts``: :meth:`of_block` of ``block``."""
        if not block:
            return
        self._bases.append(self.size)
        self._counts.append(counts)
        self.size += len(block)
        self._ends_with_newline = block.endswith(b"\n")

    def spans(self, path: str, rows: np.ndarray, row_count: int) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """For the native reader's ``rows`` (0-based, ascending) out of its ``row_count``:
        ``(line_numbers, starts, ends)`` as :meth:`LineIndex.nonblank_lines` gives them, or
        ``None`` when the stream's lines are not exactly ``row_count`` (some were blank, or the
        reader split them otherwise): then only a :class:`LineIndex` can tell."""
        rows = np.asarray(rows, dtype=np.int64)
        if not self._counts:
            return (rows + 1, rows, rows) if row_count == 0 else None
        after = np.cumsum(np.concatenate(self._counts), dtype=np.int64)  # newlines up to each run's end
        newlines = int(after[-1])
        lines = newlines + (0 if self._ends_with_newline else 1)
        if lines != row_count:
            return None
        run_starts = np.concatenate([base + np.arange(c.size, dtype=np.int64) * self.width
                                     for base, c in zip(self._bases, self._counts)])
        run_ends = np.append(run_starts[1:], self.size)
        # Line k starts after newline k - 1 and ends at newline k (or at the stream's end).
        wanted = np.unique(np.concatenate([rows - 1, rows]))
        wanted = wanted[(wanted >= 0) & (wanted < newlines)]
        runs = np.searchsorted(after, wanted, side="right")
        position = {}
        chosen = np.unique(runs)
        texts = read_spans(path, run_starts[chosen], run_ends[chosen], drop_cr=False)
        for run, text in zip(chosen.tolist(), texts):
            here = np.flatnonzero(np.frombuffer(text, dtype=np.uint8) == 10) + run_starts[run]
            first = int(after[run]) - here.size
            for j in wanted[runs == run].tolist():
                position[j] = int(here[j - first])
        starts = np.array([0 if k == 0 else position[k - 1] + 1 for k in rows.tolist()], dtype=np.int64)
        ends = np.array([position[k] if k < newlines else self.size for k in rows.tolist()], dtype=np.int64)
        return rows + 1, starts, ends


def read_spans(path: str, starts: np.ndarray, ends: np.ndarray, drop_cr: bool = True) -> list[bytes]:
    """The bytes ``[start, end)`` of the (decompressed) file for each span, in the order given;
    a trailing ``\\r`` is dropped (unless not ``drop_cr``), as ``readers.iter_lines`` drops it.
    Spans are read in ascending order (a gzip file is decompressed once, forwards)."""
    order = np.argsort(starts, kind="stable")
    out: list[bytes] = [b""] * len(order)
    with open(path, "rb") as probe:
        gz = probe.read(2) == b"\x1f\x8b"
    with (gzip_open if gz else open)(path, "rb") as handle:
        for i in order:
            handle.seek(int(starts[i]))
            raw = handle.read(int(ends[i] - starts[i]))
            out[i] = raw[:-1] if drop_cr and raw.endswith(b"\r") else raw
    return out
