"""The local engine: score account chunks one after another in this process.

Peak memory is set by the chunk size, not by the number of accounts.
"""

from __future__ import annotations

from typing import Callable, Sequence

import pandas as pd


def chunked(items: Sequence, size: int):
    """Consecutive slices of ``items`` of at most ``size`` elements."""
    if size < 1:
        raise ValueError(f"chunk size must be >= 1, got {size}")
    for start in range(0, len(items), size):
        yield items[start:start + size]


def map_local(task: Callable, items: Sequence, *, progress: Callable[[int, int], None] | None = None) -> list:
    """``[task(item) for item in items]``, reporting progress after each item."""
    results = []
    for i, item in enumerate(items):
        results.append(task(item))
        if progress:
            progress(i + 1, len(items))
    return results


def run_local(accounts: Sequence[str], load: Callable, score: Callable, *, chunk_size: int = 10_000,
              progress: Callable[[int, int], None] | None = None) -> pd.DataFrame:
    """``score(load(chunk))`` for each chunk of ``accounts``, concatenated in order."""
    parts = []
    done = 0
    for chunk in chunked(list(accounts), chunk_size):
        parts.append(score(load(chunk)))
        done += len(chunk)
        if progress:
            progress(done, len(accounts))
    if not parts:
        return pd.DataFrame()
    return pd.concat(parts, ignore_index=True)
