"""The ``changekind`` application: exit codes, consoles and the mapping of errors.

Every command registers itself on :data:`app` (``flows/cli/__init__.py``
imports each command module).  Exit codes: 0 done, every series and file
analysed; 1 done, but some series, rows or source files could not be analysed
(each is named on stderr and recorded); 2 bad usage or configuration (nothing
was run); 3 the run failed part-way (a rerun continues from each series'
watermark); 4 another run holds the database (nothing was run); 130
interrupted.
"""

from __future__ import annotations

import importlib.metadata
import logging
import os
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Annotated

import click
import typer
from pydantic import ValidationError
from rich.console import Console

from changekind.tasks.errors import ChangekindError, ConfigError

EXIT_SERIES_FAILED = 1
"""Some series could not be analysed (the others were)."""

EXIT_USAGE = 2
"""Bad usage or unreadable input; nothing was analysed."""

DEBUG_ENV = "CHANGEKIND_DEBUG"
"""Set to 1 to get the traceback of an unexpected error in a series."""

COMMAND_MODULES: dict[str, str] = {
    "detect": "detect",
    "scan": "runs",
    "backfill": "runs",
    "refit": "runs",
    "events": "events",
    "triage": "events",
    "verdicts": "events",
    "incidents": "incidents",
    "report": "report",
    "drill": "drill",
    "demo": "demo",
}
"""Each command and the module of ``changekind.flows.cli`` that defines it."""


class LazyCommands(typer.core.TyperGroup):
    """The command group: a command's module is imported when the command is used.

    ``changekind events`` thus never imports the engine (scipy, statsmodels),
    the report's drawing (matplotlib) or the flows (Prefect): start-up is what
    the command itself needs.  ``--help`` lists every command (imports all).
    """

    def list_commands(self, ctx: click.Context) -> list[str]:
        return list(dict.fromkeys([*COMMAND_MODULES, *super().list_commands(ctx)]))

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name not in self.commands and cmd_name in COMMAND_MODULES:
            importlib.import_module(f"changekind.flows.cli.{COMMAND_MODULES[cmd_name]}")
            for info in app.registered_commands:
                assert info.callback is not None
                name = info.name or typer.main.get_command_name(info.callback.__name__)
                if name == cmd_name:
                    self.add_command(
                        typer.main.get_command_from_info(
                            info,
                            pretty_exceptions_short=app.pretty_exceptions_short,
                            rich_markup_mode=app.rich_markup_mode,
                        ),
                        name,
                    )
        return super().get_command(ctx, cmd_name)

    def invoke(self, ctx: click.Context) -> object:
        """Run the command; a fleet command refused by its own parsing gets a run record.

        ``scan --workers abc`` fails in click's parsing, before the command's
        body (which records the refusals it finds itself) runs: the refusal is
        recorded here, in the database the arguments or the environment name,
        then click prints its usage error as usual (exit 2).
        """
        args = [*getattr(ctx, "_protected_args", ()), *ctx.args]
        try:
            return super().invoke(ctx)
        except typer.TyperException as exc:
            # Typer carries its own copy of click: its UsageError (exit code 2)
            # is reached through the public base class.
            usage = getattr(exc, "exit_code", None) == EXIT_USAGE and hasattr(exc, "format_message")
            if usage and args and args[0] in FLEET_COMMANDS:
                from changekind.flows.cli.config import record_refusal

                record_refusal(args[0], _option_value(args, "--db"), exc.format_message())
            raise


FLEET_COMMANDS = frozenset({"scan", "backfill", "refit"})
"""The commands that record every run, refused ones included, in ``scan_runs``."""


def _option_value(args: list[str], name: str) -> str | None:
    """The value given to option ``name`` in raw arguments (``--db URL`` or ``--db=URL``)."""
    for i, arg in enumerate(args):
        if arg == name and i + 1 < len(args) and not args[i + 1].startswith("--"):
            return args[i + 1]
        if arg.startswith(name + "="):
            return arg.split("=", 1)[1]
    return None


