"""Checking a fleet command's configuration before any flow runs.

The settings, the options, the source
(:func:`~changekind.tasks.fetch.open_source`) and the database
(:func:`~changekind.tasks.persist.connect`) are checked in this process: a
flow wraps the errors raised inside it in its own machinery; checked here, bad
configuration gets one clear line on stderr and exit code 2 instead.
"""

from __future__ import annotations

import inspect
import os
import uuid
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from pydantic import ValidationError

from changekind.flows.cli.app import OPTION_NAMES, validation_text
from changekind.flows.settings import RunOptions, Settings, split_password
from changekind.tasks import persist
from changekind.tasks.errors import ChangekindError, ConfigError, mask_url
from changekind.tasks.fetch import open_source
from changekind.tasks.labels import check_label_columns
from changekind.tasks.timeaxis import parse_instant
from changekind.tasks.window.summary import window_text

RUNNERS: tuple[str, ...] = ("threads", "processes", "dask")

PREFECT_DEFAULTS: dict[str, str] = {
    # Offline machines: no telemetry (it also logs a harmless "database is locked").
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    # The client's telemetry, and its notice on a terminal's first run (Prefect 3.9's
    # opt-out is this generic variable).
    "DO_NOT_TRACK": "1",
    # Per-task INFO logging costs 20-35 % of the orchestration time (PREFECT-NOTES).
    "PREFECT_LOGGING_LEVEL": "WARNING",
    # The ephemeral server's default 20 s start-up timeout was seen to expire under load.
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
}
"""Set in the CLI process (unless already set) before Prefect is imported."""

DASK_DEFAULTS: dict[str, str] = {
    # A local cluster logs some 30 INFO lines (start, workers, closing) on stderr.
    "DASK_LOGGING__DISTRIBUTED": "warning",
}
"""Set (unless already set) before a Dask runner is made."""


_SETTING_NAMES = {
    "db_url": "CHANGEKIND_DB_URL",
    "source": "CHANGEKIND_SOURCE",
    "runner": "CHANGEKIND_RUNNER",
    "workers": "CHANGEKIND_WORKERS",
    "dask_address": "CHANGEKIND_DASK_ADDRESS",
    "false_budget": "CHANGEKIND_FALSE_BUDGET",
    "min_effect": "CHANGEKIND_MIN_EFFECT",
}


# --------------------------------------------------------------------------- configuration


def prefect_defaults(environ: dict[str, str] | None = None) -> None:
    """Set :data:`PREFECT_DEFAULTS` in the environment where they are not set yet."""
    env = os.environ if environ is None else environ
    for name, value in PREFECT_DEFAULTS.items():
        env.setdefault(name, value)


def path_text(path: Path | None) -> str | None:
    return None if path is None else str(path)


def fleet_arguments(given: Mapping[str, Any]) -> dict[str, Any]:
    """The fleet command's own parameters that :func:`fleet_config` checks."""
    wanted = inspect.signature(fleet_config).parameters
    return {name: value for name, value in given.items() if name in wanted}


def env_settings():
    """The deployment defaults (``CHANGEKIND_*``); a bad variable is a usage problem."""

    try:
        return Settings()
    except ValidationError as exc:
        raise ConfigError(
            f"bad environment setting: {validation_text(exc, _SETTING_NAMES)}"
        ) from None


def database_url(db: str | None) -> str:
    return db if db is not None else env_settings().db_url


def check_db(url: str) -> None:
    """Connect once (and let go): an unreachable database is a usage problem."""

    engine = persist.connect(url)
    engine.dispose()


def has_table(url: str, name: str) -> bool:
    """Whether the database holds table ``name`` (connects once and lets go)."""
    engine = persist.connect(url)
    try:
        return sa.inspect(engine).has_table(name)
    finally:
        engine.dispose()


def require_tables(url: str) -> None:
    """The database exists and holds changekind's tables (reading commands only)."""

    parsed = sa.make_url(url) if "://" in url else None
    if parsed is not None and parsed.get_backend_name() == "sqlite":
        path = parsed.database
        if path and path != ":memory:" and not Path(path).exists():
            raise ConfigError(
                f"no database at {path!r}; run 'changekind scan' (or 'changekind demo') first, "
                "or point --db / CHANGEKIND_DB_URL at an existing one"
            )
    if not has_table(url, persist.series_events.name):
        raise ConfigError(
            f"database {mask_url(url)!r} holds no changekind "
            "tables yet; run 'changekind scan' or 'changekind backfill' against it first"
        )


@dataclass(frozen=True, slots=True)
class FleetConfig:
    """Everything a fleet command checked before starting its flow."""

    source: str
    db: str
    runner: str
    workers: int
    dask_address: str | None
    options: RunOptions
    columns: dict[str, str] | None
    time_kind: str
    sql: dict[str, str] = field(default_factory=dict)
    labels: tuple[str, ...] = ()


