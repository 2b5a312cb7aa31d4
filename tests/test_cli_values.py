"""The command line's own conversion of plain option values (mapper.app.cli.values).

Reference: typer's own conversion of the same parameter (its pydantic adapter), run on the
same raw values; every value must come out the same, with the same type, or fail with the
same message. The quick start-up this buys is measured by `mapper bench`, not here.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
import typer
from conftest import write_campaign
from typer import _click
from typer._coercion import build_runtime_param

from mapper.app.cli import app, values

RAW_VALUES = ["12", "-3", "+4", "007", "0", "1.5", "-0.25", "60.", ".6e2", "1e1", "1E-3", "1e400", " 70",
              "70 ", "1_0", "inf", "-inf", "nan", "abc", "", "1,5", "0x10", "١٢", "up", "down", "UP", "json",
              "table", "least_squares", "simc", "lambda", "min", "report.html", "./a b/c.duckdb", "-", True,
              False, None, 2.0, 2, Path("x.html"), ("1", "2"), ["3"], (), ("4", "x"), ("1.5", "2e1"), ("a.csv", "b"),
              ("2", "1"), ("0",), ("-1", "5"), ("up",), (Path("p.csv"),)]


def _parameters():
    group = typer.main.get_command(app)
    context = _click.Context(group)
    found = [("(global)", p, context) for p in group.get_params(context)]
    for name, command in group.commands.items():
        command_context = _click.Context(command, parent=context, info_name=name)
        found += [(name, p, command_context) for p in command.get_params(command_context)]
    return found


def _outcome(runtime, value, param, ctx):
    try:
        result = runtime.coerce(value, param=param, ctx=ctx)
    except _click.exceptions.BadParameter as exc:
        return ("refused", exc.format_message())
    return ("value", type(result), result)


def test_simple_parameters_get_the_quick_conversion():
    quick = {(name, p.name) for name, p, _ in _parameters() if values.quick(p)}
    assert {("(global)", "db"), ("(global)", "quiet"), ("(global)", "help"), ("params", "level_min"),
            ("params", "direction"), ("params", "format"), ("params", "campaign"), ("report", "out"),
            ("verdict", "ms_max")} <= quick
    # lists, pairs and bounded numbers too
    assert {("import", "sources"), ("import", "input_range"), ("fit", "workers"), ("fit", "test_ids")} <= quick
    for name, param, ctx in _parameters():
        if values.quick(param):
            assert isinstance(param.get_runtime_param(), values._QuickParam), (name, param.name)


@pytest.mark.parametrize("value", RAW_VALUES, ids=repr)
def test_every_value_converts_as_typer_converts_it(value):
    compared = 0
    for name, param, ctx in _parameters():
        if not values.quick(param):
            continue
        expected = _outcome(build_runtime_param(param.type_descriptor), value, param, ctx)
        got = _outcome(param.get_runtime_param(), value, param, ctx)
        if expected[0] == "value" and isinstance(expected[2], float) and expected[2] != expected[2]:
            assert got[0] == "value" and got[1] is float and got[2] != got[2], (name, param.name)  # NaN
        else:
            assert got == expected, (name, param.name, value)
        compared += 1
    assert compared > 20


def test_params_starts_without_validation_or_frame_libraries(tmp_path):
    """`mapper params` on a fitted store loads neither pydantic nor numpy, pandas, pyarrow or scipy."""
    folder = write_campaign(tmp_path / "c", [dict(level=30.0), dict(level=60.0, gain=3.0)])
    db = tmp_path / "store.duckdb"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    for args in (["import", str(folder)], ["fit"]):
        done = subprocess.run([sys.executable, "-m", "mapper.app.cli", "--db", str(db), *args],
                              capture_output=True, text=True, env=env)
        assert done.returncode == 0, done.stderr
    probe = ("import sys\n"
             "from mapper.app.cli import main\n"
             f"sys.argv = ['mapper', '--db', {str(db)!r}, 'params', '--level-min', '20', '--format', 'csv']\n"
             "try:\n    main()\nexcept SystemExit as exc:\n    code = exc.code\n"
             "heavy = ('pydantic', 'numpy', 'pandas', 'pyarrow', 'scipy', 'altair')\n"
             "sys.stderr.write(repr(sorted(m for m in sys.modules if m.split('.')[0] in heavy)))\n")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=env)
    assert done.stdout.count("\n") == 3 and done.stdout.startswith("test_id,campaign,file,level")
    assert done.stderr == "[]"
