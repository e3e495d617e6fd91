"""The fleet flows as deployed: task runner from the worker's environment.

``infra/prefect.yaml`` points its deployments here.  When a worker starts a
flow run it imports this module, which reads the deployment settings
(``CHANGEKIND_RUNNER``, ``CHANGEKIND_WORKERS``, ``CHANGEKIND_DASK_ADDRESS``; see
:class:`changekind.flows.settings.Settings`) and gives each flow the task
runner they name: the same choice ``changekind scan --runner ...`` makes on the
command line.  The flows themselves (names, parameters) are those of
:mod:`changekind.flows.scan`.
"""

from __future__ import annotations

from changekind.flows.pipeline import make_task_runner
from changekind.flows.scan import backfill_flow, refit_flow, scan_flow
from changekind.flows.settings import Settings

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
