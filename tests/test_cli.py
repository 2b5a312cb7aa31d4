"""The command line in-process (typer's test runner): exit codes, the message a person reads,
files created or not, JSON keys, help text, and the campaign a command works on.

A few checks need a real process (a closed pipe); they are at the end.
"""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest
from conftest import ENTRY_POINT, write_campaign, write_step_csv
from typer.testing import CliRunner

from mapper.app.cli import app, common

FIRST = "Tank T-1, spring"
SECOND = "Tank T-1, autumn"
PUBLIC_VIEW = ["test_id", "campaign", "file", "level", "direction", "input_step", "model",
               "gain", "gain_lo", "gain_hi", "time_constant", "time_constant_lo", "time_constant_hi",
               "dead_time", "dead_time_lo", "dead_time_hi", "nrmse", "quality", "flags"]


def run(db: Path | None, *args, **kwargs):
    """Invoke the command line in this process; returns the click result."""
    head = ["--db", str(db)] if db is not None else []
    return CliRunner().invoke(app, head + [str(a) for a in args], catch_exceptions=False,
                              prog_name="mapper", **kwargs)


def _tests(gain_high: float = 3.0) -> list[dict]:
    return [dict(level=30.0), dict(level=30.0, u0=60.0, step=-10.0, seed=1),
            dict(level=45.0, gain=2.5, seed=2), dict(level=45.0, gain=2.5, u0=60.0, step=-10.0, seed=3),
            dict(level=60.0, gain=gain_high, seed=4),
            dict(level=60.0, gain=gain_high, u0=60.0, step=-10.0, seed=5, note="after service")]


@pytest.fixture(scope="module")
def one_campaign(tmp_path_factory) -> Path:
    """A store holding one fitted campaign (six tests at three levels, gain rising)."""
    folder = tmp_path_factory.mktemp("one")
    write_campaign(folder / "c", _tests(), name=FIRST)
    db = folder / "store.duckdb"
    assert run(db, "import", folder / "c").exit_code == 0
    fitted = run(db, "fit")
    assert fitted.exit_code == 0, fitted.output
    return db


@pytest.fixture(scope="module")
def two_campaigns(tmp_path_factory) -> Path:
    """A store holding two campaigns, each fitted on its own."""
    folder = tmp_path_factory.mktemp("two")
    write_campaign(folder / "a", _tests(), name=FIRST)
    write_campaign(folder / "b", _tests(gain_high=3.5), name=SECOND)
    db = folder / "store.duckdb"
    assert run(db, "import", folder / "a", folder / "b").exit_code == 0
    for name in (FIRST, SECOND):
        fitted = run(db, "fit", "--campaign", name)
        assert fitted.exit_code == 0, fitted.output
        assert f"campaign '{name}'" in fitted.stdout
    return db


# -- help a person reads -------------------------------------------------------------------
COMMANDS = ["import", "fit", "params", "map", "at", "verdict", "compare", "report", "demo", "bench",
            "campaigns", "exclude", "include", "note", "show"]


@pytest.mark.parametrize("command", [None, *COMMANDS])
def test_help_shows_metavars_not_python_types(command):
    result = run(None, *([command] if command else []), "--help")
    assert result.exit_code == 0
    for python_type in ("<bool>", "<list", "<str>", "<int>", "<float>", "<path>", "{", "Path]"):
        assert python_type not in result.stdout, (command, python_type, result.stdout)


def test_help_names_values_by_what_they_are():
    assert "--db FILE" in run(None, "--help").stdout
    assert "LEVEL" in run(None, "at", "--help").stdout
    fit = run(None, "fit", "--help").stdout
    assert "--campaign NAME" in fit and "[TEST_ID...]" in fit
    assert "--refit  " in fit  # a flag takes no value
    assert "least_squares|graphical|smith|sundaresan|area" in fit
    assert "--png FILE" in run(None, "show", "--help").stdout
    imported = run(None, "import", "--help").stdout
    assert "Usage: mapper import [OPTIONS] SOURCE..." in imported
    assert "--input-range LOW HIGH" in imported and "--output-unit UNIT" in imported


