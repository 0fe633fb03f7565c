"""The Dask engine gives exactly the local engine's results, also when a worker dies mid-scan."""

import threading
import time

import pandas as pd
import pytest

import ebbwatch
from ebbwatch.datasets import make_fleet

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("dask")
    fleet = make_fleet(400, 240, seed=51, share_changed=0.2)
    fleet.daily_frame().to_parquet(tmp / "d.parquet")
    db = str(tmp / "s.duckdb")
    ebbwatch.ingest_files([], db=db, daily=str(tmp / "d.parquet"))
    return fleet, db


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        yield c


def same(a, b):
    pd.testing.assert_frame_equal(a.drop(columns=["drivers"]), b.drop(columns=["drivers"]))
    pd.testing.assert_frame_equal(a.attrs["scores"].drop(columns=["weekday_factors"]),
                                  b.attrs["scores"].drop(columns=["weekday_factors"]))


def test_dask_scan_equals_local_scan(store, cluster):
    fleet, db = store
    local = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=50)
    remote = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=50, engine="dask",
                           scheduler=cluster.scheduler_address)
    assert len(local) > 0
    same(local, remote)


def test_worker_killed_mid_scan_still_gives_the_same_results(store, cluster):
    fleet, db = store
    import os
    import signal

    local = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=4)
    with distributed.Client(cluster.scheduler_address) as client:
        pids = list(client.run(os.getpid).values())
    killed = {}

    def kill_one_worker():
        time.sleep(1.0)
        os.kill(pids[0], signal.SIGKILL)  # the worker process dies; its nanny starts a new one
        killed["at"] = time.perf_counter()

    threading.Thread(target=kill_one_worker, daemon=True).start()
    remote = ebbwatch.scan(db=db, as_of=fleet.as_of, max_alerts=1000, chunk_size=4, engine="dask",
                           scheduler=cluster.scheduler_address)
    done = time.perf_counter()
    assert "at" in killed and killed["at"] < done, "the worker was not killed while the scan ran"
    same(local, remote)


def test_unknown_engine_and_unreachable_scheduler(store):
    fleet, db = store
    from ebbwatch.errors import EbbwatchError, UsageError

    with pytest.raises(UsageError):
        ebbwatch.scan(db=db, engine="spark")
    with pytest.raises(EbbwatchError, match="cannot reach the Dask scheduler"):
        ebbwatch.scan(db=db, engine="dask", scheduler="tcp://127.0.0.1:1")
