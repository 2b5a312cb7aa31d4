"""Import options for field exports: `[columns] time_format` and dropping bad rows (issue 18 item 7).

Both through the real entry point (`mapper import`), asserting exit status, the message a
person reads, and what the store holds.
"""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

from conftest import run_mapper
from mapper.store.database import Store
from mapper.store.ingest import import_sources

STEP_AT = 60  # s
PATTERN = "%d.%m.%Y %H:%M:%S"  # day first, as European exports write it


def _frame(n: int = 240) -> pd.DataFrame:
    t = np.arange(n, dtype=float)
    u = np.where(t >= STEP_AT, 60.0, 40.0)
    y = 20.0 + 1.5 * (u - 40.0) * np.where(t >= STEP_AT + 4, 1 - np.exp(-(t - STEP_AT - 4).clip(0) / 25.0), 0)
    y = y + np.random.default_rng(4).normal(0, 0.02, n)
    return pd.DataFrame({"t": t, "valve_pct": u, "temp_c": np.round(y, 3)})


def _campaign(folder: Path, frame: pd.DataFrame, columns_extra: str = "") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / "log.csv", index=False)
    (folder / "campaign.toml").write_text(
        f'name = "field export"\n[columns]\ntime = "time"\ninput = "valve_pct"\noutput = "temp_c"\n'
        f'{columns_extra}[[tests]]\nfile = "log.csv"\n', encoding="utf-8")
    return folder


def _european(frame: pd.DataFrame) -> pd.DataFrame:
    # 1 March 2026 06:59:30 onwards: the day-first dates cross an hour, with days below 13
    # so that a month-first reading would give other (wrong) instants
    start = datetime(2026, 3, 1, 6, 59, 30)
    stamps = [(pd.Timestamp(start) + pd.Timedelta(seconds=s)).strftime(PATTERN) for s in frame["t"]]
    return frame.drop(columns="t").assign(time=stamps)[["time", "valve_pct", "temp_c"]]


def test_time_format_reads_day_first_timestamps(tmp_path):
    frame = _european(_frame())
    folder = _campaign(tmp_path / "c", frame, f'time_format = "{PATTERN}"\n')
    db = tmp_path / "s.duckdb"
    result = run_mapper("import", folder, db=db)
    assert result.returncode == 0, result.stderr
    with Store(db, read_only=True) as store:
        (test_id,) = store.test_ids()
        t, u, _ = store.samples(test_id)
        start_time, period = store.connection.execute("SELECT start_time, period FROM tests").fetchone()
    # reference: Python's own strptime of the same text
    seconds = [(datetime.strptime(s, PATTERN) - datetime.strptime(frame["time"][0], PATTERN)).total_seconds()
               for s in frame["time"]]
    np.testing.assert_allclose(t, seconds)
    assert period == 1.0 and start_time.startswith("2026-03-01T06:59:30")
    assert t[np.argmax(u > 50)] == STEP_AT


def test_time_format_decides_what_a_guess_would_get_wrong(tmp_path):
    # two-digit year and a 12-hour clock, day first: a reader left to guess can take
    # "01.03.26" for 26 March 2001 or 3 January; the named pattern reads 1 March 2026
    pattern = "%d.%m.%y %I:%M:%S %p"
    frame = _frame()
    start = datetime(2026, 3, 1, 11, 59, 0)  # crosses noon: AM to PM
    stamps = [(pd.Timestamp(start) + pd.Timedelta(seconds=s)).strftime(pattern) for s in frame["t"]]
    frame = frame.drop(columns="t").assign(time=stamps)
    folder = _campaign(tmp_path / "c", frame, f'time_format = "{pattern}"\n')
    db = tmp_path / "s.duckdb"
    result = run_mapper("import", folder, db=db)
    assert result.returncode == 0, result.stderr
    with Store(db, read_only=True) as store:
        t, _, _ = store.samples(store.test_ids()[0])
        (start_time,) = store.connection.execute("SELECT start_time FROM tests").fetchone()
    assert start_time.startswith("2026-03-01T11:59:00")
    np.testing.assert_allclose(t, frame.index.to_numpy(dtype=float))  # one second a row, across noon


def test_time_format_errors_name_the_pattern_and_the_line(tmp_path):
    frame = _european(_frame())
    codes = _campaign(tmp_path / "codes", frame, 'time_format = "dd.mm.yyyy"\n')
    result = run_mapper("import", codes, db=tmp_path / "a.duckdb")
    assert result.returncode == 1 and "time_format 'dd.mm.yyyy' holds no time codes" in result.stderr
    frame.loc[100, "time"] = "2026-03-01 07:01:10"  # one row written another way
    mixed = _campaign(tmp_path / "mixed", frame, f'time_format = "{PATTERN}"\n')
    result = run_mapper("import", mixed, db=tmp_path / "b.duckdb")
    assert result.returncode == 1
    assert "line 102" in result.stderr and "does not match time_format" in result.stderr


def _with_bad_cells(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.astype({"temp_c": object, "valve_pct": object})
    frame.loc[30, "temp_c"] = "Bad"
    frame.loc[95, "temp_c"] = "I/O Timeout"
    frame.loc[150, "valve_pct"] = "Comm Fail"
    frame.loc[200, "temp_c"] = ""
    return frame.rename(columns={"t": "time"})


def test_bad_cells_refuse_the_file_unless_dropped(tmp_path):
    folder = _campaign(tmp_path / "c", _with_bad_cells(_frame()))
    db = tmp_path / "s.duckdb"
    refused = run_mapper("import", folder, db=db)
    assert refused.returncode == 1
    assert "'Comm Fail'" in refused.stderr and "line 152" in refused.stderr
    assert "--drop-bad-rows" in refused.stderr  # the way out, named
    dropped = run_mapper("import", folder, "--drop-bad-rows", db=db)
    assert dropped.returncode == 0, dropped.stderr
    assert "log.csv: 4 row(s) with unreadable cells dropped" in dropped.stdout
    listing = run_mapper("params", "--format", "json", db=db)
    parsed = json.loads(listing.stdout)
    (row,) = parsed if isinstance(parsed, list) else parsed["rows"]  # bare list, or with units
    assert "bad_rows_dropped" in row["flags"]
    with Store(db, read_only=True) as store:
        t, u, y = store.samples(store.test_ids()[0])
    # the gaps left by the dropped rows are filled on the uniform grid, never with text
    assert np.all(np.isfinite(y)) and np.allclose(np.diff(t), 1.0) and t[-1] == 239


def test_drop_bad_rows_as_a_library_option(tmp_path):
    folder = _campaign(tmp_path / "c", _with_bad_cells(_frame()))
    with Store(tmp_path / "s.duckdb") as store:
        summary = import_sources(store, [folder], drop_bad_rows=True)
        flags = store.connection.execute("SELECT import_flags FROM tests").fetchone()[0]
    assert summary.ok and summary.rows_dropped == 4
    assert "bad_rows_dropped" in flags
