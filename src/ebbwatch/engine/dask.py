"""The Dask engine: the same per-chunk function the local engine runs, mapped over account
chunks on a ``distributed`` cluster, results gathered back in order.

Dask is an optional extra (``pip install 'ebbwatch[dask]'``) imported only here, only when used.
"""

from __future__ import annotations

import re
from contextlib import contextmanager
from typing import Callable, Sequence

import pandas as pd

from ..errors import EbbwatchError, UsageError
from .local import chunked

LOCAL = re.compile(r"^local(?::(\d+))?$")


def _distributed():
    try:
        import distributed
    except ImportError:  # pragma: no cover - depends on the install
        raise UsageError("--engine dask needs Dask: pip install 'ebbwatch[dask]'") from None
    return distributed


@contextmanager
def dask_client(scheduler: str | None):
    """A ``distributed.Client``: ``local[:N]`` starts a LocalCluster of N worker processes
    (default 2), anything else is the address of a running scheduler."""
    distributed = _distributed()
    scheduler = scheduler or "local"
    match = LOCAL.match(scheduler)
    if match:
        workers = int(match.group(1) or 2)
        with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                      dashboard_address=None) as cluster, distributed.Client(cluster) as client:
            yield client
        return
    try:
        client = distributed.Client(scheduler, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise EbbwatchError(f"cannot reach the Dask scheduler at {scheduler}: {exc}") from exc
    try:
        yield client
    finally:
        client.close()


def run_dask(accounts: Sequence[str], task: Callable, *, chunk_size: int = 10_000, client=None,
             retries: int = 3, progress=None) -> pd.DataFrame:
    """``task(chunk)`` for each chunk of ``accounts`` on the cluster, concatenated in order.

    A chunk whose worker dies is retried (``retries`` times).  Every account must come back:
    a result missing any is an error, never a silently shorter answer.
    """
    chunks = [list(c) for c in chunked(list(accounts), chunk_size)]
    futures = client.map(task, chunks, retries=retries, pure=False)
    parts = []
    for i, future in enumerate(futures):
        try:
            parts.append(future.result())
        except Exception as exc:  # noqa: BLE001 - a task failure becomes one clear error
            raise EbbwatchError(f"chunk {i + 1} of {len(chunks)} failed on the cluster: {exc}") from exc
        if progress:
            progress(min((i + 1) * chunk_size, len(accounts)), len(accounts))
    result = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
    if len(result) != len(accounts) or list(result["account"]) != list(accounts):
        raise EbbwatchError(f"the cluster returned {len(result)} of {len(accounts)} accounts; refusing a partial scan")
    return result
