"""Command line: parse, call one library function, print. The only module importing typer.

Exit status: 0 done; 1 something was rejected or no result could be given (one message
on stderr, no traceback unless ``--debug``); 2 wrong usage (checked before the store is
opened, so wrong usage never creates or changes anything); 141 when the reader of the
output went away (``mapper verdict | head -2``), as for any tool killed by a closed pipe.
Only ``import`` creates a store.
"""

from __future__ import annotations

import functools
import json
import os
import sys
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

import typer
from typer.core import TyperArgument, TyperCommand

from mapper.app import views
from mapper.errors import MapperError, UsageError
from mapper.presentation.output import format_object, format_records, plain

if TYPE_CHECKING:
    from mapper.app.session import Session

BROKEN_PIPE_STATUS = 128 + 13  # killed by SIGPIPE, as the shell reports it (common practice)


def _no_type(ctx) -> None:
    return None


class _Command(TyperCommand):
    """Help a person reads: arguments shown by their metavar alone, without a Python type."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        for param in self.params:
            if isinstance(param, TyperArgument):
                name = param.metavar or (param.name or "").upper()
                shown = name if param.required else f"[{name}]"
                param.display_type_rich = _no_type  # type: ignore[method-assign]
                param._usage_display_name = functools.partial(str, shown)  # type: ignore[method-assign]


app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_show_locals=False,
                  pretty_exceptions_enable=False,
                  rich_markup_mode=None,  # plain help: loading rich costs more than the rest of start-up
                  help="Step-test campaigns to FOPDT models, an operating map and a "
                       "single-controller-or-schedule verdict.")
command = functools.partial(app.command, cls=_Command)
_state: dict[str, Any] = {"db": None, "debug": False, "quiet": False}


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


def _format_option():
    return typer.Option(Format.table, "--format", help="table for people, csv or json for programs")


def _campaign_option(what: str = "campaign to work on"):
    return typer.Option(None, "--campaign", metavar="NAME",
                        help=f"{what} (needed when the store holds several)")


@app.callback()
def _root(db: Path | None = typer.Option(None, "--db", metavar="FILE",
                                         help="store file (default $MAPPER_DB or ./mapper.duckdb)"),
          quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress line"),
          debug: bool = typer.Option(False, "--debug", help="show the traceback of an error")) -> None:
    _state.update(db=db, debug=debug, quiet=quiet)


def _silence_stdout() -> None:
    """After a closed pipe: point stdout at /dev/null so the final flush cannot fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass  # not a real file (e.g. captured by a test runner)


def _guard(function):
    """Turn a mapper error into one message on stderr and exit status 1 (2 for wrong usage)."""
    @functools.wraps(function)
    def run(*args, **kwargs):
        try:
            return function(*args, **kwargs)
        except BrokenPipeError:
            _silence_stdout()
            raise typer.Exit(BROKEN_PIPE_STATUS) from None
        except MapperError as exc:
            if _state["debug"]:
                raise
            sys.stderr.write(f"mapper: {exc}\n")
            raise typer.Exit(2 if isinstance(exc, UsageError) else 1) from None
        except (typer.Exit, typer.BadParameter, KeyboardInterrupt):
            raise
        except Exception as exc:  # a bug: say so plainly, keep the traceback for --debug
            if _state["debug"]:
                raise
            sys.stderr.write(f"mapper: internal error: {type(exc).__name__}: {exc}\n"
                             "  hint: run again with --debug and report the traceback\n")
            raise typer.Exit(1) from None
    return run


def _session(*, write: bool = False, create: bool = False) -> Session:
    from mapper.app.session import Session  # loads pandas and the analysis: not needed for --help
    return Session(_state["db"], write=write, create=create)


def _say(lines) -> None:
    for line in lines:
        typer.echo(line)


def _progress(label: str):
    """A progress line on stderr, only on a terminal and without ``--quiet`` (logs stay clean).

    The callable takes ``(done, total, what="")``; ``what`` replaces the label when given.
    """
    if _state["quiet"] or not sys.stderr.isatty():
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


def _with_campaign(text: str, campaign: str) -> list[str]:
    return [f"campaign '{campaign}'", text]


