"""The one registry of column names: fit values and the public view ``test_params``.

Every list of fit columns is generated from here: the store's ``fits`` table and its
insert, the ``test_params`` view (see ``docs/store.md``), and the fit record's row
conversion. Adding a fit value means adding one :class:`Column` below; the store adds the
column to existing files when it opens them for writing.

This module holds names, kinds and meanings only; the SQL built from them lives in
:mod:`mapper.store.database`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

__all__ = [
    "Column",
    "ColumnKind",
    "FIT_VALUE_COLUMNS",
    "FIT_VALUE_NAMES",
    "FIT_LIST_COLUMNS",
    "FIT_LIST_NAMES",
    "TEST_PARAMS_COLUMNS",
    "TEST_PARAMS_NAMES",
    "column",
]

ColumnKind = Literal["number", "integer", "text", "text_list"]


@dataclass(frozen=True)
class Column:
    """One named column: its kind and what it holds (units in the meaning).

    Attributes
    ----------
    name : str
        Column name, spelled out (``time_constant``, not ``tau``).
    kind : {"number", "integer", "text", "text_list"}
        Stored as DOUBLE, INTEGER, VARCHAR or VARCHAR[]; a number that is not finite is
        stored as null.
    meaning : str
        One line for the documentation and for readers of the code.
    """

    name: str
    kind: ColumnKind
    meaning: str


def _interval(name: str, unit: str) -> tuple[Column, Column, Column]:
    return (Column(name, "number", f"{name.replace('_', ' ')} ({unit})"),
            Column(f"{name}_lo", "number", f"lower end of its 95 % interval ({unit})"),
            Column(f"{name}_hi", "number", f"upper end of its 95 % interval ({unit})"))


# Values of one fit, one column each in the store's ``fits`` table (beside ``test_id``,
# the lists below, the settings JSON and the tool version).
FIT_VALUE_COLUMNS: tuple[Column, ...] = (
    Column("method", "text", "estimator that produced the result"),
    Column("model", "text", "'fopdt', 'integrating' or 'none'"),
    *_interval("gain", "output units per input unit; per second for 'integrating'"),
    *_interval("time_constant", "s"),
    *_interval("dead_time", "s"),
    Column("nrmse", "number", "root-mean-square residual over the output's change"),
    Column("quality", "text", "'good', 'suspect' or 'rejected'"),
    Column("input_step", "number", "size of the input move the fit used (input units)"),
    Column("step_time", "number", "time of that move (s from the window start)"),
    Column("y_before", "number", "output before the move (output units)"),
    Column("y_after", "number", "settled output after the move (output units)"),
    Column("offset", "number", "model output before the move (output units)"),
    Column("input_before", "number", "input held before the move (input units)"),
    Column("start_state", "number", "free response still decaying at the window's first sample "
                                    "(output units); null when the plant was taken at rest"),
    Column("residual_sd", "number", "standard deviation of the residuals (output units)"),
    Column("autocorrelation", "number", "lag-one autocorrelation of the residuals"),
    Column("model_evidence", "text", "which evidence decided between the model forms"),
)
FIT_VALUE_NAMES: tuple[str, ...] = tuple(c.name for c in FIT_VALUE_COLUMNS)

FIT_LIST_COLUMNS: tuple[Column, ...] = (
    Column("flags", "text_list", "reasons behind the quality, snake_case"),
    Column("notes", "text_list", "one sentence per flag, and method notes"),
)
FIT_LIST_NAMES: tuple[str, ...] = tuple(c.name for c in FIT_LIST_COLUMNS)

# The public view, one row per test (an outside contract: extend, never rename or reorder).
TEST_PARAMS_COLUMNS: tuple[Column, ...] = (
    Column("test_id", "integer", "test id"),
    Column("campaign", "text", "campaign name"),
    Column("file", "text", "data file as named in the campaign file"),
    Column("level", "number", "operating level (output units): given, else mean of settled "
                              "output before and after the move"),
    Column("direction", "text", "'up' or 'down' (sign of the input move)"),
    Column("input_step", "number", "size of the input move"),
    Column("model", "text", "'fopdt' or 'integrating' (null until fitted)"),
    *_interval("gain", "output units per input unit; per second for 'integrating'"),
    *_interval("time_constant", "s"),
    *_interval("dead_time", "s"),
    Column("nrmse", "number", "root-mean-square residual over the output's change"),
    Column("quality", "text", "'good', 'suspect' or 'rejected' (null until fitted)"),
    Column("flags", "text_list", "reasons, from import and fit"),
)
TEST_PARAMS_NAMES: tuple[str, ...] = tuple(c.name for c in TEST_PARAMS_COLUMNS)

_BY_NAME = {c.name: c for c in (*FIT_VALUE_COLUMNS, *FIT_LIST_COLUMNS, *TEST_PARAMS_COLUMNS)}


def column(name: str) -> Column:
    """The registered column called ``name`` (KeyError if there is none)."""
    return _BY_NAME[name]
