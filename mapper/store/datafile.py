"""Reading and checking one data file: its three signals, in seconds from the first sample.

A CSV or Parquet file is read through :mod:`mapper.store.readers` and checked; every
refusal names the file, the line and column, and the value seen. Common export habits are
read as they are (semicolon with decimal commas, a byte-order mark, Windows line endings,
a units row, text timestamps in a pattern the campaign file names), and on request rows
with unreadable cells ("Bad", "I/O Timeout", "Comm Fail", blanks) are dropped and counted
instead of refusing the file.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from mapper.constants import MIN_FILE_SAMPLES
from mapper.errors import DataError
from mapper.store.readers import ScannedFile, scan_file, scan_first_text
from mapper.store.segment import Signals

__all__ = ["read_signals", "MAX_MAGNITUDE"]

MAX_MAGNITUDE = 1e12
_NUMERIC_TYPES = ("DOUBLE", "FLOAT", "BIGINT", "INTEGER", "SMALLINT", "TINYINT", "HUGEINT",
                  "UBIGINT", "UINTEGER", "USMALLINT", "UTINYINT", "DECIMAL", "REAL")
_ZONE = re.compile(r"(?:Z|[+-]\d\d:?\d\d)$")
_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d*,\d+([eE][-+]?\d+)?\s*$")


def _file_lines(n: int, offset: int) -> np.ndarray:
    # data row i (0-based) sits on file line i + 2 (header on line 1), after `offset` skipped rows
    return np.arange(n) + 2 + offset


def _to_number(path: Path, column: str, text: np.ndarray, lines: np.ndarray, decimal_comma: bool) -> np.ndarray:
    import pandas as pd  # text columns only: numeric files are read without pandas
    series = pd.Series(text, dtype=object)
    empty = series.isna() | (series.astype(str).str.strip() == "")
    if empty.any():
        i = int(np.flatnonzero(empty.to_numpy())[0])
        raise DataError(f"{path}: empty cell in column '{column}' at line {lines[i]}",
                        hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    cleaned = series.astype(str).str.strip()
    if decimal_comma:
        cleaned = cleaned.str.replace(",", ".", regex=False)
    numbers = pd.to_numeric(cleaned, errors="coerce")
    bad = numbers.isna().to_numpy()
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(
            f"{path}: text '{series.iloc[i]}' in numeric column '{column}' at line {lines[i]}",
            hint="the column must hold numbers only; remove status words such as 'Bad' from the data, "
                 "or import with --drop-bad-rows to drop such rows (counted and flagged)")
    return numbers.to_numpy(dtype=float)


def _check_finite(path: Path, column: str, values: np.ndarray, lines: np.ndarray) -> None:
    bad = ~np.isfinite(values)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(f"{path}: non-finite value {values[i]} in column '{column}' at line "
                        f"{lines[i]}", hint="remove the rows where the logger wrote NaN or inf")
    huge = np.abs(values) > MAX_MAGNITUDE
    if huge.any():
        i = int(np.flatnonzero(huge)[0])
        raise DataError(f"{path}: implausible value {values[i]:g} in column '{column}' at line "
                        f"{lines[i]}", hint="check the column; values beyond 1e12 are refused")


def _parse_time(path: Path, column: str, raw: np.ndarray, kind: str, seconds_per_unit: float,
                lines: np.ndarray, decimal_comma: bool = False,
                time_format: str | None = None) -> tuple[np.ndarray, str | None, str | None]:
    """Seconds from the first sample, the first timestamp as text, and its zone."""
    if any(kind.startswith(t) for t in _NUMERIC_TYPES) and not np.issubdtype(np.asarray(raw).dtype, np.datetime64):
        values: np.ndarray = np.ma.filled(np.ma.asarray(raw, dtype=float), np.nan)
        _check_finite(path, column, values, lines)
        return (values - values[0]) * seconds_per_unit, None, None
    import pandas as pd  # timestamps and text: numeric time is read without pandas
    if kind.startswith("TIMESTAMP") or np.issubdtype(np.asarray(raw).dtype, np.datetime64):
        stamps = pd.to_datetime(pd.Series(raw), utc=("TIME ZONE" in kind))
        if stamps.isna().any():
            i = int(np.flatnonzero(stamps.isna().to_numpy())[0])
            raise DataError(f"{path}: empty timestamp in column '{column}' at line {lines[i]}",
                            hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    elif time_format:  # text timestamps in the pattern the campaign file names
        text = pd.Series(raw, dtype=object).astype(str).str.strip()
        stamps = pd.to_datetime(text, format=time_format, errors="coerce",
                                utc=("%z" in time_format or "%Z" in time_format))
        if stamps.isna().any():
            i = int(np.flatnonzero(stamps.isna().to_numpy())[0])
            raise DataError(
                f"{path}: time '{text.iloc[i]}' in column '{column}' at line {lines[i]} does not "
                f"match time_format '{time_format}'",
                hint="correct [columns] time_format in campaign.toml (strftime codes, e.g. "
                     "\"%d.%m.%Y %H:%M:%S\") or the row")
    else:  # text: numbers written oddly, or ISO-8601 timestamps
        text = pd.Series(raw, dtype=object).astype(str).str.strip()
        numbers = pd.to_numeric(text.str.replace(",", ".", regex=False) if decimal_comma else text,
                                errors="coerce")
        if not numbers.isna().any():
            values = numbers.to_numpy(dtype=float)
            _check_finite(path, column, values, lines)
            return (values - values[0]) * seconds_per_unit, None, None
        zoned = text.str.contains(_ZONE)
        try:
            stamps = pd.to_datetime(text, format="ISO8601", utc=bool(zoned.any()), errors="coerce")
        except (ValueError, TypeError):
            stamps = pd.Series(pd.NaT, index=text.index)
        if stamps.isna().any():
            i = int(np.flatnonzero(stamps.isna().to_numpy())[0])
            raise DataError(
                f"{path}: cannot read time '{text.iloc[i]}' in column '{column}' at line {lines[i]}",
                hint="use ISO-8601 timestamps (2026-03-04T10:15:00, optionally with +01:00 or Z), "
                     "numeric time in seconds, or name the pattern with [columns] time_format")
    ns = stamps.dt.tz_convert("UTC").dt.tz_localize(None) if stamps.dt.tz is not None else stamps
    nanoseconds = ns.to_numpy(dtype="datetime64[ns]").astype(np.int64)
    seconds = (nanoseconds - nanoseconds[0]) / 1e9
    first = stamps.iloc[0]
    zone = str(first.tzinfo) if first.tzinfo is not None else None
    if kind.startswith("VARCHAR") or not kind.startswith("TIMESTAMP"):
        written = _ZONE.search(str(raw[0]).strip())  # keep the zone as the file wrote it
        zone = written.group(0) if written else zone
    return seconds, first.isoformat(), zone


def read_signals(path: Path, time_column: str, input_column: str, output_column: str,
                 seconds_per_unit: float = 1.0, *, scanned: ScannedFile | None = None,
                 time_format: str | None = None, drop_bad_rows: bool = False) -> Signals:
    """Read and check the three signals of a data file.

    Common export quirks are read, not refused: a semicolon delimiter with decimal commas,
    a byte-order mark, Windows line endings, and a units row under the header (recognised
    when the first data row holds text in the input or output column and every later row
    holds numbers there).

    Parameters
    ----------
    path : Path
        CSV or Parquet file.
    time_column, input_column, output_column : str
        Column names as written in the header.
    seconds_per_unit : float, default 1.0
        Seconds per unit of a numeric time column.
    scanned : ScannedFile, optional
        Columns already read in a batch.
    time_format : str, optional
        strftime pattern of text timestamps (``[columns] time_format``), e.g.
        ``"%d.%m.%Y %H:%M:%S"``; default: numbers or ISO-8601.
    drop_bad_rows : bool, default False
        Drop rows whose input or output cell is not a finite number ("Bad", "I/O Timeout",
        "Comm Fail", blank) or whose time cell is blank, instead of refusing the file; the
        count is kept in :attr:`Signals.dropped_rows` and the flag ``bad_rows_dropped``.

    Raises
    ------
    DataError
        Naming the file, the line and column, and the value seen.
    """
    if not path.is_file():
        raise DataError(f"{path}: file not found", hint="check the path")
    if path.stat().st_size == 0:
        raise DataError(f"{path}: the file is empty", hint="export the test again")
    columns = (time_column, input_column, output_column)
    if scanned is None:
        scanned = scan_file(path, columns)
    kinds = {c: scanned.types[c].upper() for c in columns}
    flags: list[str] = []
    offset = 0
    parquet = path.suffix.lower() in (".parquet", ".pq")
    numeric = all(any(kinds[c].startswith(t) for t in _NUMERIC_TYPES) for c in (input_column, output_column))
    masked = any(np.ma.is_masked(scanned.values[c]) for c in columns)
    text_time = bool(time_format) and not parquet  # the pattern reads the time as written
    if numeric and not masked and not text_time:
        u = np.asarray(scanned.values[input_column], dtype=float)
        y = np.asarray(scanned.values[output_column], dtype=float)
        raw_time = scanned.values[time_column]
        # with another delimiter a comma in a text time column can only be a decimal comma
        decimal_comma = (kinds[time_column].startswith("VARCHAR")
                         and (scanned.sniff_delimiter() or ",") != ",")
        lines = _file_lines(len(u), offset)
    else:
        text = scan_file(path, columns, as_text=True)
        values = {c: _as_objects(text.values[c]) for c in columns}
        n = len(values[input_column])
        if n == 0:
            raise DataError(f"{path}: header only, no data rows", hint="export the test again")
        # look well past the first rows: an export may start on whole numbers ("50;20")
        decimal_comma = (scanned.sniff_delimiter() or ",") != "," and any(
            bool(_DECIMAL_COMMA.match(str(v))) for c in columns for v in values[c][:500])
        if n > 2 and _looks_like_units_row(values, (input_column, output_column), decimal_comma):
            values = {c: v[1:] for c, v in values.items()}
            offset = 1
            flags.append("units_row_skipped")
        lines = _file_lines(len(values[input_column]), offset)
        if parquet:  # typed columns: keep the time's own type
            values[time_column] = scanned.values[time_column][offset:]
        else:
            kinds[time_column] = "VARCHAR"
        if drop_bad_rows:
            keep = _readable_rows(values, (input_column, output_column), time_column, decimal_comma)
            values = {c: v[keep] for c, v in values.items()}
            lines = lines[keep]
        u = _to_number(path, input_column, values[input_column], lines, decimal_comma)
        y = _to_number(path, output_column, values[output_column], lines, decimal_comma)
        raw_time = values[time_column]
        if not parquet:
            blank = [i for i, v in enumerate(raw_time) if v is None or not str(v).strip()]
            if blank:
                raise DataError(f"{path}: empty cell in column '{time_column}' at line "
                                f"{lines[blank[0]]}",
                                hint="fill or remove the incomplete rows; gaps in a log must not be blank "
                                     "cells (or import with --drop-bad-rows)")
    if drop_bad_rows:  # non-finite numbers too (a typed column may hold NaN)
        keep = np.isfinite(u) & np.isfinite(y) & ~np.ma.getmaskarray(raw_time)
        u, y, raw_time, lines = u[keep], y[keep], raw_time[keep], lines[keep]
    dropped = _count_rows(path, scanned) - offset - len(u) if drop_bad_rows else 0
    if dropped:
        flags.append("bad_rows_dropped")
    n = len(u)
    if n == 0:
        what = f"no data rows left after dropping {dropped} bad rows" if dropped else "header only, no data rows"
        raise DataError(f"{path}: {what}", hint="export the test again")
    _check_finite(path, input_column, u, lines)
    _check_finite(path, output_column, y, lines)
    if np.ma.is_masked(raw_time):
        i = int(np.flatnonzero(np.ma.getmaskarray(raw_time))[0])
        raise DataError(f"{path}: empty cell in column '{time_column}' at line {lines[i]}",
                        hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    raw_time = np.ma.getdata(raw_time) if np.ma.isMaskedArray(raw_time) else raw_time
    t, start_time, zone = _parse_time(path, time_column, raw_time, kinds[time_column],
                                      seconds_per_unit, lines, decimal_comma, time_format)
    if kinds[time_column].startswith("TIMESTAMP WITH TIME ZONE"):
        written = scan_first_text(path, time_column)
        match = _ZONE.search(written or "")
        zone = match.group(0) if match else "UTC"
    _check_time(path, time_column, t, lines)
    if n < MIN_FILE_SAMPLES:
        kept = f" after dropping {dropped} bad rows" if dropped else ""
        raise DataError(f"{path}: only {n} samples{kept}; at least {MIN_FILE_SAMPLES} are needed to hold a step",
                        hint="log faster or longer around the step")
    if np.ptp(u) == 0:
        raise DataError(f"{path}: the input '{input_column}' never moves (constant {u[0]:g})",
                        hint="check that the stepped variable is named as input")
    if np.ptp(y) == 0:
        raise DataError(f"{path}: the output '{output_column}' never changes (constant {y[0]:g})",
                        hint="check the output column and that the logger recorded it")
    return Signals(t=t, u=u, y=y, start_time=start_time, time_zone=zone, flags=tuple(flags),
                   dropped_rows=dropped)


def _count_rows(path: Path, scanned: ScannedFile) -> int:
    return len(next(iter(scanned.values.values())))


def _readable_rows(values: dict, numeric: Sequence[str], time_column: str, decimal_comma: bool) -> np.ndarray:
    """Rows whose numeric cells hold finite numbers and whose time cell is not blank."""
    import pandas as pd  # only for files with unreadable cells
    keep = np.ones(len(values[time_column]), dtype=bool)
    for column in numeric:
        cleaned = pd.Series(values[column], dtype=object).astype(str).str.strip()
        if decimal_comma:
            cleaned = cleaned.str.replace(",", ".", regex=False)
        numbers = pd.to_numeric(cleaned, errors="coerce").to_numpy(dtype=float)
        keep &= np.isfinite(numbers) & np.array([v is not None for v in values[column]])
    keep &= np.array([v is not None and bool(str(v).strip()) for v in values[time_column]])
    return keep


def _as_objects(values) -> np.ndarray:
    # a null read from a typed (Parquet) column arrives masked; keep it as None, never its
    # placeholder value, so that it is refused as an empty cell
    data = np.array(np.ma.getdata(values), dtype=object)
    if np.ma.is_masked(values):
        data[np.ma.getmaskarray(values)] = None
    return data


def _looks_like_units_row(values: dict, columns: Sequence[str], decimal_comma: bool) -> bool:
    def numeric(text) -> bool:
        text = str(text).strip()
        if decimal_comma:
            text = text.replace(",", ".")
        try:
            float(text)
            return True
        except ValueError:
            return False
    first = [numeric(values[c][0]) for c in columns]
    rest = [all(numeric(v) for v in values[c][1:50]) for c in columns]
    return not any(first) and all(rest)


def _check_time(path: Path, column: str, t: np.ndarray, lines: np.ndarray) -> None:
    steps = np.diff(t)
    bad = steps <= 0
    if bad.any():
        i = int(np.flatnonzero(bad)[0]) + 1
        what = "repeats" if steps[i - 1] == 0 else "goes backwards"
        raise DataError(
            f"{path}: time {what} in column '{column}' at line {lines[i]} "
            f"({t[i - 1]:g} s then {t[i]:g} s from the start)",
            hint="sort the rows by time and remove duplicated samples")
