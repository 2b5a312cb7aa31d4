"""The engineer's judgement kept in the store: excluded tests and notes added after import.

Two tables (schema version 2, documented in ``docs/store.md``):

- ``exclusions``: one row per test currently left out, with the reason, who (the user
  name from the environment) and when (UTC). Including the test again deletes the row, so
  nothing a fit stored is touched and the earlier result comes back exactly.
- ``test_notes``: notes written after import, each with its author and time (UTC).

Neither changes the public view ``test_params``; :meth:`Store.params` adds the columns
``excluded``, ``exclusion_reason``, ``excluded_by``, ``excluded_at`` and ``note`` beside it
(:func:`with_curation`). A store of schema version 1 is read as it is (nothing excluded,
only the campaign file's notes) and gains the tables the first time it is opened for
writing (:func:`upgrade`). :class:`Curation` writes and reads them. Every
statement binds its values as parameters.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from datetime import UTC, datetime
from typing import TYPE_CHECKING

import duckdb

from mapper.errors import StoreError

if TYPE_CHECKING:  # the plain rows of `mapper params` are curated without loading pandas
    import pandas as pd

CURATION_SCHEMA = [
    """CREATE TABLE IF NOT EXISTS exclusions (
        test_id INTEGER PRIMARY KEY,
        reason VARCHAR NOT NULL,
        excluded_by VARCHAR,
        excluded_at TIMESTAMP)""",
    """CREATE SEQUENCE IF NOT EXISTS note_ids START 1""",
    """CREATE TABLE IF NOT EXISTS test_notes (
        note_id INTEGER PRIMARY KEY DEFAULT nextval('note_ids'),
        test_id INTEGER NOT NULL,
        text VARCHAR NOT NULL,
        written_by VARCHAR,
        written_at TIMESTAMP)""",
]
CURATION_COLUMNS = ("excluded", "exclusion_reason", "excluded_by", "excluded_at", "note")


CURATION_VERSION = 2  # the schema version that brought these tables


def utc_now() -> datetime:
    """The current time in UTC, without zone (the store keeps every timestamp in UTC)."""
    return datetime.now(UTC).replace(tzinfo=None, microsecond=0)


def has_curation_tables(con: duckdb.DuckDBPyConnection) -> bool:
    """True when the store has the tables of schema version 2."""
    found = {r[0] for r in con.execute(
        "SELECT table_name FROM information_schema.tables WHERE table_name IN ('exclusions', 'test_notes')"
    ).fetchall()}
    return found == {"exclusions", "test_notes"}


def upgrade(con: duckdb.DuckDBPyConnection, version: int = CURATION_VERSION) -> bool:
    """Give a store of an older schema the curation tables and mark it ``version``, in one
    transaction; True if anything changed."""
    row = con.execute("SELECT value FROM mapper_meta WHERE key = 'schema_version'").fetchone()
    if row is not None and int(row[0]) >= version and has_curation_tables(con):
        return False
    con.execute("BEGIN TRANSACTION")
    try:
        for statement in CURATION_SCHEMA:
            con.execute(statement)
        con.execute("DELETE FROM mapper_meta WHERE key = 'schema_version'")
        con.execute("INSERT INTO mapper_meta VALUES ('schema_version', ?)",
                    [str(max(version, int(row[0]) if row else 0))])
    except BaseException:
        con.execute("ROLLBACK")
        raise
    con.execute("COMMIT")
    return True


def _stamp(when: datetime | None, layout: str) -> str | None:
    """A stored UTC timestamp as text (``None`` when there is none)."""
    return when.strftime(layout) if when is not None else None


def _note_line(text: str, by, when) -> str:
    stamp = _stamp(when, "%Y-%m-%d %H:%M UTC") or ""
    who = f", {by}" if by else ""
    return f"{text} ({stamp}{who})" if stamp or who else text


def curation_columns(con: duckdb.DuckDBPyConnection, test_ids: Iterable[int]) -> dict[str, list]:
    """The columns ``excluded``, ``exclusion_reason``, ``excluded_by``, ``excluded_at`` (UTC)
    and ``note`` for ``test_ids``, in their order, as plain lists.

    ``note`` is the campaign file's note, then each later note with its time and author,
    joined by "; ".
    """
    ids = [int(i) for i in test_ids]
    excluded: dict[int, tuple] = {}
    notes: dict[int, list[str]] = {i: [] for i in ids}
    for test_id, note in con.execute(
            "SELECT test_id, note FROM tests WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [ids]).fetchall():
        if note:
            notes[int(test_id)].append(str(note))
    if ids and has_curation_tables(con):
        for test_id, reason, by, when in con.execute(
                "SELECT test_id, reason, excluded_by, excluded_at FROM exclusions "
                "WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [ids]).fetchall():
            excluded[int(test_id)] = (reason, by, _stamp(when, "%Y-%m-%d %H:%M:%S UTC"))
        for test_id, text, by, when in con.execute(
                "SELECT test_id, text, written_by, written_at FROM test_notes "
                "WHERE test_id IN (SELECT unnest(?::INTEGER[])) ORDER BY written_at, note_id", [ids]).fetchall():
            notes[int(test_id)].append(_note_line(text, by, when))
    missing = (None,) * 3
    return {"excluded": [i in excluded for i in ids],
            "exclusion_reason": [excluded.get(i, missing)[0] for i in ids],
            "excluded_by": [excluded.get(i, missing)[1] for i in ids],
            "excluded_at": [excluded.get(i, missing)[2] for i in ids],
            "note": ["; ".join(notes[i]) for i in ids]}


def with_curation(con: duckdb.DuckDBPyConnection, frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` (rows of ``test_params``) with the columns of :func:`curation_columns`."""
    frame = frame.copy()
    for name, values in curation_columns(con, frame["test_id"]).items():
        frame[name] = values
    return frame