# -- only import creates a store; usage errors exit 2 before anything is opened ----------------
@pytest.mark.parametrize("args", [
    ["params"], ["map"], ["at", "5"], ["verdict"], ["report"], ["campaigns"], ["show", "1"],
    ["fit"], ["exclude", "1", "--reason", "bad"], ["include", "1"], ["note", "1", "text"],
])
def test_commands_other_than_import_create_no_store(tmp_path, args):
    db = tmp_path / "missing.duckdb"
    result = run(db, *args)
    assert result.exit_code == 1
    assert "no store here yet" in result.stderr and "mapper import" in result.stderr
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("args, word", [
    (["fit", "--method", "foo"], "--method"),
    (["verdict", "--rule", "ziegler"], "--rule"),
    (["params", "--format", "xml"], "--format"),
    (["params", "--direction", "sideways"], "--direction"),
    (["map", "--against", "flow"], "--against"),
    (["import", "x.csv", "--time-unit", "days"], "--time-unit"),
    (["exclude", "1"], "--reason"),
    (["at", "high"], "LEVEL"),
    (["no-such-command"], "no-such-command"),
])
def test_wrong_usage_exits_2_and_touches_nothing(tmp_path, args, word):
    db = tmp_path / "store.duckdb"
    result = run(db, *args)
    assert result.exit_code == 2
    assert word in result.stderr
    assert not db.exists()


def test_import_creates_the_store(tmp_path):
    folder = write_campaign(tmp_path / "c", _tests()[:2], name=FIRST)
    db = tmp_path / "new.duckdb"
    result = run(db, "import", folder)
    assert result.exit_code == 0 and db.exists()
    assert "2 tests" in result.stdout or "imported" in result.stdout


# -- naming the campaign -------------------------------------------------------------------
@pytest.mark.parametrize("args", [["params"], ["map"], ["at", "40"], ["verdict"], ["fit", "--refit"],
                                  ["report", "--out", "never.html"]])
def test_two_campaign_store_refuses_to_guess(two_campaigns, args, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run(two_campaigns, *args)
    assert result.exit_code == 2
    assert "holds 2 campaigns and none was named" in result.stderr
    assert FIRST in result.stderr and SECOND in result.stderr and "--campaign" in result.stderr
    assert not (tmp_path / "never.html").exists()


def test_unknown_campaign_lists_the_stored_ones(two_campaigns):
    result = run(two_campaigns, "map", "--campaign", "Tank T-9")
    assert result.exit_code == 1
    assert "campaign 'Tank T-9' is not in" in result.stderr and FIRST in result.stderr


def test_every_output_names_its_campaign(two_campaigns):
    table = run(two_campaigns, "params", "--campaign", SECOND)
    assert table.exit_code == 0 and table.stdout.startswith(f"campaign '{SECOND}'")
    rows = json.loads(run(two_campaigns, "params", "--campaign", SECOND, "--format", "json").stdout)
    assert {row["campaign"] for row in rows} == {SECOND} and len(rows) == 6
    at = json.loads(run(two_campaigns, "at", "40", "--campaign", SECOND, "--format", "json").stdout)
    assert at["campaign"] == SECOND
    verdict = json.loads(run(two_campaigns, "verdict", "--campaign", SECOND, "--format", "json").stdout)
    assert verdict["campaign"] == SECOND and verdict["decision"] in ("single", "schedule", "insufficient")
    mapped = json.loads(run(two_campaigns, "map", "--campaign", FIRST, "--format", "json").stdout)
    assert {row["campaign"] for row in mapped} == {FIRST}
    assert f"campaign '{FIRST}'" in run(two_campaigns, "map", "--campaign", FIRST).stdout
    assert f"verdict for campaign '{FIRST}'" in run(two_campaigns, "verdict", "--campaign", FIRST).stdout


def test_one_campaign_needs_no_name(one_campaign):
    result = run(one_campaign, "at", "45", "--format", "json")
    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout)["campaign"] == FIRST


def test_campaigns_lists_name_tests_levels_and_exclusions(two_campaigns):
    rows = json.loads(run(two_campaigns, "campaigns", "--format", "json").stdout)
    assert [row["campaign"] for row in rows] == [FIRST, SECOND]
    assert set(rows[0]) == {"campaign", "description", "tests", "levels", "imported", "excluded"}
    assert rows[0]["tests"] == 6 and rows[0]["levels"] == [30.0, 45.0, 60.0] and rows[0]["excluded"] == 0
    table = run(two_campaigns, "campaigns").stdout
    assert "levels tested" in table and "imported (UTC)" in table and SECOND in table


