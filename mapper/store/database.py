"""The store: one DuckDB file holding campaigns, tests, samples and fits.

With :mod:`mapper.store.readers` (DuckDB's CSV and Parquet readers), this is the only
code that imports duckdb. It owns the schema (documented in ``docs/store.md``; the fit
columns and the public view ``test_params`` are generated from :mod:`mapper.columns`),
opening and locking, and atomic writes (a test or a fit is stored whole or not at all).
Every statement binds its values as parameters; no user text is formatted into SQL.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

import duckdb

if TYPE_CHECKING:  # numpy and pandas load on first use: `mapper params` starts without them
    import numpy as np
    import pandas as pd

    from mapper.store.segment import TestWindow

from mapper import __version__
from mapper.columns import FIT_LIST_COLUMNS, FIT_VALUE_COLUMNS
from mapper.errors import NotAStoreError, NotFoundError, StoreError, StoreInUseError
from mapper.store.curation import CURATION_SCHEMA, transaction, upgrade, with_curation
from mapper.store.schema import (
    ADDED_COLUMNS,
    SCHEMA,
    SQL_TYPES,
    TEST_COLUMN_TYPES,
    column_array,
    quoted,
)

SCHEMA_VERSION = 2  # 2: exclusions and notes after import (store/curation.py)
DEFAULT_STORE = "mapper.duckdb"
STORE_ENV = "MAPPER_DB"
LOCK_WAIT_ENV = "MAPPER_LOCK_WAIT"
_DUCKDB_MAGIC = b"DUCK"

def default_store_path() -> Path:
    """The store used when no ``--db`` is given: ``$MAPPER_DB`` or ``mapper.duckdb`` here."""
    return Path(os.environ.get(STORE_ENV) or DEFAULT_STORE)


def _is_duckdb_file(path: Path) -> bool:
    with path.open("rb") as handle:
        head = handle.read(16)
    return len(head) >= 12 and head[8:12] == _DUCKDB_MAGIC


def _connect(path: Path, read_only: bool, wait: float) -> duckdb.DuckDBPyConnection:
    deadline = time.monotonic() + wait
    while True:
        try:
            return duckdb.connect(str(path), read_only=read_only)
        except duckdb.IOException as exc:
            text = str(exc)
            if "permission" in text.lower():
                raise StoreError(f"{path}: cannot open the store: {text.splitlines()[0]}",
                                 hint="check the file and folder permissions") from None
            if "lock" not in text.lower():  # a damaged or foreign file that looks like DuckDB
                raise NotAStoreError(
                    f"{path}: not a mapper store (cannot be opened: {text.splitlines()[0]}); "
                    "the file was left untouched",
                    hint="give --db a new file name; if this is your store, restore it from a copy",
                ) from None
            if time.monotonic() >= deadline:
                raise StoreInUseError(
                    f"{path}: store in use by another mapper process (waited {wait:.0f} s)",
                    hint="wait for the other command to finish, then run this again; "
                         f"set {LOCK_WAIT_ENV}=SECONDS to wait longer",
                ) from None
            time.sleep(0.2)
        except duckdb.Error as exc:
            raise NotAStoreError(
                f"{path}: not a mapper store ({str(exc).splitlines()[0]}); the file was left untouched",
                hint="give --db a new file name or an existing mapper store",
            ) from None


class Store:
    """A mapper store on disk.

    Parameters
    ----------
    path : str or Path, optional
        The DuckDB file; default ``$MAPPER_DB`` or ``mapper.duckdb`` in the working folder.
    read_only : bool, default False
        Open for reading only (several readers may share the file).
    create : bool, default True
        Create the store when the file does not exist (ignored when ``read_only``).
    wait : float, optional
        Seconds to wait for another process's lock (default ``$MAPPER_LOCK_WAIT`` or 10).

    Raises
    ------
    NotAStoreError
        The file exists but is not a mapper store; it is never written.
    StoreInUseError
        Another process holds the store after ``wait`` seconds.
    StoreError
        The folder does not exist, or the store was made by a newer schema.
    """

    def __init__(self, path: str | Path | None = None, *, read_only: bool = False,
                 create: bool = True, wait: float | None = None) -> None:
        self.path = Path(path) if path is not None else default_store_path()
        wait = float(os.environ.get(LOCK_WAIT_ENV, "10")) if wait is None else wait
        exists, probe = self.path.exists(), None
        if exists and self.path.is_dir():
            raise NotAStoreError(f"{self.path}: is a folder, not a store",
                                 hint="give --db a file name such as campaign.duckdb")
        if not exists:
            if not self.path.parent.exists():
                raise StoreError(f"{self.path}: folder '{self.path.parent}' does not exist",
                                 hint="create the folder first or choose another --db path")
            if read_only or not create:
                raise NotFoundError(f"{self.path}: no store here yet",
                                    hint="run 'mapper import' first to create it")
        elif not _is_duckdb_file(self.path):
            raise NotAStoreError(
                f"{self.path}: not a mapper store (not a DuckDB file); the file was left untouched",
                hint="give --db a new file name or an existing mapper store")
        else:
            probe = self._check_existing(wait, keep_open=read_only)
        if not exists:
            self._create_atomically()
        self.connection = probe or _connect(self.path, read_only, wait)
        if exists and not read_only:
            self._add_registered_columns()
            upgrade(self.connection, SCHEMA_VERSION)  # an older store gains the curation tables

    def _add_registered_columns(self) -> None:
        """Give a store made by an earlier mapper the columns added since (schema.ADDED_COLUMNS)."""
        present = set(self.connection.execute(
            "SELECT table_name, column_name FROM information_schema.columns").fetchall())
        for table, name, kind in ADDED_COLUMNS:
            if (table, name) not in present:  # names and types from the schema module, no user text
                statement = f"ALTER TABLE {table} ADD COLUMN {quoted(name)} {SQL_TYPES[kind]}"
                self.connection.execute(statement)

    def _check_existing(self, wait: float, keep_open: bool) -> duckdb.DuckDBPyConnection | None:
        # Inspect read-only first (a foreign database is never written to); a reader keeps it open.
        probe = _connect(self.path, True, wait)
        try:
            try:  # one query, no catalog listing: a database without mapper's table fails it
                row = probe.execute("SELECT value FROM mapper_meta WHERE key = 'schema_version'").fetchone()
            except (duckdb.CatalogException, duckdb.BinderException):
                raise NotAStoreError(
                    f"{self.path}: a DuckDB database but not a mapper store; it was left untouched",
                    hint="give --db a new file name for the mapper store") from None
            if row is None or int(row[0]) > SCHEMA_VERSION:
                raise StoreError(f"{self.path}: store schema {row and row[0]} is newer than this "
                                 f"mapper understands ({SCHEMA_VERSION})", hint="upgrade mapper")
        except BaseException:
            probe.close()
            raise
        if not keep_open:
            probe.close()
        return probe if keep_open else None

    def _create_atomically(self) -> None:
        """Build the new store under a temporary name and rename it into place.

        A kill at any moment leaves either no store or a whole one, never an empty
        DuckDB file that would later be refused as foreign.
        """
        partial = self.path.with_name(f".{self.path.name}.creating-{os.getpid()}")
        for leftover in (partial, partial.with_name(partial.name + ".wal")):
            leftover.unlink(missing_ok=True)
        con = duckdb.connect(str(partial))
        try:
            con.execute("BEGIN TRANSACTION")
            for statement in [*SCHEMA, *CURATION_SCHEMA]:
                con.execute(statement)
            con.execute("INSERT OR IGNORE INTO mapper_meta VALUES ('schema_version', ?), "
                        "('created_by', ?)", [str(SCHEMA_VERSION), f"mapper {__version__}"])
            con.execute("COMMIT")
            con.execute("CHECKPOINT")
        finally:
            con.close()
        try:
            os.link(partial, self.path)  # fails if another process created the store meanwhile
        except FileExistsError:
            pass
        except OSError:  # file systems without hard links
            if not self.path.exists():
                os.replace(partial, self.path)
        partial.unlink(missing_ok=True)

    # -- plumbing ---------------------------------------------------------------------
    def close(self) -> None:
        self.connection.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[duckdb.DuckDBPyConnection]:
        """All statements inside are committed together or not at all."""
        with transaction(self.connection) as con:
            yield con

    # -- campaigns and tests ------------------------------------------------------------
    def ensure_campaign(self, con, campaign) -> int:
        """Campaign id for ``campaign.name``, creating the row on first use."""
        row = con.execute("SELECT campaign_id FROM campaigns WHERE name = ?", [campaign.name]).fetchone()
        if row:
            return int(row[0])
        low_in, high_in = campaign.input_range or (None, None)
        low_out, high_out = campaign.output_range or (None, None)
        return int(con.execute(
            "INSERT INTO campaigns (name, folder, description, time_unit, input_unit, output_unit, "
            "input_range_low, input_range_high, output_range_low, output_range_high) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING campaign_id",
            [campaign.name, str(campaign.folder or ""), campaign.description, campaign.time_unit,
             campaign.input_unit, campaign.output_unit, low_in, high_in, low_out, high_out],
        ).fetchone()[0])

    def stored_sources(self, source_hashes: Sequence[str]) -> set[str]:
        """The content hashes among ``source_hashes`` that are already stored."""
        rows = self.connection.execute(
            "SELECT DISTINCT source_hash FROM tests WHERE source_hash IN (SELECT unnest(?::VARCHAR[]))",
            [list(source_hashes)]).fetchall()
        return {r[0] for r in rows}

    def add_tests(self, campaign, windows: Sequence[TestWindow]) -> list[int]:
        """Store test windows (of one or several files) in one transaction.

        Each :class:`~mapper.store.segment.TestWindow` gives its ``tests`` row through its
        ``to_row()``. Returns the new ids. Rows and samples go in as columnar tables, not
        row by row.
        """
        if not windows:
            return []
        import numpy as np
        with self.transaction() as con:
            campaign_id = self.ensure_campaign(con, campaign)
            ids = [int(r[0]) for r in con.execute(
                "SELECT nextval('test_ids') FROM range(?)", [len(windows)]).fetchall()]
            rows = [w.to_row() for w in windows]
            # columns as numpy arrays: DuckDB reads them without pandas or pyarrow
            tests = {
                "test_id": np.asarray(ids, dtype=np.int32),
                "campaign_id": np.full(len(windows), campaign_id, dtype=np.int32),
                **{name: column_array(kind, [r[name] for r in rows]) for name, kind in TEST_COLUMN_TYPES.items()},
            }
            samples = {
                "test_id": np.concatenate([np.full(len(w.t), i, dtype=np.int32) for i, w in zip(ids, windows)]),
                "sample_index": np.concatenate([np.arange(len(w.t), dtype=np.int32) for w in windows]),
                "t": np.concatenate([np.asarray(w.t, dtype=float) for w in windows]),
                "u": np.concatenate([np.asarray(w.u, dtype=float) for w in windows]),
                "y": np.concatenate([np.asarray(w.y, dtype=float) for w in windows]),
            }
            names = ", ".join(map(quoted, tests))  # fixed column names, no user text
            con.register("incoming_tests", tests)
            con.register("incoming_samples", samples)
            try:
                con.execute(f"INSERT INTO tests ({names}) SELECT {names} FROM incoming_tests")
                con.execute("INSERT INTO samples SELECT test_id, sample_index, t, u, y FROM incoming_samples")
            finally:
                con.unregister("incoming_tests")
                con.unregister("incoming_samples")
        return ids

    def campaign_info(self, name: str | None = None) -> list[dict]:
        """Campaign rows (all, or the one named) with units, ranges and test counts."""
        sql = ("SELECT c.*, (SELECT count(*) FROM tests t WHERE t.campaign_id = c.campaign_id) "
               "AS n_tests FROM campaigns c")
        args: list = []
        if name is not None:
            sql += " WHERE c.name = ?"
            args.append(name)
        cursor = self.connection.execute(sql + " ORDER BY c.campaign_id", args)
        names = [d[0] for d in cursor.description or ()]
        return [dict(zip(names, row)) for row in cursor.fetchall()]

    def test_ids(self, *, unfitted_only: bool = False, campaign: str | None = None) -> list[int]:
        """Test ids in import order: all, those without a fit, and/or those of one campaign."""
        sql, where, args = "SELECT test_id FROM tests", [], []
        if unfitted_only:
            where.append("test_id NOT IN (SELECT test_id FROM fits)")
        if campaign is not None:
            where.append("campaign_id IN (SELECT campaign_id FROM campaigns WHERE name = ?)")
            args.append(campaign)
        if where:
            sql += " WHERE " + " AND ".join(where)
        return [int(r[0]) for r in self.connection.execute(sql + " ORDER BY test_id", args).fetchall()]

    def samples(self, test_id: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Time (s), input and output of one test, in time order."""
        import numpy as np
        arrays = self.connection.execute(
            "SELECT t, u, y FROM samples WHERE test_id = ? ORDER BY sample_index",
            [test_id]).fetchnumpy()
        if len(arrays["t"]) == 0:
            raise NotFoundError(f"test {test_id} has no samples in {self.path}")
        return (np.asarray(arrays["t"], float), np.asarray(arrays["u"], float),
                np.asarray(arrays["y"], float))

    # -- fits -----------------------------------------------------------------------------
    def save_fits(self, rows: Sequence[dict]) -> None:
        """Store fit rows (``FitResult.to_row()`` plus ``test_id``) in one transaction."""
        if not rows:
            return
        import numpy as np
        # columns as numpy arrays: DuckDB reads them without pandas or pyarrow
        columns: dict[str, np.ndarray] = {"test_id": np.asarray([int(r["test_id"]) for r in rows], dtype=np.int32)}
        for spec in (*FIT_VALUE_COLUMNS, *FIT_LIST_COLUMNS):
            values = [r.get(spec.name) for r in rows]
            if spec.kind == "number":
                values = [None if v is None or not np.isfinite(float(v)) else float(v) for v in values]
            elif spec.kind == "text_list":
                values = [list(v or []) for v in values]
            columns[spec.name] = column_array(spec.kind, values)
        columns["settings"] = column_array("text", [json.dumps(r.get("settings") or {}, default=str) for r in rows])
        columns["tool_version"] = column_array("text", [__version__] * len(rows))
        table = columns
        names = ", ".join(map(quoted, table))  # registry names, no user text
        with self.transaction() as con:
            con.register("incoming_fits", table)
            try:
                con.execute("DELETE FROM fits WHERE test_id IN (SELECT test_id FROM incoming_fits)")
                con.execute(f"INSERT INTO fits ({names}) SELECT {names} FROM incoming_fits")
            finally:
                con.unregister("incoming_fits")

    def fit_inputs(self, test_ids: Sequence[int]) -> dict[int, dict]:
        """Instrument ranges, import flags and where the window's own move starts, per test,
        in one query.

        Keys: ``input_range_low``, ``input_range_high``, ``output_range_low``,
        ``output_range_high``, ``import_flags``, ``move_start_index`` and ``move_start_time`` (s from the
        window start; both None for explicit windows and stores imported before they
        were kept), and where the window sits in its file: ``source_hash``,
        ``window_index``, ``window_start`` (s) and ``period`` (s).
        """
        column_sql = ("t.move_start_index, t.move_start_time" if self._has_column("tests", "move_start_index")
                      else "NULL, NULL")  # a read-only store from an earlier mapper
        rows = self.connection.execute(
            "SELECT t.test_id, c.input_range_low, c.input_range_high, c.output_range_low, "
            "c.output_range_high, t.import_flags, " + column_sql + ", t.source_hash, t.window_index, "
            "t.window_start, t.period FROM tests t JOIN campaigns c USING (campaign_id) "
            "WHERE t.test_id IN (SELECT unnest(?::INTEGER[]))", [list(map(int, test_ids))]).fetchall()
        keys = ("input_range_low", "input_range_high", "output_range_low", "output_range_high",
                "import_flags", "move_start_index", "move_start_time", "source_hash", "window_index",
                "window_start", "period")
        return {int(r[0]): dict(zip(keys, r[1:])) for r in rows}

    def _has_column(self, table: str, column: str) -> bool:
        row = self.connection.execute(
            "SELECT count(*) FROM information_schema.columns WHERE table_name = ? AND column_name = ?",
            [table, column]).fetchone()
        return bool(row and row[0])

    def preceding_record(self, test_id: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The file's record before this test's window, from the earlier windows of its file.

        Times are seconds relative to this window's first sample (so all negative); each
        earlier window gives its samples up to the start of the window after it, so the
        shared plateaus appear once. Empty arrays for a file's first window.
        """
        import numpy as np
        arrays = self.connection.execute(
            "WITH mine AS (SELECT source_hash, window_index, window_start FROM tests WHERE test_id = ?), "
            "earlier AS (SELECT o.test_id, o.window_index, o.window_start, o.period, "
            "  lead(o.window_start) OVER (ORDER BY o.window_index) AS next_start "
            "  FROM tests o, mine WHERE o.source_hash = mine.source_hash "
            "  AND o.window_index <= mine.window_index) "
            "SELECT s.t + e.window_start - m.window_start AS t, s.u, s.y "
            "FROM samples s JOIN earlier e USING (test_id), mine m "
            "WHERE e.window_index < m.window_index "
            "AND s.t + e.window_start < e.next_start - 0.25 * e.period "
            "ORDER BY e.window_index, s.sample_index", [int(test_id)]).fetchnumpy()
        t, u, y = (np.asarray(arrays[k], float) for k in ("t", "u", "y"))
        return t, u, y

    def samples_many(self, test_ids: Sequence[int]) -> dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """Samples of several tests in one query (a batch, never the whole campaign)."""
        import numpy as np
        arrays = self.connection.execute(
            "SELECT test_id, t, u, y FROM samples WHERE test_id IN (SELECT unnest(?::INTEGER[])) "
            "ORDER BY test_id, sample_index", [list(map(int, test_ids))]).fetchnumpy()
        ids = np.asarray(arrays["test_id"])
        result: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        if len(ids) == 0:
            return result
        cuts = np.flatnonzero(np.diff(ids)) + 1
        starts = np.concatenate([[0], cuts])
        ends = np.concatenate([cuts, [len(ids)]])
        t, u, y = (np.asarray(arrays[k], float) for k in ("t", "u", "y"))
        for a, b in zip(starts, ends):
            result[int(ids[a])] = (t[a:b].copy(), u[a:b].copy(), y[a:b].copy())
        return result

    def fit_details_many(self, test_ids: Sequence[int]) -> dict[int, dict]:
        """Fit rows of several tests in one query."""
        frame = self.connection.execute(
            "SELECT * FROM fits WHERE test_id IN (SELECT unnest(?::INTEGER[]))",
            [list(map(int, test_ids))]).df()
        return {int(r["test_id"]): r for r in frame.to_dict("records")}

    def test_notes(self, test_ids: Sequence[int]) -> dict[int, str]:
        """The campaign file's note of each test, for several tests in one query."""
        rows = self.connection.execute(
            "SELECT test_id, note FROM tests WHERE test_id IN (SELECT unnest(?::INTEGER[]))",
            [list(map(int, test_ids))]).fetchall()
        return {int(r[0]): r[1] or "" for r in rows}

    # -- the public view ----------------------------------------------------------------
    def params(self, *, campaign: str | None = None, level_min: float | None = None,
               level_max: float | None = None, direction: str | None = None,
               include_rejected: bool = True) -> pd.DataFrame:
        """Rows of ``test_params`` with optional filters, ordered by campaign, level, id, plus
        ``excluded``, ``exclusion_reason``, ``excluded_by``, ``excluded_at`` and ``note``
        (:func:`mapper.store.curation.with_curation`)."""
        from mapper.store.queries import params_query
        sql, bound = params_query(campaign, level_min, level_max, direction, include_rejected)
        frame = self.connection.execute(sql, bound).df()
        frame["flags"] = [list(f) if f is not None else [] for f in frame["flags"]]
        return with_curation(self.connection, frame)

    def input_levels(self) -> dict[int, float]:
        """Operating level of each test on the input side: the mean of the input's first and
        last tenth (its settled value before and after the move)."""
        rows = self.connection.execute(
            "SELECT s.test_id, (avg(s.u) FILTER (WHERE s.sample_index < greatest(t.n_samples // 10, 1)) + "
            "avg(s.u) FILTER (WHERE s.sample_index >= t.n_samples - greatest(t.n_samples // 10, 1))) / 2 "
            "FROM samples s JOIN tests t USING (test_id) GROUP BY s.test_id").fetchall()
        return {int(r[0]): float(r[1]) for r in rows if r[1] is not None}

    def counts(self) -> dict[str, int]:
        row = self.connection.execute(
            "SELECT (SELECT count(*) FROM campaigns), (SELECT count(*) FROM tests), "
            "(SELECT count(*) FROM samples), (SELECT count(*) FROM fits)").fetchone()
        assert row is not None  # an aggregate query always returns one row
        return dict(zip(("campaigns", "tests", "samples", "fits"), map(int, row)))
