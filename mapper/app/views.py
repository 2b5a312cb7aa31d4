"""What the curating commands show: the campaign list, one test in the terminal, and the
small conversions the command line needs (units in headers, loose-file campaign details).
No typer here; the command line prints what these return.
"""

from __future__ import annotations

import dataclasses
import getpass
import math
import os
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from mapper.errors import NotFoundError, UsageError
from mapper.identification.flags import INFORMS, REJECTS, effect, flag_text

if TYPE_CHECKING:
    from mapper.app.session import Session
    from mapper.store.campaign import Campaign

_USER_VARIABLES = ("MAPPER_USER", "USER", "LOGNAME", "USERNAME")


def user_name() -> str:
    """Who is acting, from the environment (``$MAPPER_USER``, then the login name)."""
    for variable in _USER_VARIABLES:
        if os.environ.get(variable):
            return os.environ[variable]
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def with_loose_details(campaigns: Sequence[Campaign], *, description: str | None = None,
                       input_unit: str | None = None, output_unit: str | None = None,
                       input_range: tuple[float, float] | None = None,
                       output_range: tuple[float, float] | None = None) -> list[Campaign]:
    """The loose-file campaign given what a campaign file could give (description, units,
    ranges); a campaign folder keeps what its ``campaign.toml`` says.

    Raises
    ------
    UsageError
        Such details were given but no loose data file was named.
    """
    details: dict[str, Any] = {key: value for key, value in (
        ("description", description), ("input_unit", input_unit), ("output_unit", output_unit),
        ("input_range", tuple(input_range) if input_range else None),
        ("output_range", tuple(output_range) if output_range else None)) if value is not None}
    if not details:
        return list(campaigns)
    if not any(c.folder is None for c in campaigns):
        names = ", ".join("--" + k.replace("_", "-") for k in details)
        raise UsageError(f"{names} apply to loose data files only",
                         hint="a campaign folder gives these in its campaign.toml")
    return [dataclasses.replace(c, **details) if c.folder is None else c for c in campaigns]


def unit_title(key: str, title: str, units: dict[str, str]) -> str:
    """A table header with its unit: ``gain (degC/%)``."""
    unit = units.get(key)
    return f"{title} ({unit})" if unit else title


def with_unit_names(rows: list[dict], units: dict[str, str]) -> list[dict]:
    """Map summary rows with the parameter named with its unit (``gain (degC/%)``)."""
    return [dict(row, parameter=unit_title(row["parameter"], row["parameter"].replace("_", " "), units))
            for row in rows]


def unit_keys(answer: dict, units: dict[str, str]) -> dict:
    """An ``at`` answer for the terminal: each quantity named with its unit
    (``gain (degC/%)``, ``gain low (degC/%)``)."""
    shown = {}
    for key, value in answer.items():
        base = key.removesuffix("_lo").removesuffix("_hi")
        words = base.replace("_", " ") + {"_lo": " low", "_hi": " high"}.get(key[len(base):], "")
        shown[unit_title(base, words, units)] = value
    return shown


def campaign_rows(session: Session) -> list[dict]:
    """One row per campaign: name, description, tests, levels tested, imported, excluded."""
    rows = []
    for info in session.campaigns():
        data = session.data(info["name"])
        levels = sorted({round(float(v), 6) for v in data.params["level"].dropna()})
        excluded = int(data.params["excluded"].fillna(False).astype(bool).sum()) \
            if "excluded" in data.params.columns else 0
        description = info.get("description")
        imported = info.get("created_at")
        rows.append({"campaign": info["name"],
                     "description": description if isinstance(description, str) else "",
                     "tests": int(len(data.params)),
                     "levels": [float(f"{v:.4g}") for v in levels],
                     "imported": str(imported)[:19] if imported is not None else None,
                     "excluded": excluded})
    return rows


def _number(value, unit: str = "", interval=None) -> str:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(value):
        return "-"
    text = f"{value:.4g}"
    if interval is not None:
        low, high = (float(v) if v is not None else math.nan for v in interval)
        if math.isfinite(low) and math.isfinite(high):
            text += f"  (95 % interval {low:.4g} to {high:.4g})"
    return f"{text} {unit}".rstrip() if "(" not in text else text.replace("  (", f" {unit}  (", 1)


_EFFECT_WORDS = {REJECTS: "rejects the test", INFORMS: "for information"}