def column_map(
    series_column: str | None, timestamp_column: str | None, value_column: str | None
) -> dict[str, str]:
    """The source's column names given on the command line (``--series-column`` ...)."""
    given = (("series_id", series_column), ("timestamp", timestamp_column), ("value", value_column))
    return {key: name for key, name in given if name is not None}


def fleet_config(
    *,
    source: str | None,
    db: str | None,
    runner: str | None,
    dask_address: str | None,
    workers: int | None,
    series_column: str | None,
    timestamp_column: str | None,
    value_column: str | None,
    table: str | None,
    query: str | None,
    critical: float | None,
    min_points: int | None,
    window: str | None = None,
    wait: float | None = None,
    false_budget: float | None = None,
    min_effect: str | None = None,
    label_column: list[str] | None = None,
) -> FleetConfig:
    """Check a fleet command's configuration in the order a person would fix it.

    Raises
    ------
    ConfigError, ChangekindError
        The first problem found, in words (the caller prints it).

    Notes
    -----
    1. Environment settings.  2. Runner and Dask address.  3. Analysis options.
    4. The source (opened and its columns checked).  5. The database (connected).
    6. A Dask runner needs a Prefect server: configured, or running on this
       machine (:func:`~changekind.flows.processes.local_prefect_server`).
    """

    # Step 1: environment settings.
    settings = env_settings()
    source = source if source is not None else settings.source
    if not source:
        raise ConfigError("no source given; pass --source PATH (or set CHANGEKIND_SOURCE)")
    db = db if db is not None else settings.db_url

    # Step 2: runner.
    chosen = runner if runner is not None else settings.runner
    if chosen not in RUNNERS:
        raise ConfigError(f"unknown runner {chosen!r}; use --runner threads, processes or dask")
    address = dask_address if dask_address is not None else settings.dask_address
    if dask_address is not None and chosen != "dask":
        raise ConfigError(
            f"--dask-address applies to --runner dask only (the runner is {chosen!r}); "
            "add --runner dask or drop --dask-address"
        )
    if chosen != "dask":
        address = None

    # Step 3: analysis options.
    knobs: dict[str, Any] = {}
    for name, value in (
        ("critical", critical),
        ("min_points", min_points),
        ("wait_seconds", wait),
    ):
        if value is not None:
            knobs[name] = value
    if window is not None:
        knobs["window"] = window_text(window)  # a bad window: ConfigError in its own words
    knobs["workers"] = workers if workers is not None else settings.workers
    knobs["false_budget"] = false_budget if false_budget is not None else settings.false_budget
    floor = min_effect if min_effect is not None else settings.min_effect
    if floor is not None:
        knobs["min_effect"] = floor
    try:
        options = RunOptions(**knobs)
    except ValidationError as exc:
        raise ConfigError(validation_text(exc, OPTION_NAMES)) from None

    # Step 4: the source.
    columns = column_map(series_column, timestamp_column, value_column)
    spec = open_source(source, columns=columns or None, table=table, query=query)
    sql = {k: v for k, v in (("table", table), ("query", query)) if v is not None}
    labels = check_label_columns(spec, label_column)  # names the columns there are

    # Step 5: the database.
    check_db(db)

    # Step 6: Dask workers cannot share an ephemeral Prefect server.
    if chosen == "dask":
        prefect_defaults()
        for name, value in DASK_DEFAULTS.items():
            os.environ.setdefault(name, value)
        # Deliberately here: Prefect is loaded for a Dask run only (seconds of start-up).
        from prefect.settings import get_current_settings

        # Deliberately here: the probe (urllib.request) is needed by Dask runs only.
        from changekind.flows.processes import local_prefect_server

        local = None if get_current_settings().api.url else local_prefect_server()
        if local is not None:  # the cluster's workers, started later, inherit it
            os.environ["PREFECT_API_URL"] = local
        elif not get_current_settings().api.url:
            raise ConfigError(
                "--runner dask needs a Prefect server that its worker processes can share; "
                "start one with 'prefect server start' and set "
                "PREFECT_API_URL=http://127.0.0.1:4200/api (or use --runner processes)"
            )
    return FleetConfig(
        source=source if spec.kind == "sql" else spec.location,
        db=db,
        runner=chosen,
        workers=options.workers,
        dask_address=address,
        options=options,
        columns=columns or None,
        time_kind=spec.time_kind,
        sql=sql,
        labels=labels,
    )


@dataclass(frozen=True, slots=True)
class ReadingSource:
    """The source a reading command (``report``, ``drill``) reads, and where it came from."""

    location: str
    columns: dict[str, str] | None
    recorded: persist.RunSource | None = None
    """The run whose record named it; None when given (--source, CHANGEKIND_SOURCE)."""

    def said(self) -> str | None:
        """A line for stderr when the source came from a run record."""
        if self.recorded is None:
            return None
        when = self.recorded.started_at.isoformat(timespec="seconds")
        return (
            f"changekind: reading {self.location} (the source of the {self.recorded.kind} "
            f"run {self.recorded.run_id} of {when}; --source reads another)"
        )


