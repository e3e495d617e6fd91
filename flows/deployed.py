"""The fleet flows as deployed: task runner from the worker's environment.

``infra/prefect.yaml`` points its deployments here.  When a worker starts a
flow run it imports this module, which reads the deployment settings
(``OMEGASCAN_RUNNER``, ``OMEGASCAN_WORKERS``, ``OMEGASCAN_DASK_ADDRESS``; see
:class:`omegascan.flows.settings.Settings`) and gives each flow the task
runner they name: the same choice ``omegascan scan --runner ...`` makes on the
command line.  The flows themselves (names, parameters) are those of
:mod:`omegascan.flows.scan`.
"""

from __future__ import annotations

from omegascan.flows.pipeline import make_task_runner
from omegascan.flows.scan import backfill_flow, refit_flow, scan_flow
from omegascan.flows.settings import Settings

__all__ = ["backfill", "refit", "scan"]


def _with_runner(flow, settings: Settings):
    runner = make_task_runner(
        settings.runner, workers=settings.workers, dask_address=settings.dask_address
    )
    return flow.with_options(task_runner=runner)


_settings = Settings()
scan = _with_runner(scan_flow, _settings)
backfill = _with_runner(backfill_flow, _settings)
refit = _with_runner(refit_flow, _settings)