# -- units -------------------------------------------------------------------------------------
def test_units_in_table_headers_and_json(one_campaign):
    table = run(one_campaign, "params").stdout
    assert "gain (cm/%)" in table and "time constant (s)" in table and "dead time (s)" in table
    assert "level (cm)" in table
    rows = json.loads(run(one_campaign, "params", "--format", "json").stdout)
    assert rows[0]["units"] == {"gain": "cm/%", "time_constant": "s", "dead_time": "s", "level": "cm",
                                "input_step": "%", "gain_over_time_constant": "cm/%/s"}
    assert set(PUBLIC_VIEW) | {"excluded", "exclusion_reason", "note", "units"} <= set(rows[0])
    csv_header = run(one_campaign, "params", "--format", "csv").stdout.splitlines()[0].split(",")
    assert csv_header[:len(PUBLIC_VIEW)] == PUBLIC_VIEW
    assert "gain (cm/%)" in run(one_campaign, "map").stdout
    at = run(one_campaign, "at", "45")
    assert "gain (cm/%)" in at.stdout and "time constant (s)" in at.stdout
    assert json.loads(run(one_campaign, "at", "45", "--format", "json").stdout)["units"]["gain"] == "cm/%"


# -- fitting scope -----------------------------------------------------------------------------
def _methods(db: Path) -> dict[str, set[str]]:
    with duckdb.connect(str(db), read_only=True) as con:
        rows = con.execute("SELECT c.name, f.method FROM fits f JOIN tests t USING (test_id) "
                           "JOIN campaigns c USING (campaign_id)").fetchall()
    found: dict[str, set[str]] = {}
    for name, method in rows:
        found.setdefault(name, set()).add(method)
    return found


def test_refit_stays_inside_the_named_campaign_or_ids(tmp_path):
    write_campaign(tmp_path / "a", _tests()[:2], name=FIRST)
    write_campaign(tmp_path / "b", _tests()[:2], name=SECOND)
    db = tmp_path / "s.duckdb"
    run(db, "import", tmp_path / "a", tmp_path / "b")
    assert run(db, "fit", "--campaign", FIRST).exit_code == 0
    assert _methods(db) == {FIRST: {"least_squares"}}  # the other campaign is not fitted
    assert run(db, "fit", "--campaign", SECOND).exit_code == 0
    refit = run(db, "fit", "--refit", "--method", "graphical", "--campaign", SECOND)
    assert refit.exit_code == 0 and f"campaign '{SECOND}'" in refit.stdout
    assert _methods(db) == {FIRST: {"least_squares"}, SECOND: {"graphical"}}
    one = run(db, "fit", "--refit", "--method", "area", "1")
    assert one.exit_code == 0 and "1 named tests" in one.stdout
    assert _methods(db)[FIRST] == {"least_squares", "area"}
    assert run(db, "fit", "--refit", "99").exit_code == 1
    both = run(db, "fit", "1", "--campaign", FIRST)
    assert both.exit_code == 2 and "not both" in both.stderr


# -- loose files -------------------------------------------------------------------------------
def test_loose_files_take_what_a_campaign_file_gives(tmp_path):
    a = write_step_csv(tmp_path / "a.csv", columns=("time", "u", "y"))
    b = write_step_csv(tmp_path / "b.csv", columns=("time", "u", "y"), seed=3)
    db = tmp_path / "s.duckdb"
    result = run(db, "import", a, b, "--time", "time", "--input", "u", "--output", "y", "--level", "12.5",
                 "--campaign", "bench rig", "--description", "rig B, new valve", "--input-unit", "%",
                 "--output-unit", "bar", "--input-range", "0", "100", "--output-range", "0", "40")
    assert result.exit_code == 0, result.stderr
    rows = json.loads(run(db, "campaigns", "--format", "json").stdout)
    assert rows[0]["campaign"] == "bench rig" and rows[0]["description"] == "rig B, new valve"
    with duckdb.connect(str(db), read_only=True) as con:
        stored = con.execute("SELECT input_unit, output_unit, input_range_low, input_range_high, "
                             "output_range_low, output_range_high FROM campaigns").fetchone()
    assert stored == ("%", "bar", 0.0, 100.0, 0.0, 40.0)
    assert "level (bar)" in run(db, "params").stdout


