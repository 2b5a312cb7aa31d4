"""A corpus of faulty input files, generated from code into a temporary folder.

Each :class:`Fault` writes one broken campaign folder or data file and says which
command-line arguments import it and which fragments the refusal must contain (the file
name, and the line, column and value where they apply). The faults here are the ones
*not* already exercised by ``tests/test_import.py``; ``test_reliability.py`` runs every
one through the real ``mapper`` entry point and counts them.

Clean "odd but common" exports (semicolon with decimal commas, byte-order mark, Windows
line endings, a units row) are built here too, from the same numbers as a clean file.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

COLUMNS = ("t_s", "valve_pct", "level_cm")
N_ROWS = 60
LOOSE = ("--time", "t_s", "--input", "valve_pct", "--output", "level_cm")


def clean_frame(n: int = N_ROWS) -> pd.DataFrame:
    """A clean step test: input 50 -> 60 % at t = 10 s, first-order output (tau 8 s)."""
    t = np.arange(float(n))
    u = np.where(t >= 10, 60.0, 50.0)
    elapsed = np.clip(t - 12, 0, None)
    y = np.round(20.0 + 5.0 * (1 - np.exp(-elapsed / 8.0)) + 0.01 * np.sin(1.7 * t), 4)
    return pd.DataFrame({COLUMNS[0]: t, COLUMNS[1]: u, COLUMNS[2]: y})


def csv_text(frame: pd.DataFrame | None = None, *, replace: dict[int, str] | None = None,
             sep: str = ",", header: str | None = None) -> str:
    """The frame as CSV text; ``replace`` swaps whole data rows (0-based) for raw text."""
    frame = clean_frame() if frame is None else frame
    lines = [header or sep.join(frame.columns)]
    for i, row in enumerate(frame.itertuples(index=False)):
        lines.append((replace or {}).get(i, sep.join(f"{v:g}" for v in row)))
    return "\n".join(lines) + "\n"


CAMPAIGN = '''name = "Fault corpus"
[columns]
time = "t_s"
input = "valve_pct"
output = "level_cm"
'''


@dataclass(frozen=True)
class Fault:
    """One faulty input: ``build(folder)`` writes it and returns the import arguments."""

    name: str
    kind: str  # "csv", "parquet" or "campaign"
    build: Callable[[Path], list[str]]
    expect: tuple[str, ...]  # fragments the refusal must contain (besides the file name)
    culprit: str  # the file the message must name


def _csv(text: str | bytes, name: str = "bad.csv") -> Callable[[Path], list[str]]:
    def build(folder: Path) -> list[str]:
        path = folder / name
        path.write_bytes(text if isinstance(text, bytes) else text.encode())
        return [str(path), *LOOSE]
    return build


def _parquet(make: Callable[[], pd.DataFrame | bytes], name: str = "bad.parquet") -> Callable[[Path], list[str]]:
    def build(folder: Path) -> list[str]:
        path = folder / name
        made = make()
        if isinstance(made, bytes):
            path.write_bytes(made)
        else:
            made.to_parquet(path, index=False)
        return [str(path), *LOOSE]
    return build


def _parquet_bytes() -> bytes:
    import io
    buffer = io.BytesIO()
    clean_frame().to_parquet(buffer, index=False)
    return buffer.getvalue()


def _with(column: str, index: int, value, dtype=None) -> Callable[[], pd.DataFrame]:
    def make() -> pd.DataFrame:
        frame = clean_frame()
        if dtype is not None:
            frame[column] = frame[column].map(lambda v: f"{v:g}").astype(dtype)
        frame.loc[index, column] = value
        return frame
    return make


def _nan_not_null() -> bytes:
    # pandas turns NaN into a Parquet null; write a true floating-point NaN through pyarrow
    import io

    import pyarrow as pa
    import pyarrow.parquet as pq
    frame = clean_frame()
    frame.loc[12, "level_cm"] = float("nan")
    table = pa.table({c: pa.array(frame[c].to_numpy(), from_pandas=False) for c in frame.columns})
    buffer = io.BytesIO()
    pq.write_table(table, buffer)
    return buffer.getvalue()


def _campaign(text: str | bytes, setup: Callable[[Path], None] | None = None) -> Callable[[Path], list[str]]:
    def build(folder: Path) -> list[str]:
        camp = folder / "camp"
        camp.mkdir()
        (camp / "step.csv").write_text(csv_text())
        if setup:
            setup(camp)
        (camp / "campaign.toml").write_bytes(text if isinstance(text, bytes) else text.encode())
        return [str(camp)]
    return build


def _entry(extra: str = "", file: str = "step.csv") -> str:
    return CAMPAIGN + f'\n[[tests]]\nfile = "{file}"\n{extra}'


def _outside_folder_link(camp: Path) -> None:
    outside = camp.parent / "elsewhere"
    outside.mkdir()
    (outside / "step.csv").write_text(csv_text())
    os.symlink(outside, camp / "linked")


def _flat_output() -> str:
    frame = clean_frame()
    frame["level_cm"] = 20.0
    return csv_text(frame)


def _huge_time() -> str:
    frame = clean_frame()
    frame.loc[30:, "t_s"] = frame.loc[30:, "t_s"] * 1e13
    return csv_text(frame)


def _bytes_row(row: bytes) -> bytes:
    text = csv_text().encode().splitlines(keepends=True)
    text[31] = row  # data row 30 sits on file line 32
    return b"".join(text)


FAULTS: tuple[Fault, ...] = (
    # -- CSV ------------------------------------------------------------------------------
    Fault("undecodable bytes in a cell", "csv", _csv(_bytes_row(b"30,60,2\xff\xfe5\n")),
          ("not UTF-8", "Line: 32"), "bad.csv"),
    Fault("binary file saved as .csv", "csv",
          _csv(bytes(range(256)) * 8, "image.csv"), (), "image.csv"),
    Fault("mixed types: numbers then words in output", "csv",
          _csv(csv_text(replace={45: "45,60,sensor fault"})),
          ("'sensor fault'", "'level_cm'", "line 47"), "bad.csv"),
    Fault("mixed types: unit glued to a number", "csv",
          _csv(csv_text(replace={33: "33,60%,24.1"})), ("'60%'", "'valve_pct'", "line 35"), "bad.csv"),
    Fault("NaN in input", "csv", _csv(csv_text(replace={20: "20,nan,23"})),
          ("non-finite", "'valve_pct'", "line 22"), "bad.csv"),
    Fault("minus infinity in time", "csv", _csv(csv_text(replace={8: "-inf,50,20"})),
          ("non-finite", "'t_s'", "line 10"), "bad.csv"),
    Fault("huge value in output", "csv", _csv(csv_text(replace={40: "40,60,1e300"})),
          ("1e+300", "'level_cm'", "line 42"), "bad.csv"),
    Fault("huge value in time", "csv", _csv(_huge_time()), ("'t_s'", "line 32"), "bad.csv"),
    Fault("zero-variance output", "csv", _csv(_flat_output()), ("'level_cm'", "never changes", "20"), "bad.csv"),
    Fault("duplicated row (time repeats late)", "csv",
          _csv(csv_text(replace={50: "49,60,24.9"})), ("time repeats", "'t_s'", "line 52"), "bad.csv"),
    Fault("renamed time column", "csv", _csv(csv_text(header="time_s,valve_pct,level_cm")),
          ("'t_s' not found", "time_s"), "bad.csv"),
    Fault("renamed output column (case)", "csv", _csv(csv_text(header="t_s,valve_pct,Level_CM")),
          ("'level_cm' not found", "Level_CM"), "bad.csv"),
    Fault("single column file", "csv", _csv("t_s\n" + "\n".join(str(i) for i in range(40)) + "\n"),
          ("not found",), "bad.csv"),
    Fault("missing data file on the command line", "csv",
          lambda folder: [str(folder / "absent.csv"), *LOOSE], ("not found",), "absent.csv"),
    # -- Parquet --------------------------------------------------------------------------
    Fault("corrupted parquet (truncated)", "parquet", _parquet(lambda: _parquet_bytes()[:-300]),
          ("Parquet",), "bad.parquet"),
    Fault("corrupted parquet (bytes flipped in the middle)", "parquet",
          _parquet(lambda: (lambda b: b[:200] + bytes(x ^ 0xA5 for x in b[200:600]) + b[600:])(_parquet_bytes())),
          ("cannot be read", "export it again"), "bad.parquet"),
    Fault("CSV text saved as .parquet", "parquet", _parquet(lambda: csv_text().encode()),
          ("Parquet",), "bad.parquet"),
    Fault("string column holding text in parquet", "parquet",
          _parquet(_with("level_cm", 25, "n/a", dtype=str)), ("'n/a'", "'level_cm'"), "bad.parquet"),
    Fault("null in parquet input", "parquet", _parquet(_with("valve_pct", 17, None)),
          ("empty cell", "'valve_pct'", "line 19"), "bad.parquet"),
    Fault("null in parquet output", "parquet", _parquet(_with("level_cm", 12, float("nan"))),
          ("empty cell", "'level_cm'", "line 14"), "bad.parquet"),
    Fault("NaN (not null) in parquet output", "parquet", _parquet(_nan_not_null),
          ("non-finite value nan", "'level_cm'", "line 14"), "bad.parquet"),
    Fault("null time in parquet", "parquet", _parquet(_with("t_s", 9, None)),
          ("empty cell", "'t_s'", "line 11"), "bad.parquet"),
    Fault("backward time in parquet", "parquet", _parquet(_with("t_s", 30, 3.0)),
          ("goes backwards", "'t_s'"), "bad.parquet"),
    Fault("missing column in parquet", "parquet",
          _parquet(lambda: clean_frame().rename(columns={"valve_pct": "valve"})),
          ("'valve_pct' not found", "valve"), "bad.parquet"),
    Fault("parquet without rows", "parquet", _parquet(lambda: clean_frame().iloc[:0]),
          ("no data rows",), "bad.parquet"),
    # -- campaign file --------------------------------------------------------------------
    Fault("campaign file not UTF-8", "campaign", _campaign(_entry().encode() + b'note = "\xe9t\xe9"\n'),
          ("not UTF-8",), "campaign.toml"),
    Fault("duplicate key (TOML error)", "campaign", _campaign(_entry('level = 1\nlevel = 2\n')),
          ("TOML syntax error",), "campaign.toml"),
    Fault("unknown top-level key", "campaign", _campaign(_entry().replace("[columns]", "[colums]")),
          ("unknown key 'colums'", "did you mean 'columns'?"), "campaign.toml"),
    Fault("unknown time unit", "campaign", _campaign(_entry() + '[units]\ntime = "fortnight"\n'),
          ("'fortnight'",), "campaign.toml"),
    Fault("range low above high", "campaign", _campaign(_entry() + '[ranges]\ninput = [100, 0]\n'),
          ("ranges.input", "[100, 0]"), "campaign.toml"),
    Fault("range with three numbers", "campaign", _campaign(_entry() + '[ranges]\noutput = [0, 50, 100]\n'),
          ("ranges.output", "[low, high]"), "campaign.toml"),
    Fault("non-finite level", "campaign", _campaign(_entry("level = nan\n")), ("level", "finite"), "campaign.toml"),
    Fault("boolean level", "campaign", _campaign(_entry("level = true\n")), ("level", "a number", "True"),
          "campaign.toml"),
    Fault("column name given as a number", "campaign",
          _campaign(_entry().replace('time = "t_s"', "time = 7")), ("columns.time", "7"), "campaign.toml"),
    Fault("negative period", "campaign", _campaign("period = -1.0\n" + _entry()), ("period", "positive"),
          "campaign.toml"),
    Fault("no [[tests]] entries", "campaign", _campaign(CAMPAIGN), ("no [[tests]]",), "campaign.toml"),
    Fault("test entry without file", "campaign", _campaign(CAMPAIGN + '\n[[tests]]\nlevel = 4\n'),
          ("has no 'file'",), "campaign.toml"),
    Fault("test file is a folder", "campaign", _campaign(_entry(file="sub"), lambda c: (c / "sub").mkdir()),
          ("'sub' does not exist",), "campaign.toml"),
    Fault("'..' hidden inside a subfolder path", "campaign",
          _campaign(_entry(file="sub/../../step.csv"), lambda c: (c / "sub").mkdir()),
          ("leaves the campaign folder",), "campaign.toml"),
    Fault("link to a folder outside", "campaign", _campaign(_entry(file="linked/step.csv"), _outside_folder_link),
          ("leaves the campaign folder",), "campaign.toml"),
    Fault("Windows drive path", "campaign", _campaign(_entry(file="C:\\\\data\\\\step.csv")),
          ("absolute path",), "campaign.toml"),
    Fault("window with start after end", "campaign", _campaign(_entry("windows = [[50, 10]]\n")),
          ("windows", "[50, 10]"), "campaign.toml"),
    Fault("folder without campaign file", "campaign",
          lambda folder: [str((folder / "empty_campaign").mkdir() or folder / "empty_campaign")],
          ("no campaign file",), "campaign.toml"),
)


# -- odd but common exports: same numbers, different dress ----------------------------------
def semicolon_decimal_comma(frame: pd.DataFrame) -> bytes:
    lines = [";".join(frame.columns)]
    for row in frame.itertuples(index=False):
        lines.append(";".join(f"{v:g}".replace(".", ",") for v in row))
    return ("\n".join(lines) + "\n").encode()


def byte_order_mark(frame: pd.DataFrame) -> bytes:
    return b"\xef\xbb\xbf" + csv_text(frame).encode()


def windows_line_endings(frame: pd.DataFrame) -> bytes:
    return csv_text(frame).replace("\n", "\r\n").encode()


def units_row(frame: pd.DataFrame) -> bytes:
    text = csv_text(frame).split("\n", 1)
    return (text[0] + "\ns,%,cm\n" + text[1]).encode()


def all_quirks(frame: pd.DataFrame) -> bytes:
    body = semicolon_decimal_comma(frame).decode().split("\n", 1)
    text = body[0] + "\ns;%;cm\n" + body[1]
    return b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode()


ODD_EXPORTS: dict[str, Callable[[pd.DataFrame], bytes]] = {
    "semicolon delimiter with decimal commas": semicolon_decimal_comma,
    "byte-order mark": byte_order_mark,
    "Windows line endings": windows_line_endings,
    "units row under the header": units_row,
    "all four at once": all_quirks,
}
