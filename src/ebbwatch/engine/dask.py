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


def gather_in_order(futures: Sequence, what: str = "task", *, progress=None) -> list:
    """The futures' results in order.  A task that failed (after Dask's retries) is one clear
    error naming it, never a shorter list."""
    results = []
    for i, future in enumerate(futures):
        try:
            results.append(future.result())
        except Exception as exc:  # noqa: BLE001 - a task failure becomes one clear error
            raise EbbwatchError(f"{what} task {i + 1} of {len(futures)} failed on the cluster: {exc}") from exc
        if progress:
            progress(i + 1, len(futures))
    return results


def map_dask(client, task: Callable, items: Sequence, *, retries: int = 3, progress=None) -> list:
    """``[task(item) for item in items]`` on the cluster, results in the order of ``items``;
    a task whose worker dies is retried (``retries`` times)."""
    return gather_in_order(client.map(task, list(items), retries=retries, pure=False), progress=progress)


def concat_accounts(frames: Sequence[pd.DataFrame], accounts: Sequence[str]) -> pd.DataFrame:
    """The per-block score frames as one, checked to hold exactly ``accounts`` in order:
    a result missing any is an error, never a silently shorter answer."""
    result = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()
    if len(result) != len(accounts) or list(result["account"]) != list(accounts):
        raise EbbwatchError(f"the cluster returned {len(result)} of {len(accounts)} accounts; refusing a partial result")
    return result
