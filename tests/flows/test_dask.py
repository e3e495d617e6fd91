"""The scan flow on a real Dask cluster agrees with the scan on threads.

A local cluster of two worker processes runs the batches; the flow process
writes them.  The oracle is the same flow on the default threads runner: both
databases must say the same (same events, same models, same watermarks), since
the per-series analysis does not depend on where it runs.
"""

from __future__ import annotations

import time
from pathlib import Path

import dask
import distributed
import pytest

from changekind.flows.pipeline import make_task_runner
from changekind.flows.scan import scan_flow
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from tests.flows.fleet import make_fleet, write_source

pytestmark = pytest.mark.integration  # a Dask cluster of worker processes

# Small batches so the fleet's nine series become several tasks spread over
# both workers, not one task on one of them.
OPTIONS = RunOptions(workers=2, batch_seconds=1.0)


def test_scan_on_dask_cluster_matches_threads(prefect_server, tmp_path: Path, monkeypatch):
    data, _ = make_fleet(9)
    source = write_source(data, tmp_path / "source", until="2026-06-19")
    # Dask writes spill and lock files in its temporary directory.
    monkeypatch.setenv("DASK_TEMPORARY_DIRECTORY", str(tmp_path / "dask"))
    dask.config.refresh()
    threads_db = f"sqlite:///{tmp_path / 'threads.db'}"
    dask_db = f"sqlite:///{tmp_path / 'dask.db'}"

    t0 = time.perf_counter()
    on_threads = scan_flow(str(source), threads_db, OPTIONS)
    # Two days arrive: the second scan is warm for the series fitted above.
    write_source(data, source)
    on_threads_warm = scan_flow(str(source), threads_db, OPTIONS)

    write_source(data, source, until="2026-06-19")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None
    )
    try:
        runner = make_task_runner("dask", workers=2, dask_address=cluster.scheduler_address)
        on_dask_flow = scan_flow.with_options(task_runner=runner)
        on_dask = on_dask_flow(str(source), dask_db, OPTIONS)
        write_source(data, source)
        on_dask_warm = on_dask_flow(str(source), dask_db, OPTIONS)
        # Tasks each worker ran (Dask's own count): the batches went to the cluster.
        with distributed.Client(cluster, set_as_default=False) as client:
            executed = client.run(lambda dask_worker: dask_worker.state.executed_count)
    finally:
        cluster.close()
    seconds = time.perf_counter() - t0

    # The runs did real work: cold fits, then warm scans, with events found.
    assert on_dask.cold == on_threads.cold >= 8
    assert on_dask.batches == on_threads.batches >= 2
    assert on_dask_warm.warm == on_threads_warm.warm >= 1
    assert on_dask.events_new == on_threads.events_new > 0
    assert len(executed) == 2 and min(executed.values()) >= 1
    assert sum(executed.values()) >= on_dask.batches + on_dask_warm.batches
    assert on_dask.series_failed == on_threads.series_failed == 1  # the constant series
    threads_snap = persist.content_snapshot(threads_db)
    dask_snap = persist.content_snapshot(dask_db)
    assert dask_snap["series_events"] and dask_snap["series_models"]
    assert dask_snap == threads_snap
    assert seconds < 180, f"threads + Dask scans took {seconds:.0f} s"
