"""infra/prefect.yaml: it parses, its entrypoints are our flows, its values are accepted.

The file is checked with Prefect's own machinery: its prefect.yaml model
(``PrefectYamlModel``), its entrypoint loader (``load_flow_from_entrypoint``),
its ``{{ $ENV }}`` templating (``apply_values``, what ``prefect deploy`` runs),
the flow's pydantic parameter validation and the JSON schema the server
enforces on deployment parameters.  Cron expressions are checked by Prefect's
schedule model and their next fire times by ``cronsim`` (installed with
Prefect), against times worked out by hand from cron's rules (minute hour
day month weekday).  The last test deploys the file with ``prefect deploy
--all`` to the test server and runs the hourly scan through a process worker.
"""

from __future__ import annotations

import asyncio
import os
import subprocess
import sys
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
import yaml

from changekind.flows import scan
from changekind.flows.settings import RunOptions
from changekind.tasks import persist
from tests.flows.fleet import make_fleet, write_source

ROOT = Path(__file__).resolve().parents[2]
PREFECT_FILE = ROOT / "infra" / "prefect.yaml"
POOL = "changekind-process"

# deployment name -> (flow object it must load, cron or None)
EXPECTED = {
    "hourly-scan": (scan.scan_flow, "0 * * * *"),
    "backfill": (scan.backfill_flow, None),
    "nightly-refit": (scan.refit_flow, "30 2 * * *"),
}
ENV = {
    "CHANGEKIND_SOURCE": "/srv/metrics/fleet",
    "CHANGEKIND_DB_URL": "postgresql+psycopg://changekind@db.internal/changekind",
}
# A backfill run supplies its span (``prefect deployment run ... --param``).
RUN_PARAMETERS = {"backfill": {"start": "2026-05-01", "end": "2026-06-01"}}


def _deployments() -> dict[str, dict]:
    from prefect.cli.deploy._models import PrefectYamlModel

    raw = yaml.safe_load(PREFECT_FILE.read_text())
    model = PrefectYamlModel.model_validate(raw)  # what `prefect deploy` validates
    return {d.name: d.model_dump(exclude_unset=True, mode="json") for d in model.deployments}


def _templated(config: dict, monkeypatch) -> dict:
    """The deployment after ``prefect deploy``'s environment templating."""
    from prefect.utilities.templating import apply_values

    for key, value in ENV.items():
        monkeypatch.setenv(key, value)
    return apply_values(config, dict(os.environ), remove_notset=False)


def test_prefect_yaml_declares_the_three_deployments_on_one_process_pool():
    deployments = _deployments()
    assert set(deployments) == set(EXPECTED)
    for name, config in deployments.items():
        assert config["work_pool"]["name"] == POOL, name
        assert config["entrypoint"].startswith("flows/deployed.py:"), name
        assert config["work_pool"]["job_variables"]["env"]["CHANGEKIND_RUNNER"] == "processes"
    raw = yaml.safe_load(PREFECT_FILE.read_text())
    assert not raw.get("build") and not raw.get("push")  # code is installed on the worker


def test_entrypoints_load_our_flows(monkeypatch):
    from prefect.flows import Flow, load_flow_from_entrypoint

    monkeypatch.chdir(ROOT)  # entrypoints are relative to the repository root
    for name, config in _deployments().items():
        loaded = load_flow_from_entrypoint(config["entrypoint"], use_placeholder_flow=False)
        expected = EXPECTED[name][0]
        assert isinstance(loaded, Flow), name
        assert loaded.name == expected.name, name
        assert loaded.fn.__name__ == expected.fn.__name__, name