@command("import")
@_guard
def import_command(
    sources: list[Path] = typer.Argument(..., metavar="SOURCE...",
                                         help="campaign folders (with campaign.toml) or data files"),
    time: str | None = typer.Option(None, "--time", metavar="COLUMN", help="time column of loose data files"),
    input: str | None = typer.Option(None, "--input", metavar="COLUMN",
                                     help="input (stepped) column of loose data files"),
    output: str | None = typer.Option(None, "--output", metavar="COLUMN",
                                      help="output (response) column of loose data files"),
    level: float | None = typer.Option(None, "--level", metavar="LEVEL", help="operating level of loose data files"),
    campaign: str | None = typer.Option(None, "--campaign", metavar="NAME", help="campaign name for loose data files"),
    description: str | None = typer.Option(None, "--description", metavar="TEXT",
                                           help="campaign description for loose data files"),
    input_unit: str | None = typer.Option(None, "--input-unit", metavar="UNIT", help="unit of the input, e.g. %"),
    output_unit: str | None = typer.Option(None, "--output-unit", metavar="UNIT", help="unit of the output, e.g. degC"),
    input_range: tuple[float, float] | None = typer.Option(None, "--input-range", metavar="LOW HIGH",
                                                           help="instrument range of the input"),
    output_range: tuple[float, float] | None = typer.Option(None, "--output-range", metavar="LOW HIGH",
                                                            help="instrument range of the output"),
    time_unit: TimeUnit = typer.Option(TimeUnit.s, "--time-unit", help="unit of a numeric time column"),
    period: float | None = typer.Option(None, "--period", metavar="SECONDS", help="grid period for irregular logs"),
    drop_bad_rows: bool = typer.Option(False, "--drop-bad-rows",
                                       help="drop rows with unreadable cells (counted and flagged) "
                                            "instead of refusing the file"),
) -> None:
    """Bring a campaign folder or loose data files into the store (creating it if needed)."""
    from mapper.store.ingest import import_campaigns, prepare_sources
    for name, pair in (("--input-range", input_range), ("--output-range", output_range)):
        if pair is not None and not pair[0] < pair[1]:
            raise UsageError(f"{name} {pair[0]:g} {pair[1]:g}: LOW must be below HIGH")
    # campaign files are checked before the store is opened, so a faulty one leaves it untouched
    campaigns = prepare_sources([str(s) for s in sources], time_column=time, input_column=input,
                                output_column=output, level=level, campaign=campaign,
                                time_unit=time_unit.value, period=period)
    campaigns = views.with_loose_details(campaigns, description=description, input_unit=input_unit,
                                         output_unit=output_unit, input_range=input_range,
                                         output_range=output_range)
    with _session(write=True, create=True) as session:
        summary = import_campaigns(session.store, campaigns, progress=_progress("importing"),
                                   drop_bad_rows=drop_bad_rows)
    _say(summary.lines())
    for line in summary.refusals():
        sys.stderr.write(f"mapper: {line}\n")
    if not summary.ok:
        raise typer.Exit(1)


@command("fit")
@_guard
def fit_command(
    test_ids: list[int] | None = typer.Argument(None, metavar="TEST_ID...",
                                                help="fit only these tests (default: the campaign's)"),
    campaign: str | None = _campaign_option("campaign to fit"),
    refit: bool = typer.Option(False, "--refit", help="redo tests already fitted, not only new ones"),
    method: Method = typer.Option(Method.least_squares, "--method", help="estimator"),
    workers: int | None = typer.Option(None, "--workers", metavar="N", min=1,
                                       help="processes to use (default: all cores for large campaigns)"),
) -> None:
    """Identify an FOPDT (or integrating) model for the tests of one campaign not yet fitted."""
    from mapper.identification.fitting import fit_store
    if test_ids and campaign:
        raise UsageError("give either test ids or --campaign, not both")
    with _session(write=True) as session:
        if test_ids:
            chosen, scope = session.known_tests(test_ids), f"{len(test_ids)} named tests"
        else:
            data = session.data(campaign)
            chosen, scope = session.test_ids_of(data.name), f"campaign '{data.name}'"
        summary = fit_store(session.store, refit=refit, method=method.value, workers=workers,
                            test_ids=chosen, progress=_progress("fitting"))
    _say([scope] + summary.lines())


