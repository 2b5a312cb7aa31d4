"""The engineer's judgement kept in the store: excluded tests and notes added after import.

Two tables (schema version 2, documented in ``docs/store.md``):

- ``exclusions``: one row per test currently left out, with the reason, who (the user
  name from the environment) and when (UTC). Including the test again deletes the row, so
  nothing a fit stored is touched and the earlier result comes back exactly.
- ``test_notes``: notes written after import, each with its author and time (UTC).

Neither changes the public view ``test_params``; :meth:`Store.params` adds the columns
``excluded``, ``exclusion_reason`` and ``note`` beside it. A store of schema version 1 is
read as it is (nothing excluded, only the campaign file's notes) and gains the tables the
first time it is opened for writing. Every statement binds its values as parameters.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import UTC, datetime

import duckdb
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


def utc_now() -> datetime:
    """The current time in UTC, without zone (the store keeps every timestamp in UTC)."""
    return datetime.now(UTC).replace(tzinfo=None, microsecond=0)


def has_curation_tables(con: duckdb.DuckDBPyConnection) -> bool:
    """True when the store has the tables of schema version 2."""
    found = {r[0] for r in con.execute(
        "SELECT table_name FROM information_schema.tables WHERE table_name IN ('exclusions', 'test_notes')"
    ).fetchall()}
    return found == {"exclusions", "test_notes"}


def create_curation_tables(con: duckdb.DuckDBPyConnection) -> None:
    for statement in CURATION_SCHEMA:
        con.execute(statement)


def exclude(con: duckdb.DuckDBPyConnection, test_ids: Sequence[int], *, reason: str, by: str) -> None:
    """Mark tests as left out (a test already excluded gets the new reason, who and when)."""
    when = utc_now()
    for test_id in test_ids:
        con.execute("DELETE FROM exclusions WHERE test_id = ?", [int(test_id)])
        con.execute("INSERT INTO exclusions VALUES (?, ?, ?, ?)", [int(test_id), reason, by, when])


def include(con: duckdb.DuckDBPyConnection, test_ids: Sequence[int]) -> list[int]:
    """Bring tests back; returns those that were excluded."""
    ids = [int(i) for i in test_ids]
    rows = con.execute("DELETE FROM exclusions WHERE test_id IN (SELECT unnest(?::INTEGER[])) "
                       "RETURNING test_id", [ids]).fetchall()
    return sorted(int(r[0]) for r in rows)


def add_note(con: duckdb.DuckDBPyConnection, test_id: int, text: str, *, by: str) -> None:
    con.execute("INSERT INTO test_notes (test_id, text, written_by, written_at) VALUES (?, ?, ?, ?)",
                [int(test_id), text, by, utc_now()])


def _note_line(text: str, by, when) -> str:
    stamp = pd.Timestamp(when).strftime("%Y-%m-%d %H:%M UTC") if when is not None else ""
    who = f" {by}" if by else ""
    return f"{text} ({stamp}{who})" if stamp or who else text


def curation_frame(con: duckdb.DuckDBPyConnection, test_ids: Sequence[int], *,
                   tables: bool) -> pd.DataFrame:
    """Per test: ``excluded``, ``exclusion_reason``, ``excluded_by``, ``excluded_at`` and
    ``note`` (the campaign file's note, then later notes with their time and author,
    joined by "; "), indexed by test id."""
    ids = [int(i) for i in test_ids]
    frame = pd.DataFrame(index=pd.Index(ids, name="test_id"))
    frame["excluded"] = False
    frame["exclusion_reason"] = None
    frame["excluded_by"] = None
    frame["excluded_at"] = None
    notes: dict[int, list[str]] = {i: [] for i in ids}
    for test_id, note in con.execute(
            "SELECT test_id, note FROM tests WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [ids]).fetchall():
        if note:
            notes[int(test_id)].append(str(note))
    if tables:
        for test_id, reason, by, when in con.execute(
                "SELECT test_id, reason, excluded_by, excluded_at FROM exclusions "
                "WHERE test_id IN (SELECT unnest(?::INTEGER[]))", [ids]).fetchall():
            frame.loc[int(test_id), ["excluded", "exclusion_reason", "excluded_by", "excluded_at"]] = [
                True, reason, by, pd.Timestamp(when).strftime("%Y-%m-%d %H:%M:%S UTC") if when else None]
        for test_id, text, by, when in con.execute(
                "SELECT test_id, text, written_by, written_at FROM test_notes "
                "WHERE test_id IN (SELECT unnest(?::INTEGER[])) ORDER BY written_at, note_id", [ids]).fetchall():
            notes[int(test_id)].append(_note_line(text, by, when))
    frame["excluded"] = frame["excluded"].astype(bool)
    frame["note"] = ["; ".join(notes[i]) for i in ids]
    return frame
