"""Bringing data in: reading and checking files, time handling, uniform grids, splitting.

A data file (CSV or Parquet) is read through the store's DuckDB reader, checked (every
refusal names the file, the row and column and the value seen), its time converted to
seconds, put on a uniform grid when the samples are irregular, and cut into one
:class:`TestWindow` per input move. :func:`import_sources` stores each file whole or not
at all, skips files whose content is already stored, and returns a summary.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from mapper.constants import MIN_FILE_SAMPLES
from mapper.errors import CampaignFileError, DataError, MapperError
from mapper.store.campaign import Campaign, TestEntry, load_campaign
from mapper.store.database import Store
from mapper.store.readers import ScannedFile, scan_file, scan_first_text, scan_many
from mapper.store.segment import Signals, split_signals

MAX_MAGNITUDE = 1e12
_NUMERIC_TYPES = ("DOUBLE", "FLOAT", "BIGINT", "INTEGER", "SMALLINT", "TINYINT", "HUGEINT",
                  "UBIGINT", "UINTEGER", "USMALLINT", "UTINYINT", "DECIMAL", "REAL")
_ZONE = re.compile(r"(?:Z|[+-]\d\d:?\d\d)$")
_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d*,\d+([eE][-+]?\d+)?\s*$")


@dataclass(frozen=True)
class TestWindow:
    """One test ready to store: a window of a file on a uniform time grid."""

    file: str
    source_path: Path
    source_hash: str
    window_index: int
    window_start: float
    window_end: float
    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    period: float
    input_step: float
    direction: str
    level_estimate: float
    level_given: float | None = None
    note: str = ""
    start_time: str | None = None
    time_zone: str | None = None
    flags: tuple[str, ...] = ()


@dataclass
class FileOutcome:
    file: str
    status: str  # "imported", "already stored" or "refused"
    tests: int = 0
    message: str = ""


@dataclass
class ImportSummary:
    """What an import did, file by file."""

    outcomes: list[FileOutcome] = field(default_factory=list)

    def count(self, status: str) -> int:
        return sum(1 for o in self.outcomes if o.status == status)

    @property
    def tests_imported(self) -> int:
        return sum(o.tests for o in self.outcomes if o.status == "imported")

    @property
    def ok(self) -> bool:
        return self.count("refused") == 0

    def lines(self) -> list[str]:
        text = [f"imported {self.count('imported')} file(s) as {self.tests_imported} test(s); "
                f"already stored {self.count('already stored')}; refused {self.count('refused')}"]
        for o in self.outcomes:
            if o.status == "imported" and o.tests > 1:
                text.append(f"  {o.file}: {o.tests} input moves, one test each")
        return text

    def refusals(self) -> list[str]:
        """One message per refused file (what, where, the value seen, and a hint)."""
        return [o.message for o in self.outcomes if o.status == "refused"]


# -- reading ------------------------------------------------------------------------------
def file_hash(path: Path, settings: dict) -> str:
    """Content hash of a file together with the settings that shape its tests."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    digest.update(json.dumps(settings, sort_keys=True).encode())
    return digest.hexdigest()


def _line(index: int, offset: int) -> int:
    # data row `index` (0-based) sits on file line index + 2 (header on line 1)
    return index + 2 + offset


