"""The ``changekind`` command line: one typer application, one module per command group.

``app`` (exit codes, consoles, error mapping), ``options`` (shared options),
``config`` (checking a fleet command's configuration), ``output`` (tables and
records), and the commands: ``detect``, ``runs`` (scan, backfill, refit),
``events`` (events, triage), ``incidents``, ``report``, ``drill`` and ``demo``.  Importing a
command module registers its commands on :data:`app`; importing this package
imports them all.  Nothing here loads Prefect at import: ``changekind detect``
never pays its start-up (the fleet commands import the flows when they run).
"""

from __future__ import annotations

from changekind.flows.cli import demo, detect, drill, events, incidents, report, runs
from changekind.flows.cli.app import app

__all__ = [
    "app",
    "demo",
    "detect",
    "drill",
    "events",
    "incidents",
    "main",
    "report",
    "runs",
]


def main() -> None:
    """Entry point of the ``changekind`` console script."""
    app()
