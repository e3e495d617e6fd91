"""Configuration: deployment defaults from the environment, per-run options.

Only flows (and the CLI) read configuration; tasks receive plain values.
"""

from __future__ import annotations

import os
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from changekind.tasks.batch import AnalysisOptions
from changekind.tasks.errors import ConfigError
from changekind.tasks.window import window_text

DEFAULT_DB_URL = "sqlite:///changekind.db"
Runner = Literal["threads", "processes", "dask"]


class Settings(BaseSettings):
    """Deployment defaults, read from ``CHANGEKIND_*`` environment variables.

    ``CHANGEKIND_DB_URL`` (default ``sqlite:///changekind.db`` in the working
    directory; PostgreSQL as ``postgresql+psycopg://user@host/db``),
    ``CHANGEKIND_SOURCE``, ``CHANGEKIND_RUNNER``, ``CHANGEKIND_WORKERS``,
    ``CHANGEKIND_DASK_ADDRESS``.
    """

    model_config = SettingsConfigDict(env_prefix="CHANGEKIND_", extra="ignore")

    db_url: str = DEFAULT_DB_URL
    source: str | None = None
    runner: Runner = "threads"
    workers: int = Field(default_factory=lambda: os.cpu_count() or 1, ge=1, le=512)
    dask_address: str | None = None


class RunOptions(BaseModel):
    """Per-run analysis options (flow parameters, validated with bounds)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    critical: float | None = Field(default=None, gt=1.0, le=20.0)
    periods: tuple[int, ...] | None = None
    min_points: int = Field(default=96, ge=24, le=1_000_000)
    context_points: int = Field(default=240, ge=10, le=100_000)
    refit_after: float = Field(default=1.0, gt=0.0, le=1000.0)
    drift_alpha: float = Field(default=0.001, gt=0.0, lt=0.5)
    batch_seconds: float = Field(default=10.0, gt=0.0, le=600.0)
    # How long a run waits for another run to release the database (one run
    # at a time per database: tasks/runlock.py) before it stops unrun.
    wait_seconds: float = Field(default=300.0, ge=0.0, le=86_400.0)
    workers: int = Field(default_factory=lambda: os.cpu_count() or 1, ge=1, le=512)
    window: str | None = None

    @field_validator("window")
    @classmethod
    def _window(cls, value: str | None) -> str | None:
        if value is None:
            return None
        try:
            return window_text(value)
        except ConfigError as exc:
            raise ValueError(str(exc)) from None

    @field_validator("periods")
    @classmethod
    def _periods(cls, value: tuple[int, ...] | None) -> tuple[int, ...] | None:
        if value is not None and any(p < 2 for p in value):
            raise ValueError("seasonal periods must be at least 2 points")
        return value

    def analysis(self, *, report_from: str | None = None) -> AnalysisOptions:
        return AnalysisOptions(
            critical=self.critical,
            periods=self.periods,
            min_points=self.min_points,
            context_points=self.context_points,
            refit_after=self.refit_after,
            drift_alpha=self.drift_alpha,
            report_from=report_from,
            window=self.window,
        )
