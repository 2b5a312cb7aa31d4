"""Reading the public ``test_params`` view with optional filters, as plain rows.

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
