"""What every command shares: the typer application, option types, the error guard, the store session.

The global options (``--db``, ``--quiet``, ``--debug``) land in :data:`state`; :func:`guard`
turns a mapper error into one line on stderr and the exit status of the contract in
:mod:`mapper.app.cli`.
"""

from __future__ import annotations

import functools
import os
import sys
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

import typer
from typer.core import TyperArgument, TyperCommand, TyperGroup

from mapper.app.cli import values
from mapper.errors import MapperError, UsageError

if TYPE_CHECKING:
    from mapper.app.session import Session

__all__ = [
    "BROKEN_PIPE_STATUS", "app", "command", "state", "Format", "Against", "Direction", "Method", "Rule",
    "TimeUnit", "format_option", "campaign_option", "silence_stdout", "guard", "open_session", "say",
    "progress", "with_campaign",
]

BROKEN_PIPE_STATUS = 128 + 13  # killed by SIGPIPE, as the shell reports it (common practice)


def _no_type(ctx) -> None:
    return None


class _QuickValues:
    """Option values converted by :mod:`mapper.app.cli.values` (the help option's too)."""

    def get_help_option(self, ctx):
        option = super().get_help_option(ctx)
        if option is not None:
            values.install([option])
        return option


class _Command(_QuickValues, TyperCommand):
    """Help a person reads: arguments shown by their metavar alone, without a Python type."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        for param in self.params:
            if isinstance(param, TyperArgument):
                name = param.metavar or (param.name or "").upper()
                shown = name if param.required else f"[{name}]"
                param.display_type_rich = _no_type  # type: ignore[method-assign]
                param._usage_display_name = functools.partial(str, shown)  # type: ignore[method-assign]
        values.install(self.params)


class _Group(_QuickValues, TyperGroup):
    """The application: its global options converted as the commands' are (:mod:`.values`)."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        values.install(self.params)


app = typer.Typer(cls=_Group, add_completion=False, no_args_is_help=True, pretty_exceptions_show_locals=False,
                  pretty_exceptions_enable=False,
                  rich_markup_mode=None,  # plain help: loading rich costs more than the rest of start-up
                  help="Step-test campaigns to FOPDT models, an operating map and a "
                       "single-controller-or-schedule verdict.")
command = functools.partial(app.command, cls=_Command)
state: dict[str, Any] = {"db": None, "debug": False, "quiet": False}


class Format(StrEnum):
    table = "table"
    csv = "csv"
    json = "json"


class Against(StrEnum):
    level = "level"
    input = "input"


class Direction(StrEnum):
    up = "up"
    down = "down"


class Method(StrEnum):
    least_squares = "least_squares"
    graphical = "graphical"
    smith = "smith"
    sundaresan = "sundaresan"
    area = "area"


class Rule(StrEnum):
    simc = "simc"
    lambda_ = "lambda"


class TimeUnit(StrEnum):
    s = "s"
    min = "min"
    h = "h"


def format_option():
    return typer.Option(Format.table, "--format", help="table for people, csv or json for programs")


def campaign_option(what: str = "campaign to work on"):
    return typer.Option(None, "--campaign", metavar="NAME",
                        help=f"{what} (needed when the store holds several)")


@app.callback()
def _root(db: Path | None = typer.Option(None, "--db", metavar="FILE",
                                         help="store file (default $MAPPER_DB or ./mapper.duckdb)"),
          quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress line"),
          debug: bool = typer.Option(False, "--debug", help="show the traceback of an error")) -> None:
    state.update(db=db, debug=debug, quiet=quiet)


def silence_stdout() -> None:
    """After a closed pipe: point stdout at /dev/null so the final flush cannot fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass  # not a real file (e.g. captured by a test runner)


def guard(function):
    """Turn a mapper error into one message on stderr and exit status 1 (2 for wrong usage)."""
    @functools.wraps(function)
    def run(*args, **kwargs):
        try:
            return function(*args, **kwargs)
        except BrokenPipeError:
            silence_stdout()
            raise typer.Exit(BROKEN_PIPE_STATUS) from None
        except MapperError as exc:
            if state["debug"]:
                raise
            sys.stderr.write(f"mapper: {exc}\n")
            raise typer.Exit(2 if isinstance(exc, UsageError) else 1) from None
        except (typer.Exit, typer.BadParameter, KeyboardInterrupt):
            raise
        except Exception as exc:  # a bug: say so plainly, keep the traceback for --debug
            if state["debug"]:
                raise
            sys.stderr.write(f"mapper: internal error: {type(exc).__name__}: {exc}\n"
                             "  hint: run again with --debug and report the traceback\n")
            raise typer.Exit(1) from None
    return run


def open_session(*, write: bool = False, create: bool = False) -> Session:
    """The store of ``--db`` (or its default), opened for one command."""
    from mapper.app.session import Session  # loads pandas and the analysis: not needed for --help
    return Session(state["db"], write=write, create=create)


def say(lines) -> None:
    """Print each line on stdout."""
    for line in lines:
        typer.echo(line)


def progress(label: str):
    """A progress line on stderr, only on a terminal and without ``--quiet`` (logs stay clean).

    The callable takes ``(done, total, what="")``; ``what`` replaces the label when given.
    """
    if state["quiet"] or not sys.stderr.isatty():
        return None

    def report(done: int, total: int, what: str = "") -> None:
        width = 30
        filled = int(width * done / total) if total else width
        name = what if what and not what.endswith((".csv", ".parquet", ".pq", ".txt")) else label
        sys.stderr.write(f"\r{name:<20.20} [{'#' * filled}{'.' * (width - filled)}] {done}/{total}  ")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()
    return report


def with_campaign(text: str, campaign: str) -> list[str]:
    return [f"campaign '{campaign}'", text]
