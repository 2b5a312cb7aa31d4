"""Import through the `mapper` command line (in-process, and once as the installed command): counts,
idempotence, the view, bad input."""

from __future__ import annotations

import json
import os
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from conftest import run_mapper, write_campaign, write_step_csv
from mapper.store.ingest import read_signals
from mapper.columns import TEST_PARAMS_NAMES
from mapper.store.database import Store


def stored(db: Path) -> list[tuple]:
    with duckdb.connect(str(db), read_only=True) as con:
        return con.execute("SELECT test_id, file, level FROM test_params ORDER BY test_id").fetchall()


def test_import_then_reimport_is_idempotent(tmp_path, small_campaign):
    db = tmp_path / "store.duckdb"
    first = run_mapper("import", small_campaign, db=db, real_process=True)  # the installed command
    assert first.returncode == 0, first.stderr
    assert "imported 4 file(s) as 4 test(s)" in first.stdout
    again = run_mapper("import", small_campaign, db=db)
    assert again.returncode == 0
    assert "already stored 4" in again.stdout
    assert len(stored(db)) == 4


def test_view_has_every_public_column_and_plain_client_can_query(tmp_path, small_campaign):
    db = tmp_path / "store.duckdb"
    assert run_mapper("import", small_campaign, db=db).returncode == 0
    with duckdb.connect(str(db), read_only=True) as con:
        columns = [r[0] for r in con.execute("DESCRIBE test_params").fetchall()]
        levels = con.execute("SELECT level, direction FROM test_params ORDER BY test_id").fetchall()
        samples = con.execute("SELECT count(*) FROM samples").fetchone()[0]
        version = con.execute("SELECT value FROM mapper_meta WHERE key='schema_version'").fetchone()[0]
    assert columns == list(TEST_PARAMS_NAMES)
    assert [lv for lv, _ in levels] == [30.0, 30.0, 60.0, 60.0]  # campaign file wins
    assert [d for _, d in levels] == ["up", "down", "up", "down"]
    assert samples == 4 * 200
    assert version == "2"  # exclusions and notes (issue 15)


def test_params_json_and_filters(tmp_path, small_campaign):
    db = tmp_path / "store.duckdb"
    run_mapper("import", small_campaign, db=db)
    out = run_mapper("params", "--format", "json", "--level-min", "50", "--direction", "down", db=db)
    assert out.returncode == 0, out.stderr
    rows = json.loads(out.stdout)
    assert len(rows) == 1 and rows[0]["level"] == 60.0 and rows[0]["direction"] == "down"
    # the view's columns, plus the curation columns and the units object (issue 15)
    assert set(rows[0]) - set(TEST_PARAMS_NAMES) <= {"excluded", "exclusion_reason", "excluded_by",
                                                     "excluded_at", "note", "units"}
    assert set(TEST_PARAMS_NAMES) <= set(rows[0]) and rows[0]["units"]["gain"] == "cm/%"
    assert rows[0]["gain"] is None  # not fitted yet
    csv_out = run_mapper("params", "--format", "csv", db=db)
    assert csv_out.stdout.splitlines()[0].split(",")[:len(TEST_PARAMS_NAMES)] == list(TEST_PARAMS_NAMES)


def test_loose_files_with_columns(tmp_path):
    a = write_step_csv(tmp_path / "a.csv", columns=("time", "u", "y"))
    b = write_step_csv(tmp_path / "b.csv", columns=("time", "u", "y"), seed=3)
    db = tmp_path / "s.duckdb"
    out = run_mapper("import", a, b, "--time", "time", "--input", "u", "--output", "y",
                     "--level", "12.5", "--campaign", "bench rig", db=db)
    assert out.returncode == 0, out.stderr
    rows = stored(db)
    assert len(rows) == 2 and all(level == 12.5 for _, _, level in rows)
    missing = run_mapper("import", a, db=tmp_path / "t.duckdb")
    assert missing.returncode == 1 and "--time" in missing.stderr


