"""The one move finder and the one noise estimate (mapper.signals), and the column registry."""

from __future__ import annotations

import duckdb
import numpy as np
import pytest

from mapper import columns
from mapper.signals import find_moves, move_threshold, noise_sd, step_time
from mapper.store.database import Store


def test_noise_estimate_recovers_white_noise_sd():
    # Gaussian white noise of sd 0.3: the MAD of first differences scaled by 1.4826/sqrt(2)
    # (Hampel 1974) estimates it; a step in the middle does not inflate it
    rng = np.random.default_rng(5)
    x = rng.normal(0, 0.3, 20000) + np.where(np.arange(20000) > 10000, 50.0, 0.0)
    assert noise_sd(x) == pytest.approx(0.3, rel=0.05)
    assert noise_sd(np.repeat([1.0, 2.0], 50)) == 0.0  # a held set-point has no noise


def test_staircase_with_short_treads_is_never_merged():
    u = np.repeat([0.0, 2.0, 4.0, 6.0, 3.0], [40, 6, 6, 40, 40])  # two treads of 6 samples
    moves = find_moves(u)
    assert [m.direction for m in moves] == ["up", "up", "up", "down"]
    assert [round(m.step, 9) for m in moves] == [2.0, 2.0, 2.0, -3.0]
    assert [m.start for m in moves] == [39, 45, 51, 91]
    assert not any(m.blip for m in moves)


def test_actuator_ramp_is_one_move():
    u = np.concatenate([np.zeros(50), np.linspace(0, 10, 12)[1:], np.full(50, 10.0)])
    moves = find_moves(u)
    assert len(moves) == 1
    assert moves[0].step == pytest.approx(10.0)
    assert (moves[0].start, moves[0].end) == (49, 60)


def test_blip_is_one_flagged_event():
    u = np.zeros(200)
    u[80:83] = 5.0  # out and back within three samples
    u[150:] = -4.0  # then a real move down
    moves = find_moves(u)
    assert len(moves) == 2
    assert moves[0].blip and moves[0].direction == "up" and moves[0].step == pytest.approx(5.0)
    assert not moves[1].blip and moves[1].step == pytest.approx(-4.0)
    single = np.zeros(100)
    single[40] = 3.0  # one sample out
    assert [m.blip for m in find_moves(single)] == [True]


def test_noisy_flat_input_makes_no_move_and_noisy_steps_are_found():
    rng = np.random.default_rng(1)
    flat = 40 + rng.normal(0, 0.05, 3000)
    assert find_moves(flat) == []
    assert move_threshold(flat) == pytest.approx(8 * 0.05, rel=0.15)
    stepped = flat + np.repeat([0.0, 3.0, 1.0, 4.0, 2.0, 5.0], 500)
    moves = find_moves(stepped)
    assert [m.direction for m in moves] == ["up", "down", "up", "down", "up"]
    assert [m.start for m in moves] == pytest.approx([499, 999, 1499, 1999, 2499], abs=1)


def test_step_time_marks_half_the_largest_move():
    t = np.arange(0.0, 100.0, 0.5)
    u = np.where(t >= 30.0, 8.0, 2.0)
    assert step_time(t, u) == pytest.approx(30.0, abs=0.5)
    assert step_time(t, np.full_like(t, 4.0)) is None


# -- the column registry -----------------------------------------------------------------
# the public view's columns, as fixed by the product brief (design.md, "Store")
DESIGN_VIEW = ("test_id, campaign, file, level, direction, input_step, model, gain, gain_lo, gain_hi, "
               "time_constant, time_constant_lo, time_constant_hi, dead_time, dead_time_lo, "
               "dead_time_hi, nrmse, quality, flags").split(", ")


def test_view_and_fit_table_come_from_the_registry(tmp_path):
    assert list(columns.TEST_PARAMS_NAMES) == DESIGN_VIEW
    with Store(tmp_path / "s.duckdb") as store:
        view = [d[0] for d in store.connection.execute("SELECT * FROM test_params LIMIT 0").description]
        fits = [r[0] for r in store.connection.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_name = 'fits'").fetchall()]
    assert view == DESIGN_VIEW
    assert set(columns.FIT_VALUE_NAMES) | set(columns.FIT_LIST_NAMES) <= set(fits)


def test_store_made_before_a_registry_addition_gains_the_column(tmp_path, monkeypatch):
    path = tmp_path / "old.duckdb"
    Store(path).close()
    with duckdb.connect(str(path)) as con:  # a store from a version without `y_after`
        con.execute("ALTER TABLE fits DROP COLUMN y_after")
    with Store(path) as store:
        names = {r[0] for r in store.connection.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_name = 'fits'").fetchall()}
        store.save_fits([{"test_id": 1, "model": "fopdt", "gain": 2.0, "y_after": 3.5}])
        row = store.connection.execute("SELECT gain, y_after FROM fits").fetchone()
    assert "y_after" in names
    assert row == (2.0, 3.5)
