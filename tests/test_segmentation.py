"""Segmentation of long plant logs: every input move its own test, never merged (issue 13 item 1).

Plants are simulated with scipy.integrate.solve_ivp (the reference integrator named in the
design brief), driven by move sequences where each move comes 0.5-1.5 time constants after
the last (common practice in the field: engineers step again once most of a response is
visible), up and down, some moves as actuator ramps, with measurement noise, and sampled as a
historian stores by exception: a row only when a value moved past a deadband, or on a
heartbeat of minutes on flat stretches.

- a linear FOPDT, dy/dt = (K u(t - theta) - y) / tau;
- a heater whose losses grow with temperature (nonlinear),
  C dT/dt = P u(t - theta) / 100 - H0 (1 + a (T - Ta)) (T - Ta);
- a gravity-drained tank, A dh/dt = q(t - theta) - c sqrt(h) (nonlinear); linearised
  (textbook, e.g. Seborg et al.; from memory) tau = 2 A sqrt(h) / c, about 400 s here.

The truth for every move is the schedule the simulation was driven with.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp

from conftest import run_mapper
from mapper.errors import DataError
from mapper.store.database import Store
from mapper.store.segment import Signals, split_signals

FINE = 1.0  # s, the simulation's sample grid


@dataclass(frozen=True)
class Plant:
    name: str
    time_constant: float  # s, about (for the move spacing)
    dead_time: float  # s
    rhs: object  # (y, u) -> dy/dt
    start: float  # output at rest at the first input
    first_input: float
    noise: float  # output noise sd


def _fopdt(y, u):
    return (2.0 * u - y) / 600.0


def _heater(y, u):
    ambient, losses = 20.0, 0.05 * (1 + 0.01 * (y - 20.0))
    return (0.08 * u - losses * (y - ambient)) / 50.0


def _tank(y, u):
    return (u / 50.0 - 0.5 * np.sqrt(max(y, 1e-9))) / 50.0


PLANTS = {
    "fopdt": Plant("fopdt", 600.0, 60.0, _fopdt, 100.0, 50.0, 0.05),
    "heater": Plant("heater", 500.0, 40.0, _heater, 0.0, 50.0, 0.02),
    "tank": Plant("tank", 400.0, 20.0, _tank, 4.0, 50.0, 0.002),
}


def schedule(plant: Plant, moves: int, seed: int, ramps: tuple[int, ...] = ()):
    """Move times, input levels and stroke times: each move 0.5-1.5 tau after the last."""
    rng = np.random.default_rng(seed)
    times, levels, strokes = [], [plant.first_input], []
    now = 1.5 * plant.time_constant
    for i in range(moves):
        times.append(now)
        size = rng.uniform(4.0, 12.0) * rng.choice([-1.0, 1.0])
        if not 25.0 <= levels[-1] + size <= 75.0:
            size = -size
        levels.append(levels[-1] + size)
        strokes.append(8.0 if i in ramps else 0.0)  # an actuator stroking over 8 s
        now += rng.uniform(0.5, 1.5) * plant.time_constant
    return np.array(times), np.array(levels), np.array(strokes), now + plant.time_constant


def input_at(t, times, levels, strokes):
    """The input demand at time t (held between moves, linear during a stroke)."""
    i = int(np.searchsorted(times, t, side="right"))
    if i == 0:
        return levels[0]
    start, stroke = times[i - 1], strokes[i - 1]
    if stroke and t < start + stroke:
        return levels[i - 1] + (levels[i] - levels[i - 1]) * (t - start) / stroke
    return levels[i]


def simulate(plant: Plant, times, levels, strokes, end, seed):
    """Fine samples of input and output; the ODE solved piece by piece between input breaks."""
    grid = np.arange(0.0, end, FINE)
    y0 = plant.start
    if plant.name == "heater":  # at rest: P u / 100 = H(T) (T - Ta)
        y0 = float(np.roots([0.05 * 0.01, 0.05, -0.08 * plant.first_input])[1]) + 20.0
    elif plant.name == "tank":
        y0 = (plant.first_input / 50.0 / 0.5) ** 2
    elif plant.name == "fopdt":
        y0 = 2.0 * plant.first_input
    breaks = sorted({0.0, end, *(times + plant.dead_time), *(times + strokes + plant.dead_time)})
    out = np.empty_like(grid)
    state = [y0]
    for a, b in zip(breaks[:-1], breaks[1:]):
        inside = (grid >= a) & (grid < b)
        sol = solve_ivp(lambda t, y: [plant.rhs(y[0], input_at(t - plant.dead_time, times, levels, strokes))],
                        (a, b), state, t_eval=np.concatenate([grid[inside], [b]]), rtol=1e-9, atol=1e-9)
        out[inside] = sol.y[0][:-1]
        state = [sol.y[0][-1]]
    demand = np.array([input_at(t, times, levels, strokes) for t in grid])
    noisy = out + np.random.default_rng(seed).normal(0, plant.noise, grid.size)
    return grid, demand, noisy, y0


def by_exception(t, u, y, deadband, heartbeat=300.0):
    """Keep a row only when a value moved past its deadband, or after a heartbeat."""
    keep = [0]
    last = (u[0], y[0], t[0])
    for i in range(1, t.size):
        if u[i] != last[0] or abs(y[i] - last[1]) > deadband or t[i] - last[2] >= heartbeat:
            keep.append(i)
            last = (u[i], y[i], t[i])
    keep.append(t.size - 1)
    keep = np.unique(keep)
    return t[keep], u[keep], y[keep]


def log_for(name: str, moves: int = 14, seed: int = 1, ramps=(3, 9)):
    plant = PLANTS[name]
    times, levels, strokes, end = schedule(plant, moves, seed, ramps)
    t, u, y, _ = simulate(plant, times, levels, strokes, end, seed)
    span = float(np.ptp(y))
    st, su, sy = by_exception(t, u, y, deadband=0.002 * span)
    return plant, times, levels, st, su, sy


@pytest.mark.parametrize("name", sorted(PLANTS))
def test_every_move_found_in_order_with_its_direction(name):
    plant, times, levels, t, u, y = log_for(name)
    gaps = np.diff(t)
    assert gaps.max() >= 120 and np.median(gaps) <= 10  # minutes when flat, seconds when moving
    cuts = split_signals(Signals(t=t, u=u, y=y))
    assert len(cuts) == len(times) == 14  # a 14-move log becomes 14 tests
    for cut, when, before, after in zip(cuts, times, levels[:-1], levels[1:]):
        assert cut.direction == ("up" if after > before else "down")
        assert cut.input_step == pytest.approx(after - before, abs=1e-9)  # ramps whole, not in pieces
        # the window's own move starts where it was made (within one grid period)
        assert cut.window_start + cut.move_start_time == pytest.approx(when, abs=cut.period + FINE)
        assert "input_blip" not in cut.flags and "short_plateau" not in cut.flags
    # the moves came 0.5-1.5 tau apart, so (almost) every response was cut short; the flag
    # looks at the output, so a move that cancels the unsettled rest of the one before it
    # (the output then flat at the next move) may pass unflagged
    unsettled = sum("next_move_before_settled" in c.flags for c in cuts[:-1])
    assert unsettled >= len(cuts) - 3
    assert "next_move_before_settled" not in cuts[-1].flags  # no move after the last


def test_measured_noisy_input_gives_the_same_moves():
    plant, times, levels, t, u, y = log_for("fopdt", seed=4)
    noisy = u + np.random.default_rng(9).normal(0, 0.1, u.size)  # a measured valve position
    cuts = split_signals(Signals(t=t, u=noisy, y=y))
    assert [c.direction for c in cuts] == ["up" if b > a else "down" for a, b in zip(levels[:-1], levels[1:])]
    starts = [c.window_start + c.move_start_time for c in cuts]
    assert starts == pytest.approx(list(times), abs=3 * cuts[0].period + FINE)


def test_short_plateau_is_flagged_not_merged_and_blip_is_one_event():
    t = np.arange(0.0, 3000.0, 1.0)
    u = np.full(t.size, 50.0)
    u[600:] = 55.0
    u[608:] = 60.0  # a tread of 8 samples: two moves, the first flagged
    u[1500:1503] = 70.0  # out and back within three samples: one blip
    u[2200:] = 52.0
    response = np.convolve(u - 50.0, np.exp(-np.arange(600) / 120.0) / 120.0)[: t.size]
    y = 20.0 + 0.5 * response + np.random.default_rng(3).normal(0, 0.01, t.size)
    cuts = split_signals(Signals(t=t, u=u, y=y))
    assert [c.direction for c in cuts] == ["up", "up", "up", "down"]
    assert [round(c.input_step, 9) for c in cuts] == [5.0, 5.0, 10.0, -8.0]
    assert "short_plateau" in cuts[0].flags and "short_plateau" in cuts[1].flags
    assert "input_blip" in cuts[2].flags
    assert not {"input_blip", "short_plateau"} & set(cuts[3].flags)
    flags = Counter(f for c in cuts for f in c.flags)
    assert flags["input_blip"] == 1 and flags["short_plateau"] == 2


def test_flat_noisy_input_makes_no_move():
    rng = np.random.default_rng(7)
    t = np.arange(0.0, 2000.0, 1.0)
    with pytest.raises(DataError, match="no move"):
        split_signals(Signals(t=t, u=50 + rng.normal(0, 0.2, t.size), y=20 + rng.normal(0, 0.1, t.size)))


def test_long_log_through_the_command_line_keeps_every_move_and_the_record_before(tmp_path):
    plant, times, levels, t, u, y = log_for("heater", seed=2)
    start = pd.Timestamp("2026-03-04T06:00:00")
    frame = pd.DataFrame({"time": [(start + pd.Timedelta(seconds=float(s))).isoformat() for s in t],
                          "heater_pct": u, "temperature_c": np.round(y, 3)})
    frame.to_csv(tmp_path / "night_log.csv", index=False)
    (tmp_path / "campaign.toml").write_text(
        'name = "heater night"\n[columns]\ntime = "time"\ninput = "heater_pct"\n'
        'output = "temperature_c"\n[[tests]]\nfile = "night_log.csv"\n')
    db = tmp_path / "s.duckdb"
    result = run_mapper("import", tmp_path, db=db)
    assert result.returncode == 0, result.stderr
    assert "night_log.csv: 14 input moves, one test each" in result.stdout
    with Store(db, read_only=True) as store:
        rows = store.connection.execute(
            "SELECT test_id, window_start, move_start_time, direction FROM tests ORDER BY window_index").fetchall()
        first = store.preceding_record(rows[0][0])
        tenth = store.preceding_record(rows[9][0])
        samples = store.samples(rows[9][0])
        inputs = store.fit_inputs([rows[9][0]])[rows[9][0]]
    assert len(rows) == 14
    assert [r[3] for r in rows] == ["up" if b > a else "down" for a, b in zip(levels[:-1], levels[1:])]
    period = float(np.median(np.diff(samples[0])))
    assert [r[1] + r[2] for r in rows] == pytest.approx(list(times), abs=period + FINE)
    assert inputs["move_start_time"] == pytest.approx(rows[9][2])
    assert first[0].size == 0  # nothing before the first window
    # the record before the tenth window reaches back to the file's start, once per sample
    assert tenth[0][0] == pytest.approx(-rows[9][1]) and np.all(np.diff(tenth[0]) > 0)
    assert tenth[0][-1] < 0 and -tenth[0][-1] <= 1.01 * period
    # ...and joins the window: its output continues where the window begins
    assert abs(tenth[2][-1] - samples[2][0]) < 0.5