def test_iso_timestamps_match_pandas(tmp_path):
    """Time parsing checked against pandas' own ISO-8601 parser as the reference."""
    start = pd.Timestamp("2026-03-04T10:15:00+01:00")
    stamps = [start + pd.Timedelta(seconds=0.5 * i) for i in range(120)]
    u = np.where(np.arange(120) >= 30, 1.0, 0.0)
    y = np.convolve(u, np.ones(5) / 5)[:120] + 3
    path = tmp_path / "zoned.csv"
    pd.DataFrame({"when": [s.isoformat() for s in stamps], "u": u, "y": y}).to_csv(path, index=False)
    signals = read_signals(path, "when", "u", "y")
    reference = pd.to_datetime(pd.Series([s.isoformat() for s in stamps]), format="ISO8601", utc=True)
    expected = (reference - reference.iloc[0]).dt.total_seconds().to_numpy()
    np.testing.assert_allclose(signals.t, expected, atol=1e-9)
    assert signals.time_zone == "+01:00"
    naive = tmp_path / "naive.csv"
    pd.DataFrame({"when": [s.tz_localize(None).isoformat(sep=" ") for s in stamps], "u": u, "y": y}).to_csv(naive, index=False)
    np.testing.assert_allclose(read_signals(naive, "when", "u", "y").t, expected, atol=1e-9)


def test_numeric_time_in_minutes_and_parquet(tmp_path):
    frame = pd.read_csv(write_step_csv(tmp_path / "x.csv"))
    frame["t_s"] = frame["t_s"] / 60.0
    frame.to_parquet(tmp_path / "x.parquet")
    signals = read_signals(tmp_path / "x.parquet", "t_s", "valve_pct", "level_cm", seconds_per_unit=60.0)
    np.testing.assert_allclose(signals.t[:3], [0.0, 1.0, 2.0], atol=1e-9)


# -- bad input: each refused with the culprit named, the store unchanged ------------------
def _bad_data(folder: Path, text: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "bad.csv").write_text(text)
    return folder / "bad.csv"


def _steps(n=40, bad_line=None, bad="x"):
    lines = ["t_s,valve_pct,level_cm"]
    for i in range(n):
        row = f"{i},{50 if i < 10 else 60},{20 + (0 if i < 12 else 5)}"
        if bad_line is not None and i == bad_line:
            row = bad
        lines.append(row)
    return "\n".join(lines) + "\n"


BAD_FILES = {
    "empty file": ("", "empty"),
    "header only": ("t_s,valve_pct,level_cm\n", "no data rows"),
    "missing column": ("t_s,valve,level_cm\n" + "\n".join(f"{i},1,{i}" for i in range(30)), "columns present: t_s, valve, level_cm"),
    "text in numeric column": (_steps(bad_line=20, bad="20,sixty,25"), "'sixty' in numeric column 'valve_pct' at line 22"),
    "empty cell": (_steps(bad_line=15, bad="15,,25"), "empty cell in column 'valve_pct' at line 17"),
    "non-finite value": (_steps(bad_line=25, bad="25,60,inf"), "non-finite value inf in column 'level_cm' at line 27"),
    "time repeats": (_steps(bad_line=5, bad="4,50,20"), "time repeats"),
    "time goes backwards": (_steps(bad_line=5, bad="2,50,20"), "time goes backwards"),
    "too few samples": (_steps(n=12), "only 12 samples"),
    "input never moves": ("t_s,valve_pct,level_cm\n" + "\n".join(f"{i},50,{i % 3}" for i in range(40)), "never moves"),
    "unparsable timestamp": ("when,valve_pct,level_cm\n" + "\n".join(
        f"2026-01-01T00:00:{i:02d},{50 if i < 10 else 60},{20 + (i > 12)}" for i in range(30)) + "\nyesterday,60,21\n",
        "cannot read time 'yesterday'"),
}


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_data_file_refused_and_store_unchanged(tmp_path, small_campaign, case):
    db = tmp_path / "store.duckdb"
    assert run_mapper("import", small_campaign, db=db).returncode == 0
    before = stored(db)
    text, expected = BAD_FILES[case]
    folder = tmp_path / "bad"
    _bad_data(folder, text)
    time_column = "when" if "timestamp" in case else "t_s"
    result = run_mapper("import", folder / "bad.csv", "--time", time_column, "--input", "valve_pct",
                        "--output", "level_cm", db=db)
    assert result.returncode == 1
    assert "bad.csv" in result.stdout + result.stderr
    assert expected in result.stdout + result.stderr
    assert "Traceback" not in result.stderr
    assert stored(db) == before