def test_loose_file_details_refused_for_a_campaign_folder(tmp_path):
    folder = write_campaign(tmp_path / "c", _tests()[:1])
    db = tmp_path / "s.duckdb"
    result = run(db, "import", folder, "--input-unit", "%")
    assert result.exit_code == 2 and "loose data files only" in result.stderr
    assert not db.exists()
    backwards = run(db, "import", folder, "--input-range", "100", "0")
    assert backwards.exit_code == 2 and "LOW must be below HIGH" in backwards.stderr


# -- show --------------------------------------------------------------------------------------
def test_show_one_test_in_the_terminal(one_campaign):
    result = run(one_campaign, "show", "6")
    assert result.exit_code == 0, result.stderr
    text = result.stdout
    assert f"test 6 of campaign '{FIRST}'" in text and "step_5.csv" in text
    assert "gain" in text and "cm/%" in text and "95 % interval" in text
    assert "time constant" in text and " s " in text
    assert "grade" in text and "note          after service" in text
    assert "output  " in text and "model   " in text
    assert any(block in text for block in "▁▂▃▄▅▆▇█")
    missing = run(one_campaign, "show", "999")
    assert missing.exit_code == 1 and "no test 999" in missing.stderr


def test_show_explains_each_flag(tmp_path):
    folder = write_campaign(tmp_path / "c", [dict(level=30.0, duration=60.0, time_constant=40.0)])
    db = tmp_path / "s.duckdb"
    run(db, "import", folder)
    run(db, "fit")
    row = json.loads(run(db, "params", "--format", "json").stdout)[0]
    assert row["flags"], "the short record should raise a flag"
    text = run(db, "show", str(row["test_id"])).stdout
    for flag in row["flags"]:
        assert f"- {flag} (" in text
    assert f"grade         {row['quality']}" in text


def test_show_png_writes_the_chart(one_campaign, tmp_path):
    target = tmp_path / "test6.png"
    result = run(one_campaign, "show", "6", "--png", target)
    assert result.exit_code == 0, result.stderr
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in tmp_path.iterdir()] == ["test6.png"]  # nothing half-written beside it


# -- progress ----------------------------------------------------------------------------------
class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_only_on_a_terminal_and_not_when_quiet(monkeypatch):
    terminal = _Terminal()
    monkeypatch.setattr(sys, "stderr", terminal)
    monkeypatch.setitem(common.state, "quiet", False)
    report = common.progress("fitting")
    assert report is not None
    report(1, 4)
    report(4, 4)
    assert "fitting" in terminal.getvalue() and "4/4" in terminal.getvalue()
    monkeypatch.setitem(common.state, "quiet", True)
    assert common.progress("fitting") is None
    monkeypatch.setitem(common.state, "quiet", False)
    monkeypatch.setattr(sys, "stderr", io.StringIO())  # piped
    assert common.progress("fitting") is None


def test_piped_output_has_no_progress_line(one_campaign):
    result = run(one_campaign, "fit", "--refit")
    assert result.exit_code == 0 and "[#" not in result.stderr and "[#" not in result.stdout


# -- a real process: a closed pipe ---------------------------------------------------------------
def test_closed_pipe_ends_quietly_with_the_conventional_status(one_campaign):
    command = [str(ENTRY_POINT)] if ENTRY_POINT.exists() else [sys.executable, "-m", "mapper.app.cli"]
    process = subprocess.Popen(command + ["--db", str(one_campaign), "verdict"], stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE)
    assert process.stdout is not None and process.stderr is not None
    process.stdout.close()  # the reader goes away before the first line, as `| head -0` would
    error = process.stderr.read().decode()
    assert process.wait(timeout=120) == 141
    assert error == ""


# -- excluding, including and noting -------------------------------------------------------------
@pytest.fixture
def curated(one_campaign, tmp_path) -> Path:
    """A private copy of the one-campaign store (these tests change it)."""
    copy = tmp_path / "curated.duckdb"
    copy.write_bytes(one_campaign.read_bytes())
    return copy