@pytest.mark.parametrize(
    ("env", "runner"),
    [
        ({}, "ThreadPoolTaskRunner"),
        ({"CHANGEKIND_RUNNER": "processes", "CHANGEKIND_WORKERS": "3"}, "ProcessPoolTaskRunner"),
        (
            {"CHANGEKIND_RUNNER": "dask", "CHANGEKIND_DASK_ADDRESS": "tcp://10.0.0.5:8786"},
            "DaskTaskRunner",
        ),
    ],
)
def test_deployed_flows_take_the_task_runner_from_the_environment(monkeypatch, env, runner):
    """A worker importing the entrypoints gets the runner CHANGEKIND_RUNNER names."""
    import importlib

    from prefect.flows import load_flow_from_entrypoint

    for key in ("CHANGEKIND_RUNNER", "CHANGEKIND_WORKERS", "CHANGEKIND_DASK_ADDRESS"):
        monkeypatch.delenv(key, raising=False)
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    monkeypatch.chdir(ROOT)
    import changekind.flows.deployed as deployed

    importlib.reload(deployed)  # settings are read at import, as on a worker
    for name, config in _deployments().items():
        loaded = load_flow_from_entrypoint(config["entrypoint"], use_placeholder_flow=False)
        assert type(loaded.task_runner).__name__ == runner, name
        assert loaded.name == EXPECTED[name][0].name, name
    if runner == "ProcessPoolTaskRunner":
        assert deployed.scan.task_runner._max_workers == 3  # no public accessor in Prefect 3
    if runner == "DaskTaskRunner":
        assert deployed.scan.task_runner.address == "tcp://10.0.0.5:8786"


def test_parameters_are_accepted_by_the_flows_and_the_server_schema(monkeypatch):
    from prefect.utilities.callables import parameter_schema
    from prefect.utilities.schema_tools.validation import validate

    for name, config in _deployments().items():
        flow = EXPECTED[name][0]
        params = {**_templated(config, monkeypatch)["parameters"], **RUN_PARAMETERS.get(name, {})}
        assert "db" not in params, name  # never a deployment parameter: it may hold a secret
        assert params["source"] == ENV["CHANGEKIND_SOURCE"], name
        # The server's check on a deployment's run parameters (enforce_parameter_schema).
        validate(params, parameter_schema(flow).model_dump(), raise_on_error=True)
        # The flow's own pydantic validation, done when a run starts.
        bound = flow.validate_parameters(params)
        assert isinstance(bound["options"], RunOptions), name
        assert bound["options"].workers == 2, name
    backfill = _templated(_deployments()["backfill"], monkeypatch)["parameters"]
    assert (backfill["chunk"], backfill["warmup"]) == ("7D", "7D")


def test_bad_parameters_would_be_refused(monkeypatch):
    """The same checks refuse what the flows cannot take (so the test above can fail)."""
    from prefect.exceptions import ParameterTypeError
    from prefect.utilities.callables import parameter_schema
    from prefect.utilities.schema_tools.validation import ValidationError, validate

    config = _templated(_deployments()["hourly-scan"], monkeypatch)
    schema = parameter_schema(scan.scan_flow).model_dump()
    for bad in ({"workers": 0}, {"wrokers": 2}, {"critical": "high"}):
        params = {**config["parameters"], "options": bad}
        with pytest.raises(ValidationError):
            validate(params, schema, raise_on_error=True)
        with pytest.raises(ParameterTypeError):
            scan.scan_flow.validate_parameters(params)
    # A backfill without its span is refused by the flow.
    params = _templated(_deployments()["backfill"], monkeypatch)["parameters"]
    with pytest.raises(ParameterTypeError):
        scan.backfill_flow.validate_parameters(params)


def test_schedules_parse_and_fire_when_expected():
    import cronsim
    from prefect.client.schemas.schedules import CronSchedule
    from prefect.server.schemas.schedules import CronSchedule as ServerCronSchedule

    start = datetime(2026, 6, 1, 10, 17)
    # Worked out by hand from cron's rules: "0 * * * *" is minute 0 of every
    # hour; "30 2 * * *" is 02:30 every day.
    fires = {
        "0 * * * *": [datetime(2026, 6, 1, 11, 0), datetime(2026, 6, 1, 12, 0)],
        "30 2 * * *": [datetime(2026, 6, 2, 2, 30), datetime(2026, 6, 3, 2, 30)],
    }
    for name, config in _deployments().items():
        cron = EXPECTED[name][1]
        if cron is None:
            assert not config.get("schedules"), f"{name} must have no schedule"
            continue
        (schedule,) = config["schedules"]
        assert schedule["cron"] == cron and schedule["timezone"] == "UTC", name
        CronSchedule(cron=schedule["cron"], timezone=schedule["timezone"])  # Prefect's check
        it = cronsim.CronSim(schedule["cron"], start)
        assert [next(it), next(it)] == fires[cron], name
        # The times Prefect's scheduler would create.
        server = ServerCronSchedule(cron=schedule["cron"], timezone="UTC")
        dates = asyncio.run(server.get_dates(n=2, start=start.replace(tzinfo=UTC)))
        assert dates == [f.replace(tzinfo=UTC) for f in fires[cron]], name
    with pytest.raises(ValueError):
        CronSchedule(cron="0 * * *", timezone="UTC")  # four fields: refused


