"""Reading data files through DuckDB's own CSV and Parquet readers.

This module owns the one in-memory reader connection of a process and turns a file into
its raw columns (:class:`ScannedFile`), before any interpretation; :mod:`mapper.store.ingest`
checks and converts them. Paths are bound as parameters; only fixed reader options are
written into the statements. :func:`bare_scan` is the benchmark's baseline: DuckDB's reader
alone, storing nothing.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np

from mapper.errors import DataError

__all__ = ["ScannedFile", "scan_file", "scan_many", "scan_first_text", "sniff_delimiter", "bare_scan"]


@dataclass(frozen=True)
class ScannedFile:
    """Columns read from a data file by DuckDB's reader, before any interpretation."""

    path: Path
    columns: tuple[str, ...]
    types: dict[str, str]
    values: dict[str, Any]  # numpy arrays (masked where null), or pandas Categorical for ENUM columns

    def sniff_delimiter(self) -> str | None:
        """The CSV delimiter DuckDB's sniffer finds (None for Parquet).

        A method, not a property: it runs a query on the file, so it is asked only when
        a caller needs it.
        """
        return sniff_delimiter(self.path)



_reader: duckdb.DuckDBPyConnection | None = None


def _reader_connection() -> duckdb.DuckDBPyConnection:
    """One in-memory DuckDB connection per process for reading files (its start-up is paid once)."""
    global _reader
    if _reader is None:
        _reader = duckdb.connect()
    return _reader


def _is_parquet(path: Path) -> bool:
    return path.suffix.lower() in (".parquet", ".pq")


def sniff_delimiter(path: Path) -> str | None:
    """The CSV delimiter DuckDB's sniffer finds in ``path`` (None for Parquet or on failure)."""
    if _is_parquet(path):
        return None
    try:
        row = _reader_connection().execute("SELECT delimiter FROM sniff_csv(?)", [str(path)]).fetchone()
    except duckdb.Error:
        return None
    return None if row is None else str(row[0])


def scan_file(path: Path, columns: Sequence[str], *, as_text: bool = False,
              decimal_comma: bool = False) -> ScannedFile:
    """Read the named columns of a CSV or Parquet file with DuckDB's reader.

    CSV delimiter, header and column types are sniffed by DuckDB. ``as_text`` reads every
    column as text (used to locate a bad cell and to recognise common export quirks).

    Raises
    ------
    DataError
        The file cannot be read, holds no rows, or lacks a named column.
    """
    con = _reader_connection()
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        relation_sql, args = "read_parquet(?)", [str(path)]
    else:
        options = ", all_varchar = true" if as_text else ""
        options += ", decimal_separator = ','" if decimal_comma else ""
        relation_sql, args = f"read_csv(?{options})", [str(path)]
    try:
        cursor = con.execute(f"SELECT * FROM {relation_sql}", args)
        described = [(d[0], str(d[1])) for d in cursor.description]
    except duckdb.Error as exc:
        text = str(exc)
        if "not utf-8 encoded" in text.lower():
            where = text.splitlines()[0].split("Error: ", 1)[-1]
            raise DataError(f"{path}: holds bytes that are not UTF-8 text ({where})",
                            hint="save or export the file again as UTF-8 text") from None
        parquet = suffix in (".parquet", ".pq")
        raise DataError(f"{path}: cannot be read as {'Parquet' if parquet else 'CSV'}: "
                        f"{text.splitlines()[0]}",
                        hint="the Parquet file is damaged or not Parquet; export it again" if parquet
                        else "check that the file is a CSV export and not empty") from None
    present = tuple(r[0] for r in described)
    types = {r[0]: r[1] for r in described}
    missing = [c for c in columns if c not in present]
    if missing:
        raise DataError(
            f"{path}: column '{missing[0]}' not found; columns present: {', '.join(present)}",
            hint="name the columns as they appear in the header ([columns] in campaign.toml "
                 "or --time/--input/--output)")
    if len(present) < 2 and not as_text:
        raise DataError(f"{path}: only one column ('{present[0]}') was found",
                        hint="check the delimiter; comma, semicolon and tab are recognised")
    if any('"' in c for c in columns):
        raise DataError(f"{path}: column names with double quotes are not supported",
                        hint="rename the column in the header")
    try:
        result = cursor.fetchnumpy()  # one pass through DuckDB's reader, columnar
    except duckdb.ConversionException:
        if as_text or suffix in (".parquet", ".pq"):
            raise DataError(f"{path}: cannot be read", hint="export the file again") from None
        # text beyond the sniffer's sample: read as text so the bad cell can be named
        return scan_file(path, columns, as_text=True)
    except duckdb.Error as exc:
        hint = ("the Parquet file is damaged; export it again" if suffix in (".parquet", ".pq")
                else "look for a stray line or an unquoted delimiter in the file")
        raise DataError(f"{path}: cannot be read: {str(exc).splitlines()[0]}", hint=hint) from None
    wanted = list(dict.fromkeys(columns))
    values = {c: result[c] for c in wanted}
    return ScannedFile(path=path, columns=present, types=types, values=values)


