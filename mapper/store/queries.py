"""Plain-row reads: the public ``test_params`` view with optional filters, and the tests a
logged file became.

:meth:`mapper.store.database.Store.params` returns the same rows as a DataFrame; the plain
rows here are read without loading pandas, so ``mapper params`` starts quickly.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from mapper.store.database import Store


def params_query(campaign: str | None, level_min: float | None, level_max: float | None,
                 direction: str | None, include_rejected: bool) -> tuple[str, list]:
    """SQL and bound arguments reading ``test_params``, ordered by campaign, level, test id."""
    filters = (("campaign = ?", campaign), ("level >= ?", level_min),
               ("level <= ?", level_max), ("direction = ?", direction))
    clauses = [clause for clause, value in filters if value is not None]
    if not include_rejected:
        clauses.append("coalesce(quality, '') <> 'rejected'")
    where = (" WHERE " + " AND ".join(clauses)) if clauses else ""
    return ("SELECT * FROM test_params" + where + " ORDER BY campaign, level, test_id",
            [value for _, value in filters if value is not None])


def param_rows(store: Store, *, campaign: str | None = None, level_min: float | None = None,
               level_max: float | None = None, direction: str | None = None) -> list[dict]:
    """The rows of :meth:`Store.params <mapper.store.database.Store.params>` as plain dicts
    (``flags`` a list), every test included."""
    sql, bound = params_query(campaign, level_min, level_max, direction, True)
    cursor = store.connection.execute(sql, bound)
    names = [d[0] for d in cursor.description or ()]
    flags = names.index("flags")
    return [{**dict(zip(names, row)), "flags": list(row[flags] or [])} for row in cursor.fetchall()]


def file_windows(store: Store, campaign: str, file: str) -> list[tuple[int, float, float | None]]:
    """``(test_id, window_start, move_start_time)`` of every test cut from ``file`` in
    ``campaign``, in the file's order (seconds; ``move_start_time`` is None for explicit
    windows)."""
    rows = store.connection.execute(
        "SELECT t.test_id, t.window_start, t.move_start_time FROM tests t JOIN campaigns c USING (campaign_id) "
        "WHERE c.name = ? AND t.file = ? ORDER BY t.window_index", [campaign, file]).fetchall()
    return [(int(r[0]), float(r[1] or 0.0), None if r[2] is None else float(r[2])) for r in rows]


def campaign_files(store: Store, campaign: str) -> list[str]:
    """The data files of a campaign, by the names they were imported under."""
    rows = store.connection.execute(
        "SELECT DISTINCT t.file FROM tests t JOIN campaigns c USING (campaign_id) WHERE c.name = ? ORDER BY 1",
        [campaign]).fetchall()
    return [str(r[0]) for r in rows]
