"""The ``changekind`` command line: one typer application, one module per command group.

``app`` (exit codes, consoles, error mapping), ``options`` (shared options),
``config`` (checking a fleet command's configuration), ``output`` (tables and
records), and the commands: ``detect``, ``runs`` (scan, backfill, refit),
``events`` (events, triage, verdicts), ``incidents``, ``report``, ``drill`` and
``demo``.  Importing a
command module registers its commands on :data:`app`; the group imports a
command's module when that command is used (``app.COMMAND_MODULES``), so a
read-only command such as ``changekind events`` does not import the engine, the
report's drawing or Prefect.  Nothing here loads Prefect at import:
``changekind detect`` never pays its start-up (the fleet commands import the
flows when they run).
"""

from __future__ import annotations

from changekind.flows.cli.app import app

__all__ = ["app", "main"]


def main() -> None:
    """Entry point of the ``changekind`` console script."""
    app()