_SOURCE_COLUMN = "__mapper_source_file"


def scan_many(paths: Sequence[Path], columns: Sequence[str]) -> dict[Path, ScannedFile] | None:
    """Read several CSV files of one layout in a single pass of DuckDB's reader.

    Reading a batch at once spares the reader's per-file start-up. Returns None when the
    files do not share one layout (or anything else goes wrong); the caller then reads them
    one by one with :func:`scan_file`, which names the culprit.
    """
    if not paths or any(p.suffix.lower() in (".parquet", ".pq") for p in paths):
        return None
    con = _reader_connection()
    try:
        cursor = con.execute("SELECT * FROM read_csv(?, filename = ?)",
                             [[str(p) for p in paths], _SOURCE_COLUMN])
        described = [(d[0], str(d[1])) for d in cursor.description]
        arrays = cursor.fetchnumpy()
    except duckdb.Error:
        return None
    present = tuple(name for name, _ in described if name != _SOURCE_COLUMN)
    if len(present) < 2 or any(c not in present for c in columns) or any('"' in c for c in columns):
        return None
    types = dict(described)
    sources = np.asarray(arrays[_SOURCE_COLUMN], dtype=object)
    if len(sources) == 0:
        return None
    cuts = np.flatnonzero(sources[1:] != sources[:-1]) + 1
    starts = np.concatenate([[0], cuts])
    ends = np.concatenate([cuts, [len(sources)]])
    by_name = {str(p): p for p in paths}
    result: dict[Path, ScannedFile] = {}
    for a, b in zip(starts, ends):
        path = by_name.get(str(sources[a]))
        if path is None or path in result:
            return None
        values = {c: arrays[c][a:b] for c in dict.fromkeys(columns)}
        result[path] = ScannedFile(path=path, columns=present, types=types, values=values)
    if len(result) != len(paths):
        return None  # a file without rows: let the one-by-one reader say so
    return result


def scan_first_text(path: Path, column: str) -> str | None:
    """The first value of ``column`` as written in the file (to keep a timestamp's zone)."""
    if path.suffix.lower() in (".parquet", ".pq"):
        return None
    con = _reader_connection()
    try:
        row = con.execute("SELECT * FROM read_csv(?, all_varchar = true) LIMIT 1", [str(path)]).df()
    except duckdb.Error:
        return None
    if column not in row.columns or row.empty:
        return None
    return str(row[column].iloc[0])


def bare_scan(paths: Sequence[Path]) -> int:
    """Count the rows of every file with DuckDB's reader, storing nothing (benchmark baseline)."""
    con = _reader_connection()
    total = 0
    for path in paths:
        row = con.execute("SELECT count(*) FROM read_csv(?)", [str(path)]).fetchone()
        total += int(row[0]) if row else 0
    return total