def grade_reason(quality, flags: Sequence[str]) -> str:
    """Why a test got its grade, in words (the flags that decided it)."""
    if not isinstance(quality, str):
        return "not fitted yet (run 'mapper fit')"
    rejecting = [f for f in flags if effect(f) == REJECTS]
    doubtful = [f for f in flags if effect(f) not in (REJECTS, INFORMS)]
    if quality == "rejected":
        return f"rejected: {', '.join(rejecting) or 'no usable model'} makes the test unusable"
    if quality == "suspect":
        return f"suspect: {', '.join(doubtful or flags)} raised; use with care"
    return "good: no flag against the test" + (" (flags for information only)" if flags else "")


def show_test(session: Session, test_id: int, *, png: Path | None = None) -> list[str]:
    """One test for the terminal: where it came from, the model, parameters with intervals
    and units, every flag explained, the grade and why, and a text plot of data and model.
    With ``png`` the test's chart is also written there."""
    from mapper.app.jobs import _fitted_curve
    from mapper.presentation.textplot import sparkline_rows
    store = session.store
    row = session.test_row(test_id)
    data = session.data(row["campaign"])
    units = data.parameter_units
    window = session.curation.test_windows([test_id]).get(test_id, {})
    fit = store.fit_details_many([test_id]).get(test_id)
    t, u, y = store.samples(test_id)
    flags = list(row.get("flags") or [])
    lines = [f"test {test_id} of campaign '{data.name}'",
             f"  file          {row['file']}",
             f"  window        {window.get('window_index', 0)}: {_number(window.get('window_start'), 's')} "
             f"to {_number(window.get('window_end'), 's')} ({len(t)} samples, period "
             f"{_number(window.get('period'), 's')})",
             f"  level         {_number(row.get('level'), units.get('level', ''))}",
             f"  step          {_number(row.get('input_step'), units.get('input_step', ''))} "
             f"({row.get('direction') or '-'})",
             f"  model         {row.get('model') or '-'}"
             + (f" by {fit['method']}" if fit and fit.get("method") else "")]
    for key, title in (("gain", "gain"), ("time_constant", "time constant"), ("dead_time", "dead time")):
        interval = (row.get(f"{key}_lo"), row.get(f"{key}_hi"))
        lines.append(f"  {title:<13} {_number(row.get(key), units.get(key, ''), interval)}")
    lines.append(f"  fit error     {_number(row.get('nrmse'))} (normalised RMS)")
    lines.append(f"  grade         {grade_reason(row.get('quality'), flags)}")
    if row.get("excluded"):
        lines.append(f"  EXCLUDED      {row.get('exclusion_reason') or ''}")
    if row.get("note"):
        lines.append(f"  note          {row['note']}")
    if flags:
        lines.append("  flags:")
        lines += [f"    - {flag} ({_EFFECT_WORDS.get(effect(flag), 'makes it suspect')}): {flag_text(flag)}"
                  for flag in flags]
    fitted = _fitted_curve(fit, t, u)
    lines += ["", *sparkline_rows(t, y, fitted, u, output_unit=data.units.get("output", ""),
                                  input_unit=data.units.get("input", ""))]
    if png is not None:
        lines.append(write_test_png(row, t, u, y, fitted, fit, png, data.units))
    return lines


def write_test_png(row: dict, t, u, y, fitted, fit, path: Path, units: dict) -> str:
    """Write one test's chart as PNG (the report's chart of that test)."""
    from mapper.presentation.charts import step_test_chart
    from mapper.presentation.report import write_pngs
    path = Path(path)
    if not path.parent.is_dir():
        raise NotFoundError(f"{path}: folder '{path.parent}' does not exist",
                            hint="create the folder first")
    step_time = float(fit["step_time"]) if fit and fit.get("step_time") is not None else None
    chart = step_test_chart(row, t, u, y, fitted, step_time, units=units)
    written = write_pngs([(f".{path.name}.partial", chart)], path.parent)
    os.replace(written[0], path)  # whole or not at all
    return f"chart written to {path}"


def params_json_rows(rows: list[dict], units: dict[str, str]) -> list[dict]:
    """Params rows for JSON, each carrying the ``units`` object."""
    return [dict(row, units=units) for row in rows]


__all__ = ["campaign_rows", "grade_reason", "params_json_rows", "show_test",
           "unit_keys", "unit_title", "user_name", "with_loose_details", "with_unit_names"]