@command("params")
@_guard
def params_command(
    campaign: str | None = _campaign_option(),
    level_min: float | None = typer.Option(None, "--level-min", metavar="LEVEL"),
    level_max: float | None = typer.Option(None, "--level-max", metavar="LEVEL"),
    direction: Direction | None = typer.Option(None, "--direction"),
    format: Format = _format_option(),
) -> None:
    """One row per test: level, direction, gain, time constant, dead time with 95 % intervals."""
    with _session() as session:
        data = session.data(campaign)
        frame = data.params
        if level_min is not None:
            frame = frame[frame["level"] >= level_min]
        if level_max is not None:
            frame = frame[frame["level"] <= level_max]
        if direction is not None:
            frame = frame[frame["direction"] == direction.value]
    rows: list[dict] = frame.to_dict("records")
    units = data.parameter_units
    if format is Format.json:
        rows = [dict(row, units=units) for row in rows]
        typer.echo(format_records(rows, "json"))
    elif format is Format.csv:
        typer.echo(format_records(rows, "csv"))
    else:
        _say(_with_campaign(format_records(rows, "table", kind="params", units=units), data.name))


@command("map")
@_guard
def map_command(
    campaign: str | None = _campaign_option("campaign to map"),
    against: Against = typer.Option(Against.level, "--against", help="map against the output level or the input value"),
    format: Format = _format_option(),
) -> None:
    """Trend of each parameter against the operating level, its variation and significance."""
    with _session() as session:
        data, opmap = session.operating_map(campaign, against=against.value)
    rows = opmap.summary()
    units = data.parameter_units
    if format is Format.json:
        typer.echo(format_records([dict(r, campaign=data.name, unit=units.get(r["parameter"], ""))
                                   for r in rows], "json"))
        return
    if format is Format.csv:
        typer.echo(format_records([dict(r, campaign=data.name) for r in rows], "csv"))
        return
    level_unit = f" {units['level']}" if against is Against.level and "level" in units else ""
    lines = [f"operating map of campaign '{data.name}' against {against.value} "
             f"({opmap.level_min:g} to {opmap.level_max:g}{level_unit})",
             format_records(views.with_unit_names(rows, units), "table", kind="map"), ""]
    lines += [f"- {row['reason']}" for row in rows]
    if opmap.influence_sentence:
        lines += ["", opmap.influence_sentence] + [f"  - {d.sentence}" for d in opmap.depends_on]
    _say(lines)


@command("at")
@_guard
def at_command(
    level: float = typer.Argument(..., metavar="LEVEL", help="operating level (output units)"),
    campaign: str | None = _campaign_option(),
    extrapolate: bool = typer.Option(False, "--extrapolate",
                                     help="allow a level outside the tested range (with a warning)"),
    against: Against = typer.Option(Against.level, "--against", help="LEVEL is an output level or an input value"),
    format: Format = _format_option(),
) -> None:
    """Gain, time constant and dead time at LEVEL, with the 95 % band."""
    with _session() as session:
        data, opmap = session.operating_map(campaign, against=against.value, influence=False)
        answer = opmap.at(level, extrapolate=extrapolate)
    if answer.get("warning"):
        sys.stderr.write(f"mapper: warning: {answer['warning']}\n")
    units = data.parameter_units
    if format is Format.json:
        typer.echo(json.dumps(plain({"campaign": data.name, **answer, "units": units}), indent=2))
    elif format is Format.csv:
        typer.echo(format_object({"campaign": data.name, **answer}, "csv"))
    else:
        _say(_with_campaign(format_object(views.unit_keys(answer, units), "table"), data.name))


