"""Command line: parse, call one library function, print. The only module importing typer.

Exit status: 0 done; 1 something was rejected or no result could be given (one message
on stderr, no traceback unless ``--debug``); 2 wrong usage.
"""

from __future__ import annotations

import json
import sys
from enum import Enum
from pathlib import Path
from typing import Optional

import functools

import typer

from .errors import MapperError
from .output import format_records

app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_show_locals=False,
                  pretty_exceptions_enable=False,
                  help="Step-test campaigns to FOPDT models, an operating map and a "
                       "single-controller-or-schedule verdict.")
_state = {"db": None, "debug": False}


class Format(str, Enum):
    table = "table"
    csv = "csv"
    json = "json"


class Direction(str, Enum):
    up = "up"
    down = "down"


FormatOption = typer.Option(Format.table, "--format", help="table for people, csv or json for programs")


@app.callback()
def _root(db: Optional[Path] = typer.Option(None, "--db", help="store file (default $MAPPER_DB or ./mapper.duckdb)"),
          debug: bool = typer.Option(False, "--debug", help="show the traceback of an error")) -> None:
    _state["db"] = db
    _state["debug"] = debug


def _guard(command):
    """Turn a mapper error into one message on stderr and exit status 1."""
    @functools.wraps(command)
    def run(*args, **kwargs):
        try:
            return command(*args, **kwargs)
        except MapperError as exc:
            if _state["debug"]:
                raise
            sys.stderr.write(f"mapper: {exc}\n")
            raise typer.Exit(1) from None
        except (typer.Exit, typer.BadParameter, KeyboardInterrupt):
            raise
        except Exception as exc:  # a bug: say so plainly, keep the traceback for --debug
            if _state["debug"]:
                raise
            sys.stderr.write(f"mapper: internal error: {type(exc).__name__}: {exc}\n"
                             "  hint: run again with --debug and report the traceback\n")
            raise typer.Exit(1) from None
    return run


def _store(**kwargs):
    from .store import Store
    return Store(_state["db"], **kwargs)


def _say(lines) -> None:
    for line in lines:
        typer.echo(line)


def _progress(label: str, total_hint: int = 20):
    """A one-line progress counter on stderr for long runs (silent when not a terminal)."""
    def report(done: int, total: int, name: str = "") -> None:
        if total >= total_hint and sys.stderr.isatty():
            sys.stderr.write(f"\r{label} {done}/{total}")
            if done == total:
                sys.stderr.write("\n")
            sys.stderr.flush()
    return report


@app.command("import")
@_guard
def import_command(
    sources: list[Path] = typer.Argument(..., help="campaign folders (with campaign.toml) or data files"),
    time: Optional[str] = typer.Option(None, "--time", help="time column of loose data files"),
    input: Optional[str] = typer.Option(None, "--input", help="input (stepped) column of loose data files"),
    output: Optional[str] = typer.Option(None, "--output", help="output (response) column of loose data files"),
    level: Optional[float] = typer.Option(None, "--level", help="operating level of loose data files"),
    campaign: Optional[str] = typer.Option(None, "--campaign", help="campaign name for loose data files"),
    time_unit: str = typer.Option("s", "--time-unit", help="unit of a numeric time column: s, min or h"),
    period: Optional[float] = typer.Option(None, "--period", help="grid period in seconds for irregular logs"),
) -> None:
    """Bring a campaign folder or loose data files into the store."""
    from .ingest import import_sources
    if time_unit not in ("s", "min", "h"):
        raise typer.BadParameter("use s, min or h", param_hint="--time-unit")
    with _store() as store:
        summary = import_sources(store, [str(s) for s in sources], time_column=time, input_column=input,
                                 output_column=output, level=level, campaign=campaign,
                                 time_unit=time_unit, period=period, progress=_progress("importing"))
    _say(summary.lines())
    if not summary.ok:
        raise typer.Exit(1)


@app.command("fit")
@_guard
def fit_command(
    refit: bool = typer.Option(False, "--refit", help="redo every test, not only new ones"),
    method: str = typer.Option("least_squares", "--method",
                               help="least_squares, graphical, smith, sundaresan or area"),
    workers: Optional[int] = typer.Option(None, "--workers", help="processes to use (default: all cores for large campaigns)"),
) -> None:
    """Identify an FOPDT (or integrating) model for every test not yet fitted."""
    from .fitting import fit_store
    with _store() as store:
        summary = fit_store(store, refit=refit, method=method, workers=workers,
                            progress=_progress("fitting"))
    _say(summary.lines())


@app.command("params")
@_guard
def params_command(
    campaign: Optional[str] = typer.Option(None, "--campaign"),
    level_min: Optional[float] = typer.Option(None, "--level-min"),
    level_max: Optional[float] = typer.Option(None, "--level-max"),
    direction: Optional[Direction] = typer.Option(None, "--direction"),
    format: Format = FormatOption,
) -> None:
    """One row per test: level, direction, gain, time constant, dead time with 95 % intervals."""
    with _store(read_only=True) as store:
        frame = store.params(campaign=campaign, level_min=level_min, level_max=level_max,
                             direction=direction.value if direction else None)
    typer.echo(format_records(frame.to_dict("records"), format.value, kind="params"))


def main() -> None:
    """Console entry point with the exit-status contract (0 done, 1 refused, 2 usage)."""
    app()


if __name__ == "__main__":
    main()
