"""Cutting a long log into tests: uniform grids, one window per input move, typed windows.

A data recorder or historian export may hold many steps, irregular samples and gaps. This
module puts samples on a uniform grid and cuts them into one :class:`WindowCut` per input
move (moves found by :func:`mapper.signals.find_moves`, never merged); with the file's
identity added they become :class:`TestWindow` records, the rows the store keeps.

Where a window starts and ends, and what it keeps of the earlier record, is documented in
``docs/campaign-file.md`` ("What a long log becomes").
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from mapper.constants import MIN_FILE_SAMPLES, SHORT_PLATEAU_SAMPLES
from mapper.errors import DataError
from mapper.signals import Move, find_moves, median, noise_sd


@dataclass(frozen=True)
class Signals:
    """Time (s from the first sample), input and output of one file, checked."""

    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    start_time: str | None = None
    time_zone: str | None = None
    flags: tuple[str, ...] = ()
    dropped_rows: int = 0  # rows with unreadable cells dropped at import (on request)


@dataclass(frozen=True)
class WindowCut:
    """One test window cut from a file's signals on their uniform grid.

    Attributes
    ----------
    t : ndarray
        Seconds from the window's first sample.
    u, y : ndarray
        Input and output.
    period : float
        Grid period (s).
    window_start, window_end : float
        First and last sample of the window, in seconds from the file's first sample.
    input_step : float
        Signed size of the window's own input move (for a blip, its height).
    direction : str
        ``"up"`` or ``"down"``.
    level_estimate : float
        Mean of the output before the move and at the window's end.
    move_start_index : int or None
        Index in the window of the first sample off the old input level: where the
        window's own move starts. None for an explicit window from the campaign file.
    move_start_time : float or None
        The same instant in seconds from the window start.
    flags : tuple of str
        Import flags (registered in :mod:`mapper.identification.flags`).
    """

    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    period: float
    window_start: float
    window_end: float
    input_step: float
    direction: str
    level_estimate: float
    move_start_index: int | None = None
    move_start_time: float | None = None
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class TestWindow:
    """One test ready to store: a :class:`WindowCut` with the identity of its file.

    ``to_row()`` is the one conversion to the store's ``tests`` row; the samples go in
    as ``t``, ``u`` and ``y``.
    """

    __test__ = False  # not a pytest test class

    file: str
    source_path: Path
    source_hash: str
    window_index: int
    window_start: float
    window_end: float
    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    period: float
    input_step: float
    direction: str
    level_estimate: float
    move_start_index: int | None = None
    move_start_time: float | None = None
    level_given: float | None = None
    note: str = ""
    start_time: str | None = None
    time_zone: str | None = None
    flags: tuple[str, ...] = ()

    @classmethod
    def from_cut(cls, cut: WindowCut, *, file: str, source_path: Path, source_hash: str,
                 window_index: int, level_given: float | None = None, note: str = "",
                 start_time: str | None = None, time_zone: str | None = None,
                 flags: tuple[str, ...] = ()) -> TestWindow:
        """The cut with its file's identity; ``flags`` are added after the cut's own."""
        return cls(
            file=file, source_path=source_path, source_hash=source_hash, window_index=window_index,
            window_start=cut.window_start, window_end=cut.window_end, t=cut.t, u=cut.u, y=cut.y,
            period=cut.period, input_step=cut.input_step, direction=cut.direction,
            level_estimate=cut.level_estimate, move_start_index=cut.move_start_index,
            move_start_time=cut.move_start_time, level_given=level_given, note=note,
            start_time=start_time, time_zone=time_zone, flags=tuple(cut.flags) + tuple(flags))

    def to_row(self) -> dict:
        """The ``tests`` row of this window (without ``test_id`` and ``campaign_id``)."""
        return {
            "file": self.file, "source_path": str(self.source_path), "source_hash": self.source_hash,
            "window_index": self.window_index, "window_start": self.window_start,
            "window_end": self.window_end, "start_time": self.start_time, "time_zone": self.time_zone,
            "period": self.period, "n_samples": len(self.t), "level_given": self.level_given,
            "level_estimate": self.level_estimate, "direction": self.direction,
            "input_step": self.input_step, "note": self.note, "import_flags": list(self.flags),
            "move_start_index": self.move_start_index, "move_start_time": self.move_start_time,
        }


def uniform_grid(t: np.ndarray, u: np.ndarray, y: np.ndarray, period: float | None = None):
    """Put irregular samples on a uniform grid.

    The input is held between its recorded changes (a logged set-point or valve demand
    stays until the next record); the output is interpolated linearly. Gaps much longer
    than the grid (more than five periods) are flagged as compression.

    Returns
    -------
    t, u, y, period, flags
    """
    steps = np.diff(t)
    typical = float(median(steps))
    period = float(period) if period else typical
    flags: list[str] = []
    regular = np.allclose(steps, period, rtol=0.01, atol=0)
    if regular:
        return t, u, y, period, flags
    grid = np.arange(0.0, t[-1] + 0.5 * period, period)
    grid = grid[grid <= t[-1] + 1e-9 * period]
    held = np.searchsorted(t, grid, side="right") - 1
    u_grid = u[np.clip(held, 0, len(u) - 1)]
    y_grid = np.interp(grid, t, y)
    flags.append("resampled_to_uniform_grid")
    if (steps > 5 * period).any():
        flags.append("compressed_gaps")
    return grid, u_grid, y_grid, period, flags


def _settled_at_end(y: np.ndarray) -> bool:
    """Whether the output has stopped moving by the end of ``y`` (from a move to the next).

    The output over the last third, smoothed, must stay within four noise standard
    deviations plus 5 % of its excursion over the whole stretch (common practice: a
    first-order response moves that little in its last third only after about three
    time constants). A range, not a slope, so that a turn between two responses in
    opposite directions is not taken for a settled output.
    """
    tail = y[int(len(y) * 2 / 3):]
    if len(tail) < 4:
        return False
    width = max(1, len(tail) // 8)
    smooth = np.convolve(tail, np.ones(width) / width, mode="valid")
    return float(np.ptp(smooth)) <= 4 * noise_sd(y) + 0.05 * float(np.ptp(y))


def _move_flags(moves: Sequence[Move], i: int, y: np.ndarray, hi: int) -> list[str]:
    """Import flags of the window of move ``i`` (its own move to the window end ``hi``)."""
    move = moves[i]
    flags = ["input_blip"] if move.blip else []
    held_before = move.start - (moves[i - 1].end if i else 0)
    held_after = (moves[i + 1].start if i + 1 < len(moves) else len(y)) - move.end
    if min(held_before, held_after) < SHORT_PLATEAU_SAMPLES:
        flags.append("short_plateau")
    if i + 1 < len(moves) and not _settled_at_end(y[move.start:hi]):
        flags.append("next_move_before_settled")
    return flags


def split_signals(signals: Signals, *, windows: Sequence[tuple[float, float]] = (),
                  seconds_per_unit: float = 1.0, period: float | None = None) -> list[WindowCut]:
    """Cut a file's signals into test windows, one per input move, never merged.

    Parameters
    ----------
    signals : Signals
        The checked signals of one file.
    windows : sequence of (start, end), optional
        Explicit windows in the file's time unit, counted from its first sample; they
        override the automatic cut.
    seconds_per_unit : float, default 1.0
        Seconds per unit of the file's time.
    period : float, optional
        Grid period (s) for irregular samples; default their median spacing.

    Returns
    -------
    list of WindowCut
        In time order.

    Raises
    ------
    DataError
        The input holds no move, or an explicit window holds fewer than
        :data:`~mapper.constants.MIN_FILE_SAMPLES` samples.

    Notes
    -----
    Window *i* covers the stretch from the end of move *i-1* to the start of move *i+1*
    (the file's start and end for the first and last moves). Its samples begin halfway
    through the stretch held before its move (at least ``MIN_FILE_SAMPLES // 2`` samples
    of it, when there are that many), so a fit that takes the plant at rest sees the
    settled part; everything earlier in the file stays retrievable from the store
    (:meth:`mapper.store.database.Store.preceding_record`), and ``move_start_index``
    says where the window's own move starts. A short hold before or
    after a move is flagged ``short_plateau``; a move and its return within a few samples
    is one window flagged ``input_blip``; a next move before the output settled is
    flagged ``next_move_before_settled``. Rules of thumb ("common practice").
    """
    t, u, y, grid_period, grid_flags = uniform_grid(signals.t, signals.u, signals.y, period)
    file_flags = tuple(signals.flags) + tuple(grid_flags)
    if windows:
        cuts = []
        for start, end in windows:
            lo = int(np.searchsorted(t, start * seconds_per_unit, side="left"))
            hi = int(np.searchsorted(t, end * seconds_per_unit, side="right"))
            if hi - lo < MIN_FILE_SAMPLES:
                where = t[lo] if lo < len(t) else t[-1]
                raise DataError(f"the window ({start:g}, {end:g}) holds only {hi - lo} samples "
                                f"(from {where:g} s)", hint=f"give windows of at least {MIN_FILE_SAMPLES} samples")
            wu = u[lo:hi]
            edge = max(3, (hi - lo) // 10)
            step = float(median(wu[-edge:]) - median(wu[:edge]))
            if step == 0:
                step = float(wu[np.argmax(np.abs(wu - wu[0]))] - wu[0])
            cuts.append(_cut(t, u, y, lo, hi, grid_period, step, None, file_flags + ("explicit_window",)))
        return cuts
    moves = find_moves(u)
    if not moves:
        raise DataError("the input holds no move larger than its noise",
                        hint="check the input column; a step test needs a clear input step")
    cuts = []
    for i, move in enumerate(moves):
        held = move.start - moves[i - 1].end if i else move.start
        # the window keeps the later half of the stretch held before its move (at least
        # MIN_FILE_SAMPLES // 2 samples of it); the earlier record stays in the store
        lo = move.start - max(held // 2, min(MIN_FILE_SAMPLES // 2, held)) if i else 0
        hi = moves[i + 1].start + 1 if i + 1 < len(moves) else len(t)
        flags = tuple(_move_flags(moves, i, y, hi))
        cuts.append(_cut(t, u, y, lo, hi, grid_period, move.step, move.start + 1 - lo, file_flags + flags))
    return cuts


def _cut(t, u, y, lo: int, hi: int, period: float, step: float, move_index: int | None,
         flags: tuple[str, ...]) -> WindowCut:
    wt, wy = t[lo:hi], y[lo:hi]
    if move_index is not None:
        before = wy[max(move_index - 5, 0):max(move_index, 1)]
        tail = wy[max(move_index + 1, len(wy) - max(3, len(wy) // 10)):]
    else:
        edge = max(3, len(wy) // 10)
        before, tail = wy[:edge], wy[-edge:]
    if tail.size == 0:
        tail = wy[-1:]
    return WindowCut(
        t=wt - wt[0], u=u[lo:hi], y=wy, period=period, window_start=float(wt[0]),
        window_end=float(wt[-1]), input_step=float(step), direction="up" if step > 0 else "down",
        level_estimate=float((median(before) + median(tail)) / 2),
        move_start_index=move_index,
        move_start_time=None if move_index is None else float(wt[min(move_index, len(wt) - 1)] - wt[0]),
        flags=flags)