app = typer.Typer(
    cls=LazyCommands,
    name="changekind",
    help="Find and classify events (AO, LS, TC, IO) in fleets of metric series.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


_typer_display_type = typer.core.TyperOption.display_type_rich


def _display_type(self: typer.core.TyperOption, ctx: typer.Context) -> str | None:
    """The placeholder after an option in help: none for a flag (``--json``)."""
    if self.is_flag:
        return None
    return _typer_display_type(self, ctx)


# Typer's help prints a type placeholder after every parameter, ``<bool>`` after
# flags that take no value and ``<str>`` after arguments already named by their
# metavar; changekind's help names each value (URL, PATH, N) and leaves flags bare.
typer.core.TyperOption.display_type_rich = _display_type  # type: ignore[method-assign]
typer.core.TyperArgument.display_type_rich = lambda self, ctx: None  # type: ignore[method-assign]


def _show_version(value: bool) -> None:
    if value:
        try:
            version = importlib.metadata.version("changekind")
        except importlib.metadata.PackageNotFoundError:  # run from a source tree
            version = "unknown (not installed)"
        typer.echo(f"changekind {version}")
        raise typer.Exit()


@app.callback()
def _main(
    version: Annotated[
        bool,
        typer.Option(
            "--version",
            help="Print changekind's version and stop.",
            callback=_show_version,
            is_eager=True,
        ),
    ] = False,
) -> None:
    """Find and classify events (AO, LS, TC, IO) in fleets of metric series."""


def out_console() -> Console:
    """Console for results: plain lines are never hard-wrapped (commands stay copyable)."""
    console = Console(highlight=False, soft_wrap=True)
    if not console.is_terminal and not os.environ.get("COLUMNS"):
        # Piped output has no width: wide enough for every column, unless COLUMNS says.
        console = Console(highlight=False, soft_wrap=True, width=120)
    return console


def err_console() -> Console:
    return Console(stderr=True, highlight=False, soft_wrap=True)


def fail_usage(message: str) -> typer.Exit:
    """Print one clear line on stderr; return the exit to raise."""
    err_console().print(f"changekind: error: {message}", markup=False)
    return typer.Exit(EXIT_USAGE)


EXIT_RUN_FAILED = 3
"""The run itself failed (not one series: the run); a rerun continues where it stopped."""

EXIT_BUSY = 4
"""Another fleet run holds the database (one run at a time per database); nothing was run."""

EXIT_INTERRUPTED = 130
"""Stopped by Ctrl-C (128 + SIGINT, the shell's convention)."""

OPTION_NAMES = {
    "critical": "--critical",
    "false_budget": "--false-budget",
    "min_effect": "--min-effect",
    "periods": "--season",
    "window": "--window",
    "min_points": "--min-points",
    "workers": "--workers",
    "wait_seconds": "--wait",
}


def validation_text(exc: Exception, names: Mapping[str, str]) -> str:
    """A pydantic ValidationError in one line, fields named as the user wrote them."""
    errors = getattr(exc, "errors", None)
    if errors is None:
        return str(exc)
    parts = []
    for err in errors():
        loc = err.get("loc") or ("",)
        name = names.get(str(loc[0]), str(loc[0]))
        message = str(err.get("msg", "invalid")).removeprefix("Value error, ")
        parts.append(f"{name} {err.get('input')!r}: {message}")
    return "; ".join(parts)


# --------------------------------------------------------------------------- running a flow


class _NoTraceback(logging.Filter):
    """Keep Prefect's error lines on the console but drop their tracebacks."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.exc_info = None
        record.exc_text = None
        record.stack_info = None
        return True


@contextmanager
def console_without_tracebacks() -> Iterator[None]:
    """While a flow runs, the root console handler prints no tracebacks (unless debugging)."""
    if os.environ.get(DEBUG_ENV):
        yield
        return
    quiet = _NoTraceback()
    handlers = list(logging.getLogger().handlers)
    for handler in handlers:
        handler.addFilter(quiet)
    try:
        yield
    finally:
        for handler in handlers:
            handler.removeFilter(quiet)


def is_configuration(exc: BaseException) -> bool:
    """A problem of the configuration (exit 2), not of the run (exit 3)."""

    return isinstance(exc, ConfigError | ValidationError)


def known_cause(exc: BaseException) -> BaseException | None:
    """The ChangekindError (or pydantic ValidationError) behind an exception, if any."""

    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen:
        if isinstance(current, ChangekindError | ValidationError):
            return current
        seen.add(id(current))
        current = current.__cause__ or current.__context__
    return None


@contextmanager
def usage_errors() -> Iterator[None]:
    """Turn configuration problems into one stderr line and exit code 2."""

    try:
        yield
    except ChangekindError as exc:  # ConfigError from the checks here, or from the steps
        raise fail_usage(str(exc)) from None
    except ValidationError as exc:
        raise fail_usage(validation_text(exc, OPTION_NAMES)) from None
