"""Command line: parse, call one library function, print. The only package importing typer.

Exit status: 0 done; 1 something was rejected or no result could be given (one message
on stderr, no traceback unless ``--debug``); 2 wrong usage (checked before the store is
opened, so wrong usage never creates or changes anything); 141 when the reader of the
output went away (``mapper verdict | head -2``), as for any tool killed by a closed pipe.
Only ``import`` creates a store.

:mod:`~mapper.app.cli.common` holds the application, option types and error guard; the
commands live in :mod:`~mapper.app.cli.data_commands`, :mod:`~mapper.app.cli.result_commands`
and :mod:`~mapper.app.cli.tool_commands`, and are registered here in the order ``--help`` lists them.
"""

from __future__ import annotations

import sys

from mapper.app.cli import data_commands as data
from mapper.app.cli import result_commands as results
from mapper.app.cli import tool_commands as tools
from mapper.app.cli.common import BROKEN_PIPE_STATUS, app, command, silence_stdout

__all__ = ["app", "main"]

for _name, _function in (
    ("import", data.import_command),
    ("fit", data.fit_command),
    ("params", results.params_command),
    ("map", results.map_command),
    ("at", results.at_command),
    ("verdict", results.verdict_command),
    ("compare", results.compare_command),
    ("record-fit", results.record_fit_command),
    ("report", results.report_command),
    ("demo", tools.demo_command),
    ("bench", tools.bench_command),
    ("campaigns", data.campaigns_command),
    ("exclude", data.exclude_command),
    ("include", data.include_command),
    ("note", data.note_command),
    ("show", data.show_command),
):
    command(_name)(_function)


def main() -> None:
    """Console entry point with the exit-status contract (0 done, 1 refused, 2 usage)."""
    try:
        app()
    except BrokenPipeError:  # the reader went away while click itself was writing
        silence_stdout()
        sys.exit(BROKEN_PIPE_STATUS)