@command("verdict")
@_guard
def verdict_command(
    campaign: str | None = _campaign_option(),
    ms_max: float = typer.Option(2.0, "--ms-max", metavar="MS", help="largest acceptable maximum sensitivity Ms"),
    slowdown_max: float = typer.Option(2.0, "--slowdown-max", metavar="FACTOR",
                                       help="largest acceptable slowdown against local tuning"),
    closed_loop_time: float | None = typer.Option(None, "--closed-loop-time", metavar="SECONDS",
                                                  help="SIMC tau_c (default: the dead time)"),
    rule: Rule = typer.Option(Rule.simc, "--rule", help="local tuning rule"),
    schedule_out: Path | None = typer.Option(None, "--schedule-out", metavar="FILE",
                                             help="write the schedule table as CSV"),
    format: Format = _format_option(),
) -> None:
    """Single model and controller, or a gain schedule: with reasons, margins and the table."""
    from mapper.app.jobs import verdict_for
    with _session() as session:
        data, verdict = verdict_for(session, campaign=campaign, ms_max=ms_max, slowdown_max=slowdown_max,
                                    closed_loop_time=closed_loop_time, rule=rule.value,
                                    schedule_out=schedule_out)
    result = {"campaign": data.name, **verdict.to_dict(), "units": data.parameter_units}
    if format is Format.json:
        typer.echo(json.dumps(plain(result), indent=2))
        return
    if format is Format.csv:
        typer.echo(format_records([dict(r, campaign=data.name) for r in result["schedule"]], "csv"))
        return
    lines = [f"verdict for campaign '{data.name}'"]
    lines += [f"decision: {result['decision']}"] + [f"  - {r}" for r in result["reasons"]]
    if verdict.depends_on_sentence:
        lines += [f"  - {verdict.depends_on_sentence}"] + [f"    {d['sentence']}" for d in result["depends_on"]]
    lines += ["", "single controller at each tested level (Ms; IAE and peak after a load step, ratios to local "
              "SIMC; setpoint overshoot):", format_records(verdict.level_rows(), "table")]
    if verdict.schedule_points and result["decision"] == "schedule":
        lines += ["", "schedule as applied at each tested level:",
                  format_records(verdict.level_rows(schedule=True), "table")]
    lines += ["", "schedule:", format_records([{k: v for k, v in r.items() if k != "tested_levels"}
                                               for r in result["schedule"]], "table")]
    if schedule_out is not None:
        lines.append(f"schedule written to {schedule_out}")
    _say(lines)


@command("compare")
@_guard
def compare_command(
    first: str = typer.Argument(..., metavar="NAME", help="campaign name (the older one, usually)"),
    second: str = typer.Argument(..., metavar="OTHER", help="campaign name to compare with"),
    format: Format = _format_option(),
) -> None:
    """Two campaigns side by side: which parameters moved, where, and whether significantly."""
    with _session() as session:
        rows = session.compare_two(first, second)
    if format is Format.table:
        _say([f"campaign '{first}' against campaign '{second}'"] + [f"- {row['sentence']}" for row in rows])
    else:
        typer.echo(format_records(rows, format.value))


@command("report")
@_guard
def report_command(
    out: Path = typer.Option(Path("report.html"), "--out", metavar="FILE", help="HTML file to write"),
    png_dir: Path | None = typer.Option(None, "--png-dir", metavar="FOLDER", help="also write each chart as PNG here"),
    campaign: str | None = _campaign_option("campaign to report"),
    compare_with: str | None = typer.Option(None, "--compare-with", metavar="NAME",
                                            help="an older campaign to compare against"),
    ms_max: float = typer.Option(2.0, "--ms-max", metavar="MS"),
    slowdown_max: float = typer.Option(2.0, "--slowdown-max", metavar="FACTOR"),
    prepared_by: str | None = typer.Option(None, "--prepared-by", metavar="NAME",
                                           help="name for the record block (blank to sign on paper)"),
    checked_by: str | None = typer.Option(None, "--checked-by", metavar="NAME",
                                          help="name for the record block (blank to sign on paper)"),
) -> None:
    """Write the self-contained HTML report (opens offline)."""
    from mapper.app.jobs import write_campaign_report
    with _session() as session:
        data = session.fitted_data(campaign)
        outcome = write_campaign_report(session, out, campaign=data.name, png_dir=png_dir, ms_max=ms_max,
                                        slowdown_max=slowdown_max, compare_with=compare_with,
                                        prepared_by=prepared_by, checked_by=checked_by,
                                        progress=_progress("writing the report"))
    lines = [f"report on campaign '{data.name}' written to {outcome.path} "
             f"({outcome.size_bytes / 1e6:.2f} MB)"]
    if outcome.png_files:
        lines.append(f"{len(outcome.png_files)} PNG charts in {png_dir}")
    _say(lines)


