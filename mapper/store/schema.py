"""The store's schema: its tables and the public view ``test_params``, as SQL.

The ``fits`` value columns and the view's columns are generated from the one registry,
:mod:`mapper.columns`; names are quoted identifiers from that registry (some, like
``offset``, are SQL keywords), never user text. :data:`ADDED_COLUMNS` lists the columns
added since schema 1, so a store made by an earlier mapper gains them when opened for
writing. The tables are documented in ``docs/store.md``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

from mapper.columns import (
    FIT_LIST_COLUMNS,
    FIT_VALUE_COLUMNS,
    FIT_VALUE_NAMES,
    TEST_PARAMS_NAMES,
)

if TYPE_CHECKING:
    import numpy as np

__all__ = ["SCHEMA", "ADDED_COLUMNS", "SQL_TYPES", "column_array", "TEST_COLUMN_TYPES", "quoted"]

# DuckDB type of each kind of registered column (mapper.columns)
SQL_TYPES = {"number": "DOUBLE", "integer": "INTEGER", "text": "VARCHAR", "text_list": "VARCHAR[]"}


def column_array(kind: str, values: Sequence) -> np.ndarray:
    """One column of rows to hand to DuckDB, as a numpy array of Python values.

    DuckDB reads a dict of numpy arrays as a table without pandas or pyarrow (each loads
    about 0.1-0.2 s at start-up); an object array carries ``None`` as NULL and a list as a
    ``VARCHAR[]`` value, and the insert casts each column to its registered type.
    """
    import numpy as np
    out = np.empty(len(values), dtype=object)
    if kind == "number":
        out[:] = [None if v is None else float(v) for v in values]
    elif kind == "integer":
        out[:] = [None if v is None else int(v) for v in values]
    elif kind == "text":
        out[:] = [None if v is None else str(v) for v in values]
    elif kind == "text_list":
        for i, v in enumerate(values):  # one by one: a list of lists would become a 2-D array
            out[i] = None if v is None else [str(item) for item in v]
    else:
        raise ValueError(f"unknown column kind {kind!r}")
    return out



# Columns of the public view that are not plain fit values: how each is formed.
_VIEW_EXPRESSIONS = {
    "test_id": "t.test_id",
    "campaign": "c.name",
    "file": "t.file",
    "level": "coalesce(t.level_given, (f.y_before + f.y_after) / 2, t.level_estimate)",
    "direction": ("coalesce(CASE WHEN f.input_step > 0 THEN 'up' WHEN f.input_step < 0 THEN 'down' END, "
                  "t.direction)"),
    "input_step": "coalesce(f.input_step, t.input_step)",
    "flags": "list_concat(coalesce(t.import_flags, []::VARCHAR[]), coalesce(f.flags, []::VARCHAR[]))",
}


def quoted(name: str) -> str:
    """A registered column name as an SQL identifier (some, like ``offset``, are keywords)."""
    return f'"{name}"'


def _fits_table_sql() -> str:
    """CREATE TABLE for ``fits``, its value columns generated from the registry."""
    registered = [f"{quoted(c.name)} {SQL_TYPES[c.kind]}" for c in (*FIT_VALUE_COLUMNS, *FIT_LIST_COLUMNS)]
    return ("CREATE TABLE IF NOT EXISTS fits (test_id INTEGER PRIMARY KEY, " + ", ".join(registered)
            + ", settings VARCHAR, tool_version VARCHAR, fitted_at TIMESTAMP DEFAULT current_timestamp)")


def _view_sql() -> str:
    """The public view ``test_params``, its columns in the registry's order."""
    fit_names = set(FIT_VALUE_NAMES)
    selected = []
    for name in TEST_PARAMS_NAMES:
        if name in _VIEW_EXPRESSIONS:
            selected.append(f"{_VIEW_EXPRESSIONS[name]} AS {quoted(name)}")
        elif name in fit_names:
            selected.append(f"f.{quoted(name)}")
        else:
            raise RuntimeError(f"view column {name} has no source")  # a registry edit missed here
    return ("CREATE OR REPLACE VIEW test_params AS SELECT " + ", ".join(selected)
            + " FROM tests t JOIN campaigns c USING (campaign_id) LEFT JOIN fits f USING (test_id)")


SCHEMA = [
    """CREATE TABLE IF NOT EXISTS mapper_meta (key VARCHAR PRIMARY KEY, value VARCHAR)""",
    """CREATE SEQUENCE IF NOT EXISTS campaign_ids START 1""",
    """CREATE SEQUENCE IF NOT EXISTS test_ids START 1""",
    """CREATE TABLE IF NOT EXISTS campaigns (
        campaign_id INTEGER PRIMARY KEY DEFAULT nextval('campaign_ids'),
        name VARCHAR NOT NULL UNIQUE,
        folder VARCHAR,
        description VARCHAR,
        time_unit VARCHAR,
        input_unit VARCHAR,
        output_unit VARCHAR,
        input_range_low DOUBLE, input_range_high DOUBLE,
        output_range_low DOUBLE, output_range_high DOUBLE,
        created_at TIMESTAMP DEFAULT current_timestamp)""",
    """CREATE TABLE IF NOT EXISTS tests (
        test_id INTEGER PRIMARY KEY DEFAULT nextval('test_ids'),
        campaign_id INTEGER NOT NULL REFERENCES campaigns (campaign_id),
        file VARCHAR NOT NULL,
        source_path VARCHAR,
        source_hash VARCHAR NOT NULL,
        window_index INTEGER NOT NULL,
        window_start DOUBLE, window_end DOUBLE,
        start_time VARCHAR,
        time_zone VARCHAR,
        period DOUBLE NOT NULL,
        n_samples INTEGER NOT NULL,
        level_given DOUBLE,
        level_estimate DOUBLE,
        direction VARCHAR,
        input_step DOUBLE,
        note VARCHAR,
        import_flags VARCHAR[],
        move_start_index INTEGER,
        move_start_time DOUBLE,
        imported_at TIMESTAMP DEFAULT current_timestamp,
        UNIQUE (source_hash, window_index))""",
    """CREATE TABLE IF NOT EXISTS samples (
        test_id INTEGER NOT NULL,
        sample_index INTEGER NOT NULL,
        t DOUBLE NOT NULL,
        u DOUBLE NOT NULL,
        y DOUBLE NOT NULL)""",
    _fits_table_sql(),
    _view_sql(),
]


# Kind of each column of the ``tests`` table that a TestWindow row fills (see
# mapper.store.segment.TestWindow.to_row), for the columnar insert.
TEST_COLUMN_TYPES = {
    "file": "text", "source_path": "text", "source_hash": "text", "window_index": "integer",
    "window_start": "number", "window_end": "number", "start_time": "text", "time_zone": "text",
    "period": "number", "n_samples": "integer", "level_given": "number", "level_estimate": "number",
    "direction": "text", "input_step": "number", "note": "text", "import_flags": "text_list",
    "move_start_index": "integer", "move_start_time": "number",
}

# Columns added since schema 1: (table, name, kind); an older store gains them on a writable open.
ADDED_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("tests", "move_start_index", "integer"),
    ("tests", "move_start_time", "number"),
    *(("fits", c.name, c.kind) for c in (*FIT_VALUE_COLUMNS, *FIT_LIST_COLUMNS)),
)