def test_good_files_still_stored_when_one_is_refused(tmp_path):
    folder = write_campaign(tmp_path / "c", [dict(level=10.0), dict(level=20.0)])
    (folder / "broken.csv").write_text(_steps(bad_line=20, bad="20,sixty,25"))
    with (folder / "campaign.toml").open("a") as handle:
        handle.write('\n[[tests]]\nfile = "broken.csv"\n')
    db = tmp_path / "s.duckdb"
    result = run_mapper("import", folder, db=db)
    assert result.returncode == 1
    assert "imported 2 file(s)" in result.stdout and "refused 1" in result.stdout
    assert len(stored(db)) == 2


CAMPAIGN_FAULTS = {
    "syntax error": ('name = "x\n[columns]\n', "TOML syntax error"),
    "missing columns section": ('name = "x"\n[[tests]]\nfile = "step_0.csv"\n', "missing required section [columns]"),
    "missing name": ('[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "step_0.csv"\n', "missing required key 'name'"),
    "unknown key": ('name = "x"\n[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "step_0.csv"\nlevle = 3\n', "did you mean 'level'?"),
    "wrong type": ('name = "x"\n[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "step_0.csv"\nlevel = "forty"\n', "level must be a number, found 'forty'"),
    "missing file": ('name = "x"\n[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "nope.csv"\n', "'nope.csv' does not exist"),
    "dot-dot path": ('name = "x"\n[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "../outside.csv"\n', "leaves the campaign folder"),
    "absolute path": ('name = "x"\n[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "/etc/hostname"\n', "absolute path"),
    "link pointing out": ('name = "x"\n[columns]\ntime="t_s"\ninput="valve_pct"\noutput="level_cm"\n[[tests]]\nfile = "link.csv"\n', "leaves the campaign folder"),
}


@pytest.mark.parametrize("case", sorted(CAMPAIGN_FAULTS))
def test_bad_campaign_file_refused_and_nothing_stored(tmp_path, small_campaign, case):
    db = tmp_path / "store.duckdb"
    assert run_mapper("import", small_campaign, db=db).returncode == 0
    before = stored(db)
    folder = tmp_path / "faulty"
    folder.mkdir()
    write_step_csv(folder / "step_0.csv")
    write_step_csv(tmp_path / "outside.csv")
    os.symlink(tmp_path / "outside.csv", folder / "link.csv")
    text, expected = CAMPAIGN_FAULTS[case]
    (folder / "campaign.toml").write_text(text)
    result = run_mapper("import", folder, db=db)
    assert result.returncode == 1
    assert "campaign.toml" in result.stderr
    assert expected in result.stderr
    assert "Traceback" not in result.stderr
    assert stored(db) == before


def test_foreign_file_as_store_is_refused_and_untouched(tmp_path, small_campaign):
    foreign = tmp_path / "notes.duckdb"
    foreign.write_bytes(b"these are my notes, not a database\n" * 10)
    before = foreign.read_bytes()
    result = run_mapper("import", small_campaign, db=foreign)
    assert result.returncode == 1 and "not a mapper store" in result.stderr
    assert foreign.read_bytes() == before
    other = tmp_path / "other.duckdb"
    with duckdb.connect(str(other)) as con:
        con.execute("CREATE TABLE readings (x DOUBLE)")
    other_before = other.read_bytes()
    result = run_mapper("import", small_campaign, db=other)
    assert result.returncode == 1 and "not a mapper store" in result.stderr
    assert other.read_bytes() == other_before


def test_store_in_missing_folder_refused(tmp_path, small_campaign):
    result = run_mapper("import", small_campaign, db=tmp_path / "nowhere" / "s.duckdb")
    assert result.returncode == 1 and "does not exist" in result.stderr
    assert not (tmp_path / "nowhere").exists()


def test_store_path_from_environment(tmp_path, small_campaign):
    db = tmp_path / "env.duckdb"
    result = run_mapper("import", small_campaign, env={"MAPPER_DB": str(db)}, cwd=tmp_path)
    assert result.returncode == 0 and db.exists()
    with Store(db, read_only=True) as store:
        assert store.counts()["tests"] == 4


def test_wrong_usage_exits_2(tmp_path):
    assert run_mapper("params", "--direction", "sideways", db=tmp_path / "x.duckdb").returncode == 2
    assert run_mapper("no-such-command", real_process=True).returncode == 2
