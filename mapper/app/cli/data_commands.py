"""Commands that fill the store and look after its tests: import, fit, campaigns, exclude, include, note, show."""

from __future__ import annotations

import sys
from pathlib import Path

import typer

from mapper.app import views
from mapper.app.cli.common import (
    Format,
    Method,
    TimeUnit,
    campaign_option,
    format_option,
    guard,
    open_session,
    progress,
    say,
)
from mapper.errors import UsageError
from mapper.presentation.output import format_records

__all__ = ["import_command", "fit_command", "campaigns_command", "exclude_command", "include_command",
           "note_command", "show_command"]


@guard
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
    with open_session(write=True, create=True) as session:
        summary = import_campaigns(session.store, campaigns, progress=progress("importing"),
                                   drop_bad_rows=drop_bad_rows)
    say(summary.lines())
    for line in summary.refusals():
        sys.stderr.write(f"mapper: {line}\n")
    if not summary.ok:
        raise typer.Exit(1)


@guard
def fit_command(
    test_ids: list[int] | None = typer.Argument(None, metavar="TEST_ID...",
                                                help="fit only these tests (default: the campaign's)"),
    campaign: str | None = campaign_option("campaign to fit"),
    refit: bool = typer.Option(False, "--refit", help="redo tests already fitted, not only new ones"),
    method: Method = typer.Option(Method.least_squares, "--method", help="estimator"),
    workers: int | None = typer.Option(None, "--workers", metavar="N", min=1,
                                       help="processes to use (default: all cores for large campaigns)"),
) -> None:
    """Identify an FOPDT (or integrating) model for the tests of one campaign not yet fitted."""
    from mapper.identification.fitting import fit_store
    if test_ids and campaign:
        raise UsageError("give either test ids or --campaign, not both")
    with open_session(write=True) as session:
        if test_ids:
            chosen, scope = session.known_tests(test_ids), f"{len(test_ids)} named tests"
        else:
            name = session.campaign_info(campaign)["name"]
            chosen, scope = session.test_ids_of(name), f"campaign '{name}'"
        summary = fit_store(session.store, refit=refit, method=method.value, workers=workers,
                            test_ids=chosen, progress=progress("fitting"))
    say([scope] + summary.lines())


@guard
def campaigns_command(format: Format = format_option()) -> None:
    """The campaigns in the store: name, description, tests, levels, imported, excluded."""
    with open_session() as session:
        rows = views.campaign_rows(session)
    typer.echo(format_records(rows, format.value, kind="campaigns"))


@guard
def exclude_command(
    test_ids: list[int] = typer.Argument(..., metavar="TEST_ID...", help="tests to leave out"),
    reason: str = typer.Option(..., "--reason", metavar="TEXT", help="why (kept in the record)"),
) -> None:
    """Leave tests out of the map, comparisons and verdict (they stay stored and listed)."""
    if not reason.strip():
        raise UsageError("--reason must say why the tests are left out")
    with open_session(write=True) as session:
        ids = session.known_tests(test_ids)
        who = views.user_name()
        session.curation.exclude_tests(ids, reason=reason.strip(), by=who)
    say([f"test {i} excluded by {who}: {reason.strip()}" for i in ids])


@guard
def include_command(
    test_ids: list[int] = typer.Argument(..., metavar="TEST_ID...", help="excluded tests to bring back"),
) -> None:
    """Bring excluded tests back into the map, comparisons and verdict."""
    with open_session(write=True) as session:
        ids = session.known_tests(test_ids)
        restored = session.curation.include_tests(ids)
    say([f"test {i} included again" if i in restored else f"test {i} was not excluded" for i in ids])


@guard
def note_command(
    test_id: int = typer.Argument(..., metavar="TEST_ID", help="the test"),
    text: str = typer.Argument(..., metavar="TEXT", help="the note (quote it)"),
) -> None:
    """Add a note to a test after import (kept with its time and author)."""
    if not text.strip():
        raise UsageError("the note is empty")
    with open_session(write=True) as session:
        session.known_tests([test_id])
        session.curation.add_note(test_id, text.strip(), by=views.user_name())
    typer.echo(f"note added to test {test_id}")


@guard
def show_command(
    test_id: int = typer.Argument(..., metavar="TEST_ID", help="the test"),
    png: Path | None = typer.Option(None, "--png", metavar="FILE", help="also write the test's chart as PNG"),
) -> None:
    """One test in the terminal: parameters with intervals and units, flags explained, a text plot."""
    with open_session() as session:
        shown = views.show_test(session, test_id, png=png)
    say(shown)
