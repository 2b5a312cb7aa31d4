"""Command line: parse, call one library function, print. The only module importing typer.

Exit status: 0 done; 1 something was rejected or no result could be given (one message
on stderr, no traceback unless ``--debug``); 2 wrong usage.
"""

from __future__ import annotations

import functools
import json
import sys
from enum import StrEnum
from pathlib import Path
from typing import Any

import typer

from mapper.errors import MapperError
from mapper.presentation.output import format_object, format_records, plain

app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_show_locals=False,
                  rich_markup_mode=None,  # plain help: loading rich costs more than the rest of start-up
                  pretty_exceptions_enable=False,
                  help="Step-test campaigns to FOPDT models, an operating map and a "
                       "single-controller-or-schedule verdict.")
_state: dict[str, Any] = {"db": None, "debug": False}


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


FormatOption = typer.Option(Format.table, "--format", help="table for people, csv or json for programs")


@app.callback()
def _root(db: Path | None = typer.Option(None, "--db", help="store file (default $MAPPER_DB or ./mapper.duckdb)"),
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
    from mapper.store.database import Store
    return Store(_state["db"], **kwargs)


def _say(lines) -> None:
    for line in lines:
        typer.echo(line)


def _progress(label: str, total_hint: int = 20):
    """A progress bar on stderr for long runs (only on a terminal, so logs stay clean)."""
    def report(done: int, total: int, name: str = "") -> None:
        if total < total_hint or not sys.stderr.isatty():
            return
        width = 30
        filled = int(width * done / total)
        sys.stderr.write(f"\r{label} [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
        if done == total:
            sys.stderr.write("\n")
        sys.stderr.flush()
    return report


@app.command("import")
@_guard
def import_command(
    sources: list[Path] = typer.Argument(..., help="campaign folders (with campaign.toml) or data files"),
    time: str | None = typer.Option(None, "--time", help="time column of loose data files"),
    input: str | None = typer.Option(None, "--input", help="input (stepped) column of loose data files"),
    output: str | None = typer.Option(None, "--output", help="output (response) column of loose data files"),
    level: float | None = typer.Option(None, "--level", help="operating level of loose data files"),
    campaign: str | None = typer.Option(None, "--campaign", help="campaign name for loose data files"),
    time_unit: str = typer.Option("s", "--time-unit", help="unit of a numeric time column: s, min or h"),
    period: float | None = typer.Option(None, "--period", help="grid period in seconds for irregular logs"),
    drop_bad_rows: bool = typer.Option(False, "--drop-bad-rows",
                                       help="drop rows with unreadable cells (counted and flagged) "
                                            "instead of refusing the file"),
) -> None:
    """Bring a campaign folder or loose data files into the store."""
    from mapper.store.ingest import import_campaigns, prepare_sources
    if time_unit not in ("s", "min", "h"):
        raise typer.BadParameter("use s, min or h", param_hint="--time-unit")
    # campaign files are checked before the store is opened, so a faulty one leaves it untouched
    campaigns = prepare_sources([str(s) for s in sources], time_column=time, input_column=input,
                                output_column=output, level=level, campaign=campaign,
                                time_unit=time_unit, period=period)
    with _store() as store:
        summary = import_campaigns(store, campaigns, progress=_progress("importing"),
                                   drop_bad_rows=drop_bad_rows)
    _say(summary.lines())
    for line in summary.refusals():
        sys.stderr.write(f"mapper: {line}\n")
    if not summary.ok:
        raise typer.Exit(1)


@app.command("fit")
@_guard
def fit_command(
    refit: bool = typer.Option(False, "--refit", help="redo every test, not only new ones"),
    method: str = typer.Option("least_squares", "--method",
                               help="least_squares, graphical, smith, sundaresan or area"),
    workers: int | None = typer.Option(None, "--workers",
                                       help="processes to use (default: all cores for large campaigns)"),
) -> None:
    """Identify an FOPDT (or integrating) model for every test not yet fitted."""
    from mapper.identification.fitting import fit_store
    with _store() as store:
        summary = fit_store(store, refit=refit, method=method, workers=workers,
                            progress=_progress("fitting"))
    _say(summary.lines())


@app.command("params")
@_guard
def params_command(
    campaign: str | None = typer.Option(None, "--campaign"),
    level_min: float | None = typer.Option(None, "--level-min"),
    level_max: float | None = typer.Option(None, "--level-max"),
    direction: Direction | None = typer.Option(None, "--direction"),
    format: Format = FormatOption,
) -> None:
    """One row per test: level, direction, gain, time constant, dead time with 95 % intervals."""
    from mapper.store.queries import param_rows  # plain rows: no pandas to load
    with _store(read_only=True) as store:
        rows = param_rows(store, campaign=campaign, level_min=level_min, level_max=level_max,
                          direction=direction.value if direction else None)
    typer.echo(format_records(rows, format.value, kind="params"))


@app.command("map")
@_guard
def map_command(
    campaign: str | None = typer.Option(None, "--campaign", help="campaign to map (default: the newest)"),
    against: Against = typer.Option(Against.level, "--against", help="map against the output level or the input value"),
    format: Format = FormatOption,
) -> None:
    """Trend of each parameter against the operating level, its variation and significance."""
    from mapper.app.jobs import operating_map
    data, opmap = operating_map(_state["db"], campaign=campaign, against=against.value)
    rows = opmap.summary()
    if format is not Format.table:
        typer.echo(format_records(rows, format.value))
        return
    lines = [data.note] if data.note else []
    lines += [f"operating map of '{data.name}' against {against.value} "
              f"({opmap.level_min:g} to {opmap.level_max:g})", format_records(rows, "table", kind="map"), ""]
    lines += [f"- {row['reason']}" for row in rows]
    if opmap.influence_sentence:
        lines += ["", opmap.influence_sentence] + [f"  - {d.sentence}" for d in opmap.depends_on]
    _say(lines)


@app.command("at")
@_guard
def at_command(
    level: float = typer.Argument(..., help="operating level (output units)"),
    campaign: str | None = typer.Option(None, "--campaign"),
    extrapolate: bool = typer.Option(False, "--extrapolate",
                                     help="allow a level outside the tested range (with a warning)"),
    against: Against = typer.Option(Against.level, "--against", help="LEVEL is an output level or an input value"),
    format: Format = FormatOption,
) -> None:
    """Gain, time constant and dead time at LEVEL, with the 95 % band."""
    from mapper.app.jobs import parameters_at
    answer = parameters_at(_state["db"], level, campaign=campaign, extrapolate=extrapolate,
                           against=against.value)
    if answer.get("warning"):
        sys.stderr.write(f"mapper: warning: {answer['warning']}\n")
    typer.echo(format_object(answer, format.value))


@app.command("verdict")
@_guard
def verdict_command(
    campaign: str | None = typer.Option(None, "--campaign"),
    ms_max: float = typer.Option(2.0, "--ms-max", help="largest acceptable maximum sensitivity Ms"),
    slowdown_max: float = typer.Option(2.0, "--slowdown-max", help="largest acceptable slowdown against local tuning"),
    closed_loop_time: float | None = typer.Option(None, "--closed-loop-time",
                                                  help="SIMC tau_c in s (default: the dead time)"),
    rule: str = typer.Option("simc", "--rule", help="local tuning rule: simc or lambda"),
    schedule_out: Path | None = typer.Option(None, "--schedule-out", help="write the schedule table as CSV"),
    format: Format = FormatOption,
) -> None:
    """Single model and controller, or a gain schedule: with reasons, margins and the table."""
    from mapper.app.jobs import verdict_for
    data, verdict = verdict_for(_state["db"], campaign=campaign, ms_max=ms_max, slowdown_max=slowdown_max,
                                closed_loop_time=closed_loop_time, rule=rule, schedule_out=schedule_out)
    result = verdict.to_dict()
    if format is Format.json:
        typer.echo(json.dumps(plain(result), indent=2))
        return
    if format is Format.csv:
        typer.echo(format_records(result["schedule"], "csv"))
        return
    lines = [data.note] if data.note else []
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


@app.command("compare")
@_guard
def compare_command(
    first: str = typer.Argument(..., help="campaign name (the older one, usually)"),
    second: str = typer.Argument(..., help="campaign name to compare with"),
    format: Format = FormatOption,
) -> None:
    """Two campaigns side by side: which parameters moved, where, and whether significantly."""
    from mapper.app.jobs import compare_two
    rows = compare_two(_state["db"], first, second)
    if format is Format.table:
        _say(f"- {row['sentence']}" for row in rows)
    else:
        typer.echo(format_records(rows, format.value))


@app.command("report")
@_guard
def report_command(
    out: Path = typer.Option(Path("report.html"), "--out", help="HTML file to write"),
    png_dir: Path | None = typer.Option(None, "--png-dir", help="also write each chart as PNG here"),
    campaign: str | None = typer.Option(None, "--campaign"),
    compare_with: str | None = typer.Option(None, "--compare-with", help="an older campaign to compare against"),
    ms_max: float = typer.Option(2.0, "--ms-max"),
    slowdown_max: float = typer.Option(2.0, "--slowdown-max"),
    prepared_by: str | None = typer.Option(None, "--prepared-by", metavar="NAME",
                                           help="name for the record block (blank to sign on paper)"),
    checked_by: str | None = typer.Option(None, "--checked-by", metavar="NAME",
                                          help="name for the record block (blank to sign on paper)"),
) -> None:
    """Write the self-contained HTML report (opens offline)."""
    from mapper.app.jobs import write_campaign_report
    outcome = write_campaign_report(_state["db"], out, campaign=campaign, png_dir=png_dir, ms_max=ms_max,
                                    slowdown_max=slowdown_max, compare_with=compare_with,
                                    prepared_by=prepared_by, checked_by=checked_by)
    lines = [f"report written to {outcome.path} ({outcome.size_bytes / 1e6:.2f} MB)"]
    if outcome.png_files:
        lines.append(f"{len(outcome.png_files)} PNG charts in {png_dir}")
    _say(lines)


@app.command("demo")
@_guard
def demo_command(
    out: Path = typer.Option(Path("mapper_demo"), "--out", help="folder for the demo store, report and schedule"),
    png: bool = typer.Option(False, "--png/--no-png", help="also write the charts as PNG (a few seconds more)"),
) -> None:
    """Run the whole job on the bundled sample campaign into a fresh folder."""
    from mapper.app.jobs import run_demo
    _say(run_demo(out, png=png).lines)


@app.command("bench")
@_guard
def bench_command(
    tests: int = typer.Option(100, "--tests", min=2, help="tests in the synthetic campaign"),
    samples: int = typer.Option(600, "--samples", min=50, help="samples per test"),
    scale: int = typer.Option(10, "--scale", min=2, help="the end-to-end run is repeated at this many times the tests"),
    json_out: Path | None = typer.Option(None, "--json", help="also write the figures as JSON"),
) -> None:
    """Speed and memory against the plain alternatives, measured side by side in one run."""
    from mapper.demo.bench import bench_lines, run_bench
    figures = run_bench(tests=tests, samples=samples, scale=scale)
    _say(bench_lines(figures))
    if json_out is not None:
        json_out.write_text(json.dumps(plain(figures), indent=2))
        typer.echo(f"figures written to {json_out}")


def main() -> None:
    """Console entry point with the exit-status contract (0 done, 1 refused, 2 usage)."""
    app()


if __name__ == "__main__":
    main()
