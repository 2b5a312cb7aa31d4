"""Bringing data in: campaigns and loose files, file by file, into the store.

Each data file is read and checked (:mod:`mapper.store.datafile`), cut into one
:class:`~mapper.store.segment.TestWindow` per input move (:mod:`mapper.store.segment`) and
stored whole or not at all. :func:`import_sources` skips files whose content is already
stored and returns a summary, file by file.
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from mapper.errors import CampaignFileError, DataError, MapperError
from mapper.store.campaign import Campaign, TestEntry, load_campaign
from mapper.store.database import Store
from mapper.store.datafile import read_signals
from mapper.store.readers import ScannedFile, scan_many
from mapper.store.segment import TestWindow, split_signals

__all__ = ["import_sources", "import_campaign", "import_campaigns", "prepare_sources",
           "campaign_from_options", "read_signals", "ImportSummary", "FileOutcome", "TestWindow"]


@dataclass
class FileOutcome:
    file: str
    status: str  # "imported", "already stored" or "refused"
    tests: int = 0
    message: str = ""
    dropped_rows: int = 0  # rows with unreadable cells dropped (import with drop_bad_rows)


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
            if o.status == "imported" and o.dropped_rows:
                text.append(f"  {o.file}: {o.dropped_rows} row(s) with unreadable cells dropped "
                            "(flagged bad_rows_dropped)")
        return text

    @property
    def rows_dropped(self) -> int:
        """Rows with unreadable cells dropped over all imported files."""
        return sum(o.dropped_rows for o in self.outcomes if o.status == "imported")

    def refusals(self) -> list[str]:
        """One message per refused file (what, where, the value seen, and a hint)."""
        return [o.message for o in self.outcomes if o.status == "refused"]


# -- import -------------------------------------------------------------------------------
def file_hash(path: Path, settings: dict) -> str:
    """Content hash of a file together with the settings that shape its tests."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    digest.update(json.dumps(settings, sort_keys=True).encode())
    return digest.hexdigest()


def windows_for_file(entry: TestEntry, campaign: Campaign, source_hash: str,
                     scanned: ScannedFile | None = None, *,
                     drop_bad_rows: bool = False) -> tuple[list[TestWindow], int]:
    """Read, check and cut one file of a campaign: its windows and the rows dropped.

    Raises DataError on bad input.
    """
    signals = read_signals(entry.path, campaign.time_column, campaign.input_column,
                           campaign.output_column, campaign.seconds_per_time_unit, scanned=scanned,
                           time_format=campaign.time_format, drop_bad_rows=drop_bad_rows)
    try:
        pieces = split_signals(signals, windows=entry.windows,
                               seconds_per_unit=campaign.seconds_per_time_unit, period=campaign.period)
    except DataError as exc:
        raise DataError(f"{entry.path}: {exc.args[0]}", hint=exc.hint) from None
    single = len(pieces) == 1
    return [TestWindow.from_cut(piece, file=entry.file, source_path=entry.path, source_hash=source_hash,
                                window_index=i, note=entry.note, start_time=signals.start_time,
                                time_zone=signals.time_zone, level_given=entry.level if single else None)
            for i, piece in enumerate(pieces)], signals.dropped_rows


def _hash_settings(campaign: Campaign, entry: TestEntry, drop_bad_rows: bool = False) -> dict:
    settings = {"columns": [campaign.time_column, campaign.input_column, campaign.output_column],
                "time_unit": campaign.time_unit, "windows": [list(w) for w in entry.windows],
                "period": campaign.period, "campaign": campaign.name}
    # settings added later enter the hash only when used, so earlier imports still match
    if campaign.time_format:
        settings["time_format"] = campaign.time_format
    if drop_bad_rows:
        settings["drop_bad_rows"] = True
    return settings


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
                    progress: Callable[[int, int, str], None] | None = None, *,
                    drop_bad_rows: bool = False) -> ImportSummary:
    """Import every file of ``campaign`` into ``store``.

    With ``drop_bad_rows`` a row whose input or output cell is unreadable ("Bad",
    "I/O Timeout", "Comm Fail", blank) is dropped instead of refusing the file; the rows
    are counted per file in the summary and the file's tests carry ``bad_rows_dropped``.
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
            hashes[number] = file_hash(entry.path, _hash_settings(campaign, entry, drop_bad_rows))
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
            source_hash = hashes.get(number) or file_hash(entry.path, _hash_settings(campaign, entry, drop_bad_rows))
            if source_hash in pending_hashes or source_hash in stored:
                summary.outcomes.append(FileOutcome(entry.file, "already stored"))
                continue
            windows, dropped = windows_for_file(entry, campaign, source_hash, scans.get(entry.path),
                                                drop_bad_rows=drop_bad_rows)
        except DataError as exc:
            summary.outcomes.append(FileOutcome(entry.file, "refused", message=str(exc)))
            continue
        pending.extend(windows)
        pending_hashes.add(source_hash)
        pending_outcomes.append(FileOutcome(entry.file, "imported", tests=len(windows), dropped_rows=dropped))
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
                     progress: Callable[[int, int, str], None] | None = None, *,
                     drop_bad_rows: bool = False) -> ImportSummary:
    """Import checked campaigns (from :func:`prepare_sources`) into ``store``.

    ``drop_bad_rows`` as :func:`import_campaign`.
    """
    summary = ImportSummary()
    for item in campaigns:
        summary.outcomes.extend(import_campaign(store, item, progress, drop_bad_rows=drop_bad_rows).outcomes)
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
                   progress: Callable[[int, int, str], None] | None = None,
                   drop_bad_rows: bool = False, **options) -> ImportSummary:
    """Import campaign folders and/or loose data files (options as :func:`prepare_sources`).

    ``drop_bad_rows`` drops rows with unreadable cells instead of refusing their file
    (counted in the summary, flagged ``bad_rows_dropped``; see :func:`import_campaign`).
    Campaign-file errors are raised before anything is stored.
    """
    return import_campaigns(store, prepare_sources(sources, **options), progress, drop_bad_rows=drop_bad_rows)
