"""Commands that read the fitted campaign: params, map, at, verdict, compare, report."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import typer

from mapper.app import views
from mapper.app.cli.common import (
    Against,
    Direction,
    Format,
    Rule,
    campaign_option,
    format_option,
    guard,
    open_session,
    progress,
    say,
    with_campaign,
)
from mapper.presentation.output import format_object, format_records, plain

__all__ = ["params_command", "map_command", "at_command", "verdict_command", "compare_command", "report_command",
           "record_fit_command"]


@guard
def params_command(
    campaign: str | None = campaign_option(),
    level_min: float | None = typer.Option(None, "--level-min", metavar="LEVEL"),
    level_max: float | None = typer.Option(None, "--level-max", metavar="LEVEL"),
    direction: Direction | None = typer.Option(None, "--direction"),
    format: Format = format_option(),
) -> None:
    """One row per test: level, direction, gain, time constant, dead time with 95 % intervals."""
    with open_session() as session:
        data = session.param_rows(campaign, level_min=level_min, level_max=level_max,
                                  direction=direction.value if direction is not None else None)
    rows = data.rows
    units = data.parameter_units
    if format is Format.json:
        rows = [dict(row, units=units) for row in rows]
        typer.echo(format_records(rows, "json"))
    elif format is Format.csv:
        typer.echo(format_records(rows, "csv"))
    else:
        say(with_campaign(format_records(rows, "table", kind="params", units=units), data.name))


@guard
def map_command(
    campaign: str | None = campaign_option("campaign to map"),
    against: Against = typer.Option(Against.level, "--against", help="map against the output level or the input value"),
    format: Format = format_option(),
) -> None:
    """Trend of each parameter against the operating level, its variation and significance."""
    with open_session() as session:
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
    say(lines)


@guard
def at_command(
    level: float = typer.Argument(..., metavar="LEVEL", help="operating level (output units)"),
    campaign: str | None = campaign_option(),
    extrapolate: bool = typer.Option(False, "--extrapolate",
                                     help="allow a level outside the tested range (with a warning)"),
    against: Against = typer.Option(Against.level, "--against", help="LEVEL is an output level or an input value"),
    format: Format = format_option(),
) -> None:
    """Gain, time constant and dead time at LEVEL, with the 95 % band."""
    with open_session() as session:
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
        say(with_campaign(format_object(views.unit_keys(answer, units), "table"), data.name))


@guard
def verdict_command(
    campaign: str | None = campaign_option(),
    ms_max: float = typer.Option(2.0, "--ms-max", metavar="MS", help="largest acceptable maximum sensitivity Ms"),
    slowdown_max: float = typer.Option(2.0, "--slowdown-max", metavar="FACTOR",
                                       help="largest acceptable slowdown against local tuning"),
    closed_loop_time: float | None = typer.Option(None, "--closed-loop-time", metavar="SECONDS",
                                                  help="SIMC tau_c (default: the dead time)"),
    rule: Rule = typer.Option(Rule.simc, "--rule", help="local tuning rule"),
    schedule_out: Path | None = typer.Option(None, "--schedule-out", metavar="FILE",
                                             help="write the schedule table as CSV"),
    format: Format = format_option(),
) -> None:
    """Single model and controller, or a gain schedule: with reasons, margins and the table."""
    from mapper.app.jobs import verdict_for
    with open_session() as session:
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
    say(lines)


@guard
def compare_command(
    first: str = typer.Argument(..., metavar="NAME", help="campaign name (the older one, usually)"),
    second: str = typer.Argument(..., metavar="OTHER", help="campaign name to compare with"),
    format: Format = format_option(),
) -> None:
    """Two campaigns side by side: which parameters moved, where, and whether significantly."""
    with open_session() as session:
        rows = session.compare_two(first, second)
    if format is Format.table:
        say([f"campaign '{first}' against campaign '{second}'"] + [f"- {row['sentence']}" for row in rows])
    else:
        typer.echo(format_records(rows, format.value))


@guard
def report_command(
    out: Path = typer.Option(Path("report.html"), "--out", metavar="FILE", help="HTML file to write"),
    png_dir: Path | None = typer.Option(None, "--png-dir", metavar="FOLDER", help="also write each chart as PNG here"),
    campaign: str | None = campaign_option("campaign to report"),
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
    with open_session() as session:
        data = session.fitted_data(campaign)
        outcome = write_campaign_report(session, out, campaign=data.name, png_dir=png_dir, ms_max=ms_max,
                                        slowdown_max=slowdown_max, compare_with=compare_with,
                                        prepared_by=prepared_by, checked_by=checked_by,
                                        progress=progress("writing the report"))
    lines = [f"report on campaign '{data.name}' written to {outcome.path} "
             f"({outcome.size_bytes / 1e6:.2f} MB)"]
    if outcome.png_files:
        lines.append(f"{len(outcome.png_files)} PNG charts in {png_dir}")
    say(lines)


@guard
def record_fit_command(
    file: str = typer.Argument(..., metavar="FILE", help="the logged file, by the name it was imported under"),
    campaign: str | None = campaign_option(),
    format: Format = format_option(),
) -> None:
    """One model across all the moves of a logged file beside each move's own model, and whether
    the moves' gains differ beyond their intervals (the evidence of nonlinearity)."""
    from mapper.app.records import record_fit, record_fit_lines, record_fit_rows
    with open_session() as session:
        record, result = record_fit(session, file, campaign)
    if format is Format.table:
        say(record_fit_lines(record, result))
    elif format is Format.json:
        typer.echo(json.dumps(plain(record_fit_rows(record, result)), indent=2))
    else:
        typer.echo(format_records(record_fit_rows(record, result)["local"], "csv"))
