"""The local engine: score account chunks in this process.

Peak memory is set by the chunk size (and the number of chunks in flight), not by the number of
accounts.
"""

from __future__ import annotations

import os
from collections import deque
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait
from typing import Callable, Sequence


def chunked(items: Sequence, size: int):
    """Consecutive slices of ``items`` of at most ``size`` elements."""
    if size < 1:
        raise ValueError(f"chunk size must be >= 1, got {size}")
    for start in range(0, len(items), size):
        yield items[start:start + size]


# Accounts scored at once by default.  Smaller chunks keep each (A, D) temporary of the scoring
# under glibc's largest mmap threshold (32 MB), so it reuses freed heap memory instead of asking
# the kernel for fresh zeroed pages: on the 100k-account scan benchmark 5,000 against 10,000 cut
# system time from 2.8 to 1.1 s, whole-scan wall time by 7% and peak memory by 28%; 2,500 and
# 4,000 were no faster than 5,000 (tests/benchmarks/scan.py; DEVELOPERS.md).
DEFAULT_CHUNK_SIZE = 5_000


def default_threads() -> int:
    """Chunks scored at once by default: one per core, at most four (memory grows with it)."""
    return max(1, min(4, os.cpu_count() or 1))


def run_local(accounts: Sequence[str], load: Callable, score: Callable, *, chunk_size: int = DEFAULT_CHUNK_SIZE,
              progress: Callable[[int, int], None] | None = None, threads: int = 1) -> list:
    """``[score(load(chunk)) for chunk in chunks of accounts]``, in order.

    With ``threads`` > 1, up to that many chunks are scored at once in threads (numpy and
    DuckDB release the GIL in their heavy loops) while the next chunks are loaded, one at a time
    on one thread of their own (``load`` may use a connection that must not be shared).  At
    most ``threads`` loaded chunks wait, so memory stays bounded.
    """
    chunks = list(chunked(list(accounts), chunk_size))
    results, done = [None] * len(chunks), 0
    if threads <= 1:
        for i, chunk in enumerate(chunks):
            results[i] = score(load(chunk))
            done += len(chunk)
            if progress:
                progress(done, len(accounts))
        return results
    with ThreadPoolExecutor(1) as reader, ThreadPoolExecutor(threads) as scorers:
        to_load = iter(enumerate(chunks))
        loading, scoring = deque(), {}

        def load_next():
            for i, chunk in to_load:  # at most one
                loading.append((i, reader.submit(load, chunk)))
                break

        for _ in range(threads):
            load_next()
        while loading or scoring:
            while loading and len(scoring) < threads:
                i, panel = loading.popleft()
                scoring[scorers.submit(score, panel.result())] = i
                load_next()
            # Whichever chunk finishes first frees its thread for the next: waiting on the oldest
            # left a thread idle whenever a younger chunk finished before it.
            finished, _ = wait(scoring, return_when=FIRST_COMPLETED)
            for future in finished:
                i = scoring.pop(future)
                results[i] = future.result()
                done += len(chunks[i])
                if progress:
                    progress(done, len(accounts))
    return results