@command("demo")
@_guard
def demo_command(
    out: Path = typer.Option(Path("mapper_demo"), "--out", metavar="FOLDER",
                             help="folder for the demo store, report and schedule"),
    png: bool = typer.Option(False, "--png/--no-png", help="also write the charts as PNG (a few seconds more)"),
) -> None:
    """Run the whole job on the bundled sample campaign into a fresh folder."""
    from mapper.app.jobs import run_demo
    _say(run_demo(out, png=png, progress=_progress("demo")).lines)


@command("bench")
@_guard
def bench_command(
    tests: int = typer.Option(100, "--tests", metavar="N", min=2, help="tests in the synthetic campaign"),
    samples: int = typer.Option(600, "--samples", metavar="N", min=50, help="samples per test"),
    scale: int = typer.Option(10, "--scale", metavar="FACTOR", min=2,
                              help="the end-to-end run is repeated at this many times the tests"),
    json_out: Path | None = typer.Option(None, "--json", metavar="FILE", help="also write the figures as JSON"),
) -> None:
    """Speed and memory against the plain alternatives, measured side by side in one run."""
    from mapper.demo.bench import bench_lines, run_bench
    figures = run_bench(tests=tests, samples=samples, scale=scale)
    _say(bench_lines(figures))
    if json_out is not None:
        json_out.write_text(json.dumps(plain(figures), indent=2))
        typer.echo(f"figures written to {json_out}")


@command("campaigns")
@_guard
def campaigns_command(format: Format = _format_option()) -> None:
    """The campaigns in the store: name, description, tests, levels, imported, excluded."""
    with _session() as session:
        rows = views.campaign_rows(session)
    typer.echo(format_records(rows, format.value, kind="campaigns"))


@command("exclude")
@_guard
def exclude_command(
    test_ids: list[int] = typer.Argument(..., metavar="TEST_ID...", help="tests to leave out"),
    reason: str = typer.Option(..., "--reason", metavar="TEXT", help="why (kept in the record)"),
) -> None:
    """Leave tests out of the map, comparisons and verdict (they stay stored and listed)."""
    if not reason.strip():
        raise UsageError("--reason must say why the tests are left out")
    with _session(write=True) as session:
        ids = session.known_tests(test_ids)
        who = views.user_name()
        session.curation.exclude_tests(ids, reason=reason.strip(), by=who)
    _say([f"test {i} excluded by {who}: {reason.strip()}" for i in ids])


@command("include")
@_guard
def include_command(
    test_ids: list[int] = typer.Argument(..., metavar="TEST_ID...", help="excluded tests to bring back"),
) -> None:
    """Bring excluded tests back into the map, comparisons and verdict."""
    with _session(write=True) as session:
        ids = session.known_tests(test_ids)
        restored = session.curation.include_tests(ids)
    _say([f"test {i} included again" if i in restored else f"test {i} was not excluded" for i in ids])


@command("note")
@_guard
def note_command(
    test_id: int = typer.Argument(..., metavar="TEST_ID", help="the test"),
    text: str = typer.Argument(..., metavar="TEXT", help="the note (quote it)"),
) -> None:
    """Add a note to a test after import (kept with its time and author)."""
    if not text.strip():
        raise UsageError("the note is empty")
    with _session(write=True) as session:
        session.known_tests([test_id])
        session.curation.add_note(test_id, text.strip(), by=views.user_name())
    typer.echo(f"note added to test {test_id}")


@command("show")
@_guard
def show_command(
    test_id: int = typer.Argument(..., metavar="TEST_ID", help="the test"),
    png: Path | None = typer.Option(None, "--png", metavar="FILE", help="also write the test's chart as PNG"),
) -> None:
    """One test in the terminal: parameters with intervals and units, flags explained, a text plot."""
    with _session() as session:
        shown = views.show_test(session, test_id, png=png)
    _say(shown)


def main() -> None:
    """Console entry point with the exit-status contract (0 done, 1 refused, 2 usage)."""
    try:
        app()
    except BrokenPipeError:  # the reader went away while click itself was writing
        _silence_stdout()
        sys.exit(BROKEN_PIPE_STATUS)


__all__ = ["app", "main"]


if __name__ == "__main__":
    main()
