"""Turning result records into text: a table for people, CSV or JSON for programs."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Mapping, Sequence

from mapper.records import plain

_TABLE_COLUMNS = {
    "params": [
        ("test_id", "id"), ("file", "file"), ("level", "level"),
        ("direction", "dir"), ("model", "model"), ("gain", "gain"), ("time_constant", "time constant"),
        ("dead_time", "dead time"), ("nrmse", "nrmse"), ("quality", "quality"), ("flags", "flags"),
        ("excluded", "excluded"), ("note", "note"),
    ],
    "campaigns": [
        ("campaign", "campaign"), ("description", "description"), ("tests", "tests"),
        ("levels", "levels tested"), ("imported", "imported (UTC)"), ("excluded", "excluded"),
    ],
    "map": [
        ("parameter", "parameter"), ("shape", "trend"), ("at_low_end", "at low end"),
        ("at_high_end", "at high end"), ("min", "min"), ("max", "max"), ("ratio", "max/min"),
        ("significant", "significant"), ("n_tests", "tests"),
    ],
}


def _cell(value, interval=None) -> str:
    value = plain(value)
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, list):
        return ",".join(str(v) for v in value) or "-"
    if isinstance(value, float):
        text = f"{value:.4g}"
        if interval and interval[0] is not None and interval[1] is not None:
            text += f" [{interval[0]:.3g}, {interval[1]:.3g}]"
        return text
    return str(value)


def table(records: Sequence[dict], columns: Sequence[tuple[str, str]] | None = None) -> str:
    """Aligned text table; an estimate with ``_lo``/``_hi`` keys shows its interval."""
    if not records:
        return "(no rows)"
    if columns is None:
        keys = [k for k in records[0] if not k.endswith(("_lo", "_hi"))]
        columns = [(k, k) for k in keys]
    rows = []
    for record in records:
        row = []
        for key, _ in columns:
            interval = None
            if f"{key}_lo" in record:
                interval = (plain(record.get(f"{key}_lo")), plain(record.get(f"{key}_hi")))
            row.append(_cell(record.get(key), interval))
        rows.append(row)
    heads = [title for _, title in columns]
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(heads)]
    lines = ["  ".join(h.ljust(w) for h, w in zip(heads, widths)),
             "  ".join("-" * w for w in widths)]
    lines += ["  ".join(c.ljust(w) for c, w in zip(r, widths)) for r in rows]
    return "\n".join(line.rstrip() for line in lines)


def format_records(records: Sequence[dict], fmt: str, *, kind: str | None = None,
                   units: Mapping[str, str] | None = None) -> str:
    """Records as ``table``, ``csv`` or ``json`` text (json keys as given).

    ``units`` (``{key: unit}``) puts units into the table's headers: ``gain (degC/%)``.
    """
    records = [plain(dict(r)) for r in records]
    if fmt == "json":
        return json.dumps(records, indent=2)
    if fmt == "csv":
        buffer = io.StringIO()
        if records:
            writer = csv.DictWriter(buffer, fieldnames=list(records[0]), lineterminator="\n")
            writer.writeheader()
            for record in records:
                writer.writerow({k: (";".join(map(str, v)) if isinstance(v, list) else
                                     ("" if v is None else v)) for k, v in record.items()})
        return buffer.getvalue().rstrip("\n")
    columns = _TABLE_COLUMNS.get(kind) if kind else None
    if columns is not None and units:
        columns = [(key, f"{title} ({units[key]})" if units.get(key) else title) for key, title in columns]
    return table(records, columns)


def format_object(obj: dict, fmt: str) -> str:
    """One result object as json, or as key/value lines for table and csv."""
    obj = plain(obj)
    if fmt == "json":
        return json.dumps(obj, indent=2)
    if fmt == "csv":
        return format_records([obj], "csv")
    width = max(len(k) for k in obj) if obj else 0
    return "\n".join(f"{k.ljust(width)}  {_cell(v)}" for k, v in obj.items())