def _to_number(path: Path, column: str, text: np.ndarray, offset: int, decimal_comma: bool) -> np.ndarray:
    series = pd.Series(text, dtype=object)
    empty = series.isna() | (series.astype(str).str.strip() == "")
    if empty.any():
        i = int(np.flatnonzero(empty.to_numpy())[0])
        raise DataError(f"{path}: empty cell in column '{column}' at line {_line(i, offset)}",
                        hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    cleaned = series.astype(str).str.strip()
    if decimal_comma:
        cleaned = cleaned.str.replace(",", ".", regex=False)
    numbers = pd.to_numeric(cleaned, errors="coerce")
    bad = numbers.isna().to_numpy()
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(
            f"{path}: text '{series.iloc[i]}' in numeric column '{column}' at line {_line(i, offset)}",
            hint="the column must hold numbers only; remove comments or status words from the data")
    return numbers.to_numpy(dtype=float)


def _check_finite(path: Path, column: str, values: np.ndarray, offset: int) -> None:
    bad = ~np.isfinite(values)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(f"{path}: non-finite value {values[i]} in column '{column}' at line "
                        f"{_line(i, offset)}", hint="remove the rows where the logger wrote NaN or inf")
    huge = np.abs(values) > MAX_MAGNITUDE
    if huge.any():
        i = int(np.flatnonzero(huge)[0])
        raise DataError(f"{path}: implausible value {values[i]:g} in column '{column}' at line "
                        f"{_line(i, offset)}", hint="check the column; values beyond 1e12 are refused")


def _parse_time(path: Path, column: str, raw: np.ndarray, kind: str, seconds_per_unit: float,
                offset: int, decimal_comma: bool = False) -> tuple[np.ndarray, str | None, str | None]:
    """Seconds from the first sample, the first timestamp as text, and its zone."""
    if kind.startswith("TIMESTAMP") or np.issubdtype(np.asarray(raw).dtype, np.datetime64):
        stamps = pd.to_datetime(pd.Series(raw), utc=("TIME ZONE" in kind))
        if stamps.isna().any():
            i = int(np.flatnonzero(stamps.isna().to_numpy())[0])
            raise DataError(f"{path}: empty timestamp in column '{column}' at line {_line(i, offset)}",
                            hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    elif any(kind.startswith(t) for t in _NUMERIC_TYPES):
        values: np.ndarray = np.ma.filled(np.ma.asarray(raw, dtype=float), np.nan)
        _check_finite(path, column, values, offset)
        return (values - values[0]) * seconds_per_unit, None, None
    else:  # text: numbers written oddly, or ISO-8601 timestamps
        text = pd.Series(raw, dtype=object).astype(str).str.strip()
        numbers = pd.to_numeric(text.str.replace(",", ".", regex=False) if decimal_comma else text,
                                errors="coerce")
        if not numbers.isna().any():
            values = numbers.to_numpy(dtype=float)
            _check_finite(path, column, values, offset)
            return (values - values[0]) * seconds_per_unit, None, None
        zoned = text.str.contains(_ZONE)
        try:
            stamps = pd.to_datetime(text, format="ISO8601", utc=bool(zoned.any()), errors="coerce")
        except (ValueError, TypeError):
            stamps = pd.Series(pd.NaT, index=text.index)
        if stamps.isna().any():
            i = int(np.flatnonzero(stamps.isna().to_numpy())[0])
            raise DataError(
                f"{path}: cannot read time '{text.iloc[i]}' in column '{column}' at line {_line(i, offset)}",
                hint="use ISO-8601 timestamps (2026-03-04T10:15:00, optionally with +01:00 or Z) "
                     "or numeric time in seconds")
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
                 seconds_per_unit: float = 1.0, *, scanned: ScannedFile | None = None) -> Signals:
    """Read and check the three signals of a data file.

    Common export quirks are read, not refused: a semicolon delimiter with decimal commas,
    a byte-order mark, Windows line endings, and a units row under the header (recognised
    when the first data row holds text in the input or output column and every later row
    holds numbers there). ``scanned`` passes columns already read in a batch.

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
    numeric = all(any(kinds[c].startswith(t) for t in _NUMERIC_TYPES) for c in (input_column, output_column))
    masked = any(np.ma.is_masked(scanned.values[c]) for c in columns)
    if numeric and not masked:
        u = np.asarray(scanned.values[input_column], dtype=float)
        y = np.asarray(scanned.values[output_column], dtype=float)
        raw_time = scanned.values[time_column]
        # with another delimiter a comma in a text time column can only be a decimal comma
        decimal_comma = (kinds[time_column].startswith("VARCHAR")
                         and (scanned.sniff_delimiter() or ",") != ",")
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
        u = _to_number(path, input_column, values[input_column], offset, decimal_comma)
        y = _to_number(path, output_column, values[output_column], offset, decimal_comma)
        if path.suffix.lower() in (".parquet", ".pq"):  # typed columns: keep the time's own type
            raw_time = scanned.values[time_column][offset:]
        else:
            raw_time = values[time_column]
            kinds[time_column] = "VARCHAR"
            blank = [i for i, v in enumerate(raw_time) if v is None or not str(v).strip()]
            if blank:
                raise DataError(f"{path}: empty cell in column '{time_column}' at line "
                                f"{_line(blank[0], offset)}",
                                hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    n = len(u)
    if n == 0:
        raise DataError(f"{path}: header only, no data rows", hint="export the test again")
    _check_finite(path, input_column, u, offset)
    _check_finite(path, output_column, y, offset)
    if np.ma.is_masked(raw_time):
        i = int(np.flatnonzero(np.ma.getmaskarray(raw_time))[0])
        raise DataError(f"{path}: empty cell in column '{time_column}' at line {_line(i, offset)}",
                        hint="fill or remove the incomplete rows; gaps in a log must not be blank cells")
    raw_time = np.ma.getdata(raw_time) if np.ma.isMaskedArray(raw_time) else raw_time
    t, start_time, zone = _parse_time(path, time_column, raw_time, kinds[time_column],
                                      seconds_per_unit, offset, decimal_comma)
    if kinds[time_column].startswith("TIMESTAMP WITH TIME ZONE"):
        written = scan_first_text(path, time_column)
        match = _ZONE.search(written or "")
        zone = match.group(0) if match else "UTC"
    _check_time(path, time_column, t, offset)
    if n < MIN_FILE_SAMPLES:
        raise DataError(f"{path}: only {n} samples; at least {MIN_FILE_SAMPLES} are needed to hold a step",
                        hint="log faster or longer around the step")
    if np.ptp(u) == 0:
        raise DataError(f"{path}: the input '{input_column}' never moves (constant {u[0]:g})",
                        hint="check that the stepped variable is named as input")
    if np.ptp(y) == 0:
        raise DataError(f"{path}: the output '{output_column}' never changes (constant {y[0]:g})",
                        hint="check the output column and that the logger recorded it")
    return Signals(t=t, u=u, y=y, start_time=start_time, time_zone=zone, flags=tuple(flags))


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


def _check_time(path: Path, column: str, t: np.ndarray, offset: int) -> None:
    steps = np.diff(t)
    bad = steps <= 0
    if bad.any():
        i = int(np.flatnonzero(bad)[0]) + 1
        what = "repeats" if steps[i - 1] == 0 else "goes backwards"
        raise DataError(
            f"{path}: time {what} in column '{column}' at line {_line(i, offset)} "
            f"({t[i - 1]:g} s then {t[i]:g} s from the start)",
            hint="sort the rows by time and remove duplicated samples")


# -- import -------------------------------------------------------------------------------
def windows_for_file(entry: TestEntry, campaign: Campaign, source_hash: str,
                     scanned: ScannedFile | None = None) -> list[TestWindow]:
    """Read, check and cut one file of a campaign. Raises DataError on bad input."""
    signals = read_signals(entry.path, campaign.time_column, campaign.input_column,
                           campaign.output_column, campaign.seconds_per_time_unit, scanned=scanned)
    try:
        pieces = split_signals(signals, windows=entry.windows,
                               seconds_per_unit=campaign.seconds_per_time_unit, period=campaign.period)
    except DataError as exc:
        raise DataError(f"{entry.path}: {exc.args[0]}", hint=exc.hint) from None
    single = len(pieces) == 1
    return [TestWindow(file=entry.file, source_path=entry.path, source_hash=source_hash,
                       window_index=i, note=entry.note, start_time=signals.start_time,
                       time_zone=signals.time_zone,
                       level_given=entry.level if single else None, **piece)
            for i, piece in enumerate(pieces)]


def _hash_settings(campaign: Campaign, entry: TestEntry) -> dict:
    return {"columns": [campaign.time_column, campaign.input_column, campaign.output_column],
            "time_unit": campaign.time_unit, "windows": [list(w) for w in entry.windows],
            "period": campaign.period, "campaign": campaign.name}


PAUSE_ENV = "MAPPER_TEST_PAUSE_AFTER_BATCH"


def _pause_for_tests() -> None:
    """Test hook: announce a committed batch on stderr and hold, so a kill can be aimed.

    Set only by the interruption tests (``MAPPER_TEST_PAUSE_AFTER_BATCH=SECONDS``); it
    makes "killed between two batches" a state the test can see on any machine speed.
    """
    seconds = os.environ.get(PAUSE_ENV)
    if seconds:
        print("mapper-test: batch committed", file=sys.stderr, flush=True)
        time.sleep(float(seconds))


BATCH_FILES = 32  # files written per transaction
SCAN_FILES = 128  # files read per pass of DuckDB's reader (its start-up is paid once a pass)
SCAN_BYTES = 32 << 20  # ...and at most this much of them, so a pass stays small in memory
BATCH_SAMPLES = 500_000  # ...or fewer, so a batch never holds much in memory


def import_campaign(store: Store, campaign: Campaign,
                    progress: Callable[[int, int, str], None] | None = None) -> ImportSummary:
    """Import every file of ``campaign`` into ``store``.

    Each file is read and checked completely before anything of it is written; checked
    files are written in batches, each batch in one transaction, so every file is stored
    whole or not at all. A file whose content (and settings) is already stored is skipped;
    a refused file does not stop the others and leaves the store as it was.
    """
    summary = ImportSummary()
    total = len(campaign.tests)
    pending: list[TestWindow] = []
    pending_outcomes: list[FileOutcome] = []
    pending_hashes: set[str] = set()

    def flush() -> None:
        if pending:
            store.add_tests(campaign, pending)
            _pause_for_tests()
        summary.outcomes.extend(pending_outcomes)
        pending.clear()
        pending_outcomes.clear()
        pending_hashes.clear()

    hashes: dict[int, str] = {}
    for number, entry in enumerate(campaign.tests, start=1):
        try:
            hashes[number] = file_hash(entry.path, _hash_settings(campaign, entry))
        except OSError:
            pass  # reported below when the file is read
    stored = store.stored_sources(list(hashes.values()))
    columns = (campaign.time_column, campaign.input_column, campaign.output_column)
    scans: dict[Path, ScannedFile] = {}
    scanned_up_to = 0
    for number, entry in enumerate(campaign.tests, start=1):
        if progress:
            progress(number, total, entry.file)
        if number > scanned_up_to:
            # read the next batch of new files in one pass of the reader
            upcoming: list[Path] = []
            size = 0
            for i, e in enumerate(campaign.tests[number - 1:], start=number):
                if len(upcoming) >= SCAN_FILES or size >= SCAN_BYTES:
                    break
                scanned_up_to = i
                if hashes.get(i) not in stored:
                    upcoming.append(e.path)
                    size += e.path.stat().st_size if e.path.is_file() else 0
            scans = scan_many(list(dict.fromkeys(upcoming)), columns) or {}
        try:
            source_hash = hashes.get(number) or file_hash(entry.path, _hash_settings(campaign, entry))
            if source_hash in pending_hashes or source_hash in stored:
                summary.outcomes.append(FileOutcome(entry.file, "already stored"))
                continue
            windows = windows_for_file(entry, campaign, source_hash, scans.get(entry.path))
        except DataError as exc:
            summary.outcomes.append(FileOutcome(entry.file, "refused", message=str(exc)))
            continue
        pending.extend(windows)
        pending_hashes.add(source_hash)
        pending_outcomes.append(FileOutcome(entry.file, "imported", tests=len(windows)))
        if len(pending_outcomes) >= BATCH_FILES or sum(len(w.t) for w in pending) >= BATCH_SAMPLES:
            flush()
    flush()
    return summary


def prepare_sources(sources: Sequence[str | Path], *, time_column: str | None = None,
                    input_column: str | None = None, output_column: str | None = None,
                    level: float | None = None, campaign: str | None = None,
                    time_unit: str = "s", period: float | None = None) -> list[Campaign]:
    """Campaigns for the named folders and loose files, checked before any store is opened.

    Raises
    ------
    CampaignFileError, DataError, MapperError
        For a faulty campaign file, a missing file, or loose files without column names.
    """
    folders = [Path(s) for s in sources if Path(s).is_dir() or Path(s).name == "campaign.toml"]
    files = [s for s in sources if Path(s) not in folders]
    campaigns = [load_campaign(folder) for folder in folders]
    if files:
        if not (time_column and input_column and output_column):
            raise MapperError(
                f"{files[0]}: loose data files need --time, --input and --output column names",
                hint="or import a campaign folder holding a campaign.toml")
        campaigns.append(campaign_from_options(
            files, time_column=time_column, input_column=input_column, output_column=output_column,
            level=level, campaign=campaign, time_unit=time_unit, period=period))
    if not campaigns:
        raise CampaignFileError("nothing to import", hint="name a campaign folder or data files")
    return campaigns


def import_campaigns(store: Store, campaigns: Sequence[Campaign],
                     progress: Callable[[int, int, str], None] | None = None) -> ImportSummary:
    """Import checked campaigns (from :func:`prepare_sources`) into ``store``."""
    summary = ImportSummary()
    for item in campaigns:
        summary.outcomes.extend(import_campaign(store, item, progress).outcomes)
    return summary


def campaign_from_options(files: Sequence[str | Path], *, time_column: str, input_column: str,
                          output_column: str, level: float | None = None,
                          campaign: str | None = None, time_unit: str = "s",
                          period: float | None = None) -> Campaign:
    """A campaign made of loose files named on the command line."""
    entries = []
    for name in files:
        path = Path(name)
        if not path.is_file():
            raise DataError(f"{path}: file not found", hint="check the path")
        entries.append(TestEntry(path=path.resolve(), file=path.name, level=level))
    return Campaign(name=campaign or "loose files", folder=None, time_column=time_column,
                    input_column=input_column, output_column=output_column, time_unit=time_unit,
                    period=period, tests=tuple(entries))


def import_sources(store: Store, sources: Sequence[str | Path], *,
                   progress: Callable[[int, int, str], None] | None = None, **options) -> ImportSummary:
    """Import campaign folders and/or loose data files (options as :func:`prepare_sources`).

    Campaign-file errors are raised before anything is stored.
    """
    return import_campaigns(store, prepare_sources(sources, **options), progress)