def curated_rows(con: duckdb.DuckDBPyConnection, rows: Sequence[dict]) -> list[dict]:
    """Plain rows of ``test_params`` with the columns of :func:`curation_columns` added."""
    columns = curation_columns(con, [row["test_id"] for row in rows])
    return [{**row, **{name: values[k] for name, values in columns.items()}} for k, row in enumerate(rows)]


@contextmanager
def transaction(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """All statements inside are committed together or not at all (the store's one transaction rule)."""
    con.execute("BEGIN TRANSACTION")
    try:
        yield con
    except BaseException:
        con.execute("ROLLBACK")
        raise
    con.execute("COMMIT")


class Curation:
    """Exclusions, notes and test windows of an open store (``Curation(store.connection)``)."""

    def __init__(self, connection: duckdb.DuckDBPyConnection) -> None:
        self.connection = connection

    @contextmanager
    def _curating(self) -> Iterator[duckdb.DuckDBPyConnection]:
        con = self.connection
        if not has_curation_tables(con):
            raise StoreError("the store has no tables for exclusions and notes",
                             hint="open it for writing (the tables are added then)")
        with transaction(con):
            yield con

    def exclude_tests(self, test_ids: Sequence[int], *, reason: str, by: str) -> None:
        """Leave tests out of map, comparisons and verdict, recording why, who and when (UTC).

        A test already excluded gets the new reason, who and when. Nothing else is touched.
        """
        when = utc_now()
        with self._curating() as con:
            for test_id in test_ids:
                con.execute("DELETE FROM exclusions WHERE test_id = ?", [int(test_id)])
                con.execute("INSERT INTO exclusions VALUES (?, ?, ?, ?)", [int(test_id), reason, by, when])

    def include_tests(self, test_ids: Sequence[int]) -> list[int]:
        """Bring excluded tests back; returns those that were excluded."""
        ids = [int(i) for i in test_ids]
        with self._curating() as con:
            was = [int(r[0]) for r in con.execute(
                "SELECT test_id FROM exclusions WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [ids]).fetchall()]
            con.execute("DELETE FROM exclusions WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [ids])
        return sorted(was)

    def add_note(self, test_id: int, text: str, *, by: str) -> None:
        """Keep a note on a test, with its author and time (UTC)."""
        with self._curating() as con:
            con.execute("INSERT INTO test_notes (test_id, text, written_by, written_at) VALUES (?, ?, ?, ?)",
                        [int(test_id), text, by, utc_now()])

    def test_windows(self, test_ids: Sequence[int]) -> dict[int, dict]:
        """Where each test came from: window index, start and end (s), period (s), samples."""
        rows = self.connection.execute(
            "SELECT test_id, window_index, window_start, window_end, period, n_samples, source_path "
            "FROM tests WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [[int(i) for i in test_ids]]).fetchall()
        keys = ("window_index", "window_start", "window_end", "period", "n_samples", "source_path")
        return {int(r[0]): dict(zip(keys, r[1:])) for r in rows}
