"""Signal rules shared by every layer: finding input moves and estimating noise.

One home for two rules that several layers need (pure numpy, no I/O):

* :func:`noise_sd`, the one robust noise estimate (median absolute deviation of first
  differences);
* the one move finder: :func:`find_moves` lists every input move of a record (the store
  cuts long logs with it); :func:`find_step` takes those moves and describes the main one
  of a test window with its timing (identification), and :func:`step_time` gives the
  instant a chart marks.

The thresholds are rules of thumb of the trade ("common practice"), named in
:mod:`mapper.constants`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mapper.constants import (
    BLIP_SAMPLES,
    MOVE_FRACTION,
    MOVE_NOISE_SDS,
    MOVE_SPAN_FRACTION,
    RAMP_GAP_SAMPLES,
)

__all__ = ["Move", "StepInfo", "find_moves", "find_step", "median", "noise_sd", "step_time"]


# --- noise ---------------------------------------------------------------------------


def median(x: np.ndarray) -> float:
    """Median by partial sort (np.median's checks cost more than the sort on short data)."""
    k = x.size // 2
    if x.size % 2:
        return float(np.partition(x, k)[k])
    part = np.partition(x, (k - 1, k))
    return 0.5 * float(part[k - 1] + part[k])



def noise_sd(x: np.ndarray) -> float:
    """Robust standard deviation of the sample-to-sample noise of a signal.

    Notes
    -----
    Median absolute deviation of the first differences, scaled by 1.4826 / sqrt(2)
    (Hampel, 1974); steps and slow trends do not inflate it. For strongly
    autocorrelated noise it underestimates the marginal spread, so model residuals
    are preferred when a model is available.
    """
    x = np.asarray(x, dtype=float)
    if x.size < 3:
        return 0.0
    dx = np.diff(x)
    if 2 * np.count_nonzero(dx) < dx.size:  # more than half the steps are exactly zero
        return 0.0
    return 1.4826 * median(np.abs(dx - median(dx))) / np.sqrt(2.0)


# --- the main move of one test window -----------------------------------------------


@dataclass(frozen=True)
class StepInfo:
    """Where and how the input moved in a test.

    Attributes
    ----------
    time : float
        Time (s) at which the main input move started; NaN if none was found.
    size : float
        ``u_after - u_before`` (input units); 0.0 if no move.
    u_before, u_after : float
        Settled input before and after the main move.
    ramp_duration : float
        Duration (s) of the move; 0.0 for a clean step.
    n_moves : int
        Number of distinct input moves of at least 10 % of the main one.
    index : int
        First sample at which the input has left ``u_before`` (``len(u)`` if none).
    effective_time : float
        Centroid in time of the input change: the instant of an ideal step with the
        same first moment, used by the point methods for ramps.
    """

    time: float
    size: float
    u_before: float
    u_after: float
    ramp_duration: float
    n_moves: int
    index: int
    effective_time: float

    @property
    def found(self) -> bool:
        return self.n_moves > 0 and self.size != 0.0


def _no_step(n: int, u: np.ndarray) -> StepInfo:
    level = median(u) if n else float("nan")
    return StepInfo(float("nan"), 0.0, level, level, 0.0, 0, n, float("nan"))


def find_step(t: np.ndarray, u: np.ndarray) -> StepInfo:
    """Find the main input move of a test, its size and the number of moves.

    Parameters
    ----------
    t : ndarray
        Sample times (s), uniform grid.
    u : ndarray
        Input samples.

    Returns
    -------
    StepInfo
        ``n_moves == 0`` and ``size == 0.0`` when the input does not move clearly.

    Notes
    -----
    The moves are those of :func:`find_moves`, the one move rule (the store cuts long
    logs with it too); moves under :data:`~mapper.constants.MOVE_FRACTION` of the biggest
    are not counted. The main move is the first within 90 % of the biggest; its levels
    are the medians of the steady stretches on either side, up to the neighbouring
    moves. Its timing: for a noise-free (set-point) input the exact first changed
    sample and run of changes; for a measured input the 10 % and 90 % crossings (wider
    when the noise is large against the move), so clean steps and short actuator ramps
    are both handled.
    """
    t = np.asarray(t, dtype=float)
    u = np.asarray(u, dtype=float)
    n = u.size
    if n < 6 or not np.all(np.isfinite(u)):
        return _no_step(n, u)
    moves = find_moves(u)
    steps = [m for m in moves if not m.blip]
    if not steps:
        return _no_step(n, u)
    biggest = max(abs(m.after - m.before) for m in steps)
    keep = [m for m in moves if abs(m.step if m.blip else m.after - m.before) >= MOVE_FRACTION * biggest]
    j = next(i for i, m in enumerate(keep) if not m.blip and abs(m.after - m.before) >= 0.9 * biggest)
    main = keep[j]
    dx = np.diff(u)
    scale = max(float(np.max(np.abs(u))), 1e-300)
    if 2 * np.count_nonzero(np.abs(dx) > 1e-9 * scale) < dx.size:
        return _set_point_timing(t, u, dx, main, len(keep))
    # levels from the whole steady stretches on either side of the main move
    lo = keep[j - 1].end + 1 if j > 0 else 0
    hi = keep[j + 1].start + 1 if j + 1 < len(keep) else n
    before = median(u[lo : main.start + 1])
    after = median(u[main.end : hi])
    size = after - before
    sign = np.sign(size)
    sigma = noise_sd(u)
    p_lo = float(np.clip(4.0 * sigma / abs(size), 0.1, 0.4))
    w = int(np.clip(n // 20, 2, 10))
    seg = slice(max(main.start - w + 1, lo), min(main.end + w + 1, hi))
    frac = (u[seg] - before) * sign / abs(size)
    i_lo = seg.start + int(np.argmax(frac >= p_lo))
    i_hi = seg.start + int(np.argmax(frac >= 1.0 - p_lo))
    if i_hi < i_lo:
        i_hi = i_lo
    period = median(np.diff(t))
    duration = (t[i_hi] - t[i_lo]) / (1.0 - 2.0 * p_lo)
    start = t[i_lo] - p_lo * duration
    if i_hi == i_lo:  # a clean step between two samples
        duration, start = 0.0, float(t[i_lo])
    index = int(np.searchsorted(t, start - 1e-9 * period))
    # centroid of the input increments, each applied at its sample instant (ZOH)
    lo_c = max(index - 1, 1)
    hi_c = min(i_hi + 2, n)
    inc = np.diff(u[lo_c - 1 : hi_c])
    tot = float(inc.sum())
    eff = float(np.dot(t[lo_c:hi_c], inc) / tot) if tot * sign > 0.5 * abs(size) else start
    return StepInfo(
        time=float(start),
        size=float(size),
        u_before=before,
        u_after=after,
        ramp_duration=float(max(duration, 0.0)),
        n_moves=len(keep),
        index=index,
        effective_time=eff,
    )


def _set_point_timing(t: np.ndarray, u: np.ndarray, dx: np.ndarray, main: Move, n_moves: int) -> StepInfo:
    """Exact timing of the main move of a noise-free (set-point) input: its run of changes."""
    k_a, k_b = main.start, main.end
    inc = dx[k_a:k_b]
    effective = float(np.dot(t[k_a + 1 : k_b + 1], inc) / inc.sum()) if inc.sum() else float(t[k_a + 1])
    return StepInfo(
        time=float(t[k_a + 1]),
        size=float(u[k_b] - u[k_a]),
        u_before=float(u[k_a]),
        u_after=float(u[k_b]),
        ramp_duration=float(t[k_b] - t[k_a + 1]),
        n_moves=n_moves,
        index=k_a + 1,
        effective_time=effective,
    )


# --- every move of a record -------------------------------------------------------------


@dataclass(frozen=True)
class Move:
    """One input move of a record (a step, a ramp, or a blip).

    Attributes
    ----------
    start : int
        Index of the last sample at the old input level.
    end : int
        Index of the first sample at the new level (for a blip: back at the level).
    before, after : float
        Held input before and after the move.
    step : float
        Signed size of the move, ``after - before``; for a blip, the size of its first
        leg (the pulse height), so that its sign gives the direction.
    blip : bool
        The input went and came back within :data:`~mapper.constants.BLIP_SAMPLES`
        samples: one event, not two moves.
    """

    start: int
    end: int
    before: float
    after: float
    step: float
    blip: bool = False

    @property
    def direction(self) -> str:
        """``"up"`` or ``"down"``: the sign of :attr:`step`."""
        return "up" if self.step > 0 else "down"


def _held_level(u: np.ndarray, index: int, threshold: float) -> float:
    """Median of the few samples from ``index`` that stay within ``threshold`` of it."""
    ahead = u[index: index + 5]
    leaves = np.flatnonzero(np.abs(ahead - ahead[0]) > threshold)
    return median(ahead[: int(leaves[0]) if leaves.size else ahead.size])


def move_threshold(u: np.ndarray) -> float:
    """Smallest change of the held input that counts as a move (input units).

    The larger of :data:`~mapper.constants.MOVE_NOISE_SDS` robust noise standard
    deviations (:func:`noise_sd`) and :data:`~mapper.constants.MOVE_SPAN_FRACTION` of the
    input's range, so noise on a flat input and converter jitter never make a move.
    """
    u = np.asarray(u, dtype=float)
    span = float(np.ptp(u)) if u.size else 0.0
    scale = max(1.0, float(np.max(np.abs(u)))) if u.size else 1.0
    return max(MOVE_NOISE_SDS * noise_sd(u), MOVE_SPAN_FRACTION * span, 1e-12 * scale)


def find_moves(u: np.ndarray) -> list[Move]:
    """Every distinct input move of a record, in time order.

    Parameters
    ----------
    u : ndarray
        Input samples on a uniform grid (a logged set-point or valve demand held between
        records, or a measured, noisy input).

    Returns
    -------
    list of Move
        Empty when the input never changes by more than :func:`move_threshold`.

    Notes
    -----
    The input is followed against the level it last held. A move starts when the input
    leaves that level by more than the threshold and lasts while it keeps travelling the
    same way, so an actuator ramp is one move; ramp pieces in one direction separated by
    at most :data:`~mapper.constants.RAMP_GAP_SAMPLES` samples are joined. Moves are
    never merged otherwise: a staircase with short treads gives one move per tread. A
    move that is reversed within :data:`~mapper.constants.BLIP_SAMPLES` samples (or
    comes straight back) is one event marked ``blip``. Rules of thumb ("common practice").
    """
    u = np.asarray(u, dtype=float)
    n = u.size
    if n < 2 or not np.all(np.isfinite(u)) or np.ptp(u) == 0:
        return []
    threshold = move_threshold(u)
    steps = np.diff(u)
    raw: list[list] = []  # [start, end, before, after, sign]
    reference = _held_level(u, 0, threshold)
    k = 1
    while k < n:
        away = np.flatnonzero(np.abs(u[k:] - reference) > threshold)
        if away.size == 0:
            break
        k += int(away[0])
        start = k - 1
        sign = 1.0 if u[k] > reference else -1.0
        # the move lasts while the input keeps travelling in the same direction
        stopped = np.flatnonzero(sign * steps[k:] <= threshold / 4)
        end = k + int(stopped[0]) if stopped.size else n - 1
        after = _held_level(u, end, threshold)
        if raw and raw[-1][4] == sign and start - raw[-1][1] <= RAMP_GAP_SAMPLES:
            raw[-1][1], raw[-1][3] = end, after  # the next piece of one ramp
        else:
            raw.append([start, end, reference, after, sign])
        reference = after
        k = end + 1
    moves: list[Move] = []
    i = 0
    while i < len(raw):
        start, end, before, after, sign = raw[i]
        peak = float(np.max(sign * (u[start: end + 1] - before))) * sign
        if abs(after - before) <= threshold:  # went and came straight back
            moves.append(Move(start, end, before, after, peak, blip=True))
        elif (i + 1 < len(raw) and raw[i + 1][4] == -sign
              and raw[i + 1][0] - end <= BLIP_SAMPLES):  # reversed within a few samples
            moves.append(Move(start, raw[i + 1][1], before, raw[i + 1][3], after - before, blip=True))
            i += 1
        else:
            moves.append(Move(start, end, before, after, after - before))
        i += 1
    return moves


def step_time(t: np.ndarray, u: np.ndarray) -> float | None:
    """Time at which the input covers half of its largest move (None without a move).

    The instant a chart marks as "the step"; from :func:`find_moves`.
    """
    t = np.asarray(t, dtype=float)
    u = np.asarray(u, dtype=float)
    moves = find_moves(u)
    if not moves:
        return None
    main = max(moves, key=lambda m: abs(m.step))
    segment = u[main.start: main.end + 1] - main.before
    crossed = np.flatnonzero(np.sign(main.step) * segment >= 0.5 * abs(main.step))
    return float(t[main.start + int(crossed[0])]) if crossed.size else float(t[main.end])
