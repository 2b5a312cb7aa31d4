"""The whole-record fit of one logged file: one model across all its moves beside the local
models, and whether the local models differ (what ``mapper record-fit`` shows).

The store keeps a long log as one test per move; this job puts the file's record back
together from its tests (each sample once, :meth:`~mapper.store.database.Store.preceding_record`)
and hands it to :func:`mapper.identification.record.fit_record`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mapper.app.session import Session
from mapper.errors import NotFoundError
from mapper.identification.record import RecordFit, fit_record
from mapper.store.queries import campaign_files, file_windows

__all__ = ["FileRecord", "record_fit", "record_fit_rows", "record_fit_lines"]


@dataclass(frozen=True)
class FileRecord:
    """One file's whole record and where each of its tests' moves starts."""

    campaign: str
    file: str
    test_ids: tuple[int, ...]
    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    move_starts: tuple[int, ...]


def file_record(session: Session, file: str, campaign: str | None = None) -> FileRecord:
    """The record of ``file`` (its name as imported) in the named (or only) campaign.

    Raises
    ------
    NotFoundError
        No test of that file, or a test without a known move start (an explicit window).
    """
    info = session.campaign_info(campaign)
    rows = file_windows(session.store, info["name"], file)
    if not rows:
        files = campaign_files(session.store, info["name"])
        listed = ", ".join(files[:12]) + (" ..." if len(files) > 12 else "")
        raise NotFoundError(f"campaign '{info['name']}' holds no test from a file named '{file}'",
                            hint=f"files of the campaign: {listed}")
    if any(r[2] is None for r in rows):
        raise NotFoundError(f"'{file}' was cut into explicit windows, so where each move starts is not stored",
                            hint="the whole-record fit needs the automatic cut of a long log")
    last_id, last_start = rows[-1][0], rows[-1][1]
    before_t, before_u, before_y = session.store.preceding_record(last_id)
    t_w, u_w, y_w = session.store.samples(last_id)
    t = np.concatenate([before_t, t_w])
    u = np.concatenate([before_u, u_w])
    y = np.concatenate([before_y, y_w])
    # each move's start in the record's own time (seconds from the last window's start)
    starts = [start + float(move or 0.0) - last_start for _, start, move in rows]
    move_starts = tuple(int(np.searchsorted(t, s - 1e-9)) for s in starts)
    return FileRecord(info["name"], file, tuple(r[0] for r in rows), t, u, y, move_starts)


def record_fit(session: Session, file: str, campaign: str | None = None) -> tuple[FileRecord, RecordFit]:
    """The file's record and its whole-record fit beside the local models."""
    record = file_record(session, file, campaign)
    return record, fit_record(record.t, record.u, record.y, record.move_starts)


def record_fit_rows(record: FileRecord, result: RecordFit) -> dict:
    """Plain data of a whole-record fit (the JSON of ``mapper record-fit``)."""
    local = [
        {"test_id": test_id, "move": i + 1, "input_step": r.input_step, "model": r.model,
         "gain": r.gain, "gain_lo": r.gain_lo, "gain_hi": r.gain_hi,
         "time_constant": r.time_constant, "time_constant_lo": r.time_constant_lo,
         "time_constant_hi": r.time_constant_hi, "dead_time": r.dead_time, "quality": r.quality}
        for i, (test_id, r) in enumerate(zip(record.test_ids, result.local))
    ]
    whole = None
    if result.whole is not None:
        w = result.whole
        whole = {"gain": w.gain, "gain_lo": w.gain_lo, "gain_hi": w.gain_hi,
                 "time_constant": w.time_constant, "time_constant_lo": w.time_constant_lo,
                 "time_constant_hi": w.time_constant_hi, "dead_time": w.dead_time,
                 "residual_sd": w.residual_sd}
    return {"campaign": record.campaign, "file": record.file, "local": local, "whole_record": whole,
            "homogeneity": {"statistic": result.statistic, "degrees_of_freedom": result.degrees_of_freedom,
                            "p_value": result.p_value, "local_models_differ": result.differ}}


def _interval(value, lo, hi) -> str:
    if value is None:
        return "-"
    if lo is None or hi is None:
        return f"{value:.4g}"
    return f"{value:.4g} [{lo:.4g}, {hi:.4g}]"


def record_fit_lines(record: FileRecord, result: RecordFit) -> list[str]:
    """The whole-record fit as lines a person reads."""
    lines = [f"campaign '{record.campaign}', file '{record.file}': {len(result.local)} move(s)",
             "", f"{'move':>4} {'test':>5} {'step':>8}  {'gain [95 %]':30} {'time constant s [95 %]':30} "
             f"{'dead time s':>11}  quality"]
    for i, (test_id, r) in enumerate(zip(record.test_ids, result.local)):
        step = f"{r.input_step:+.4g}" if r.input_step is not None else "-"
        dead = f"{r.dead_time:.4g}" if r.dead_time is not None else "-"
        lines.append(f"{i + 1:>4} {test_id:>5} {step:>8}  {_interval(r.gain, r.gain_lo, r.gain_hi):30} "
                     f"{_interval(r.time_constant, r.time_constant_lo, r.time_constant_hi):30} "
                     f"{dead:>11}  {r.quality}")
    lines.append("")
    if result.whole is None:
        lines.append("one model across the record: not possible (no usable local model)")
    else:
        w = result.whole
        lines.append(f"one model across the record: gain {_interval(w.gain, w.gain_lo, w.gain_hi)}, "
                     f"time constant {_interval(w.time_constant, w.time_constant_lo, w.time_constant_hi)} s, "
                     f"dead time {w.dead_time:.4g} s")
    if result.degrees_of_freedom == 0:
        lines.append("fewer than two usable local models: nothing to compare")
    elif result.differ:
        lines.append(f"the local gains differ beyond their intervals (chi-square {result.statistic:.3g} on "
                     f"{result.degrees_of_freedom} degrees of freedom, p = {result.p_value:.2g}): one linear "
                     "model does not serve these moves; map them against the operating level")
    else:
        lines.append(f"the local gains agree within their intervals (chi-square {result.statistic:.3g} on "
                     f"{result.degrees_of_freedom} degrees of freedom, p = {result.p_value:.2g}): no evidence "
                     "of nonlinearity across these moves")
    return lines
