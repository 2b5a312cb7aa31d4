"""Long historian logs: many moves in one file, store-by-exception compression, zoned timestamps.

The plant is a gravity-drained vessel, A dh/dt = q - c sqrt(h), simulated with
scipy.integrate.solve_ivp, with a transport delay on the inflow. Its linearisation
(textbook, e.g. Seborg et al.; from memory) is K = 2 sqrt(h)/c and tau = 2 A sqrt(h)/c;
for a finite step the steady-state gain is exactly the secant (h2 - h1)/(q2 - q1) with
h = (q/c)^2.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp

from conftest import run_mapper
from mapper.errors import DataError
from mapper.store.ingest import read_signals
from mapper.store.segment import Signals, find_moves, split_signals
from mapper.store.database import Store

AREA, OUTLET, DELAY = 1.5, 0.5, 4.0
FLOWS = [1.00, 1.05, 1.10, 1.15, 1.10, 1.05, 1.00, 0.95]  # staircase up, then down
HOLD = 150.0  # s between moves: about 10 time constants
START = pd.Timestamp("2026-05-12T08:00:00+02:00")


def simulate_log(seed: int = 3, dt: float = 0.5):
    """Simulated 'true' samples of inflow and level on a fine grid."""
    times = np.arange(0.0, HOLD * len(FLOWS), dt)
    def inflow(t):
        return FLOWS[min(int(max(t - DELAY, 0.0) // HOLD), len(FLOWS) - 1)]
    def rhs(t, h):
        return [(inflow(t) - OUTLET * np.sqrt(max(h[0], 1e-9))) / AREA]
    h0 = (FLOWS[0] / OUTLET) ** 2
    solution = solve_ivp(rhs, (0, times[-1]), [h0], t_eval=times, max_step=0.25, rtol=1e-8, atol=1e-10)
    level = solution.y[0] + np.random.default_rng(seed).normal(0, 0.002, len(times))
    demand = np.array([FLOWS[min(int(t // HOLD), len(FLOWS) - 1)] for t in times])
    return times, demand, level


def store_by_exception(times, demand, level, deadband=0.004, heartbeat=30.0) -> pd.DataFrame:
    """Rows only where a value moved past its deadband (or a heartbeat), as a historian keeps them."""
    keep = [0]
    last_level, last_demand, last_time = level[0], demand[0], times[0]
    for i in range(1, len(times)):
        if (abs(level[i] - last_level) > deadband or demand[i] != last_demand
                or times[i] - last_time >= heartbeat):
            keep.append(i)
            last_level, last_demand, last_time = level[i], demand[i], times[i]
    keep = np.array(keep)
    stamps = [(START + pd.Timedelta(seconds=float(s))).isoformat() for s in times[keep]]
    return pd.DataFrame({"timestamp": stamps, "inflow_m3s": demand[keep], "level_m": np.round(level[keep], 4)})


@pytest.fixture(scope="module")
def export(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("historian")
    times, demand, level = simulate_log()
    frame = store_by_exception(times, demand, level)
    assert len(frame) < 0.6 * len(times)  # the export really is compressed
    path = folder / "day_log.csv"
    frame.to_csv(path, index=False)
    return path


def test_every_move_found_in_order_with_right_parameters(export):
    signals = read_signals(export, "timestamp", "inflow_m3s", "level_m")
    # time parsing checked against pandas' ISO-8601 parser
    frame = pd.read_csv(export)
    reference = pd.to_datetime(frame["timestamp"], format="ISO8601", utc=True)
    np.testing.assert_allclose(signals.t, (reference - reference.iloc[0]).dt.total_seconds(), atol=1e-6)
    assert signals.time_zone == "+02:00"
    windows = split_signals(signals, period=0.5)
    assert len(windows) == len(FLOWS) - 1
    from mapper.identification.identify import identify
    for i, window in enumerate(windows):
        q1, q2 = FLOWS[i], FLOWS[i + 1]
        h1, h2 = (q1 / OUTLET) ** 2, (q2 / OUTLET) ** 2
        assert window.direction == ("up" if q2 > q1 else "down")
        assert window.input_step == pytest.approx(q2 - q1, abs=1e-9)
        assert window.level_estimate == pytest.approx((h1 + h2) / 2, abs=0.02)
        assert "resampled_to_uniform_grid" in window.flags
        fit = identify(window.t, window.u, window.y)
        secant_gain = (h2 - h1) / (q2 - q1)
        h_mid = ((q1 + q2) / 2 / OUTLET) ** 2
        time_constant = 2 * AREA * np.sqrt(h_mid) / OUTLET
        assert fit.gain == pytest.approx(secant_gain, rel=0.05)
        assert fit.time_constant == pytest.approx(time_constant, rel=0.10)
        assert fit.dead_time == pytest.approx(DELAY, abs=1.5)


def test_flat_noisy_input_invents_no_move():
    rng = np.random.default_rng(11)
    t = np.arange(0.0, 600.0, 1.0)
    u = 40 + rng.normal(0, 0.05, len(t))
    y = 10 + rng.normal(0, 0.05, len(t))
    assert find_moves(u) == []
    with pytest.raises(DataError, match="no move"):
        split_signals(Signals(t=t, u=u, y=y))
    # the same noise around a staircase gives exactly the real moves
    stairs = u + np.repeat([0.0, 5.0, 10.0, 5.0], 150)
    assert len(find_moves(stairs)) == 3


def test_move_before_settled_is_flagged():
    t = np.arange(0.0, 400.0, 1.0)
    u = np.where(t >= 50, 1.0, 0.0) + np.where(t >= 120, 1.0, 0.0)  # second move after 70 s
    y = np.zeros_like(t)
    for start in (50, 120):
        y += np.where(t >= start, 1 - np.exp(-np.clip(t - start, 0, None) / 60.0), 0.0)
    windows = split_signals(Signals(t=t, u=u, y=y + np.random.default_rng(2).normal(0, 1e-3, len(t))))
    assert len(windows) == 2
    assert "next_move_before_settled" in windows[0].flags
    assert "next_move_before_settled" not in windows[1].flags


def test_log_gives_the_same_map_as_separate_files(tmp_path, export):
    """One historian export and the same tests cut into separate files give the same map."""
    log_folder = tmp_path / "log"
    log_folder.mkdir()
    (log_folder / "day_log.csv").write_bytes(export.read_bytes())
    head = ('name = "{name}"\nperiod = 0.5\n[columns]\ntime = "timestamp"\ninput = "inflow_m3s"\n'
            'output = "level_m"\n')
    (log_folder / "campaign.toml").write_text(head.format(name="from the log") + '[[tests]]\nfile = "day_log.csv"\n')
    files_folder = tmp_path / "files"
    files_folder.mkdir()
    frame = pd.read_csv(export)
    seconds = (pd.to_datetime(frame["timestamp"], format="ISO8601", utc=True)
               - pd.to_datetime(frame["timestamp"].iloc[0], utc=True)).dt.total_seconds()
    text = head.format(name="separate files")
    for i in range(len(FLOWS) - 1):
        lo, hi = (i + 0.5) * HOLD, (i + 2) * HOLD
        part = frame[(seconds >= lo) & (seconds < hi)]
        part.to_csv(files_folder / f"move_{i}.csv", index=False)
        text += f'[[tests]]\nfile = "move_{i}.csv"\n'
    (files_folder / "campaign.toml").write_text(text)
    db = tmp_path / "s.duckdb"
    imported = run_mapper("import", log_folder, files_folder, db=db)
    assert imported.returncode == 0, imported.stderr
    assert "day_log.csv: 7 input moves" in imported.stdout
    for name in ("from the log", "separate files"):  # two campaigns: each is named
        assert run_mapper("fit", "--campaign", name, db=db).returncode == 0
    from mapper.analysis.opmap import build_map
    with Store(db, read_only=True) as store:
        maps = {name: build_map(store.params(campaign=name)) for name in ("from the log", "separate files")}
        windows = store.connection.execute(
            "SELECT window_start, window_end FROM tests JOIN campaigns USING (campaign_id) "
            "WHERE name = 'from the log' ORDER BY window_index").fetchall()
    assert len(windows) == 7 and all(b > a for a, b in windows)  # traceable back to the log
    for level in (4.2, 4.6, 5.0):
        a, b = maps["from the log"].at(level), maps["separate files"].at(level)
        assert a["gain"] == pytest.approx(b["gain"], rel=0.03)
        assert a["time_constant"] == pytest.approx(b["time_constant"], rel=0.06)
