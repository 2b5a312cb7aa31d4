"""Commands that need no store of the user's: demo and bench."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from mapper.app.cli.common import guard, progress, say
from mapper.presentation.output import plain

__all__ = ["demo_command", "bench_command"]


@guard
def demo_command(
    out: Path = typer.Option(Path("mapper_demo"), "--out", metavar="FOLDER",
                             help="folder for the demo store, report and schedule"),
    png: bool = typer.Option(False, "--png/--no-png", help="also write the charts as PNG (a few seconds more)"),
) -> None:
    """Run the whole job on the bundled sample campaign into a fresh folder."""
    from mapper.app.jobs import run_demo
    say(run_demo(out, png=png, progress=progress("demo")).lines)


@guard
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
    say(bench_lines(figures))
    if json_out is not None:
        json_out.write_text(json.dumps(plain(figures), indent=2))
        typer.echo(f"figures written to {json_out}")
