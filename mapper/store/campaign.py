"""The campaign file, ``campaign.toml``: reading, checking and path confinement.

A campaign folder holds one ``campaign.toml`` and the data files it lists. This module
turns that file into a :class:`Campaign`, refusing anything it cannot stand behind: a
syntax error, a missing section, an unknown key (with the close one suggested), a value
of the wrong type, a file that does not exist, or a path that leaves the folder by
``..``, an absolute path or a link. The format is documented in ``docs/campaign-file.md``.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from mapper.errors import CampaignFileError

CAMPAIGN_FILE_NAME = "campaign.toml"

#: Seconds per unit of a numeric time column.
TIME_UNITS = {
    "s": 1.0, "sec": 1.0, "second": 1.0, "seconds": 1.0,
    "ms": 1e-3, "millisecond": 1e-3, "milliseconds": 1e-3,
    "min": 60.0, "minute": 60.0, "minutes": 60.0,
    "h": 3600.0, "hour": 3600.0, "hours": 3600.0,
}

_TOP_KEYS = {"name", "description", "columns", "units", "ranges", "tests", "period"}
_COLUMN_KEYS = {"time", "input", "output", "time_format"}
_REQUIRED_COLUMN_KEYS = ("input", "output", "time")
_UNIT_KEYS = {"time", "input", "output"}
_RANGE_KEYS = {"input", "output"}
_TEST_KEYS = {"file", "level", "note", "windows"}


@dataclass(frozen=True)
class TestEntry:
    """One ``[[tests]]`` entry: a data file and what the campaign file says about it.

    Attributes
    ----------
    path : Path
        Resolved absolute path, checked to lie inside the campaign folder.
    file : str
        The path as written in the campaign file (shown to people, stored).
    level : float or None
        Operating level given by the engineer; wins over the level taken from the data.
    note : str
        Free text, stored and shown as text only.
    windows : tuple of (float, float)
        Explicit (start, end) time windows in the file's time unit, one test each;
        empty means "split automatically".
    """

    path: Path
    file: str
    level: float | None = None
    note: str = ""
    windows: tuple[tuple[float, float], ...] = ()


@dataclass(frozen=True)
class Campaign:
    """A campaign as described by its campaign file (or by command-line options)."""

    name: str
    folder: Path | None
    time_column: str
    input_column: str
    output_column: str
    time_unit: str = "s"
    input_unit: str = ""
    output_unit: str = ""
    input_range: tuple[float, float] | None = None
    output_range: tuple[float, float] | None = None
    period: float | None = None
    description: str = ""
    tests: tuple[TestEntry, ...] = field(default_factory=tuple)
    time_format: str | None = None  # strftime pattern of text timestamps, e.g. "%d.%m.%Y %H:%M:%S"

    @property
    def seconds_per_time_unit(self) -> float:
        return TIME_UNITS[self.time_unit]


def _suggest(word: str, allowed: set[str]) -> str:
    close = difflib.get_close_matches(word, sorted(allowed), n=1, cutoff=0.5)
    if close:
        return f"did you mean '{close[0]}'?"
    return "allowed keys: " + ", ".join(sorted(allowed))


def _check_keys(table: dict, allowed: set[str], where: str, source: Path) -> None:
    for key in table:
        if key not in allowed:
            raise CampaignFileError(
                f"{source}: unknown key '{key}' in {where}",
                hint=_suggest(key, allowed),
            )


def _expect(value, kinds, what: str, source: Path):
    # bool is an int in Python; a level of `true` is a mistake, not 1.0
    if isinstance(value, bool) or not isinstance(value, kinds):
        names = {str: "text in quotes", float: "a number", int: "a number",
                 list: "a list", dict: "a table"}
        wanted = " or ".join(sorted({names.get(k, k.__name__) for k in kinds}))
        raise CampaignFileError(
            f"{source}: {what} must be {wanted}, found {value!r}",
            hint=f"write {what} as {wanted}",
        )
    return value


def _number(value, what: str, source: Path) -> float:
    number = float(_expect(value, (int, float), what, source))
    if not math.isfinite(number):
        raise CampaignFileError(f"{source}: {what} must be finite, found {value!r}",
                                hint=f"write {what} as an ordinary number (not nan or inf)")
    return number


def _range(value, what: str, source: Path) -> tuple[float, float]:
    _expect(value, (list,), what, source)
    if len(value) != 2:
        raise CampaignFileError(
            f"{source}: {what} must be [low, high], found {value!r}",
            hint="give the instrument range as two numbers, e.g. [0, 100]",
        )
    low, high = (_number(v, what, source) for v in value)
    if not low < high:
        raise CampaignFileError(f"{source}: {what} must have low < high, found {value!r}",
                                hint="give the smaller number first, e.g. [0, 100]")
    return low, high


def confine(folder: Path, relative: str, source: Path) -> Path:
    """Resolve ``relative`` inside ``folder``; refuse a path that leaves it.

    Absolute paths, ``..`` that climbs out, and links pointing outside are refused
    (links are followed before the check, so a link cannot smuggle a path out).
    """
    if Path(relative).is_absolute() or relative.startswith(("/", "\\")) or ":" in relative[:3]:
        raise CampaignFileError(
            f"{source}: test file '{relative}' is an absolute path",
            hint="give data files relative to the campaign folder",
        )
    root = folder.resolve()
    target = (root / relative).resolve()
    if not target.is_relative_to(root):
        raise CampaignFileError(
            f"{source}: test file '{relative}' leaves the campaign folder",
            hint="copy the data file into the campaign folder; paths may not climb out "
                 "with '..' or through a link",
        )
    if not target.is_file():
        raise CampaignFileError(
            f"{source}: test file '{relative}' does not exist",
            hint=f"check the name; files present: {_listing(root)}",
        )
    return target


def _listing(folder: Path, limit: int = 8) -> str:
    names = sorted(p.name for p in folder.iterdir() if p.is_file() and p.name != CAMPAIGN_FILE_NAME)
    shown = ", ".join(names[:limit])
    return shown + (" ..." if len(names) > limit else "") if names else "(none)"


def load_campaign(folder: str | Path) -> Campaign:
    """Read and check the campaign file of ``folder``.

    Parameters
    ----------
    folder : str or Path
        The campaign folder (or the campaign file itself).

    Returns
    -------
    Campaign

    Raises
    ------
    CampaignFileError
        For every fault in the file, naming the file, the key and the value seen.
    """
    folder = Path(folder)
    source = folder if folder.is_file() else folder / CAMPAIGN_FILE_NAME
    folder = source.parent
    if not source.is_file():
        raise CampaignFileError(
            f"{source}: no campaign file here",
            hint="put a campaign.toml in the folder (see docs/campaign-file.md) or import "
                 "loose files with --time/--input/--output",
        )
    try:
        data = tomllib.loads(source.read_bytes().decode("utf-8-sig"))
    except UnicodeDecodeError as exc:
        raise CampaignFileError(f"{source}: not UTF-8 text ({exc.reason} at byte {exc.start})",
                                hint="save the campaign file as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise CampaignFileError(f"{source}: TOML syntax error: {exc}",
                                hint="fix the line named; strings need quotes") from None

    _check_keys(data, _TOP_KEYS, "the top level", source)
    if "name" not in data:
        raise CampaignFileError(f"{source}: missing required key 'name'",
                                hint='add a line such as name = "Exchanger outlet, March tests"')
    name = _expect(data["name"], (str,), "name", source).strip()
    if not name:
        raise CampaignFileError(f"{source}: name is empty", hint="give the campaign a name")
    if "columns" not in data:
        raise CampaignFileError(f"{source}: missing required section [columns]",
                                hint="add [columns] with time, input and output column names")
    columns = _expect(data["columns"], (dict,), "[columns]", source)
    _check_keys(columns, _COLUMN_KEYS, "[columns]", source)
    for key in _REQUIRED_COLUMN_KEYS:
        if key not in columns:
            raise CampaignFileError(f"{source}: [columns] is missing '{key}'",
                                    hint="name the time, input and output columns")
        _expect(columns[key], (str,), f"columns.{key}", source)
    time_format = None
    if "time_format" in columns:
        time_format = _time_format(columns["time_format"], source)

    units = _expect(data.get("units", {}), (dict,), "[units]", source)
    _check_keys(units, _UNIT_KEYS, "[units]", source)
    for key, value in units.items():
        _expect(value, (str,), f"units.{key}", source)
    time_unit = units.get("time", "s").strip().lower()
    if time_unit not in TIME_UNITS:
        raise CampaignFileError(f"{source}: units.time '{units['time']}' is not a time unit",
                                hint="use s, min or h")

    ranges = _expect(data.get("ranges", {}), (dict,), "[ranges]", source)
    _check_keys(ranges, _RANGE_KEYS, "[ranges]", source)
    input_range = _range(ranges["input"], "ranges.input", source) if "input" in ranges else None
    output_range = _range(ranges["output"], "ranges.output", source) if "output" in ranges else None
    period = None
    if "period" in data:
        period = _number(data["period"], "period", source)
        if period <= 0:
            raise CampaignFileError(f"{source}: period must be positive, found {period}",
                                    hint="give the grid period in seconds, e.g. period = 1.0")

    entries = _expect(data.get("tests", []), (list,), "[[tests]]", source)
    if not entries:
        raise CampaignFileError(f"{source}: no [[tests]] entries",
                                hint='add one [[tests]] table per data file, with file = "..."')
    tests = [_test_entry(entry, i, folder, source) for i, entry in enumerate(entries, start=1)]
    return Campaign(
        name=name, folder=folder.resolve(), time_column=columns["time"],
        input_column=columns["input"], output_column=columns["output"], time_unit=time_unit,
        input_unit=units.get("input", ""), output_unit=units.get("output", ""),
        input_range=input_range, output_range=output_range, period=period,
        description=str(data.get("description", "")), tests=tuple(tests), time_format=time_format,
    )


def _time_format(value, source: Path) -> str:
    """A strftime pattern for text timestamps, checked by formatting a known instant."""
    pattern = _expect(value, (str,), "columns.time_format", source)
    example = datetime(2026, 3, 4, 10, 15, 30, tzinfo=UTC)
    try:
        written = example.strftime(pattern)
        datetime.strptime(written, pattern)
    except ValueError as exc:
        raise CampaignFileError(f"{source}: columns.time_format '{pattern}' is not a usable time "
                                f"pattern ({exc})",
                                hint='write it with strftime codes, e.g. "%d.%m.%Y %H:%M:%S"') from None
    if "%" not in pattern or written == pattern:
        raise CampaignFileError(f"{source}: columns.time_format '{pattern}' holds no time codes",
                                hint='write it with strftime codes, e.g. "%d.%m.%Y %H:%M:%S"')
    return pattern


def _test_entry(entry, number: int, folder: Path, source: Path) -> TestEntry:
    where = f"[[tests]] entry {number}"
    _expect(entry, (dict,), where, source)
    _check_keys(entry, _TEST_KEYS, where, source)
    if "file" not in entry:
        raise CampaignFileError(f"{source}: {where} has no 'file'",
                                hint='add file = "name.csv" to the entry')
    relative = _expect(entry["file"], (str,), f"{where} file", source)
    path = confine(folder, relative, source)
    level = _number(entry["level"], f"{where} level", source) if "level" in entry else None
    note = _expect(entry.get("note", ""), (str,), f"{where} note", source)
    windows = []
    for window in _expect(entry.get("windows", []), (list,), f"{where} windows", source):
        start, end = _range(window, f"{where} windows", source)
        windows.append((start, end))
    return TestEntry(path=path, file=relative, level=level, note=note, windows=tuple(windows))