def reading_source(
    given: str | None, db_url: str | None, columns: Mapping[str, str] | None
) -> ReadingSource:
    """The source to read: ``--source``, else ``CHANGEKIND_SOURCE``, else the latest run's.

    The latest run's source is the one recorded in ``scan_runs`` of the
    database (:func:`~changekind.tasks.persist.latest_source`), with the
    column names that run was given; column names given now win.

    Raises
    ------
    ConfigError
        No source given and none recorded, or the recorded one had a password
        (not stored): the message says what to give.
    """
    named = dict(columns or {})
    if given:
        return ReadingSource(given, named or None)
    settings = env_settings()
    if settings.source:
        return ReadingSource(settings.source, named or None)
    recorded = None
    if db_url is not None:
        try:
            require_tables(db_url)
            recorded = persist.latest_source(db_url)
        except ChangekindError:
            recorded = None
        except sa.exc.SQLAlchemyError:  # a database from before runs recorded their source
            recorded = None
    if recorded is None:
        raise ConfigError(
            "no source given, and no run recorded in the database names one; "
            "pass --source PATH (or set CHANGEKIND_SOURCE)"
        )
    if recorded.masked:
        raise ConfigError(
            f"the latest run ({recorded.run_id}) read {recorded.source}, whose password is "
            "not stored; give --source with the password (or set CHANGEKIND_SOURCE)"
        )
    return ReadingSource(recorded.source, {**(recorded.columns or {}), **named} or None, recorded)


def record_refusal(kind: str, db: str | None, message: str) -> str | None:
    """Record a fleet command refused on its configuration as a run of its own.

    The row (status ``failed``, the message prefixed ``not run:``) goes to the
    database the command was given (``--db``, else ``CHANGEKIND_DB_URL``) when
    that database answers and already holds changekind's tables: a refused
    command never creates a database or its tables.  Returns the run id
    recorded, or None when there was nowhere to record it (bad ``--db`` or
    environment, a database that does not exist yet); the refusal itself is
    what the person sees either way.
    """
    try:
        url = database_url(db)
        require_tables(url)
    except ChangekindError:
        return None
    run_id = str(uuid.uuid4())
    try:
        persist.record_refused_run(url, run_id, kind, f"not run: {message}")  # type: ignore[arg-type]
    except (ChangekindError, sa.exc.SQLAlchemyError):  # nowhere to record it
        return None
    return run_id


@contextmanager
def refusals_recorded(kind: str, db: str | None) -> Iterator[None]:
    """A configuration error raised in the block is recorded (:func:`record_refusal`)."""
    try:
        yield
    except ChangekindError as exc:
        record_refusal(kind, db, str(exc))
        raise
    except ValidationError as exc:
        record_refusal(kind, db, validation_text(exc, OPTION_NAMES))
        raise


def check_time(value: str | None, what: str, time_kind: str) -> str | None:
    """A time bound the source can compare with: a number or a date-time, as it holds.

    Read by the time axis's rule (:func:`~changekind.tasks.timeaxis.parse_instant`:
    ISO 8601 only, a naive time is UTC).
    """
    if value is None:
        return None
    try:
        got = parse_instant(value, what=what)
    except ConfigError:
        if time_kind != "numeric":
            raise  # its message says what is wrong ('05/03/2030': day and month ambiguous)
        got = None
    if time_kind == "numeric":
        if not isinstance(got, float):
            raise ConfigError(
                f"{what} {value!r} is not a number, and the source's timestamps are numbers"
            )
    elif got is None or isinstance(got, float):
        raise ConfigError(
            f"{what} {value!r} is not a date-time; give an ISO 8601 time such as "
            "2026-06-01 or 2026-06-01T12:00:00Z"
        )
    return value


def flow_arguments(flow: Any, config: FleetConfig, **extra: Any) -> dict[str, Any]:
    """The flow's parameters from the checked configuration."""

    params = inspect.signature(flow.fn).parameters
    arguments: dict[str, Any] = {
        "source": config.source,
        "db": _db_parameter(config.db),
        "options": config.options,
        "columns": config.columns,
        **{k: v for k, v in extra.items() if v is not None},
    }
    if config.labels:
        arguments["label_columns"] = list(config.labels)
    for name, value in config.sql.items():
        if name not in params:
            raise ConfigError(
                f"--{name} is not supported yet: the fleet flows of this version read "
                "Parquet and CSV sources only; export the series to Parquet meanwhile"
            )
        arguments[name] = value
    return arguments


def _db_parameter(url: str) -> str:
    """The database URL as a flow parameter: without its password.

    Prefect stores flow-run parameters in the clear; the password goes to
    this process's environment (``CHANGEKIND_DB_PASSWORD``), where the flow
    finds it (:func:`~changekind.flows.settings.resolve_db`).
    """

    public, password = split_password(url)
    if password is not None:
        os.environ["CHANGEKIND_DB_PASSWORD"] = password
    return public