def _cli(*args: str, env: dict[str, str], timeout: float = 180) -> str:
    prefect = str(Path(sys.executable).with_name("prefect"))
    done = subprocess.run(
        [prefect, *args], cwd=ROOT, env=env, capture_output=True, text=True, timeout=timeout
    )
    assert done.returncode == 0, f"prefect {' '.join(args)} failed:\n{done.stdout}\n{done.stderr}"
    return done.stdout


@pytest.mark.integration
def test_prefect_deploy_all_then_a_worker_runs_the_scan(prefect_server, tmp_path):
    from prefect.client.orchestration import get_client
    from prefect.settings import PREFECT_API_URL

    data, _ = make_fleet(5)
    # infra/prefect.yaml names rack and firmware as the series' label columns.
    data["rack"] = data["series_id"].str.split("/").str[0]
    data["firmware"] = np.where(data["series_id"].str.endswith("disk-0"), "7.3", "7.2")
    source = write_source(data, tmp_path / "source")
    db = f"sqlite:///{tmp_path / 'deployed.db'}"
    env = {
        **os.environ,
        "PREFECT_API_URL": PREFECT_API_URL.value(),  # the test server
        "PREFECT_HOME": str(tmp_path / "prefect-home"),
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "PREFECT_CLI_PROMPT": "false",
        "CHANGEKIND_SOURCE": str(source),
        "CHANGEKIND_DB_URL": db,
    }
    _cli("work-pool", "create", POOL, "--type", "process", "--overwrite", env=env)
    _cli("deploy", "--all", "--prefect-file", str(PREFECT_FILE), env=env)

    with get_client(sync_client=True) as client:
        stored = {
            name: client.read_deployment_by_name(f"{EXPECTED[name][0].name}/{name}")
            for name in EXPECTED
        }
        for name, deployment in stored.items():
            assert deployment.work_pool_name == POOL, name
            assert "db" not in deployment.parameters, name  # read on the worker host
            crons = [s.schedule.cron for s in deployment.schedules]
            assert crons == ([EXPECTED[name][1]] if EXPECTED[name][1] else []), name
            # Pausing drops the runs the scheduler made, so the worker below
            # picks up only the run created here.
            client.pause_deployment(deployment.id)
        # Five series are less than one batch of work, which a scan runs in the
        # flow's own process (pipeline.small_run); a batch of 0.01 s makes this
        # run take the worker processes' path that a fleet's scan takes.
        options = {**stored["hourly-scan"].parameters["options"], "batch_seconds": 0.01}
        run = client.create_flow_run_from_deployment(
            stored["hourly-scan"].id, parameters={"options": options}
        )

    # One polling round of a process worker picks the run up and runs it to the end.
    _cli("worker", "start", "--pool", POOL, "--run-once", env=env, timeout=300)
    with get_client(sync_client=True) as client:
        state = client.read_flow_run(run.id).state
    assert state is not None and state.is_completed(), state.message
    # Two worker processes were started before the planning, then the batches ran.
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

    with get_client(sync_client=True) as client:
        tasks = client.read_task_runs(
            flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[run.id]))
        )
    starts = [t for t in tasks if t.name.startswith("start-worker")]
    batches = [t for t in tasks if t.name.startswith("analyse-batch")]
    assert len(starts) == 2 and batches
    assert all(t.state is not None and t.state.is_completed() for t in starts + batches)
    snap = persist.content_snapshot(db)
    assert len(snap["series_models"]) == 5  # every disk fitted (the constant one fails)
    assert snap["series_events"]
    # The deployment's label columns reached the worker and were stored per series.
    labels = {(r[0], r[1]): r[2] for r in snap["series_labels"]}
    assert labels[("shelf-0/disk-0", "firmware")] == "7.3"
    assert labels[("shelf-1/disk-0", "rack")] == "shelf-1"
