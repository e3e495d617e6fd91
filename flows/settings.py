"""Configuration: deployment defaults from the environment, per-run options.

Only flows (and the CLI) read configuration; tasks receive plain values.
"""

from __future__ import annotations

import os
from typing import TYPE_CHECKING, Literal

import sqlalchemy as sa
from pydantic import BaseModel, ConfigDict, Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from changekind.tasks.batch import AnalysisOptions
from changekind.tasks.critical import BUDGET_RANGE, CRITICAL_RANGE, FALSE_BUDGET
from changekind.tasks.errors import ConfigError
from changekind.tasks.magnitude import parse_min_effect
from changekind.tasks.window.summary import window_text

if TYPE_CHECKING:  # the engine (scipy) is imported by the commands that analyse
    from changekind.tasks.batch import AnalysisOptions

DEFAULT_DB_URL = "sqlite:///changekind.db"
Runner = Literal["threads", "processes", "dask"]


class Settings(BaseSettings):
    """Deployment defaults, read from ``CHANGEKIND_*`` environment variables.

    ``CHANGEKIND_DB_URL`` (default ``sqlite:///changekind.db`` in the working
    directory; PostgreSQL as ``postgresql+psycopg://user@host/db``),
    ``CHANGEKIND_SOURCE``, ``CHANGEKIND_RUNNER``, ``CHANGEKIND_WORKERS``,
    ``CHANGEKIND_DASK_ADDRESS``, ``CHANGEKIND_FALSE_BUDGET`` (expected false
    events per series per 30 days; default 0.5), ``CHANGEKIND_MIN_EFFECT``
    (smallest effect written, e.g. ``5%``; default none).  The database
    password may be kept out of the URL: ``CHANGEKIND_DB_PASSWORD``, or
    ``CHANGEKIND_DB_PASSWORD_BLOCK``, the name of a Prefect Secret block
    holding it (see :func:`resolve_db`).
    """

    model_config = SettingsConfigDict(env_prefix="CHANGEKIND_", extra="ignore")

    db_url: str = DEFAULT_DB_URL
    db_password: SecretStr | None = None
    db_password_block: str | None = None
    source: str | None = None
    runner: Runner = "threads"
    workers: int = Field(default_factory=lambda: os.cpu_count() or 1, ge=1, le=512)
    dask_address: str | None = None
    false_budget: float = Field(default=FALSE_BUDGET, ge=BUDGET_RANGE[0], le=BUDGET_RANGE[1])
    min_effect: str | None = None

    @field_validator("min_effect")
    @classmethod
    def _min_effect(cls, value: str | None) -> str | None:
        floor = parse_min_effect(value)
        return None if floor is None else floor.text


class RunOptions(BaseModel):
    """Per-run analysis options (flow parameters, validated with bounds)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    critical: float | None = Field(
        default=None, gt=CRITICAL_RANGE[0], le=CRITICAL_RANGE[1]
    )  # the engine's one range (changekind.tasks.critical.check_critical)
    # Expected false events per clean series per 30 days of data; the critical
    # value of every cold analysis and warm scan comes from it (critical
    # overrides it).
    false_budget: float = Field(default=FALSE_BUDGET, ge=BUDGET_RANGE[0], le=BUDGET_RANGE[1])
    # Smallest |effect| written: "5%" of the level, "2sigma" or "3.5" series units.
    min_effect: str | None = None
    periods: tuple[int, ...] | None = None
    min_points: int = Field(default=96, ge=24, le=1_000_000)
    context_points: int = Field(default=240, ge=10, le=100_000)
    refit_after: float = Field(default=1.0, gt=0.0, le=1000.0)
    drift_alpha: float = Field(default=0.001, gt=0.0, lt=0.5)
    # Scans only: at most this share of a batch's series gets a full refit per
    # run (at least one), the longest waiting first; the rest are deferred and
    # counted.  Backfill and refit runs refit everything due.
    refit_share: float = Field(default=0.02, gt=0.0, le=1.0)
    batch_seconds: float = Field(default=10.0, gt=0.0, le=600.0)
    # How long a run waits for another run to release the database (one run
    # at a time per database: tasks/runlock.py) before it stops unrun.
    wait_seconds: float = Field(default=300.0, ge=0.0, le=86_400.0)
    workers: int = Field(default_factory=lambda: os.cpu_count() or 1, ge=1, le=512)
    window: str | None = None
    # Newly confirmed events are announced as Prefect events when |effect_pct| is at
    # least this (flows/notify.py); events without a percentage only when it is 0.
    notify_min_effect_pct: float = Field(default=0.0, ge=0.0, le=1_000_000.0)

    @field_validator("window")
    @classmethod
    def _window(cls, value: str | None) -> str | None:
        if value is None:
            return None
        try:
            return window_text(value)
        except ConfigError as exc:
            raise ValueError(str(exc)) from None

    @field_validator("min_effect")
    @classmethod
    def _min_effect(cls, value: str | None) -> str | None:
        floor = parse_min_effect(value)  # a ValueError names the accepted forms
        return None if floor is None else floor.text

    @field_validator("periods")
    @classmethod
    def _periods(cls, value: tuple[int, ...] | None) -> tuple[int, ...] | None:
        if value is not None and any(p < 2 for p in value):
            raise ValueError("seasonal periods must be at least 2 points")
        return value

    def analysis(self, *, report_from: str | None = None) -> AnalysisOptions:
        from changekind.tasks.batch import AnalysisOptions  # the engine, for runs only

        return AnalysisOptions(
            critical=self.critical,
            false_budget=self.false_budget,
            min_effect=parse_min_effect(self.min_effect),
            periods=self.periods,
            min_points=self.min_points,
            context_points=self.context_points,
            refit_after=self.refit_after,
            drift_alpha=self.drift_alpha,
            refit_share=self.refit_share,
            report_from=report_from,
            window=self.window,
        )


def split_password(url: str) -> tuple[str, str | None]:
    """``url`` without its password, and the password (None when it has none).

    What goes into a flow run's parameters is the first: Prefect stores the
    parameters where anyone who can read its server reads them.
    """
    try:
        parsed = sa.make_url(url)
    except sa.exc.ArgumentError:
        return url, None  # not a URL: the database layer says what is wrong with it
    if parsed.password is None:
        return url, None
    password = str(parsed.password)
    return parsed._replace(password=None).render_as_string(hide_password=False), password


def resolve_db(db: str | None) -> str:
    """The database URL a flow connects to, with its password.

    ``db`` (a flow parameter, never holding a password) or else
    ``CHANGEKIND_DB_URL``; a URL without a password gets the one of
    ``CHANGEKIND_DB_PASSWORD`` or of the Prefect Secret block named by
    ``CHANGEKIND_DB_PASSWORD_BLOCK``, when set.  Read in the flow's process,
    so the password stays in its environment or the Secret block.
    """
    settings = Settings()
    url = db if db else settings.db_url
    if split_password(url)[1] is not None:
        return url
    password = None
    if settings.db_password is not None:
        password = settings.db_password.get_secret_value()
    elif settings.db_password_block:
        # Deliberately here: the CLI imports this module and must not load Prefect.
        from prefect.blocks.system import Secret

        password = str(Secret.load(settings.db_password_block).get())
    if not password:
        return url
    try:
        parsed = sa.make_url(url)
    except sa.exc.ArgumentError:
        return url
    if parsed.get_backend_name() == "sqlite":
        return url
    return parsed.set(password=password).render_as_string(hide_password=False)