def test_exclude_changes_map_and_verdict_and_include_restores_them_exactly(curated, monkeypatch):
    monkeypatch.setenv("MAPPER_USER", "r.ingham")
    outputs = ("map", "verdict", "at 45")

    def snapshot() -> dict[str, str]:
        found = {}
        for command in outputs:
            result = run(curated, *command.split(), "--format", "json")
            assert result.exit_code == 0, result.stderr
            found[command] = result.stdout
        return found
    before = snapshot()
    result = run(curated, "exclude", "5", "6", "--reason", "valve stuck during test")
    assert result.exit_code == 0, result.stderr
    assert "test 5 excluded by r.ingham: valve stuck during test" in result.stdout
    after = snapshot()
    assert all(after[c] != before[c] for c in outputs)  # the 60 cm tests left the map
    mapped = json.loads(after["map"])
    assert all(row["n_tests"] == 4 for row in mapped)
    rows = {r["test_id"]: r for r in json.loads(run(curated, "params", "--format", "json").stdout)}
    assert len(rows) == 6  # excluded tests stay stored and listed
    assert rows[5]["excluded"] is True and rows[5]["exclusion_reason"] == "valve stuck during test"
    assert rows[5]["excluded_by"] == "r.ingham" and rows[5]["excluded_at"].endswith("UTC")
    assert rows[1]["excluded"] is False and rows[1]["exclusion_reason"] is None
    assert json.loads(run(curated, "campaigns", "--format", "json").stdout)[0]["excluded"] == 2
    assert "EXCLUDED      valve stuck during test" in run(curated, "show", "5").stdout
    back = run(curated, "include", "5", "6", "1")
    assert back.exit_code == 0
    assert "test 5 included again" in back.stdout and "test 1 was not excluded" in back.stdout
    assert snapshot() == before


def test_exclude_refuses_unknown_tests_and_empty_reasons(curated):
    missing = run(curated, "exclude", "5", "77", "--reason", "bad")
    assert missing.exit_code == 1 and "no test 77" in missing.stderr
    assert not any(r["excluded"] for r in json.loads(run(curated, "params", "--format", "json").stdout))
    empty = run(curated, "exclude", "5", "--reason", "  ")
    assert empty.exit_code == 2 and "--reason" in empty.stderr


def test_every_test_excluded_gives_a_clear_message(curated):
    run(curated, "exclude", *[str(i) for i in range(1, 7)], "--reason", "all bad")
    result = run(curated, "verdict")
    assert result.exit_code == 1 and "every fitted test is excluded" in result.stderr
    assert "mapper include" in result.stderr


def test_note_is_kept_with_its_time_and_shown(curated, monkeypatch):
    monkeypatch.setenv("MAPPER_USER", "k.osei")
    result = run(curated, "note", "6", "repeat planned after the valve service")
    assert result.exit_code == 0 and "note added to test 6" in result.stdout
    rows = {r["test_id"]: r for r in json.loads(run(curated, "params", "--format", "json").stdout)}
    note = rows[6]["note"]
    assert note.startswith("after service; repeat planned after the valve service (")
    assert note.endswith("UTC, k.osei)")
    assert "repeat planned" in run(curated, "show", "6").stdout
    assert run(curated, "note", "6", " ").exit_code == 2
    assert run(curated, "note", "99", "text").exit_code == 1


def test_a_store_of_the_first_schema_is_read_and_upgraded_only_when_written(curated):
    with duckdb.connect(str(curated)) as con:  # make it look like a store written before exclusions
        con.execute("DROP TABLE exclusions")
        con.execute("DROP TABLE test_notes")
        con.execute("UPDATE mapper_meta SET value = '1' WHERE key = 'schema_version'")
    read = run(curated, "params", "--format", "json")
    assert read.exit_code == 0 and json.loads(read.stdout)[0]["excluded"] is False
    with duckdb.connect(str(curated), read_only=True) as con:
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert "exclusions" not in tables  # reading changed nothing
    assert run(curated, "exclude", "2", "--reason", "drift").exit_code == 0
    with duckdb.connect(str(curated), read_only=True) as con:
        assert con.execute("SELECT count(*) FROM exclusions").fetchone()[0] == 1
        view = [d[0] for d in con.execute("SELECT * FROM test_params LIMIT 0").description]
    assert view == PUBLIC_VIEW  # the public view keeps its columns exactly


def test_report_opens_the_store_once(one_campaign, tmp_path, monkeypatch):
    from mapper.store import database
    opened = []
    original = database.Store.__init__

    def counting(self, *args, **kwargs):
        opened.append(args)
        original(self, *args, **kwargs)
    monkeypatch.setattr(database.Store, "__init__", counting)
    result = run(one_campaign, "report", "--out", tmp_path / "r.html")
    assert result.exit_code == 0, result.stderr
    assert f"report on campaign '{FIRST}'" in result.stdout
    assert len(opened) == 1
