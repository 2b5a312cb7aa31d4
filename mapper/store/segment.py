"""Cutting a long log into tests: uniform grids, finding input moves, test windows.

A data recorder or historian export may hold many steps, irregular samples and gaps. This
module puts samples on a uniform grid and cuts them into one window per input move; the
windows become tests in :mod:`mapper.store.ingest`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from mapper.constants import MIN_FILE_SAMPLES
from mapper.errors import DataError
from mapper.signals import find_moves, median, noise_sd


@dataclass(frozen=True)
class Signals:
    """Time (s from the first sample), input and output of one file, checked."""

    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    start_time: str | None = None
    time_zone: str | None = None
    flags: tuple[str, ...] = ()



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


def _settled_at_end(y: np.ndarray, response: float) -> bool:
    tail = y[int(0.75 * len(y)):]
    if len(tail) < 4:
        return False
    x = np.arange(len(tail))
    slope = np.polyfit(x, tail, 1)[0]
    drift = abs(slope) * len(tail)
    return drift <= max(3 * noise_sd(y), 0.05 * abs(response))


def split_signals(signals: Signals, *, windows: Sequence[tuple[float, float]] = (),
                  seconds_per_unit: float = 1.0, period: float | None = None) -> list[dict]:
    """Cut a file's signals into test windows (one per input move).

    Each automatic window runs from the last half of the settled stretch before its move
    to the start of the next move. A move followed by another before the output settled
    still becomes a test, flagged ``next_move_before_settled``. Explicit ``windows``
    (start, end in the file's time unit, counted from its first sample) override the split.
    """
    t, u, y, grid_period, grid_flags = uniform_grid(signals.t, signals.u, signals.y, period)
    pieces: list[tuple[int, int, list[str]]] = []
    if windows:
        for start, end in windows:
            lo = int(np.searchsorted(t, start * seconds_per_unit, side="left"))
            hi = int(np.searchsorted(t, end * seconds_per_unit, side="right"))
            pieces.append((lo, hi, ["explicit_window"]))
    else:
        moves = [(m.start, m.end) for m in find_moves(u)]
        if not moves:
            raise DataError("the input holds no move larger than its noise",
                            hint="check the input column; a step test needs a clear input step")
        plateaus = [moves[i + 1][0] - moves[i][1] for i in range(len(moves) - 1)]
        long_enough = all(p >= max(MIN_FILE_SAMPLES, 0.05 * len(t)) for p in plateaus)
        if len(moves) == 1 or not long_enough:
            flags = ["several_input_moves"] if len(moves) > 1 else []
            pieces.append((0, len(t), flags))
        else:
            for i, (start, _end) in enumerate(moves):
                before = 0 if i == 0 else moves[i - 1][1] + 1
                lo = start - max((start - before) // 2, min(MIN_FILE_SAMPLES // 2, start - before)) if i else 0
                hi = moves[i + 1][0] if i + 1 < len(moves) else len(t)
                flags = []
                response = median(y[max(hi - 5, lo):hi]) - median(y[lo:start + 1])
                if i + 1 < len(moves) and not _settled_at_end(y[lo:hi], response):
                    flags.append("next_move_before_settled")
                pieces.append((lo, hi, flags))
    result = []
    for lo, hi, flags in pieces:
        if hi - lo < MIN_FILE_SAMPLES:
            raise DataError(f"a test window holds only {hi - lo} samples (from {t[lo] if lo < len(t) else t[-1]:g} s)",
                            hint=f"give windows of at least {MIN_FILE_SAMPLES} samples")
        wt, wu, wy = t[lo:hi], u[lo:hi], y[lo:hi]
        edge = max(3, len(wt) // 10)
        step = float(median(wu[-edge:]) - median(wu[:edge]))
        if step == 0:
            step = float(wu[np.argmax(np.abs(wu - wu[0]))] - wu[0])
        result.append(dict(
            t=wt - wt[0], u=wu, y=wy, period=grid_period, window_start=float(wt[0]),
            window_end=float(wt[-1]), input_step=step, direction="up" if step > 0 else "down",
            level_estimate=float((median(wy[:edge]) + median(wy[-edge:])) / 2),
            flags=tuple(signals.flags) + tuple(grid_flags) + tuple(flags)))
    return result
